//! Access beyond the role × route status matrix (`api_surface.rs`): a refused call
//! changes nothing, tokens are stored only as their SHA-256, and near misses of a
//! secret — including the stored hash itself, as someone holding a copy of the
//! database would try — are unknown tokens. There are no tenants (API.md): every
//! worker token may read every campaign's spec and models, by design.

mod common;
use common::*;
use serde_json::json;
use sha2::{Digest, Sha256};
use tessera_server::auth::Role;

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
    let sha = hex::encode(Sha256::digest(&other));
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
    for role in Role::ALL {
        let secret = ts.token(role);
        // The row holds SHA-256(secret) in hex (FIPS 180-4, computed here by the sha2
        // crate, whose "abc" vector the unit tests check) and never the secret.
        let want = hex::encode(Sha256::digest(secret.as_bytes()));
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
        hex::encode(Sha256::digest(admin.as_bytes())),
    ];
    for t in &near_misses {
        let r = ts.client.get("/api/v1/whoami", t).await;
        assert_eq!(r.status, 401, "{t}: {}", r.text());
        assert_eq!(r.json()["error"], "unauthorized");
    }
    ts.server.stop().await.unwrap();
}
