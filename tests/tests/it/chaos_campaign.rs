//! Fault injection: one campaign of several thousand cells, decided by the real engine
//! in real worker processes on loopback, while a chaos loop SIGKILLs a random worker at
//! least 20 times and the server at least 3 times (each restarted; the server on the
//! same SQLite file and port). The campaign must finish, and afterwards, read straight
//! from the database file:
//! - the leaves tile the envelope exactly once (bit-exact f64 ends, sorted chain from the
//!   envelope's low end to its high end) and their exact integer volumes sum to 2^D;
//! - every cell was decided exactly once: one non-error result per cell, its `result_id`
//!   names it, and the campaign's result count equals the number of cells;
//! - the per-status counters equal a recount of the cells, nothing is pending, leased
//!   or failed, and the coverage fractions add up to exactly 1;
//! - every result a worker saw acknowledged (`--ack-log`) is in the results table.
//!
//! The scenario is a one-state tank of our own: h' = q − 0.1 h, a two-output linear
//! network (the server tests' tiny model) that always picks "on" (q = 0.2) on h ∈ [0, 1],
//! unsafe h ≥ 1.5 within 10 s. Closed form (common practice, linear ODE):
//! h(t) = 2 − (2 − h0) e^{−0.1 t}, so starts above 2 − 0.5 e ≈ 0.641 are unsafe; with
//! `refine_unsafe` the unsafe part is bisected to max depth, giving several thousand
//! cells that the engine decides in milliseconds each.
//!
//! The chaos schedule is pseudo-random with a fixed seed (printed; `TESSERA_CHAOS_SEED`
//! overrides it) so that a failure can be replayed.

use serde_json::{json, Value};
use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};
use tessera_tests::bin;

const MAX_DEPTH: u32 = 13;
const WORKERS: usize = 3;
const WORKER_KILLS: usize = 20;
const SERVER_KILLS: usize = 3;


/// Children killed at the end whatever happens.
#[derive(Default)]
struct Procs {
    server: Option<Child>,
    workers: Vec<Option<Child>>,
}
impl Drop for Procs {
    fn drop(&mut self) {
        for c in self.workers.iter_mut().flatten().chain(self.server.as_mut()) {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// xorshift64*: a small fixed-seed generator for the schedule.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
}

struct Setup {
    dir: PathBuf,
    port: u16,
    url: String,
    db: PathBuf,
}

impl Setup {
    fn spawn_server(&self, incarnation: usize) -> Child {
        let log = std::fs::File::create(self.dir.join(format!("server-{incarnation}.log"))).unwrap();
        let c = Command::new(bin("tessera-server"))
            .args(["serve", "--listen", &format!("127.0.0.1:{}", self.port)])
            // Short leases so that a killed worker's cells come back quickly. The
            // attempt and expiry limits are the defaults: kills must not fail a cell.
            .args(["--lease-seconds", "2", "--sweep-seconds", "1"])
            .arg("--db")
            .arg(&self.db)
            .arg("--bootstrap-token-file")
            .arg(self.dir.join("admin.token"))
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .unwrap();
        tessera_tests::wait_until_up(&self.url);
        c
    }

    fn spawn_worker(&self, slot: usize, incarnation: usize, token: &str) -> Child {
        let name = format!("w{slot}-{incarnation}");
        Command::new(bin("tessera-worker"))
            .args(["run", "--server", &self.url, "--threads", "2", "--name", &name])
            .arg("--ack-log")
            .arg(self.dir.join(format!("ack-{name}.log")))
            .env("TESSERA_TOKEN", token)
            .env("RUST_LOG", "warn")
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(self.dir.join(format!("{name}.log"))).unwrap())
            .spawn()
            .unwrap()
    }
}

fn get(url: &str, token: &str) -> Value {
    ureq::get(url).set("Authorization", &format!("Bearer {token}")).call().unwrap().into_json().unwrap()
}

/// GET that tolerates the server being down for a moment (it is restarted by us).
fn get_retry(url: &str, token: &str) -> Value {
    let t0 = Instant::now();
    loop {
        match ureq::get(url).set("Authorization", &format!("Bearer {token}")).call() {
            Ok(r) => return r.into_json().unwrap(),
            Err(e) => {
                assert!(t0.elapsed() < Duration::from_secs(30), "{url}: {e}");
                std::thread::sleep(Duration::from_millis(50));
            }
        }
    }
}

/// The last lines of every process log, for the failure message: the temporary
/// folder is gone once the test has failed.
fn log_tails(dir: &Path) -> String {
    let mut names: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|d| d.flatten().map(|e| e.path()).filter(|p| p.extension().is_some_and(|x| x == "log") && !p.file_name().unwrap().to_string_lossy().starts_with("ack-")).collect())
        .unwrap_or_default();
    names.sort();
    let mut out = String::new();
    for p in names {
        let text = std::fs::read_to_string(&p).unwrap_or_default();
        let lines: Vec<&str> = text.lines().collect();
        out.push_str(&format!("--- {} ({} lines)\n", p.file_name().unwrap().to_string_lossy(), lines.len()));
        for l in &lines[lines.len().saturating_sub(12)..] {
            out.push_str(l);
            out.push('\n');
        }
    }
    out
}

