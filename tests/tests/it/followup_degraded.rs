//! End to end: a follow-up campaign with a deliberately degraded controller. A real
//! server and a real worker process run the lander demo (low depth, short horizon)
//! with its own network (campaign A), then a follow-up B of A whose network is the same
//! one with its output layer rewired so it always picks the weakest thrust, then a
//! follow-up C with the original network again.
//!
//! Checked against things outside the diff code:
//! - the degraded network picks command 0 on every sampled observation, evaluated by
//!   onnxruntime (`tests/reference/make_degraded_lander.py`), and the original does not;
//! - every counterexample of B replays (`tessera-worker replay`: simulation and a
//!   validated re-check) under the degraded controller, which picks only `cut`;
//! - the safe→counterexample volume of the diff equals a recount from the two
//!   campaigns' leaf boxes: the real-number overlap (widths over envelope widths) of
//!   every leaf safe in A with every leaf of B whose counterexample replayed;
//! - the client's `gate --no-new-counterexample` (and the pipeline's `gate.py`, under
//!   the flag's earlier name `--no-new-unsafe`) fails B and passes C (same controller
//!   as A: a cell proven safe cannot hold a sound counterexample under the same model),
//!   each verdict with its caution.

use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use tessera_tests::bin;


fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

fn get(url: &str, token: &str) -> Value {
    ureq::get(url).set("Authorization", &format!("Bearer {token}")).call().unwrap().into_json().unwrap()
}

fn text(o: &Output) -> String {
    format!("{}{}", String::from_utf8_lossy(&o.stdout), String::from_utf8_lossy(&o.stderr))
}

/// The lander demo spec, read from its file, made small: depth 5, 12 periods, unsafe
/// cells cut down to max_depth, and the given network.
fn write_spec(dir: &Path, name: &str, network: &str) -> PathBuf {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo/lander/spec.json");
    let mut spec: Value = serde_json::from_str(&std::fs::read_to_string(demo).unwrap()).unwrap();
    spec["refinement"]["max_depth"] = 5.into();
    spec["refinement"]["refine_unsafe"] = true.into();
    spec["horizon_periods"] = 12.into();
    spec["engine"] = json!({"node_budget": 200, "time_budget_s": 3.0, "falsify_samples": 8, "sim_steps": 20});
    spec["controller"]["networks"] = json!([network]);
    let path = dir.join(name);
    std::fs::write(&path, serde_json::to_string_pretty(&spec).unwrap()).unwrap();
    path
}

/// All leaves of a campaign: (status, box over the split states).
fn leaves(url: &str, token: &str, id: &str) -> Vec<(String, Vec<[f64; 2]>)> {
    let l = get(&format!("{url}/api/v1/campaigns/{id}/leaves?limit=50000"), token);
    assert!(l["next_after"].is_null());
    let statuses: Vec<String> = l["statuses"].as_array().unwrap().iter().map(|s| s.as_str().unwrap().into()).collect();
    let dims = l["split_states"].as_array().unwrap().len();
    l["rows"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| {
            let b = (0..dims).map(|j| [r[3 + 2 * j].as_f64().unwrap(), r[4 + 2 * j].as_f64().unwrap()]).collect();
            (statuses[r[1].as_u64().unwrap() as usize].clone(), b)
        })
        .collect()
}

/// Fraction of the envelope in the intersection of two boxes, in real arithmetic on
/// the boxes' f64 ends (exact here: every end is a short binary fraction).
fn overlap(a: &[[f64; 2]], b: &[[f64; 2]], env: &[[f64; 2]]) -> f64 {
    let mut f = 1.0;
    for j in 0..env.len() {
        let w = a[j][1].min(b[j][1]) - a[j][0].max(b[j][0]);
        if w <= 0.0 {
            return 0.0;
        }
        f *= w / (env[j][1] - env[j][0]);
    }
    f
}

