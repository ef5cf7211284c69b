//! The status vocabularies: of a cell, of a campaign, and of a lease in a per-lease
//! answer. Each enum is the one place its names are spelled.

use serde::{Deserialize, Serialize};

/// Status of a cell of the bisection tree. Leaves carry volume; `split` marks an
/// internal node (its volume lives in its two halves).
///
/// Two spellings: the API name (serde, `api_name`), used in every answer, report,
/// metric and on the dashboard; and the stored name (`as_str`, `parse`), the text in
/// the `cells.status` and `campaign_counters.status` columns. They differ for one
/// status only: a leaf holding a re-checked counterexample is stored as `unsafe` and
/// shown as `counterexample`. Its volume is that of the whole cell, an upper bound on
/// the unsafe initial states in it and not a measure of them, so it is not called
/// "unsafe" outside. The stored value stays: it sits under a CHECK constraint of the
/// `cells` table that SQLite changes only by copying the whole table, and a migrated
/// file could no longer be opened by the previous server version.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CellStatus {
    /// Waiting in the queue.
    Pending,
    /// Held by a worker under a lease.
    Leased,
    /// Proven: no trajectory from the cell reaches the unsafe set.
    Safe,
    /// A re-checked counterexample starts somewhere in the cell (stored `unsafe`).
    Counterexample,
    /// Inconclusive at the depth or cell limit.
    Unresolved,
    /// Gave up: too many failed attempts or expired leases.
    Failed,
    /// Cut in two; an internal node without volume of its own.
    Split,
}

impl CellStatus {
    /// Every status, in the order the API lists them (dashboard status indices and
    /// the compact rows of `/leaves` use positions in this list): the leaves first,
    /// `split` last.
    pub const ALL: [CellStatus; 7] = [
        CellStatus::Pending,
        CellStatus::Leased,
        CellStatus::Safe,
        CellStatus::Counterexample,
        CellStatus::Unresolved,
        CellStatus::Failed,
        CellStatus::Split,
    ];

    /// The statuses of leaves (those that carry volume), in the same order: all but
    /// the last.
    pub const LEAVES: [CellStatus; 6] = {
        let mut out = [CellStatus::Pending; 6];
        let mut i = 0;
        while i < out.len() {
            out[i] = CellStatus::ALL[i];
            i += 1;
        }
        out
    };

    /// The stored name (SQL text).
    pub fn as_str(self) -> &'static str {
        match self {
            CellStatus::Pending => "pending",
            CellStatus::Leased => "leased",
            CellStatus::Safe => "safe",
            CellStatus::Counterexample => "unsafe",
            CellStatus::Unresolved => "unresolved",
            CellStatus::Failed => "failed",
            CellStatus::Split => "split",
        }
    }

    /// The status of a stored name; `None` for any other text.
    pub fn parse(stored: &str) -> Option<CellStatus> {
        CellStatus::ALL.into_iter().find(|s| s.as_str() == stored)
    }

    /// The name outside the store (as serde spells it).
    pub fn api_name(self) -> &'static str {
        match self {
            CellStatus::Counterexample => "counterexample",
            s => s.as_str(),
        }
    }

    /// The status an API name gives; `None` for any other text, the stored name
    /// `unsafe` included.
    pub fn from_api_name(name: &str) -> Option<CellStatus> {
        CellStatus::ALL.into_iter().find(|s| s.api_name() == name)
    }

    /// Position in [`CellStatus::ALL`].
    pub fn index(self) -> usize {
        CellStatus::ALL.iter().position(|s| *s == self).unwrap_or(0)
    }

    /// A leaf status (counted in volume), as opposed to `split`.
    pub fn is_leaf(self) -> bool {
        self != CellStatus::Split
    }

    /// Still to be decided: `pending` or `leased`. A campaign with no open cell is done.
    pub fn is_open(self) -> bool {
        matches!(self, CellStatus::Pending | CellStatus::Leased)
    }

    /// The API names of all statuses, comma-separated (for error messages).
    pub fn api_names() -> String {
        CellStatus::ALL.map(CellStatus::api_name).join(", ")
    }
}

/// Lifecycle state of a campaign (stored and shown under the same names).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum CampaignState {
    /// Cells are leased out.
    Running,
    /// No new leases; held leases run on.
    Paused,
    /// Stopped for good; outstanding leases were withdrawn.
    Cancelled,
    /// No pending or leased cell is left.
    Done,
}

impl CampaignState {
    pub const ALL: [CampaignState; 4] =
        [CampaignState::Running, CampaignState::Paused, CampaignState::Cancelled, CampaignState::Done];