fn write_model(dir: &Path) -> Vec<u8> {
    let m = tessera_server::model_check::testing::tiny_model(1, 2, "chaos");
    std::fs::write(dir.join("tank.onnx"), &m).unwrap();
    m
}

fn tank_spec(model_sha: &str) -> Value {
    let mut spec = tessera_tests::tank_spec("chaos-tank", model_sha);
    spec["refinement"]["max_depth"] = json!(MAX_DEPTH);
    spec
}

#[test]
fn campaign_survives_worker_and_server_kills_and_loses_nothing() {
    let _slow = tessera_tests::slow_test();
    let seed: u64 = std::env::var("TESSERA_CHAOS_SEED").ok().and_then(|s| s.parse().ok()).unwrap_or(20261202);
    let tmp = tempfile::tempdir().unwrap();
    let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let s = Setup {
        dir: tmp.path().to_path_buf(),
        port,
        url: format!("http://127.0.0.1:{port}"),
        db: tmp.path().join("tessera.sqlite"),
    };
    let mut procs = Procs::default();
    let mut server_incarnation = 0;
    procs.server = Some(s.spawn_server(server_incarnation));
    let admin = tessera_tests::read_token(&s.dir.join("admin.token"));

    let model = write_model(&s.dir);
    let up: Value = ureq::post(&format!("{}/api/v1/models", s.url))
        .set("Authorization", &format!("Bearer {admin}"))
        .set("Content-Type", "application/octet-stream")
        .send_bytes(&model)
        .unwrap()
        .into_json()
        .unwrap();
    let sha = up["sha256"].as_str().unwrap().to_string();
    let created: Value = ureq::post(&format!("{}/api/v1/campaigns", s.url))
        .set("Authorization", &format!("Bearer {admin}"))
        .send_json(tank_spec(&sha))
        .unwrap()
        .into_json()
        .unwrap();
    let id = created["id"].as_str().unwrap().to_string();
    let tok = Command::new(bin("tessera-server")).args(["token", "create", "--role", "worker", "--db"]).arg(&s.db).output().unwrap();
    assert!(tok.status.success(), "{}", String::from_utf8_lossy(&tok.stderr));
    let worker_token = String::from_utf8(tok.stdout).unwrap().trim().lines().last().unwrap().to_string();

    let mut incarnations = vec![0usize; WORKERS];
    for slot in 0..WORKERS {
        procs.workers.push(Some(s.spawn_worker(slot, 0, &worker_token)));
    }

    // The chaos loop: one event every 0.3–1.2 s; about one event in eight kills the
    // server. It stops killing once both quotas are met; every kill must land while
    // the campaign is still running.
    let cov_url = format!("{}/api/v1/campaigns/{id}/coverage", s.url);
    let t0 = Instant::now();
    let mut rng = Rng(seed | 1);
    let (mut worker_kills, mut server_kills) = (0usize, 0usize);
    while worker_kills < WORKER_KILLS || server_kills < SERVER_KILLS {
        std::thread::sleep(Duration::from_millis(300 + rng.below(900)));
        let cov = get_retry(&cov_url, &admin);
        assert_eq!(
            cov["state"], "running",
            "the campaign ended after {worker_kills} worker and {server_kills} server kills: too small for the schedule"
        );
        let kill_server = server_kills < SERVER_KILLS && (rng.below(8) == 0 || worker_kills >= WORKER_KILLS);
        if kill_server {
            let mut c = procs.server.take().unwrap();
            c.kill().unwrap(); // SIGKILL
            c.wait().unwrap();
            server_kills += 1;
            server_incarnation += 1;
            procs.server = Some(s.spawn_server(server_incarnation));
        } else if worker_kills < WORKER_KILLS {
            let slot = rng.below(WORKERS as u64) as usize;
            let mut c = procs.workers[slot].take().unwrap();
            c.kill().unwrap(); // SIGKILL
            c.wait().unwrap();
            worker_kills += 1;
            incarnations[slot] += 1;
            procs.workers[slot] = Some(s.spawn_worker(slot, incarnations[slot], &worker_token));
        }
    }
    let chaos_s = t0.elapsed().as_secs_f64();

    // Let the campaign finish; a minute without a new result is a stall, not slowness.
    let (mut last_results, mut last_progress) = (-1i64, Instant::now());
    let cov = loop {
        let cov = get(&cov_url, &admin);
        if cov["state"] != "running" {
            break cov;
        }
        let results = cov["results"].as_i64().unwrap_or(0);
        if results != last_results {
            (last_results, last_progress) = (results, Instant::now());
        }
        assert!(
            last_progress.elapsed() < Duration::from_secs(60) && t0.elapsed() < Duration::from_secs(600),
            "the campaign did not finish ({:.0} s since the last new result): {cov}\n{}",
            last_progress.elapsed().as_secs_f64(),
            log_tails(&s.dir)
        );
        std::thread::sleep(Duration::from_millis(200));
    };
    let total_s = t0.elapsed().as_secs_f64();
    assert_eq!(cov["state"], "done", "{cov}");

    // Coverage fractions (exact integer volumes) add up to exactly 1.
    let total = cov["total_volume"].as_i64().unwrap();
    assert_eq!(total, 1i64 << MAX_DEPTH);
    let mut sum = 0;
    for (status, v) in cov["statuses"].as_object().unwrap() {
        let vol = v["volume"].as_i64().unwrap();
        if matches!(status.as_str(), "pending" | "leased" | "failed") {
            assert_eq!(vol, 0, "cells left {status} after the campaign ended: {cov}");
        }
        sum += vol;
    }
    assert_eq!(sum, total, "the fractions must add up to exactly 1: {cov}");
    let tiling = get(&format!("{}/api/v1/admin/campaigns/{id}/tiling", s.url), &admin);
    assert_eq!(tiling["ok"], true, "server's tiling check: {tiling}");

    // Stop everything, then read the database file ourselves.
    for c in procs.workers.iter_mut().flatten() {
        let _ = c.kill();
        let _ = c.wait();
    }
    let mut srv = procs.server.take().unwrap();
    // SAFETY: kill(2) on our own child.
    unsafe {
        libc::kill(srv.id() as libc::pid_t, libc::SIGTERM);
    }
    assert!(srv.wait().unwrap().success(), "server did not stop cleanly");

    let mut acked: HashSet<String> = HashSet::new();
    let mut ack_lines = 0usize;
    for e in std::fs::read_dir(&s.dir).unwrap() {
        let p = e.unwrap().path();
        if p.file_name().unwrap().to_string_lossy().starts_with("ack-") {
            for l in std::fs::read_to_string(&p).unwrap().lines() {
                ack_lines += 1;
                acked.insert(l.to_string());
            }
        }
    }

    let db = DbView::read(&s.db, &id);
    let n_cells = db.cells.len();
    println!(
        "chaos: seed {seed}; {worker_kills} worker kills and {server_kills} server kills in {chaos_s:.1} s; \
         campaign of {n_cells} cells ({} leaves) done in {total_s:.1} s; {} results acknowledged to workers \
         ({ack_lines} log lines), {} result rows",
        db.cells.iter().filter(|c| c.status != "split").count(),
        acked.len(),
        db.results.len()
    );
    assert!(n_cells >= 2000, "only {n_cells} cells: the scenario should have several thousand");

    db.check_tiling(MAX_DEPTH);
    db.check_counted_once();
    db.check_counters();
    let stored: HashSet<&str> = db.results.iter().map(|r| r.lease_id.as_str()).collect();
    let lost: Vec<&String> = acked.iter().filter(|l| !stored.contains(l.as_str())).collect();
    assert!(lost.is_empty(), "{} acknowledged results are not in the database, e.g. {:?}", lost.len(), &lost[..lost.len().min(5)]);
    assert!(acked.len() * 10 >= db.results.len() * 9, "too few acknowledgements logged ({}) for {} results", acked.len(), db.results.len());
    println!("chaos: 0 lost cells, 0 acknowledged results lost, leaves tile the envelope exactly once");
}