#[test]
fn a_degraded_controller_shows_safe_volume_turned_unsafe() {
    let _slow = tessera_tests::slow_test();
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo/lander");
    std::fs::copy(demo.join("lander.onnx"), dir.join("lander.onnx")).unwrap();
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("reference/make_degraded_lander.py");
    let out = Command::new("python3")
        .arg(&script)
        .arg(dir.join("lander.onnx"))
        .arg(dir.join("degraded.onnx"))
        .output()
        .expect("python3 must be installed");
    assert!(out.status.success(), "the reference script needs numpy, onnx and onnxruntime: {}", text(&out));
    let check: Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(check["degraded_picks_cut"], 1.0, "{check}");
    assert!(check["original_picks_cut"].as_f64().unwrap() < 0.9, "{check}");

    let spec_a = write_spec(dir, "a.json", "lander.onnx");
    let spec_b = write_spec(dir, "b.json", "degraded.onnx");
    let port = free_port();
    let url = format!("http://127.0.0.1:{port}");
    let db = dir.join("tessera.sqlite");
    let admin_file = dir.join("admin.token");
    let mut guard = tessera_tests::Procs(Vec::new());
    guard.0.push(
        Command::new(bin("tessera-server"))
            .args(["serve", "--listen", &format!("127.0.0.1:{port}"), "--lease-seconds", "30"])
            .arg("--db")
            .arg(&db)
            .arg("--bootstrap-token-file")
            .arg(&admin_file)
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(dir.join("server.log")).unwrap())
            .spawn()
            .unwrap(),
    );
    tessera_tests::wait_until_up(&url);
    let admin = tessera_tests::read_token(&admin_file);
    let tok = Command::new(bin("tessera-server")).args(["token", "create", "--role", "worker", "--db"]).arg(&db).output().unwrap();
    assert!(tok.status.success());
    let worker_token = String::from_utf8(tok.stdout).unwrap().trim().lines().last().unwrap().to_string();
    guard.0.push(
        Command::new(bin("tessera-worker"))
            .args(["run", "--server", &url, "--threads", "2", "--name", "w"])
            .env("TESSERA_TOKEN", &worker_token)
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(dir.join("worker.log")).unwrap())
            .spawn()
            .unwrap(),
    );
    let tessera = |args: &[&str]| -> Output {
        Command::new(bin("tessera")).arg("--server").arg(&url).args(args).env("TESSERA_TOKEN", &admin).output().unwrap()
    };
    let submit = |spec: &Path, follow_up: Option<&str>| -> String {
        let mut args = vec!["submit", spec.to_str().unwrap()];
        if let Some(f) = follow_up {
            args.extend(["--follow-up", f]);
        }
        let o = tessera(&args);
        assert!(o.status.success(), "submit: {}", text(&o));
        String::from_utf8(o.stdout).unwrap().trim().to_string()
    };

    // Campaign A, the original controller.
    let a = submit(&spec_a, None);
    let g = tessera(&["gate", &a, "--min-safe", "0", "--interval", "0.3"]);
    assert_eq!(g.status.code(), Some(0), "{}", text(&g));
    let cov_a = get(&format!("{url}/api/v1/campaigns/{a}/coverage"), &admin);
    let safe_a = cov_a["statuses"]["safe"]["fraction"].as_f64().unwrap();
    assert!(safe_a > 0.0, "the original controller must be proven safe somewhere for this test to mean anything: {cov_a}");

    // Follow-up B, the degraded controller: the gate on new counterexample volume fails.
    let b = submit(&spec_b, Some(&a));
    let g = tessera(&["gate", &b, "--no-new-counterexample", "--interval", "0.3"]);
    assert_eq!(g.status.code(), Some(1), "{}", text(&g));
    let out = String::from_utf8_lossy(&g.stdout);
    assert!(out.contains("lies in cells with a counterexample now"), "{}", text(&g));
    assert_eq!(out.lines().last(), Some(tessera_engine::caution::CAUTION_LINE), "{}", text(&g));
    let ch = get(&format!("{url}/api/v1/campaigns/{b}/changes"), &admin);
    assert_eq!(ch["final"], true, "{ch}");
    let s2u = ch["summary"]["safe_to_counterexample"]["fraction"].as_f64().unwrap();

    // Independent recount: replay every counterexample of B, then overlap the boxes.
    let env: Vec<[f64; 2]> = ch["envelope"].as_array().unwrap().iter().map(|p| [p[0].as_f64().unwrap(), p[1].as_f64().unwrap()]).collect();
    let mut replayed: Vec<Vec<[f64; 2]>> = Vec::new();
    let mut after = 0;
    loop {
        let page = get(&format!("{url}/api/v1/campaigns/{b}/counterexamples?limit=1000&after={after}"), &admin);
        for (k, cx) in page["counterexamples"].as_array().unwrap().iter().enumerate() {
            if cx["cell_status"] != "counterexample" {
                continue; // a cell that was cut further: its leaves have their own results
            }
            let f = dir.join(format!("cx-{after}-{k}.json"));
            std::fs::write(&f, json!({"counterexample": cx["counterexample"]}).to_string()).unwrap();
            let r = Command::new(bin("tessera-worker")).arg("replay").arg(&f).arg("--spec").arg(&spec_b).output().unwrap();
            assert!(r.status.success(), "counterexample {k} of B does not replay: {}", text(&r));
            let commands = String::from_utf8_lossy(&r.stdout).lines().find(|l| l.starts_with("commands:")).unwrap_or("").to_string();
            assert!(commands.split_whitespace().skip(1).all(|c| c == "cut"), "the degraded controller picked {commands}");
            let h = &cx["box"]["h"];
            let v = &cx["box"]["v"];
            let x0 = &cx["counterexample"]["initial_state"];
            let inside = |iv: &Value, x: &Value| iv[0].as_f64().unwrap() <= x.as_f64().unwrap() && x.as_f64().unwrap() <= iv[1].as_f64().unwrap();
            assert!(inside(h, &x0["h"]) && inside(v, &x0["v"]), "counterexample outside its cell: {cx}");
            replayed.push(vec![[h[0].as_f64().unwrap(), h[1].as_f64().unwrap()], [v[0].as_f64().unwrap(), v[1].as_f64().unwrap()]]);
        }
        match page["next_after"].as_i64() {
            Some(n) => after = n,
            None => break,
        }
    }
    let leaves_b = leaves(&url, &admin, &b);
    let cx_leaves_b = leaves_b.iter().filter(|(s, _)| s == "counterexample").count();
    assert_eq!(replayed.len(), cx_leaves_b, "every counterexample leaf of B has a replayed counterexample");
    let safe_a_boxes: Vec<Vec<[f64; 2]>> = leaves(&url, &admin, &a).into_iter().filter(|(s, _)| s == "safe").map(|(_, b)| b).collect();
    let expected: f64 = safe_a_boxes.iter().map(|x| replayed.iter().map(|y| overlap(x, y, &env)).sum::<f64>()).sum();
    assert!(expected > 0.0);
    assert!((s2u - expected).abs() < 1e-12, "diff says {s2u}, recount {expected}: {ch}");
    println!("A safe {safe_a}; B: safe→counterexample {s2u} ({}), recount {expected}", ch["summary"]["safe_to_counterexample"]["reduced"]);

    let md = tessera(&["report", &b]);
    assert!(md.status.success());
    let md = String::from_utf8_lossy(&md.stdout);
    assert!(md.contains("## Changes since campaign") && md.contains("Previously safe, now in counterexample cells"), "{md}");

    // The training pipeline's gate example does the same against the live server.
    let gate_py = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/pipeline/gate.py");
    let g = Command::new("python3")
        .arg(&gate_py)
        .args(["--server", &url, "--min-safe", "0", "--poll-s", "0.3", "--timeout-s", "240", "--follow-up", &a, "--no-new-unsafe", "--spec"])
        .arg(&spec_b)
        .env("TESSERA_TOKEN", &admin)
        .output()
        .expect("python3 must be installed");
    assert_eq!(g.status.code(), Some(1), "pipeline gate: {}", text(&g));
    let out = String::from_utf8_lossy(&g.stdout);
    assert!(out.contains("lies in cells with a counterexample now"), "{}", text(&g));
    assert!(out.contains(tessera_engine::caution::CAUTION), "the server's caution: {}", text(&g));

    // Follow-up C with the original controller: nothing proven safe before lies in a
    // counterexample cell now (the flag under its earlier name still works).
    let c = submit(&spec_a, Some(&a));
    let g = tessera(&["gate", &c, "--no-new-unsafe", "--interval", "0.3"]);
    assert_eq!(g.status.code(), Some(0), "{}", text(&g));
    assert_eq!(String::from_utf8_lossy(&g.stdout).lines().last(), Some(tessera_engine::caution::CAUTION_LINE), "{}", text(&g));
    let t = get(&format!("{url}/api/v1/admin/campaigns/{c}/tiling"), &admin);
    assert_eq!(t["ok"], true, "{t}");
}
