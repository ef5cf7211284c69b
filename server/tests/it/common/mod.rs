//! Shared helpers of the integration tests: an in-process server on loopback with a
//! SQLite file in a temp dir, a small HTTP client, tokens and a spec.
#![allow(dead_code)]

use http_body_util::{BodyExt, Full};
use hyper::body::Bytes;
use hyper_util::client::legacy::{connect::HttpConnector, Client as HyperClient};
use hyper_util::rt::TokioExecutor;
use serde_json::{json, Value};
use std::collections::HashMap;
use std::path::Path;
use tessera_server::auth::Role;
use tessera_server::{Config, RunningServer};

pub struct Resp {
    pub status: u16,
    pub content_type: String,
    pub headers: hyper::HeaderMap,
    pub body: Vec<u8>,
}

impl Resp {
    pub fn json(&self) -> Value {
        serde_json::from_slice(&self.body)
            .unwrap_or_else(|e| panic!("status {}: body is not JSON ({e}): {}", self.status, String::from_utf8_lossy(&self.body)))
    }
    pub fn text(&self) -> String {
        String::from_utf8_lossy(&self.body).into_owned()
    }
}

#[derive(Clone)]
pub struct Client {
    pub base: String,
    http: HyperClient<HttpConnector, Full<Bytes>>,
}

impl Client {
    pub fn new(base: String) -> Client {
        Client { base, http: HyperClient::builder(TokioExecutor::new()).build_http() }
    }

    pub async fn req(&self, method: &str, path: &str, token: Option<&str>, body: Option<Vec<u8>>) -> Resp {
        let mut b = hyper::Request::builder().method(method).uri(format!("{}{}", self.base, path));
        if let Some(t) = token {
            b = b.header("authorization", format!("Bearer {t}"));
        }
        if body.is_some() {
            b = b.header("content-type", "application/json");
        }
        let req = b.body(Full::new(Bytes::from(body.unwrap_or_default()))).expect("request");
        let resp = self.http.request(req).await.expect("HTTP request");
        let status = resp.status().as_u16();
        let headers = resp.headers().clone();
        let content_type =
            headers.get("content-type").and_then(|v| v.to_str().ok()).unwrap_or("").to_string();
        let body = resp.into_body().collect().await.expect("body").to_bytes().to_vec();
        Resp { status, content_type, headers, body }
    }
    pub async fn get(&self, path: &str, token: &str) -> Resp {
        self.req("GET", path, Some(token), None).await
    }
    pub async fn post(&self, path: &str, token: &str, body: &Value) -> Resp {
        self.req("POST", path, Some(token), Some(body.to_string().into_bytes())).await
    }
    pub async fn post_raw(&self, path: &str, token: &str, body: Vec<u8>) -> Resp {
        self.req("POST", path, Some(token), Some(body)).await
    }
}

/// A running server with one token per role.
pub struct TestServer {
    pub server: RunningServer,
    pub client: Client,
    pub tokens: HashMap<Role, String>,
}

impl TestServer {
    pub fn token(&self, r: Role) -> &str {
        &self.tokens[&r]
    }
    pub fn admin(&self) -> &str {
        self.token(Role::Admin)
    }
}

pub fn config(dir: &Path) -> Config {
    Config::for_tests(dir.join("tessera.sqlite"))
}

/// Start a server with `config`; tokens are created (or re-created after a restart).
pub async fn start(config: Config) -> TestServer {
    let server = tessera_server::start(config).await.expect("server starts");
    let mut tokens = HashMap::new();
    for r in Role::ALL {
        tokens.insert(r, server.state.store.create_token(r, "test").await.expect("token"));
    }
    let client = Client::new(server.url());
    TestServer { server, client, tokens }
}

/// Upload a tiny ONNX model with 1 input and 2 outputs; returns its sha256.
pub async fn upload_model(ts: &TestServer, tag: &str) -> String {
    let m = tessera_server::model_check::testing::tiny_model(1, 2, tag);
    let r = ts.client.post_raw("/api/v1/models", ts.token(Role::Submitter), m).await;
    assert_eq!(r.status, 201, "{}", r.text());
    r.json()["sha256"].as_str().unwrap().to_string()
}

