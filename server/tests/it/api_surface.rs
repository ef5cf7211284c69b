//! The API surface: the role matrix over every route, the OpenAPI document against
//! the routes served, and bad input answered with 4xx JSON errors.

use crate::common;
use common::*;
use serde_json::{json, Value};
use std::collections::BTreeSet;
use tessera_server::auth::Role;

/// Who may call what, written out from the access rules of the brief (not read from
/// the server's table): viewer reads; submitter reads, uploads and manages
/// campaigns; worker leases, extends, submits and reads specs and models; admin all.
fn expected_roles(method: &str, path: &str) -> Option<&'static [&'static str]> {
    const READ: &[&str] = &["admin", "submitter", "viewer"];
    const READ_WORK: &[&str] = &["admin", "submitter", "viewer", "worker"];
    const SUBMIT: &[&str] = &["admin", "submitter"];
    const WORK: &[&str] = &["admin", "worker"];
    const ADMIN: &[&str] = &["admin"];
    const PUBLIC: &[&str] = &[];
    Some(match (method, path) {
        // /metrics is public so that a Prometheus scraper needs no token.
        ("GET", "/healthz") | ("GET", "/api/v1/openapi.json") | ("GET", "/metrics") => PUBLIC,
        // The dashboard's pages and assets are public; the page asks for a token and
        // every API call it makes is checked like any other.
        ("GET", "/")
        | ("GET", "/dashboard")
        | ("GET", "/dashboard/campaigns/{id}")
        | ("GET", "/dashboard/app.js")
        | ("GET", "/dashboard/style.css") => PUBLIC,
        // Any known token may ask which role it has.
        ("GET", "/api/v1/whoami") => READ_WORK,
        ("POST", "/api/v1/models") => SUBMIT,
        ("GET", "/api/v1/models/{sha256}") => READ_WORK,
        ("GET", "/api/v1/campaigns") => READ,
        ("POST", "/api/v1/campaigns") => SUBMIT,
        ("GET", "/api/v1/campaigns/{id}") => READ,
        ("GET", "/api/v1/campaigns/{id}/spec") => READ_WORK,
        ("POST", "/api/v1/campaigns/{id}/pause")
        | ("POST", "/api/v1/campaigns/{id}/resume")
        | ("POST", "/api/v1/campaigns/{id}/cancel") => SUBMIT,
        ("GET", "/api/v1/campaigns/{id}/coverage")
        | ("GET", "/api/v1/campaigns/{id}/cells")
        | ("GET", "/api/v1/campaigns/{id}/counterexamples")
        | ("GET", "/api/v1/campaigns/{id}/leaves")
        | ("GET", "/api/v1/campaigns/{id}/results")
        | ("GET", "/api/v1/campaigns/{id}/history")
        | ("GET", "/api/v1/campaigns/{id}/changes")
        | ("GET", "/api/v1/campaigns/{id}/report")
        | ("GET", "/api/v1/campaigns/{id}/report.md") => READ,
        ("POST", "/api/v1/leases")
        | ("POST", "/api/v1/leases/extend")
        | ("POST", "/api/v1/leases/release")
        | ("POST", "/api/v1/results") => WORK,
        ("POST", "/api/v1/admin/tokens") | ("GET", "/api/v1/admin/campaigns/{id}/tiling") => ADMIN,
        _ => return None,
    })
}

fn body_for(method: &str, path: &str, spec: &Value) -> Option<Vec<u8>> {
    if method != "POST" {
        return None;
    }
    Some(match path {
        "/api/v1/models" => tessera_server::model_check::testing::tiny_model(1, 2, "matrix"),
        "/api/v1/campaigns" => spec.to_string().into_bytes(),
        "/api/v1/leases" => json!({"max": 1}).to_string().into_bytes(),
        "/api/v1/leases/extend" | "/api/v1/leases/release" => json!({"lease_ids": []}).to_string().into_bytes(),
        "/api/v1/results" => json!({"results": []}).to_string().into_bytes(),
        "/api/v1/admin/tokens" => json!({"role": "viewer"}).to_string().into_bytes(),
        _ => b"{}".to_vec(),
    })
}

