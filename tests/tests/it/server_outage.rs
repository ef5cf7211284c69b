//! A server outage longer than the lease time, met by a worker holding more results
//! than the server takes in one request, with the server's default attempt and expiry
//! limits. One real worker process (16 engine threads) decides a campaign whose every
//! cell is unsafe, so every verdict carries a long counterexample trajectory. The
//! server is killed (SIGKILL) as soon as the worker holds its first 32 leases and is
//! started again (same file and port) only once the worker's log shows more than the
//! server's 1 MiB body limit of results waiting and the leases have run out. Then:
//! - the campaign finishes with nothing `failed`, the leaves tile the envelope and
//!   every cell has exactly one result (the server's tiling check recounts counters);
//! - no cell was charged a failed attempt (no engine error happened; the expiries of
//!   the outage are counted apart);
//! - every lease that expired has its result stored: the worker's results crossed
//!   the outage, split into requests the server takes, and none was dropped.
//!
//! The scenario is the one-state tank of the fault test: h' = q − 0.1 h with a
//! network that always picks "on" (q = 0.2), unsafe h ≥ 1.5. Closed form (common
//! practice, linear ODE): h(t) = 2 − (2 − h0) e^{−0.1 t}, so every start in
//! [0.7, 1.0] enters the unsafe set after 6.9–9.6 s, i.e. within 14–20 periods of
//! 0.5 s; at 150 simulation steps per period the counterexample's sampled trajectory
//! has 2,000–3,000 points, tens of kilobytes of JSON per verdict.

use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};
use tessera_tests::bin;

const SERVER_BODY_LIMIT: usize = 1024 * 1024;

fn spawn_server(dir: &Path, port: u16, db: &Path, incarnation: usize) -> Child {
    let log = std::fs::File::create(dir.join(format!("server-{incarnation}.log"))).unwrap();
    let c = Command::new(bin("tessera-server"))
        .args(["serve", "--listen", &format!("127.0.0.1:{port}"), "--lease-seconds", "2", "--sweep-seconds", "1"])
        .arg("--db")
        .arg(db)
        .arg("--bootstrap-token-file")
        .arg(dir.join("admin.token"))
        .stdout(Stdio::null())
        .stderr(log)
        .spawn()
        .unwrap();
    tessera_tests::wait_until_up(&format!("http://127.0.0.1:{port}"));
    c
}

fn get(url: &str, token: &str) -> Value {
    ureq::get(url).set("Authorization", &format!("Bearer {token}")).call().unwrap().into_json().unwrap()
}

/// The most bytes of results the worker's log reported waiting for the server.
fn most_bytes_waiting(log: &Path) -> usize {
    let text = std::fs::read_to_string(log).unwrap_or_default();
    text.lines()
        .filter_map(|l| {
            let i = l.find(" bytes) failed")?;
            let head = &l[..i];
            head[head.rfind('(')? + 1..].parse::<usize>().ok()
        })
        .max()
        .unwrap_or(0)
}

/// The last lines of a log, for failure messages (the temporary folder goes with the test).
fn tail(log: &Path) -> String {
    let text = std::fs::read_to_string(log).unwrap_or_default();
    let lines: Vec<&str> = text.lines().collect();
    lines[lines.len().saturating_sub(20)..].join("\n")
}

fn spec(model_sha: &str) -> Value {
    let mut spec = tessera_tests::tank_spec("outage-tank", model_sha);
    spec["horizon_periods"] = json!(24);
    spec["envelope"] = json!({"h": [0.7, 1.0]});
    spec["engine"] = json!({"sim_steps": 150});
    spec
}

