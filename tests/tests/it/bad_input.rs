//! Bad input catalogue against the real server binary on loopback: each case gets a
//! 4xx JSON error `{error, detail, field?}` naming the field at fault where there is
//! one, the server stays up, and nothing is partly written (no campaign or model
//! appears from a refused request).

use serde_json::{json, Value};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::Duration;
use tessera_tests::{bin, Server};



/// Status and JSON body of one request (any status).
fn call(method: &str, url: &str, token: &str, body: Option<(&[u8], &str)>) -> (u16, Value) {
    let req = ureq::request(method, url).set("Authorization", &format!("Bearer {token}"));
    let r = match body {
        Some((b, ct)) => req.set("Content-Type", ct).send_bytes(b),
        None => req.call(),
    };
    let resp = match r {
        Ok(r) => r,
        Err(ureq::Error::Status(_, r)) => r,
        // The server may close the connection while a client still sends an oversized
        // body (after answering 413); report that as status 0 with the transport error.
        Err(e) => return (0, Value::String(e.to_string())),
    };
    let status = resp.status();
    let text = resp.into_string().unwrap_or_default();
    (status, serde_json::from_str(&text).unwrap_or(Value::String(text)))
}

#[test]
fn bad_inputs_get_a_clear_4xx_and_change_nothing() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let url = format!("http://127.0.0.1:{port}");
    let _server = Server(
        Command::new(bin("tessera-server"))
            .args(["serve", "--listen", &format!("127.0.0.1:{port}")])
            .arg("--db")
            .arg(dir.join("db.sqlite"))
            .arg("--bootstrap-token-file")
            .arg(dir.join("admin.token"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap(),
    );
    tessera_tests::wait_until_up(&url);
    let admin = tessera_tests::read_token(&dir.join("admin.token"));

    // A valid base: the lander demo with its model uploaded.
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo/lander");
    let model = std::fs::read(demo.join("lander.onnx")).unwrap();
    let (st, up) = call("POST", &format!("{url}/api/v1/models"), &admin, Some((&model, "application/octet-stream")));
    assert!(st == 200 || st == 201, "{up}");
    let sha = up["sha256"].as_str().unwrap().to_string();
    let mut base: Value = serde_json::from_str(&std::fs::read_to_string(demo.join("spec.json")).unwrap()).unwrap();
    base["controller"]["networks"] = json!([format!("sha256:{sha}")]);
    base["refinement"]["max_depth"] = 2.into();

    // (description, mutation of the spec, expected field or error code in the answer)
    type Mutation = Box<dyn Fn(&mut Value)>;
    let spec_cases: Vec<(&str, Mutation, &str)> = vec![
        ("wrong type for name", Box::new(|s| s["name"] = json!(5)), "name"),
        ("unknown top-level field", Box::new(|s| s["colour"] = json!("red")), "colour"),
        ("unknown nested field", Box::new(|s| s["controller"]["perod"] = json!(1)), "controller"),
        ("period is a string", Box::new(|s| s["controller"]["period"] = json!("fast")), "controller.period"),
        ("negative period", Box::new(|s| s["controller"]["period"] = json!(-1.0)), "controller.period"),
        ("latency 2", Box::new(|s| s["controller"]["latency_periods"] = json!(2)), "controller.latency_periods"),
        ("inverted envelope", Box::new(|s| s["envelope"]["h"] = json!([3.0, 2.0])), "envelope.h"),
        ("envelope of three numbers", Box::new(|s| s["envelope"]["h"] = json!([1, 2, 3])), "envelope.h"),
        ("envelope of an unknown state", Box::new(|s| s["envelope"]["z"] = json!([0, 1])), "envelope.z"),
        ("missing envelope state", Box::new(|s| { s["envelope"].as_object_mut().unwrap().remove("v"); }), "envelope"),
        ("inverted disturbance", Box::new(|s| s["disturbances"][0]["range"] = json!([0.3, -0.3])), "disturbances[0].range"),
        ("noise not around zero", Box::new(|s| s["controller"]["observations"][0]["noise"] = json!([0.1, 0.2])), "controller.observations[0].noise"),
        ("unknown name in dynamics", Box::new(|s| s["dynamics"]["v"] = json!("a - g0")), "dynamics.v"),
        ("unknown function", Box::new(|s| s["dynamics"]["v"] = json!("sinh(a)")), "dynamics.v"),
        ("parse error", Box::new(|s| s["dynamics"]["h"] = json!("v +* 2")), "dynamics.h"),
        ("division by a zero-width expression", Box::new(|s| s["dynamics"]["h"] = json!("v / (2 - 2)")), "dynamics.h"),
        ("dynamics for an unknown state", Box::new(|s| s["dynamics"]["z"] = json!("1")), "dynamics.z"),
        ("observation over an input", Box::new(|s| s["controller"]["observations"][0]["expr"] = json!("a")), "controller.observations[0].expr"),
        ("zero scale", Box::new(|s| s["controller"]["normalization"]["scale"][0] = json!(0.0)), "controller.normalization.scale[0]"),
        ("scale of the wrong length", Box::new(|s| s["controller"]["normalization"]["scale"] = json!([1.0])), "controller.normalization.scale"),
        ("command sets an unknown input", Box::new(|s| s["controller"]["commands"][0]["set"]["b"] = json!(1.0)), "controller.commands[0].set.b"),
        ("duplicate command", Box::new(|s| s["controller"]["commands"][1]["name"] = json!("cut")), "controller.commands[1].name"),
        ("one command fewer than outputs", Box::new(|s| { s["controller"]["commands"].as_array_mut().unwrap().pop(); }), "controller.networks[0]"),
        ("unknown initial command", Box::new(|s| s["controller"]["initial_command"] = json!("hover")), "controller.initial_command"),
        ("single selection with a bank", Box::new(|s| s["controller"]["networks"] = json!([s["controller"]["networks"][0].clone(), s["controller"]["networks"][0].clone()])), "controller.selection"),
        ("network_of_command out of range", Box::new(|s| s["controller"]["selection"] = json!({"mode": "previous_command", "network_of_command": [0, 0, 0, 0, 7]})), "controller.selection.network_of_command[4]"),
        ("model not uploaded", Box::new(|s| s["controller"]["networks"] = json!([format!("sha256:{}", "0".repeat(64))])), "controller.networks[0]"),
        ("path with .. as model", Box::new(|s| s["controller"]["networks"] = json!(["../../etc/passwd"])), "controller.networks[0]"),
        ("SQL fragment as a state name", Box::new(|s| s["states"][0]["name"] = json!("h'; DROP TABLE cells;--")), "states[0].name"),
        ("duplicate state name", Box::new(|s| s["states"][1]["name"] = json!("h")), "states[1].name"),
        ("reserved name", Box::new(|s| s["states"][0]["name"] = json!("sin")), "states[0].name"),
        ("unsafe chain", Box::new(|s| s["unsafe"][0]["all"][0] = json!("0 <= h <= 1")), "unsafe[0].all[0]"),
        ("unsafe without comparison", Box::new(|s| s["unsafe"][0]["all"][0] = json!("h + 1")), "unsafe[0].all[0]"),
        // Found by fuzzing: the constraint splitter used to panic inside a multi-byte character.
        ("multi-byte character in a constraint", Box::new(|s| s["unsafe"][0]["all"][0] = json!("h <= 0.\u{2de}2")), "unsafe[0].all[0]"),
        ("empty unsafe set", Box::new(|s| s["unsafe"] = json!([])), "unsafe"),
        ("absurd depth", Box::new(|s| s["refinement"]["max_depth"] = json!(1000)), "refinement.max_depth"),
        ("split of an unknown state", Box::new(|s| s["refinement"]["split"] = json!(["q"])), "refinement.split[0]"),
        ("absurd node budget", Box::new(|s| s["engine"] = json!({"node_budget": 1e12})), "engine.node_budget"),
        ("zero horizon", Box::new(|s| s["horizon_periods"] = json!(0)), "horizon_periods"),
        ("negative horizon", Box::new(|s| s["horizon_periods"] = json!(-3)), "horizon_periods"),
        ("taylor order 50", Box::new(|s| s["engine"] = json!({"taylor_order": 50})), "engine.taylor_order"),
        ("unsupported spec version", Box::new(|s| s["version"] = json!(7)), "version"),
    ];
    let campaigns_url = format!("{url}/api/v1/campaigns");
    let mut tried = 0;
    for (what, mutate, field) in &spec_cases {
        let mut s = base.clone();
        mutate(&mut s);
        let body = serde_json::to_vec(&s).unwrap();
        let (st, ans) = call("POST", &campaigns_url, &admin, Some((&body, "application/json")));
        assert!((400..500).contains(&st), "{what}: status {st}: {ans}");
        let text = ans.to_string();
        assert!(text.contains(field), "{what}: the answer does not name {field}: {text}");
        assert!(ans["error"].is_string() && ans["detail"].is_string(), "{what}: not a JSON error: {text}");
        tried += 1;
    }

    // Raw bodies and other routes.
    let raw_cases: Vec<(&str, &str, String, Vec<u8>, &str)> = vec![
        ("malformed JSON", "POST", campaigns_url.clone(), b"{\"name\": ".to_vec(), "line 1"),
        ("NaN literal", "POST", campaigns_url.clone(), b"{\"name\": NaN}".to_vec(), "line 1"),
        ("Infinity literal", "POST", campaigns_url.clone(), b"{\"horizon_periods\": Infinity}".to_vec(), "line 1"),
        ("number out of range", "POST", campaigns_url.clone(), br#"{"name":"x","horizon_periods":1e999}"#.to_vec(), "error"),
        ("JSON array instead of a spec", "POST", campaigns_url.clone(), b"[]".to_vec(), "error"),
        ("empty body", "POST", campaigns_url.clone(), Vec::new(), "error"),
        ("oversized JSON body", "POST", campaigns_url.clone(), vec![b' '; 2 * 1024 * 1024], "body_too_large"),
        ("not ONNX", "POST", format!("{url}/api/v1/models"), b"this is not a model".to_vec(), "body"),
        ("empty model", "POST", format!("{url}/api/v1/models"), Vec::new(), "body"),
        ("bad query: priority", "POST", format!("{campaigns_url}?priority=high"), serde_json::to_vec(&base).unwrap(), "priority"),
        ("bad query: initial depth", "POST", format!("{campaigns_url}?initial_depth=99"), serde_json::to_vec(&base).unwrap(), "initial_depth"),
        ("lease with max 0", "POST", format!("{url}/api/v1/leases"), br#"{"max":0}"#.to_vec(), "max"),
        ("lease with an unknown field", "POST", format!("{url}/api/v1/leases"), br#"{"max":1,"greedy":true}"#.to_vec(), "greedy"),
        ("results with a wrong type", "POST", format!("{url}/api/v1/results"), br#"{"results":[{"lease_id":5,"result":{}}]}"#.to_vec(), "results[0].lease_id"),
    ];
    for (what, method, u, body, needle) in &raw_cases {
        let ct = if u.contains("/models") { "application/octet-stream" } else { "application/json" };
        let (st, ans) = call(method, u, &admin, Some((body, ct)));
        if *needle == "body_too_large" && st == 0 {
            // Cut off mid-upload: refused before the body was read, which is the point.
            tried += 1;
            continue;
        }
        assert!((400..500).contains(&st), "{what}: status {st}: {ans}");
        assert!(ans.to_string().contains(needle), "{what}: the answer does not name {needle}: {ans}");
        tried += 1;
    }
    let get_cases: Vec<(&str, String)> = vec![
        ("unknown campaign", format!("{campaigns_url}/00000000-0000-0000-0000-000000000000")),
        ("SQL in a path", format!("{campaigns_url}/x'%20OR%201=1--/coverage")),
        ("path traversal", format!("{url}/api/v1/models/..%2F..%2Fetc%2Fpasswd")),
        ("SQL in a query", format!("{campaigns_url}?state=running'%20OR%201=1--")),
        ("page size too large", format!("{campaigns_url}/00000000-0000-0000-0000-000000000000/cells?limit=100000")),
        ("unknown route", format!("{url}/api/v1/nothing")),
    ];
    for (what, u) in &get_cases {
        let (st, ans) = call("GET", u, &admin, None);
        assert!((400..500).contains(&st), "{what}: status {st}: {ans}");
        assert!(ans["error"].is_string(), "{what}: not a JSON error: {ans}");
        tried += 1;
    }
    // Forged leases are refused item by item, and recorded nowhere.
    let (st, ans) = call(
        "POST",
        &format!("{url}/api/v1/results"),
        &admin,
        Some((br#"{"results":[{"lease_id":"forged","result":{"verdict":"safe"}}]}"#, "application/json")),
    );
    assert_eq!(st, 200, "{ans}");
    assert_eq!(ans["items"][0]["status"], "unknown_lease", "{ans}");
    tried += 1;

    // Every broken model of the ONNX reader's reference set (written with the `onnx`
    // package's helper API by tests/reference/onnx_cases.py): unsupported operators,
    // a weight shape that does not fit, a declared output size the nodes do not
    // compute, cycles, missing inputs, ... Each is refused naming the node at fault.
    let cases_dir = tempfile::tempdir().unwrap();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("reference/onnx_cases.py");
    let out = Command::new("python3").arg(&script).arg(cases_dir.path()).output().expect("python3 must be installed");
    assert!(out.status.success(), "onnx_cases.py failed (are onnx and onnxruntime installed?): {}", String::from_utf8_lossy(&out.stderr));
    let manifest: Value = serde_json::from_slice(&std::fs::read(cases_dir.path().join("manifest.json")).unwrap()).unwrap();
    let bad_models = manifest["bad"].as_array().unwrap();
    assert!(bad_models.len() >= 10);
    for m in bad_models {
        let f = m["file"].as_str().unwrap();
        let bytes = std::fs::read(cases_dir.path().join(f)).unwrap();
        let (st, ans) = call("POST", &format!("{url}/api/v1/models"), &admin, Some((&bytes, "application/octet-stream")));
        assert!((400..500).contains(&st), "{f}: status {st}: {ans}");
        for needle in m["must_contain"].as_array().unwrap() {
            assert!(ans.to_string().contains(needle.as_str().unwrap()), "{f}: the answer does not say {needle}: {ans}");
        }
        tried += 1;
    }

    // Still up, and nothing was written by the refused requests.
    assert_eq!(call("GET", &format!("{url}/healthz"), &admin, None).0, 200);
    let (_, list) = call("GET", &campaigns_url, &admin, None);
    assert_eq!(list["campaigns"].as_array().map(|a| a.len()), Some(0), "a refused request created a campaign: {list}");
    assert!(tried >= 50, "only {tried} bad inputs tried");
    println!("{tried} bad inputs tried; every one refused with a 4xx JSON error; server up; nothing written");
}

/// Results that arrive for a lease that ended (expired, already answered, campaign
/// cancelled), that name another campaign's cell, or that say nothing readable, are
/// refused item by item with a status saying why, and are never counted.
#[test]
fn results_for_ended_leases_or_other_cells_are_refused_and_not_counted() {
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let url = format!("http://127.0.0.1:{port}");
    let _server = Server(
        Command::new(bin("tessera-server"))
            .args(["serve", "--listen", &format!("127.0.0.1:{port}"), "--lease-seconds", "1", "--sweep-seconds", "1"])
            .arg("--db")
            .arg(dir.join("db.sqlite"))
            .arg("--bootstrap-token-file")
            .arg(dir.join("admin.token"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap(),
    );
    tessera_tests::wait_until_up(&url);
    let admin = tessera_tests::read_token(&dir.join("admin.token"));
    let (st, tok) = call("POST", &format!("{url}/api/v1/admin/tokens"), &admin, Some((br#"{"role":"worker"}"#, "application/json")));
    assert_eq!(st, 201, "{tok}");
    let worker = tok["token"].as_str().unwrap().to_string();
    let model = tessera_server::model_check::testing::tiny_model(1, 2, "ended-leases");
    let (_, up) = call("POST", &format!("{url}/api/v1/models"), &admin, Some((&model, "application/octet-stream")));
    let sha = up["sha256"].as_str().unwrap();
    let spec = |name: &str| {
        json!({
            "name": name,
            "states": [{"name": "h", "unit": "m"}],
            "inputs": [{"name": "q", "unit": "m/s"}],
            "dynamics": {"h": "q - 0.1 * h"},
            "controller": {
                "period": 0.5, "observations": [{"name": "level", "expr": "h"}],
                "networks": [format!("sha256:{sha}")], "selection": {"mode": "single"}, "decision": "argmax",
                "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.2}}],
                "initial_command": "off"
            },
            "unsafe": [{"all": ["h >= 2"]}], "horizon_periods": 4,
            "envelope": {"h": [0.0, 1.0]}, "refinement": {"max_depth": 3, "split": ["h"]}
        })
    };
    let create = |name: &str| -> String {
        let body = serde_json::to_vec(&spec(name)).unwrap();
        let (st, c) = call("POST", &format!("{url}/api/v1/campaigns"), &admin, Some((&body, "application/json")));
        assert_eq!(st, 201, "{c}");
        c["id"].as_str().unwrap().to_string()
    };
    let (a, b) = (create("a"), create("b"));
    let lease = || -> Vec<Value> {
        let (st, l) = call("POST", &format!("{url}/api/v1/leases"), &worker, Some((br#"{"max":2,"worker":"t"}"#, "application/json")));
        assert_eq!(st, 200, "{l}");
        l["leases"].as_array().unwrap().clone()
    };
    let submit = |items: Value| -> Vec<Value> {
        let body = serde_json::to_vec(&json!({"worker": "t", "results": items})).unwrap();
        let (st, r) = call("POST", &format!("{url}/api/v1/results"), &worker, Some((&body, "application/json")));
        assert_eq!(st, 200, "{r}");
        r["items"].as_array().unwrap().clone()
    };
    let results_of = |id: &str| -> i64 {
        call("GET", &format!("{url}/api/v1/campaigns/{id}/coverage"), &admin, None).1["results"].as_i64().unwrap()
    };
    let safe = json!({"verdict": "safe", "reason": "scripted", "split_hint": null, "counterexample": null, "stats": {}});
    let mut tried = 0;

    // One root cell of each campaign.
    let leases = lease();
    assert_eq!(leases.len(), 2, "{leases:?}");
    let of = |c: &str| leases.iter().find(|l| l["campaign_id"] == c).unwrap().clone();
    let (la, lb) = (of(&a), of(&b));

    // A's lease with B's cell: refused, and A's lease stays usable.
    let r = submit(json!([{"lease_id": la["lease_id"], "cell_id": lb["cell_id"], "result": safe}]));
    assert_eq!(r[0]["status"], "invalid", "{r:?}");
    tried += 1;
    // Unreadable verdicts.
    for bad in [json!({"verdict": "maybe"}), json!({"verdict": "safe", "error": "both"}), json!("safe"), json!({})] {
        let r = submit(json!([{"lease_id": la["lease_id"], "result": bad}]));
        assert_eq!(r[0]["status"], "invalid", "{bad}: {r:?}");
        tried += 1;
    }
    // The same lease twice in one batch: the first counts, the second is a duplicate.
    let r = submit(json!([{"lease_id": la["lease_id"], "result": safe}, {"lease_id": la["lease_id"], "result": safe}]));
    assert_eq!((r[0]["status"].as_str(), r[1]["status"].as_str()), (Some("accepted"), Some("duplicate")), "{r:?}");
    tried += 1;
    // And again in a later batch.
    let r = submit(json!([{"lease_id": la["lease_id"], "result": safe}]));
    assert_eq!(r[0]["status"], "duplicate", "{r:?}");
    tried += 1;

    // B's lease expires (1 s leases, swept every second) and B's root is leased
    // again: the late result of the first lease is refused (a late result whose cell
    // nobody took meanwhile would count; server/tests/it/campaign.rs tests that).
    std::thread::sleep(Duration::from_millis(2500));
    let leases = lease();
    let lb2 = leases.iter().find(|l| l["campaign_id"] == b.as_str()).expect("B's root is leased again").clone();
    let r = submit(json!([{"lease_id": lb["lease_id"], "result": safe}]));
    assert_eq!(r[0]["status"], "expired", "{r:?}");
    tried += 1;

    // A lease of a campaign cancelled meanwhile: withdrawn.
    let (st, c) = call("POST", &format!("{url}/api/v1/campaigns/{b}/cancel"), &admin, Some((b"", "application/json")));
    assert_eq!(st, 200, "{c}");
    let r = submit(json!([{"lease_id": lb2["lease_id"], "result": safe}]));
    assert_eq!(r[0]["status"], "withdrawn", "{r:?}");
    tried += 1;

    assert_eq!(results_of(&a), 1, "only A's one accepted result counts");
    assert_eq!(results_of(&b), 0, "nothing of B was accepted");
    println!("{tried} bad results tried; each refused with its reason; none counted");
}