#[tokio::test]
async fn every_route_and_role_gives_the_expected_status() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "m").await;
    let spec = spec(&model, 4);
    let id = create_campaign(&ts, &spec, "").await;
    let routes = tessera_server::routes();
    assert!(routes.len() >= 22);
    let mut checked = 0;
    for r in &routes {
        let r = &r.doc;
        let method = r.method.as_str();
        let expected = expected_roles(method, r.path)
            .unwrap_or_else(|| panic!("route {method} {} is missing from the test's matrix", r.path));
        let mut path = r.path.replace("{id}", &id).replace("{sha256}", &model);
        if r.path.ends_with("/changes") {
            // The campaign follows up nothing: compare it with itself.
            path.push_str(&format!("?against={id}"));
        }
        let callers: Vec<(Option<&str>, Option<&str>)> = vec![
            (None, None),
            (Some("tsr_not_a_real_token"), Some("bogus")),
            (Some(ts.token(Role::Admin)), Some("admin")),
            (Some(ts.token(Role::Submitter)), Some("submitter")),
            (Some(ts.token(Role::Worker)), Some("worker")),
            (Some(ts.token(Role::Viewer)), Some("viewer")),
        ];
        for (token, name) in callers {
            let resp = ts.client.req(method, &path, token, body_for(method, r.path, &spec)).await;
            let public = expected.is_empty();
            let allowed = public || name.is_some_and(|n| expected.contains(&n));
            let ctx = format!("{method} {} as {name:?}: {} {}", r.path, resp.status, resp.text());
            if allowed {
                assert!(resp.status < 400, "{ctx}");
            } else if token.is_none() || name == Some("bogus") {
                assert_eq!(resp.status, 401, "{ctx}");
                assert_eq!(resp.json()["error"], "unauthorized", "{ctx}");
                assert_eq!(resp.headers.get("www-authenticate").unwrap(), "Bearer");
            } else {
                assert_eq!(resp.status, 403, "{ctx}");
                assert_eq!(resp.json()["error"], "forbidden", "{ctx}");
            }
            checked += 1;
        }
    }
    assert_eq!(checked, routes.len() * 6);
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn openapi_lists_exactly_the_routes_served() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let r = ts.client.req("GET", "/api/v1/openapi.json", None, None).await;
    assert_eq!(r.status, 200);
    let doc = r.json();
    assert!(doc["openapi"].as_str().unwrap().starts_with("3."));
    assert!(doc["info"]["description"].as_str().unwrap().contains("not a certification"));
    let mut documented = BTreeSet::new();
    for (path, ops) in doc["paths"].as_object().unwrap() {
        for (m, op) in ops.as_object().unwrap() {
            assert!(op["responses"].is_object(), "{m} {path}");
            documented.insert((m.to_uppercase(), path.clone()));
        }
    }
    let served: BTreeSet<(String, String)> =
        tessera_server::routes().iter().map(|r| (r.doc.method.as_str().to_string(), r.doc.path.to_string())).collect();
    assert_eq!(documented, served);
    // Every documented route is really routed: none falls through to the 404 fallback.
    for (m, path) in &documented {
        let concrete = path.replace("{id}", "00000000-0000-4000-8000-000000000000").replace("{sha256}", &"0".repeat(64));
        let resp = ts.client.req(m, &concrete, Some(ts.admin()), Some(b"{}".to_vec())).await;
        let fell_through = resp.status == 404 && resp.json()["detail"].as_str().unwrap_or("").starts_with("no such route");
        assert!(!fell_through, "{m} {path} is documented but not routed");
    }
    // And an undocumented one does fall through, as JSON.
    let resp = ts.client.req("GET", "/api/v1/nothing-here", Some(ts.admin()), None).await;
    assert_eq!(resp.status, 404);
    assert_eq!(resp.json()["error"], "not_found");
    ts.server.stop().await.unwrap();
}

fn assert_json_error(r: &Resp, status: u16, error: &str) -> Value {
    assert_eq!(r.status, status, "{}", r.text());
    assert!(r.content_type.starts_with("application/json"), "{}", r.content_type);
    let v = r.json();
    assert_eq!(v["error"], error, "{v}");
    assert!(v["detail"].as_str().is_some_and(|d| !d.is_empty()), "{v}");
    v
}

