//! Access beyond the role × route status matrix (`api_surface.rs`): a refused call
//! changes nothing, tokens are stored only as their SHA-256 (FIPS 180-4), and near
//! misses of a secret — including the stored hash itself, as someone holding a copy
//! of the database would try — are unknown tokens. There are no tenants (API.md):
//! every worker token may read every campaign's spec and models, by design.
//!
//! Hashes are computed here by Python's `hashlib` (a reference outside this project and
//! its `sha2` crate), whose SHA-256 is first checked against the FIPS 180-4 example
//! "abc" (NIST's published example values). The test fails, never skips, without python3.

use crate::common;
use common::*;
use serde_json::json;
use std::io::Write;
use std::process::{Command, Stdio};
use tessera_server::auth::Role;

/// SHA-256 of each input in lowercase hex, by Python's hashlib.
fn python_sha256(inputs: &[&[u8]]) -> Vec<String> {
    // Inputs travel as hex lines, so any bytes are fine.
    let script = "import hashlib, sys\nfor line in sys.stdin:\n    print(hashlib.sha256(bytes.fromhex(line.strip())).hexdigest())\n";
    let mut child = Command::new("python3")
        .args(["-c", script])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("python3 must be installed: it is the reference for SHA-256 here");
    let mut stdin = child.stdin.take().unwrap();
    for i in inputs {
        writeln!(stdin, "{}", hex::encode(i)).unwrap();
    }
    drop(stdin);
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "python3 hashlib failed: {}", String::from_utf8_lossy(&out.stderr));
    let lines: Vec<String> = String::from_utf8(out.stdout).unwrap().lines().map(str::to_string).collect();
    assert_eq!(lines.len(), inputs.len());
    lines
}

#[test]
fn the_reference_sha256_matches_the_published_example() {
    // SHA-256("abc"), the one-block example of FIPS 180-4 in NIST's published example values.
    assert_eq!(python_sha256(&[b"abc"]), ["ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"]);
}

#[tokio::test]
async fn refused_calls_change_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "access").await;
    let spec = spec(&model, 3);
    let (worker, viewer, submitter) = (ts.token(Role::Worker), ts.token(Role::Viewer), ts.token(Role::Submitter));

    // A worker cannot create campaigns, upload models or mint tokens.
    let r = ts.client.post("/api/v1/campaigns", worker, &spec).await;
    assert_eq!(r.status, 403, "{}", r.text());
    let other = tessera_server::model_check::testing::tiny_model(1, 2, "worker-upload");
    let r = ts.client.post_raw("/api/v1/models", worker, other.clone()).await;
    assert_eq!(r.status, 403, "{}", r.text());
    let r = ts.client.post("/api/v1/admin/tokens", worker, &json!({"role": "admin"})).await;
    assert_eq!(r.status, 403, "{}", r.text());
    let campaigns = ts.client.get("/api/v1/campaigns", ts.admin()).await.json();
    assert_eq!(campaigns["campaigns"].as_array().unwrap().len(), 0, "{campaigns}");
    let sha = python_sha256(&[&other]).remove(0);
    assert_eq!(ts.client.get(&format!("/api/v1/models/{sha}"), ts.admin()).await.status, 404);
    let n: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM tokens").fetch_one(&ts.server.state.store.pool).await.unwrap();
    assert_eq!(n, 4, "one token per role, none minted by the worker");

    // A viewer cannot lease, a submitter cannot lease or submit: no cell leaves 'pending'.
    let id = create_campaign(&ts, &spec, "").await;
    for tok in [viewer, submitter] {
        let r = ts.client.post("/api/v1/leases", tok, &json!({"max": 5, "worker": "x"})).await;
        assert_eq!(r.status, 403, "{}", r.text());
    }
    let cov = ts.client.get(&format!("/api/v1/campaigns/{id}/coverage"), viewer).await.json();
    assert_eq!(cov["statuses"]["leased"]["cells"].as_i64().unwrap_or(0), 0, "{cov}");
    let leases = lease(&ts, 1).await;
    let l = leases[0]["lease_id"].as_str().unwrap();
    let body = json!({"worker": "x", "results": [{"lease_id": l, "result": {"verdict": "safe"}}]});
    assert_eq!(ts.client.post("/api/v1/results", submitter, &body).await.status, 403);
    // A worker cannot cancel or pause it either.
    for action in ["cancel", "pause"] {
        let r = ts.client.req("POST", &format!("/api/v1/campaigns/{id}/{action}"), Some(worker), None).await;
        assert_eq!(r.status, 403, "{action}: {}", r.text());
    }
    let cov = ts.client.get(&format!("/api/v1/campaigns/{id}/coverage"), viewer).await.json();
    assert_eq!(cov["results"], 0, "{cov}");
    assert_eq!(cov["state"], "running", "{cov}");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn tokens_are_stored_hashed_and_near_misses_are_unknown() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let pool = &ts.server.state.store.pool;
    let secrets: Vec<&[u8]> = Role::ALL.iter().map(|r| ts.token(*r).as_bytes()).collect();
    let hashes = python_sha256(&secrets);
    for (role, want) in Role::ALL.into_iter().zip(hashes) {
        let secret = ts.token(role);
        // The row holds SHA-256(secret) in hex (FIPS 180-4, computed by hashlib) and
        // never the secret.
        let stored: String = sqlx::query_scalar("SELECT token_hash FROM tokens WHERE role = ?")
            .bind(role.as_str())
            .fetch_one(pool)
            .await
            .unwrap();
        assert_eq!(stored, want, "{role:?}");
        let leaks: i64 = sqlx::query_scalar(
            "SELECT COUNT(*) FROM tokens WHERE instr(id || token_hash || role || label, ?) > 0",
        )
        .bind(&secret[4..])
        .fetch_one(pool)
        .await
        .unwrap();
        assert_eq!(leaks, 0, "the secret of {role:?} appears in the tokens table");
    }
    let admin = ts.admin().to_string();
    assert_eq!(ts.client.get("/api/v1/whoami", &admin).await.status, 200);
    let last = admin.chars().last().unwrap();
    let flipped = format!("{}{}", &admin[..admin.len() - 1], if last == '0' { '1' } else { '0' });
    let near_misses = [
        flipped,
        admin[..admin.len() - 1].to_string(),
        format!("{admin}0"),
        admin.to_uppercase(),
        // The stored hash is not a credential: a copy of the database grants nothing.
        python_sha256(&[admin.as_bytes()]).remove(0),
    ];
    for t in &near_misses {
        let r = ts.client.get("/api/v1/whoami", t).await;
        assert_eq!(r.status, 401, "{t}: {}", r.text());
        assert_eq!(r.json()["error"], "unauthorized");
    }
    ts.server.stop().await.unwrap();
}
