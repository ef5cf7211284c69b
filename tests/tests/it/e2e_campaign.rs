//! End to end: a real server and two real worker processes on loopback run a small
//! campaign of the lander demo (low depth) to the end. Checked: the fractions add up to
//! exactly 1 and the leaves tile the envelope; a worker killed with SIGKILL in the
//! middle leaves no cell behind (its leases expire and are re-issued); every
//! counterexample of the report replays with `tessera-worker replay`; the `tessera`
//! client submits, gates, waits, shows the status and reports, every verdict with the
//! caution; SIGTERM stops a worker with status 0.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};
use tessera_tests::bin;

/// The workspace's binaries sit next to the test's `deps` folder.

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

fn get(url: &str, token: &str) -> serde_json::Value {
    ureq::get(url).set("Authorization", &format!("Bearer {token}")).call().unwrap().into_json().unwrap()
}

fn term(c: &Child) {
    // SAFETY: kill(2) on our own child.
    unsafe {
        libc::kill(c.id() as libc::pid_t, libc::SIGTERM);
    }
}

fn write_small_lander(dir: &Path) -> PathBuf {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo/lander");
    std::fs::copy(demo.join("lander.onnx"), dir.join("lander.onnx")).unwrap();
    let mut spec: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(demo.join("spec.json")).unwrap()).unwrap();
    spec["refinement"]["max_depth"] = 3.into();
    spec["horizon_periods"] = 12.into();
    spec["engine"] = serde_json::json!({"node_budget": 200, "time_budget_s": 3.0, "falsify_samples": 8, "sim_steps": 20});
    let path = dir.join("spec.json");
    std::fs::write(&path, serde_json::to_string_pretty(&spec).unwrap()).unwrap();
    path
}