#[tokio::test]
async fn bad_input_gets_4xx_json_errors() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "x").await;
    let sub = ts.token(Role::Submitter).to_string();
    let work = ts.token(Role::Worker).to_string();
    let good = spec(&model, 4);

    // Malformed JSON.
    let r = ts.client.post_raw("/api/v1/leases", &work, b"{\"max\": ".to_vec()).await;
    assert_json_error(&r, 400, "malformed_json");
    let r = ts.client.post_raw("/api/v1/campaigns", &sub, b"{not json".to_vec()).await;
    let v = assert_json_error(&r, 422, "invalid_spec");
    assert!(v["errors"].as_array().is_some_and(|e| !e.is_empty()));
    // Unknown and mistyped fields name their path.
    let r = ts.client.post("/api/v1/leases", &work, &json!({"max": 1, "maxx": 2})).await;
    let v = assert_json_error(&r, 422, "invalid_request");
    assert!(v["detail"].as_str().unwrap().contains("maxx"));
    let r = ts.client.post("/api/v1/results", &work, &json!({"results": [{"lease_id": 5, "result": {}}]})).await;
    let v = assert_json_error(&r, 422, "invalid_request");
    assert_eq!(v["field"], "results[0].lease_id");
    let r = ts.client.post("/api/v1/leases", &work, &json!({"max": 0})).await;
    assert_eq!(assert_json_error(&r, 422, "invalid_request")["field"], "max");

    let mut s = good.clone();
    s["controller"]["perod"] = json!(1);
    let r = ts.client.post("/api/v1/campaigns", &sub, &s).await;
    let v = assert_json_error(&r, 422, "invalid_spec");
    assert_eq!(v["field"], "controller.perod");
    // Invalid spec: every problem listed with its path.
    let mut s = good.clone();
    s["dynamics"]["h"] = json!("q - k * h");
    s["envelope"]["h"] = json!([2.0, 1.0]);
    s["refinement"]["max_depth"] = json!(99);
    let r = ts.client.post("/api/v1/campaigns", &sub, &s).await;
    let v = assert_json_error(&r, 422, "invalid_spec");
    let paths: Vec<&str> = v["errors"].as_array().unwrap().iter().map(|e| e["path"].as_str().unwrap()).collect();
    for p in ["dynamics.h", "envelope.h", "refinement.max_depth"] {
        assert!(paths.contains(&p), "{p} missing in {paths:?}");
    }
    // Models: must be uploaded, referred to by hash, and fit the spec.
    let mut s = good.clone();
    s["controller"]["networks"] = json!([format!("sha256:{}", "a".repeat(64))]);
    let r = ts.client.post("/api/v1/campaigns", &sub, &s).await;
    assert_eq!(assert_json_error(&r, 422, "model_not_found")["field"], "controller.networks[0]");
    let mut s = good.clone();
    s["controller"]["networks"] = json!(["tank.onnx"]);
    let r = ts.client.post("/api/v1/campaigns", &sub, &s).await;
    assert_eq!(assert_json_error(&r, 422, "model_ref")["field"], "controller.networks[0]");
    let wide = ts
        .client
        .post_raw("/api/v1/models", &sub, tessera_server::model_check::testing::tiny_model(3, 2, "wide"))
        .await
        .json()["sha256"]
        .as_str()
        .unwrap()
        .to_string();
    let mut s = good.clone();
    s["controller"]["networks"] = json!([format!("sha256:{wide}")]);
    let r = ts.client.post("/api/v1/campaigns", &sub, &s).await;
    let v = assert_json_error(&r, 422, "invalid_spec");
    assert_eq!(v["field"], "controller.networks[0]");
    assert!(v["detail"].as_str().unwrap().contains("3 inputs"));
    // Query parameters.
    let r = ts.client.post("/api/v1/campaigns?initial_depth=99", &sub, &good).await;
    assert_eq!(assert_json_error(&r, 400, "bad_request")["field"], "initial_depth");
    let r = ts.client.post("/api/v1/campaigns?priority=high", &sub, &good).await;
    assert_json_error(&r, 400, "bad_query");
    let id = create_campaign(&ts, &good, "").await;
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?limit=0"), &sub).await;
    assert_eq!(assert_json_error(&r, 400, "bad_request")["field"], "limit");
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=happy"), &sub).await;
    assert_eq!(assert_json_error(&r, 400, "bad_request")["field"], "status");

    // Oversized bodies: 1 MiB for JSON, 16 MiB for models.
    let big = vec![b' '; 1024 * 1024 + 10];
    let r = ts.client.post_raw("/api/v1/campaigns", &sub, big.clone()).await;
    assert_json_error(&r, 413, "body_too_large");
    let r = ts.client.post_raw("/api/v1/results", &work, big).await;
    assert_json_error(&r, 413, "body_too_large");
    let mut huge = tessera_server::model_check::testing::tiny_model(1, 2, "huge");
    huge.resize(16 * 1024 * 1024 + 1, 0);
    let r = ts.client.post_raw("/api/v1/models", &sub, huge).await;
    assert_json_error(&r, 413, "body_too_large");
    // A model just under the JSON limit is fine (the model route has its own limit).
    let mut m = tessera_server::model_check::testing::tiny_model(1, 2, &"p".repeat(2 * 1024 * 1024));
    m.truncate(m.len());
    let r = ts.client.post_raw("/api/v1/models", &sub, m).await;
    assert_eq!(r.status, 201, "{}", r.text());
    // Bad models.
    let r = ts.client.post_raw("/api/v1/models", &sub, vec![]).await;
    assert_json_error(&r, 422, "invalid_model");
    let r = ts.client.post_raw("/api/v1/models", &sub, b"this is not a model".to_vec()).await;
    assert_json_error(&r, 422, "invalid_model");
    // Unknown things.
    let r = ts.client.get("/api/v1/campaigns/123", &sub).await;
    assert_json_error(&r, 404, "not_found");
    let r = ts.client.get("/api/v1/models/xyz", &sub).await;
    assert_eq!(assert_json_error(&r, 400, "bad_request")["field"], "sha256");
    let r = ts.client.get(&format!("/api/v1/models/{}", "0".repeat(64)), &sub).await;
    assert_json_error(&r, 404, "not_found");
    let r = ts.client.req("DELETE", "/api/v1/campaigns", Some(&sub), None).await;
    assert_json_error(&r, 405, "method_not_allowed");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn health_and_tokens() {
    let dir = tempfile::tempdir().unwrap();
    let token_file = dir.path().join("admin.token");
    let mut cfg = config(dir.path());
    cfg.bootstrap_token_file = Some(token_file.clone());
    let ts = start(cfg.clone()).await;
    let r = ts.client.req("GET", "/healthz", None, None).await;
    assert_eq!(r.status, 200);
    assert_eq!(r.json()["status"], "ok");
    let boot = std::fs::read_to_string(&token_file).unwrap().trim().to_string();
    // The bootstrap token is an admin token; admins can mint tokens over the API.
    let r = ts.client.post("/api/v1/admin/tokens", &boot, &json!({"role": "viewer", "label": "ci"})).await;
    assert_eq!(r.status, 201, "{}", r.text());
    let viewer = r.json()["token"].as_str().unwrap().to_string();
    assert_eq!(ts.client.get("/api/v1/campaigns", &viewer).await.status, 200);
    assert_eq!(ts.client.post("/api/v1/leases", &viewer, &json!({"max": 1})).await.status, 403);
    // Only hashes are stored.
    let n: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM tokens WHERE token_hash = ? OR token_hash = ?")
        .bind(&boot)
        .bind(&viewer)
        .fetch_one(&ts.server.state.store.pool)
        .await
        .unwrap();
    assert_eq!(n, 0);
    ts.server.stop().await.unwrap();
    // A restart with the same file keeps the same token.
    let ts = start(cfg).await;
    assert_eq!(ts.client.get("/api/v1/campaigns", &boot).await.status, 200);
    assert_eq!(std::fs::read_to_string(&token_file).unwrap().trim(), boot);
    ts.server.stop().await.unwrap();
}
