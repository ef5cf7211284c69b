//! Bearer tokens and roles. Only the SHA-256 of a token is stored; the secret is
//! shown once, at creation.

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize, clap::ValueEnum)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    Admin,
    Submitter,
    Worker,
    Viewer,
}

impl Role {
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Admin => "admin",
            Role::Submitter => "submitter",
            Role::Worker => "worker",
            Role::Viewer => "viewer",
        }
    }
    pub fn parse(s: &str) -> Option<Role> {
        match s {
            "admin" => Some(Role::Admin),
            "submitter" => Some(Role::Submitter),
            "worker" => Some(Role::Worker),
            "viewer" => Some(Role::Viewer),
            _ => None,
        }
    }
    pub const ALL: [Role; 4] = [Role::Admin, Role::Submitter, Role::Worker, Role::Viewer];
}

/// Who may call a route.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Access {
    /// No token needed.
    Public,
    /// viewer, submitter, admin.
    Read,
    /// viewer, submitter, worker, admin (specs and models, which workers need).
    ReadOrWork,
    /// submitter, admin.
    Submit,
    /// worker, admin.
    Work,
    /// admin only.
    Admin,
}

impl Access {
    /// Whether `role` may call a route with this access.
    pub fn allows(self, role: Role) -> bool {
        use Role::*;
        match self {
            Access::Public => true,
            Access::Read => matches!(role, Viewer | Submitter | Admin),
            Access::ReadOrWork => true,
            Access::Submit => matches!(role, Submitter | Admin),
            Access::Work => matches!(role, Worker | Admin),
            Access::Admin => role == Admin,
        }
    }
    /// The roles allowed, for documentation.
    pub fn roles(self) -> Vec<&'static str> {
        if self == Access::Public {
            return vec![];
        }
        Role::ALL.iter().filter(|r| self.allows(**r)).map(|r| r.as_str()).collect()
    }
}

/// SHA-256 of a token, lowercase hex.
pub fn hash_token(token: &str) -> String {
    hex::encode(Sha256::digest(token.as_bytes()))
}

/// A fresh random token: `tsr_` and 64 hex digits (244 random bits from two UUID v4s,
/// which come from the operating system's random source).
pub fn new_token() -> String {
    let a = uuid::Uuid::new_v4();
    let b = uuid::Uuid::new_v4();
    format!("tsr_{}{}", a.simple(), b.simple())
}

/// Equality of two byte strings in time that depends only on their lengths.
pub fn constant_time_eq(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    let mut diff = 0u8;
    for (x, y) in a.iter().zip(b) {
        diff |= x ^ y;
    }
    std::hint::black_box(diff) == 0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn access_matrix() {
        assert!(Access::Read.allows(Role::Viewer));
        assert!(!Access::Read.allows(Role::Worker));
        assert!(Access::ReadOrWork.allows(Role::Worker));
        assert!(!Access::Submit.allows(Role::Viewer));
        assert!(!Access::Work.allows(Role::Submitter));
        assert!(Access::Work.allows(Role::Admin));
        assert!(!Access::Admin.allows(Role::Submitter));
    }

    #[test]
    fn tokens_hash_and_compare() {
        let t = new_token();
        assert_eq!(t.len(), 4 + 64);
        assert_ne!(t, new_token());
        // SHA-256("abc"): FIPS 180-4, one-block example of NIST's published example values.
        assert_eq!(hash_token("abc"), "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
        assert!(constant_time_eq(b"abc", b"abc"));
        assert!(!constant_time_eq(b"abc", b"abd"));
        assert!(!constant_time_eq(b"abc", b"ab"));
    }
}