#[test]
fn results_cross_an_outage_longer_than_the_lease_and_larger_than_a_request() {
    let _slow = tessera_tests::slow_test();
    let tmp = tempfile::tempdir().unwrap();
    let dir = tmp.path().to_path_buf();
    let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let url = format!("http://127.0.0.1:{port}");
    let db = dir.join("tessera.sqlite");
    let mut procs = tessera_tests::Procs(vec![spawn_server(&dir, port, &db, 0)]);
    let admin = tessera_tests::read_token(&dir.join("admin.token"));

    let model = tessera_server::model_check::testing::tiny_model(1, 2, "outage");
    let up: Value = ureq::post(&format!("{url}/api/v1/models"))
        .set("Authorization", &format!("Bearer {admin}"))
        .set("Content-Type", "application/octet-stream")
        .send_bytes(&model)
        .unwrap()
        .into_json()
        .unwrap();
    // 32 cells to start with (a uniform cut to depth 5), each cut once more when its
    // counterexample comes back: 96 results in all.
    let created: Value = ureq::post(&format!("{url}/api/v1/campaigns?initial_depth=5"))
        .set("Authorization", &format!("Bearer {admin}"))
        .send_json(spec(up["sha256"].as_str().unwrap()))
        .unwrap()
        .into_json()
        .unwrap();
    let id = created["id"].as_str().unwrap().to_string();
    let tok = Command::new(bin("tessera-server")).args(["token", "create", "--role", "worker", "--db"]).arg(&db).output().unwrap();
    assert!(tok.status.success(), "{}", String::from_utf8_lossy(&tok.stderr));
    let worker_token = String::from_utf8(tok.stdout).unwrap().trim().lines().last().unwrap().to_string();

    let worker_log = dir.join("worker.log");
    procs.0.push(
        Command::new(bin("tessera-worker"))
            .args(["run", "--server", &url, "--threads", "16", "--name", "outage", "--idle-exit", "3"])
            .env("TESSERA_TOKEN", &worker_token)
            .env("RUST_LOG", "info")
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(&worker_log).unwrap())
            .spawn()
            .unwrap(),
    );

    // The outage starts as soon as the worker holds its first 32 leases and has
    // loaded the spec and model (so that it decides the cells while the server is away).
    let cov_url = format!("{url}/api/v1/campaigns/{id}/coverage");
    let t0 = Instant::now();
    loop {
        let cov = get(&cov_url, &admin);
        assert_eq!(cov["results"], 0, "a result arrived before the outage: cells too fast for the test: {cov}");
        let loaded = std::fs::read_to_string(&worker_log).unwrap_or_default().contains("spec and models loaded");
        if loaded && cov["statuses"]["leased"]["cells"] == 32 {
            break;
        }
        assert!(t0.elapsed() < Duration::from_secs(30), "the worker did not lease: {cov}");
        std::thread::sleep(Duration::from_millis(5));
    }
    let mut server = procs.0.remove(0);
    server.kill().unwrap(); // SIGKILL
    server.wait().unwrap();
    let down = Instant::now();
    let killed_ms = now_ms();

    // It ends once the leases have run out (2 s) and more than the body limit waits.
    while down.elapsed() < Duration::from_secs(4) || most_bytes_waiting(&worker_log) <= SERVER_BODY_LIMIT {
        assert!(
            down.elapsed() < Duration::from_secs(120),
            "the worker never held more than {SERVER_BODY_LIMIT} bytes of results (most: {}); its log:\n{}",
            most_bytes_waiting(&worker_log),
            tail(&worker_log)
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    let waiting = most_bytes_waiting(&worker_log);
    let outage_s = down.elapsed().as_secs_f64();
    procs.0.insert(0, spawn_server(&dir, port, &db, 1));

    // The campaign finishes.
    let t1 = Instant::now();
    let cov = loop {
        let cov = get(&cov_url, &admin);
        if cov["state"] != "running" {
            break cov;
        }
        assert!(
            t1.elapsed() < Duration::from_secs(300),
            "the campaign did not finish: {cov}\n{}",
            tail(&worker_log)
        );
        std::thread::sleep(Duration::from_millis(200));
    };
    assert_eq!(cov["state"], "done", "{cov}");
    assert_eq!(cov["statuses"]["failed"]["cells"], 0, "{cov}");
    assert_eq!(cov["results"], 96, "{cov}");
    let tiling = get(&format!("{url}/api/v1/admin/campaigns/{id}/tiling"), &admin);
    assert_eq!(tiling["ok"], true, "{tiling}");

    // Read the file: attempts, expired leases and their results.
    let mut server = procs.0.remove(0);
    // SAFETY: kill(2) on our own child.
    unsafe {
        libc::kill(server.id() as libc::pid_t, libc::SIGTERM);
    }
    assert!(server.wait().unwrap().success());
    let v = DbView::read(&db, &id, killed_ms);
    // 63 cells of the uniform cut to depth 5, and two halves of each of its 32 leaves.
    assert_eq!(v.cells, 63 + 64, "cells of the tree");
    assert_eq!(v.charged, 0, "cells charged a failed attempt by the outage");
    assert!(v.expired >= 16, "only {} leases expired in the outage: the test did not exercise expiry", v.expired);
    assert_eq!(v.expired_without_result, 0, "{} of {} expired leases have no result: results were lost", v.expired_without_result, v.expired);
    assert_eq!(v.decided_cells, 96, "every cell leased has exactly one result, the one it names");
    assert_eq!(v.decided_twice, 0, "cells with more than one result");
    println!(
        "outage of {outage_s:.1} s (leases of 2 s); the worker held {waiting} bytes of results (limit {SERVER_BODY_LIMIT}); \
         {} leases expired, each result delivered afterwards ({} bytes of results leased before and stored after); \
         {} cells (median {:.0} ms of engine time each), none failed, no attempt charged",
        v.expired, v.bytes_across, v.cells, v.median_cell_ms
    );
    assert!(v.bytes_across > SERVER_BODY_LIMIT as i64, "only {} bytes of results crossed the outage", v.bytes_across);
}

fn now_ms() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_millis() as i64
}