#[test]
fn two_workers_finish_a_campaign_and_a_killed_worker_loses_nothing() {
    let _slow = tessera_tests::slow_test();
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path();
    let spec_path = write_small_lander(dir);
    let port = free_port();
    let url = format!("http://127.0.0.1:{port}");
    let db = dir.join("tessera.sqlite");
    let admin_file = dir.join("admin.token");
    let mut guard = tessera_tests::Procs(Vec::new());

    let server_log = std::fs::File::create(dir.join("server.log")).unwrap();
    guard.0.push(
        Command::new(bin("tessera-server"))
            .args(["serve", "--listen", &format!("127.0.0.1:{port}"), "--lease-seconds", "3", "--sweep-seconds", "1"])
            .arg("--db")
            .arg(&db)
            .arg("--bootstrap-token-file")
            .arg(&admin_file)
            .stdout(Stdio::null())
            .stderr(server_log)
            .spawn()
            .unwrap(),
    );
    tessera_tests::wait_until_up(&url);
    let admin = tessera_tests::read_token(&admin_file);

    // The client uploads the model, rewrites the reference and creates the campaign.
    let out = Command::new(bin("tessera"))
        .args(["--server", &url, "submit"])
        .arg(&spec_path)
        .env("TESSERA_TOKEN", &admin)
        .output()
        .unwrap();
    assert!(out.status.success(), "submit failed: {}", String::from_utf8_lossy(&out.stderr));
    let id = String::from_utf8(out.stdout).unwrap().trim().to_string();

    let tok = Command::new(bin("tessera-server")).args(["token", "create", "--role", "worker", "--db"]).arg(&db).output().unwrap();
    assert!(tok.status.success());
    let worker_token = String::from_utf8(tok.stdout).unwrap().trim().lines().last().unwrap().to_string();

    let spawn_worker = |name: &str| -> Child {
        Command::new(bin("tessera-worker"))
            .args(["run", "--server", &url, "--threads", "1", "--name", name])
            .env("TESSERA_TOKEN", &worker_token)
            .stdout(Stdio::piped())
            .stderr(std::fs::File::create(dir.join(format!("{name}.log"))).unwrap())
            .spawn()
            .unwrap()
    };
    let doomed = spawn_worker("doomed");
    let steady = spawn_worker("steady");
    guard.0.push(doomed);
    guard.0.push(steady);

    // Kill the first worker once the campaign is under way.
    let cov_url = format!("{url}/api/v1/campaigns/{id}/coverage");
    let t0 = Instant::now();
    loop {
        let cov = get(&cov_url, &admin);
        if cov["results"].as_i64().unwrap_or(0) >= 2 || cov["state"] != "running" {
            break;
        }
        assert!(t0.elapsed() < Duration::from_secs(240), "no progress: {cov}");
        std::thread::sleep(Duration::from_millis(100));
    }
    guard.0[1].kill().unwrap(); // SIGKILL
    guard.0[1].wait().unwrap();

    // The client's gate waits for the end; min-safe 0 always passes a finished campaign.
    let gate = Command::new(bin("tessera"))
        .args(["--server", &url, "gate", &id, "--min-safe", "0", "--interval", "0.5"])
        .env("TESSERA_TOKEN", &admin)
        .output()
        .unwrap();
    assert_eq!(gate.status.code(), Some(0), "gate: {}{}", String::from_utf8_lossy(&gate.stdout), String::from_utf8_lossy(&gate.stderr));
    // Every verdict the client prints ends with the caution line.
    let caution = tessera_engine::caution::CAUTION_LINE;
    let gate_out = String::from_utf8_lossy(&gate.stdout);
    assert!(gate_out.starts_with("pass: proven-safe fraction"), "{gate_out}");
    assert_eq!(gate_out.lines().last(), Some(caution), "{gate_out}");
    let status = Command::new(bin("tessera")).args(["--server", &url, "status", &id]).env("TESSERA_TOKEN", &admin).output().unwrap();
    assert!(status.status.success());
    let status_out = String::from_utf8_lossy(&status.stdout);
    assert!(status_out.lines().any(|l| l.starts_with("counterexample ")), "a row for the counterexample volume: {status_out}");
    assert!(!status_out.lines().any(|l| l.starts_with("unsafe ")), "{status_out}");
    assert!(status_out.contains("counterexample: the volume of leaf cells"), "what the row counts: {status_out}");
    assert_eq!(status_out.lines().last(), Some(caution), "{status_out}");
    let wait = Command::new(bin("tessera")).args(["--server", &url, "wait", &id]).env("TESSERA_TOKEN", &admin).output().unwrap();
    assert!(wait.status.success());
    let wait_err = String::from_utf8_lossy(&wait.stderr);
    assert!(wait_err.contains("counterexample"), "{wait_err}");
    assert_eq!(wait_err.lines().last(), Some(caution), "the final line of wait: {wait_err}");

    let cov = get(&cov_url, &admin);
    assert_eq!(cov["state"], "done");
    let total = cov["total_volume"].as_i64().unwrap();
    let mut sum = 0;
    for (status, v) in cov["statuses"].as_object().unwrap() {
        let vol = v["volume"].as_i64().unwrap();
        if status == "pending" || status == "leased" {
            assert_eq!(vol, 0, "cells left {status} after the campaign ended");
        }
        sum += vol;
    }
    assert_eq!(sum, total, "the fractions must add up to exactly 1");
    let tiling = get(&format!("{url}/api/v1/admin/campaigns/{id}/tiling"), &admin);
    assert_eq!(tiling["ok"], true, "tiling check: {tiling}");

    // Every counterexample replays.
    let report = get(&format!("{url}/api/v1/campaigns/{id}/report"), &admin);
    let cxs = report["counterexamples"].as_array().unwrap();
    for (k, cx) in cxs.iter().enumerate() {
        let f = dir.join(format!("cx-{k}.json"));
        std::fs::write(&f, serde_json::to_string(&serde_json::json!({"counterexample": cx["counterexample"]})).unwrap()).unwrap();
        let r = Command::new(bin("tessera-worker")).arg("replay").arg(&f).arg("--spec").arg(&spec_path).output().unwrap();
        assert!(r.status.success(), "counterexample {k} does not replay: {}", String::from_utf8_lossy(&r.stdout));
    }
    println!("campaign done: {} results, {} counterexamples, coverage {}", cov["results"], cxs.len(), cov["statuses"]);

    let md = Command::new(bin("tessera"))
        .args(["--server", &url, "report", &id, "--format", "md"])
        .env("TESSERA_TOKEN", &admin)
        .output()
        .unwrap();
    assert!(md.status.success());
    assert!(String::from_utf8_lossy(&md.stdout).contains(tessera_engine::caution::CAUTION), "the report's caution in full");

    // The training pipeline's gate example against this live server: it uploads the
    // model, creates its own campaign, follows it to the end and passes min-safe 0.
    let gate_py = Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy/pipeline/gate.py");
    let g = Command::new("python3")
        .arg(&gate_py)
        .args(["--server", &url, "--min-safe", "0", "--poll-s", "0.5", "--timeout-s", "240", "--spec"])
        .arg(&spec_path)
        .env("TESSERA_TOKEN", &admin)
        .output()
        .expect("python3 must be installed");
    let g_out = String::from_utf8_lossy(&g.stdout);
    assert_eq!(g.status.code(), Some(0), "pipeline gate: {g_out}{}", String::from_utf8_lossy(&g.stderr));
    assert!(g_out.contains("PASS"), "{g_out}");
    // And it fails the step when the bar is above what was proven.
    let g = Command::new("python3")
        .arg(&gate_py)
        .args(["--server", &url, "--min-safe", "1", "--poll-s", "0.5", "--timeout-s", "240", "--spec"])
        .arg(&spec_path)
        .env("TESSERA_TOKEN", &admin)
        .output()
        .unwrap();
    let safe_all = cov["statuses"]["safe"]["volume"].as_i64().unwrap() == total;
    assert_eq!(g.status.code(), Some(if safe_all { 0 } else { 1 }), "{}", String::from_utf8_lossy(&g.stdout));

    // SIGTERM: the surviving worker stops with status 0.
    term(&guard.0[2]);
    let st = guard.0[2].wait().unwrap();
    assert!(st.success(), "worker exit status {st:?}");
    term(&guard.0[0]);
    let st = guard.0[0].wait().unwrap();
    assert!(st.success(), "server exit status {st:?}");
}