struct CellRow {
    id: String,
    parent: Option<String>,
    depth: u32,
    lo: f64,
    hi: f64,
    status: String,
    result_id: Option<String>,
}

struct ResultRow {
    id: String,
    cell_id: String,
    lease_id: String,
    kind: String,
}

/// The campaign's rows, read with sqlx from the file the server wrote.
struct DbView {
    cells: Vec<CellRow>,
    results: Vec<ResultRow>,
    results_count: i64,
    counters: HashMap<String, (i64, i64)>,
}

impl DbView {
    fn read(path: &Path, id: &str) -> DbView {
        use sqlx::{ConnectOptions, Row};
        let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
        rt.block_on(async {
            let mut c = sqlx::sqlite::SqliteConnectOptions::new().filename(path).read_only(true).connect().await.unwrap();
            let cells = sqlx::query("SELECT id, parent_id, depth, box, status, result_id FROM cells WHERE campaign_id = ?")
                .bind(id)
                .fetch_all(&mut c)
                .await
                .unwrap()
                .iter()
                .map(|r| {
                    let b: Vec<u8> = r.get(3);
                    assert_eq!(b.len(), 16, "one split dimension: 16 bytes of box");
                    CellRow {
                        id: r.get(0),
                        parent: r.get(1),
                        depth: r.get::<i64, _>(2) as u32,
                        lo: f64::from_le_bytes(b[0..8].try_into().unwrap()),
                        hi: f64::from_le_bytes(b[8..16].try_into().unwrap()),
                        status: r.get(4),
                        result_id: r.get(5),
                    }
                })
                .collect();
            let results = sqlx::query("SELECT id, cell_id, lease_id, kind FROM results WHERE campaign_id = ?")
                .bind(id)
                .fetch_all(&mut c)
                .await
                .unwrap()
                .iter()
                .map(|r| ResultRow { id: r.get(0), cell_id: r.get(1), lease_id: r.get(2), kind: r.get(3) })
                .collect();
            let results_count: i64 =
                sqlx::query_scalar("SELECT results_count FROM campaigns WHERE id = ?").bind(id).fetch_one(&mut c).await.unwrap();
            let counters = sqlx::query("SELECT status, cells, volume FROM campaign_counters WHERE campaign_id = ?")
                .bind(id)
                .fetch_all(&mut c)
                .await
                .unwrap()
                .iter()
                .map(|r| (r.get::<String, _>(0), (r.get::<i64, _>(1), r.get::<i64, _>(2))))
                .collect();
            DbView { cells, results, results_count, counters }
        })
    }