struct DbView {
    cells: i64,
    decided_cells: i64,
    decided_twice: i64,
    charged: i64,
    expired: i64,
    expired_without_result: i64,
    bytes_across: i64,
    median_cell_ms: f64,
}

impl DbView {
    fn read(path: &PathBuf, id: &str, killed_ms: i64) -> DbView {
        use sqlx::ConnectOptions;
        let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
        rt.block_on(async {
            let mut c = sqlx::sqlite::SqliteConnectOptions::new().filename(path).read_only(true).connect().await.unwrap();
            let one = |sql: &'static str| sqlx::query_scalar::<_, i64>(sql).bind(id.to_string());
            let cells = one("SELECT COUNT(*) FROM cells WHERE campaign_id = ?").fetch_one(&mut c).await.unwrap();
            let decided_cells = one(
                "SELECT COUNT(*) FROM cells c WHERE campaign_id = ?
                 AND (SELECT COUNT(*) FROM results r WHERE r.cell_id = c.id AND r.kind != 'error') = 1
                 AND c.result_id = (SELECT r.id FROM results r WHERE r.cell_id = c.id AND r.kind != 'error')",
            )
            .fetch_one(&mut c)
            .await
            .unwrap();
            let decided_twice = one(
                "SELECT COUNT(*) FROM (SELECT cell_id FROM results WHERE campaign_id = ? AND kind != 'error'
                 GROUP BY cell_id HAVING COUNT(*) > 1)",
            )
            .fetch_one(&mut c)
            .await
            .unwrap();
            let charged =
                one("SELECT COUNT(*) FROM cells WHERE campaign_id = ? AND attempts > 0").fetch_one(&mut c).await.unwrap();
            let expired = one(
                "SELECT COUNT(*) FROM ended_leases e JOIN cells c ON c.id = e.cell_id
                 WHERE c.campaign_id = ? AND e.reason = 'expired'",
            )
            .fetch_one(&mut c)
            .await
            .unwrap();
            let expired_without_result = one(
                "SELECT COUNT(*) FROM ended_leases e JOIN cells c ON c.id = e.cell_id
                 WHERE c.campaign_id = ? AND e.reason = 'expired'
                 AND NOT EXISTS (SELECT 1 FROM results r WHERE r.lease_id = e.lease_id)",
            )
            .fetch_one(&mut c)
            .await
            .unwrap();
            let bytes_across: i64 = sqlx::query_scalar(
                "SELECT COALESCE(SUM(LENGTH(verdict_json)), 0) FROM results
                 WHERE campaign_id = ? AND leased_at < ? AND received_at > ?",
            )
            .bind(id)
            .bind(killed_ms)
            .bind(killed_ms)
            .fetch_one(&mut c)
            .await
            .unwrap();
            let mut times: Vec<f64> = sqlx::query_scalar("SELECT elapsed_ms FROM results WHERE campaign_id = ? AND elapsed_ms IS NOT NULL")
                .bind(id)
                .fetch_all(&mut c)
                .await
                .unwrap();
            times.sort_by(f64::total_cmp);
            let median_cell_ms = times.get(times.len() / 2).copied().unwrap_or(f64::NAN);
            DbView { median_cell_ms, cells, decided_cells, decided_twice, charged, expired, expired_without_result, bytes_across }
        })
    }
}
