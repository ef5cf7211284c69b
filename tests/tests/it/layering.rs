//! The crates' layering (DEVELOPERS.md, "Architecture map"): which crate may depend on
//! which. Read from each crate's Cargo.toml, so a new dependency that breaks a rule fails
//! here instead of being found in review.

use std::collections::BTreeSet;
use std::path::Path;

/// The names in a manifest's `[dependencies]` table (not dev- or build-dependencies):
/// one `name = …` per line, as every manifest of this workspace writes them.
fn dependencies(krate: &str) -> BTreeSet<String> {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("..").join(krate).join("Cargo.toml");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let mut in_deps = false;
    let mut names = BTreeSet::new();
    for line in text.lines().map(str::trim) {
        if line.starts_with('[') {
            in_deps = line == "[dependencies]";
            continue;
        }
        if in_deps && !line.is_empty() && !line.starts_with('#') {
            let name = line.split(['=', '.', ' ']).next().unwrap().trim();
            names.insert(name.to_string());
        }
    }
    assert!(!names.is_empty(), "{krate}/Cargo.toml: no [dependencies] found");
    names
}

fn forbid(krate: &str, banned: &[&str], why: &str) {
    let deps = dependencies(krate);
    let found: Vec<&&str> = banned.iter().filter(|b| deps.contains(**b)).collect();
    assert!(found.is_empty(), "crate {krate} depends on {found:?}: {why}");
}

#[test]
fn the_protocol_is_plain_data() {
    let deps = dependencies("protocol");
    let allowed: BTreeSet<String> = ["serde", "serde_json"].iter().map(|s| s.to_string()).collect();
    assert!(deps.is_subset(&allowed), "tessera-protocol may use serde and serde_json only, has {deps:?}");
}

#[test]
fn the_engine_knows_nothing_of_http_sql_or_async() {
    forbid(
        "engine",
        &["tokio", "axum", "sqlx", "ureq", "hyper", "reqwest", "tessera-server", "tessera-worker", "tessera-cli"],
        "the engine decides one cell; transport, storage and the worker loop live elsewhere",
    );
}

#[test]
fn the_server_does_not_link_the_worker_or_the_cli() {
    forbid("server", &["tessera-worker", "tessera-cli", "ureq"], "the server talks to workers over HTTP only");
}

#[test]
fn the_worker_and_the_cli_do_not_link_the_server() {
    for krate in ["worker", "cli"] {
        forbid(krate, &["tessera-server", "axum", "sqlx"], "clients reach the server over HTTP only");
    }
}