    pub fn as_str(self) -> &'static str {
        match self {
            CampaignState::Running => "running",
            CampaignState::Paused => "paused",
            CampaignState::Cancelled => "cancelled",
            CampaignState::Done => "done",
        }
    }

    pub fn parse(s: &str) -> Option<CampaignState> {
        CampaignState::ALL.into_iter().find(|c| c.as_str() == s)
    }

    /// Running or paused: results are still taken.
    pub fn is_open(self) -> bool {
        matches!(self, CampaignState::Running | CampaignState::Paused)
    }
}

/// What became of one lease, in the per-lease answers of extend, release and submit
/// (and, for the three ways a lease ends without a result, the stored reason in
/// `ended_leases.reason`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LeaseStatus {
    /// Extend: held, expiry pushed back.
    Extended,
    /// Release: given back; or, later, why it is not held: the worker released it.
    Released,
    /// Submit: the result was recorded.
    Accepted,
    /// Submit: a result for this lease was already recorded (also earlier in the batch).
    Duplicate,
    /// Extend, release: a result for this lease was recorded.
    Completed,
    /// The lease ran out and was swept (its cell may be leased again).
    Expired,
    /// The campaign was cancelled.
    Withdrawn,
    /// No such lease.
    UnknownLease,
    /// Submit: the result was unreadable; nothing recorded, the lease stays valid.
    Invalid,
}

impl LeaseStatus {
    pub const ALL: [LeaseStatus; 9] = [
        LeaseStatus::Extended,
        LeaseStatus::Released,
        LeaseStatus::Accepted,
        LeaseStatus::Duplicate,
        LeaseStatus::Completed,
        LeaseStatus::Expired,
        LeaseStatus::Withdrawn,
        LeaseStatus::UnknownLease,
        LeaseStatus::Invalid,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            LeaseStatus::Extended => "extended",
            LeaseStatus::Released => "released",
            LeaseStatus::Accepted => "accepted",
            LeaseStatus::Duplicate => "duplicate",
            LeaseStatus::Completed => "completed",
            LeaseStatus::Expired => "expired",
            LeaseStatus::Withdrawn => "withdrawn",
            LeaseStatus::UnknownLease => "unknown_lease",
            LeaseStatus::Invalid => "invalid",
        }
    }

    pub fn parse(s: &str) -> Option<LeaseStatus> {
        LeaseStatus::ALL.into_iter().find(|l| l.as_str() == s)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn cell_status_api_names_are_the_serde_names() {
        // The names listed for `GET /api/v1/campaigns/{id}/cells?status=` in server/API.md.
        let listed = ["pending", "leased", "safe", "counterexample", "unresolved", "failed", "split"];
        for (s, name) in CellStatus::ALL.into_iter().zip(listed) {
            assert_eq!(serde_json::to_value(s).unwrap(), json!(name));
            assert_eq!(serde_json::from_value::<CellStatus>(json!(name)).unwrap(), s);
            assert_eq!(s.api_name(), name);
            assert_eq!(CellStatus::from_api_name(name), Some(s));
        }
        assert_eq!(CellStatus::api_names(), listed.join(", "));
    }

    #[test]
    fn stored_and_api_names_correspond_one_to_one() {
        // The stored names allowed by the CHECK constraint in migrations/0001_init.sql.
        let stored = ["pending", "leased", "safe", "unsafe", "unresolved", "failed", "split"];
        for (s, name) in CellStatus::ALL.into_iter().zip(stored) {
            assert_eq!(s.as_str(), name);
            assert_eq!(CellStatus::parse(name), Some(s));
        }
        assert_eq!(CellStatus::Counterexample.as_str(), "unsafe");
        // The stored name is not accepted from outside, nor the API name by the store.
        assert_eq!(CellStatus::from_api_name("unsafe"), None);
        assert!(serde_json::from_value::<CellStatus>(json!("unsafe")).is_err());
        assert_eq!(CellStatus::parse("counterexample"), None);
        assert_eq!(CellStatus::parse("bogus"), None);
        assert_eq!(CellStatus::LEAVES.to_vec(), CellStatus::ALL.into_iter().filter(|s| s.is_leaf()).collect::<Vec<_>>());
        for (i, s) in CellStatus::ALL.into_iter().enumerate() {
            assert_eq!(s.index(), i);
        }
    }

    #[test]
    fn campaign_and_lease_status_names() {
        for s in CampaignState::ALL {
            assert_eq!(serde_json::to_value(s).unwrap(), json!(s.as_str()));
            assert_eq!(CampaignState::parse(s.as_str()), Some(s));
        }
        assert_eq!(CampaignState::ALL.map(CampaignState::as_str), ["running", "paused", "cancelled", "done"]);
        for s in LeaseStatus::ALL {
            assert_eq!(serde_json::to_value(s).unwrap(), json!(s.as_str()));
            assert_eq!(LeaseStatus::parse(s.as_str()), Some(s));
        }
        assert_eq!(serde_json::to_value(LeaseStatus::UnknownLease).unwrap(), json!("unknown_lease"));
    }
}