    /// The leaves, sorted by their low end, chain bit-exactly from 0 to 1; each has the
    /// width of its depth; every split cell has exactly two children.
    fn check_tiling(&self, max_depth: u32) {
        let mut children: HashMap<&str, usize> = HashMap::new();
        for c in &self.cells {
            if let Some(p) = &c.parent {
                *children.entry(p.as_str()).or_default() += 1;
            }
        }
        let roots = self.cells.iter().filter(|c| c.parent.is_none()).count();
        assert_eq!(roots, 1, "exactly one root cell");
        for c in &self.cells {
            let n = children.get(c.id.as_str()).copied().unwrap_or(0);
            let want = if c.status == "split" { 2 } else { 0 };
            assert_eq!(n, want, "cell {} ({}) has {n} children", c.id, c.status);
            assert!(c.depth <= max_depth);
        }
        let mut leaves: Vec<&CellRow> = self.cells.iter().filter(|c| c.status != "split").collect();
        leaves.sort_by(|a, b| a.lo.total_cmp(&b.lo));
        assert_eq!(leaves[0].lo.to_bits(), 0.0f64.to_bits(), "the first leaf starts at the envelope's low end");
        assert_eq!(leaves.last().unwrap().hi.to_bits(), 1.0f64.to_bits(), "the last leaf ends at the envelope's high end");
        for w in leaves.windows(2) {
            assert_eq!(w[0].hi.to_bits(), w[1].lo.to_bits(), "gap or overlap between leaves {} and {}", w[0].id, w[1].id);
        }
        let mut volume: i64 = 0;
        for l in &leaves {
            // Bisection of [0, 1] gives dyadic ends: the width is exactly 2^-depth.
            assert_eq!(l.hi - l.lo, 0.5f64.powi(l.depth as i32), "leaf {} width vs depth {}", l.id, l.depth);
            volume += 1i64 << (max_depth - l.depth);
        }
        assert_eq!(volume, 1i64 << max_depth, "leaf volumes sum to the envelope exactly");
    }