/// The tank spec of the brief, with a second, non-split state `v`, envelope
/// h ∈ [0, 1], v ∈ [-1, 1], and the given depth. Cells with counterexamples stay
/// leaves (`refine_unsafe` false), as the hand-computed trees of the tests assume; the
/// default (cut them down to max depth) has a test of its own in `campaign.rs`.
pub fn spec(model: &str, max_depth: u32) -> Value {
    json!({
        "name": "tank",
        "states": [{"name": "h", "unit": "m"}, {"name": "v", "unit": "m/s"}],
        "inputs": [{"name": "q", "unit": "m/s"}],
        "dynamics": {"h": "q - 0.1 * h", "v": "0"},
        "controller": {
            "period": 0.5,
            "observations": [{"name": "level", "expr": "h"}],
            "networks": [format!("sha256:{model}")],
            "selection": {"mode": "single"},
            "decision": "argmax",
            "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.2}}],
            "initial_command": "off"
        },
        "unsafe": [{"all": ["h >= 2"]}],
        "horizon_periods": 20,
        "envelope": {"h": [0.0, 1.0], "v": [-1.0, 1.0]},
        "refinement": {"max_depth": max_depth, "split": ["h"], "refine_unsafe": false}
    })
}

pub async fn create_campaign(ts: &TestServer, spec: &Value, query: &str) -> String {
    let r = ts.client.post(&format!("/api/v1/campaigns{query}"), ts.token(Role::Submitter), spec).await;
    assert_eq!(r.status, 201, "{}", r.text());
    r.json()["id"].as_str().unwrap().to_string()
}

/// The scripted verdict: safe if h's upper end < 0.5 (said to rest on the exact
/// method's MILP solver, `stats.method = "exact"`, when it is at most 0.25), unsafe if
/// its lower end > 0.9, else inconclusive with hint h.
pub fn scripted(cell: &Value) -> Value {
    let h = &cell["box"]["h"];
    let (lo, hi) = (h[0].as_f64().unwrap(), h[1].as_f64().unwrap());
    if hi <= 0.25 {
        json!({"verdict": "safe", "reason": "scripted", "split_hint": null, "counterexample": null, "stats": {"method": "exact"}})
    } else if hi < 0.5 {
        json!({"verdict": "safe", "reason": "scripted", "split_hint": null, "counterexample": null, "stats": {}})
    } else if lo > 0.9 {
        json!({"verdict": "unsafe", "reason": "scripted", "split_hint": null,
               "counterexample": {"initial_state": {"h": lo, "v": 0.0}, "commands": ["on"]}, "stats": {}})
    } else {
        json!({"verdict": "inconclusive", "reason": "scripted", "split_hint": {"dim": "h", "score": 1.0},
               "counterexample": null, "stats": {}})
    }
}

/// Lease up to `max` cells; returns the lease list.
pub async fn lease(ts: &TestServer, max: u32) -> Vec<Value> {
    let r = ts.client.post("/api/v1/leases", ts.token(Role::Worker), &json!({"max": max, "worker": "test"})).await;
    assert_eq!(r.status, 200, "{}", r.text());
    r.json()["leases"].as_array().unwrap().clone()
}

/// Submit `(lease_id, result)` pairs; returns the per-item answers.
pub async fn submit(ts: &TestServer, items: &[(String, Value)]) -> Vec<Value> {
    submit_raw(ts, items.iter().map(|(l, r)| json!({"lease_id": l, "result": r, "elapsed_ms": 0.5})).collect()).await
}

/// Submit result items as given.
pub async fn submit_raw(ts: &TestServer, results: Vec<Value>) -> Vec<Value> {
    let r = ts
        .client
        .post("/api/v1/results", ts.token(Role::Worker), &json!({"worker": "test", "engine_version": "scripted-1", "results": results}))
        .await;
    assert_eq!(r.status, 200, "{}", r.text());
    r.json()["items"].as_array().unwrap().clone()
}

/// Run the scripted worker for at most `rounds` lease/submit rounds (None: until
/// nothing is left to lease). Returns the number of results accepted.
pub async fn drive(ts: &TestServer, batch: u32, rounds: Option<usize>) -> usize {
    let mut accepted = 0;
    let mut n = 0;
    loop {
        if rounds.is_some_and(|r| n >= r) {
            return accepted;
        }
        n += 1;
        let cells = lease(ts, batch).await;
        if cells.is_empty() {
            return accepted;
        }
        let items: Vec<(String, Value)> =
            cells.iter().map(|c| (c["lease_id"].as_str().unwrap().to_string(), scripted(c))).collect();
        for a in submit(ts, &items).await {
            assert_eq!(a["status"], "accepted", "{a}");
            accepted += 1;
        }
    }
}

pub async fn coverage(ts: &TestServer, id: &str) -> Value {
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/coverage"), ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 200, "{}", r.text());
    r.json()
}

pub async fn tiling(ts: &TestServer, id: &str) -> Value {
    let r = ts.client.get(&format!("/api/v1/admin/campaigns/{id}/tiling"), ts.admin()).await;
    assert_eq!(r.status, 200, "{}", r.text());
    r.json()
}