    /// One non-error result per cell (leaves and split cells were each decided once),
    /// named by the cell, and the campaign's count equals the number of results.
    fn check_counted_once(&self) {
        let mut per_cell: HashMap<&str, Vec<&ResultRow>> = HashMap::new();
        for r in self.results.iter().filter(|r| r.kind != "error") {
            per_cell.entry(r.cell_id.as_str()).or_default().push(r);
        }
        for c in &self.cells {
            let rs = per_cell.get(c.id.as_str()).map(Vec::as_slice).unwrap_or(&[]);
            assert_eq!(rs.len(), 1, "cell {} ({}) has {} results", c.id, c.status, rs.len());
            assert_eq!(c.result_id.as_deref(), Some(rs[0].id.as_str()), "cell {} names another result", c.id);
        }
        assert_eq!(per_cell.len(), self.cells.len(), "results for cells that do not exist");
        let decided = self.results.iter().filter(|r| r.kind != "error").count() as i64;
        assert_eq!(self.results_count, decided, "the campaign's result count");
    }

    /// The stored per-status counters equal a recount of the cells.
    fn check_counters(&self) {
        let max_depth = MAX_DEPTH;
        let mut recount: HashMap<String, (i64, i64)> = HashMap::new();
        for c in &self.cells {
            let e = recount.entry(c.status.clone()).or_default();
            e.0 += 1;
            if c.status != "split" {
                e.1 += 1i64 << (max_depth - c.depth);
            }
        }
        for (status, &(cells, volume)) in &self.counters {
            let want = recount.get(status).copied().unwrap_or((0, 0));
            assert_eq!((cells, volume), want, "counter of {status}");
        }
        for status in recount.keys() {
            assert!(self.counters.contains_key(status), "no counter for {status}");
        }
        for s in ["pending", "leased", "failed"] {
            assert!(!recount.contains_key(s), "{} cells left {s}", recount[s].0);
        }
    }
}
