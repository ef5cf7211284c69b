//! Throughput benchmark of the campaign server (not a test).
//!
//! N synthetic workers on loopback lease batches, answer at once and submit, for a
//! fixed time; prints sustained cells/s and lease/submit latency percentiles. Then,
//! in the same run, the raw rate of the same batched SQLite work without HTTP.
//!
//!     cargo run --release -p tessera-server --example bench_server -- [--workers 8,64,256] [--seconds 15] [--batch 32] [--separate]
//!
//! `--separate` runs the synthetic workers in a process of their own (this program
//! again, with `--drive URL` and the worker token in `TESSERA_BENCH_TOKEN`), so that the
//! server's process serves HTTP only.
//!
//! Verdicts are a deterministic function of the cell id: half inconclusive (split),
//! three eighths safe, one eighth unsafe, so the queue neither drains nor explodes.
//! They have the size of the demo's stored verdicts: about 0.6 KB for safe and
//! inconclusive ones with their stats, about 20 KB for an unsafe one (most of it the
//! counterexample's sampled trajectory), 3 KB on average. The texts are made once and
//! pasted into the request bodies, so the synthetic workers cost little.

use http_body_util::{BodyExt, Full};
use hyper::body::Bytes;
use hyper_util::client::legacy::Client;
use hyper_util::rt::TokioExecutor;
use serde_json::{json, Value};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tessera_server::auth::Role;
use tessera_protocol::ResultItem;
use tessera_server::leases;
use tessera_server::writer::Writer;
use tessera_server::Config;

/// The three verdict texts, made once.
struct Verdicts {
    inconclusive: String,
    safe: String,
    unsafe_: String,
}

fn stats(k: u64) -> Value {
    json!({"tree_nodes": 412 + k, "periods_reached": 7, "max_branches": 3, "wall_ms": 83.61274512,
           "plant_ms": 21.40913375, "network_ms": 38.11802004, "falsify_ms": 17.53390016, "simulations": 24,
           "repeats": 5, "method": "constrained", "probe_ms": 2.716603})
}

impl Verdicts {
    fn new() -> Verdicts {
        let inconclusive = json!({"verdict": "inconclusive", "reason": "unsafe_not_excluded",
            "detail": "an enclosure may meet unsafe region 0 in period 7 (sub-step 3 of 4) on 3 of 5 branches",
            "split_hint": {"dim": "h", "score": 0.7312118}, "stats": stats(1), "engine_version": "0.1.0"});
        let safe = json!({"verdict": "safe", "detail": "every branch stays out of the unsafe set for 24 periods",
            "stats": stats(2), "engine_version": "0.1.0"});
        // A counterexample entering the unsafe set after 16 periods of 0.5 s, with 17
        // samples per period.
        let trajectory: Vec<Value> = (0..272)
            .map(|i| {
                let t = i as f64 * (0.5 / 17.0);
                json!({"t": t, "x": [0.6180339887498949 + 0.0123456789 * t.sin(), -0.3183098861837907 * (t * 0.37).cos()]})
            })
            .collect();
        let unsafe_ = json!({"verdict": "unsafe",
            "detail": "counterexample enters unsafe region 0 at t = 7.9853 s",
            "counterexample": {"initial_state": {"h": 0.6180339887498949, "v": -0.3183098861837907},
                "initial_command": "off",
                "disturbances": {"w": (0..24).map(|k| 0.01 * (k as f64).sin()).collect::<Vec<f64>>()},
                "noise": {"level": (0..24).map(|k| -0.002 * (k as f64).cos()).collect::<Vec<f64>>()},
                "commands": (0..24).map(|k| if k % 3 == 0 { "off" } else { "on" }).collect::<Vec<&str>>(),
                "trajectory": trajectory, "entry_time": 7.985294117647058,
                "proven_unsafe_during": [7.98, 8.0], "unsafe_region": 0, "found_by": "sampling"},
            "stats": stats(3), "engine_version": "0.1.0"});
        Verdicts { inconclusive: inconclusive.to_string(), safe: safe.to_string(), unsafe_: unsafe_.to_string() }
    }

    /// The verdict of a cell, by its id: 4 in 8 inconclusive, 3 safe, 1 unsafe.
    fn for_cell(&self, cell_id: &str) -> &str {
        match cell_id.bytes().fold(0u32, |h, b| h.wrapping_mul(31).wrapping_add(b as u32)) % 8 {
            0..=3 => &self.inconclusive,
            4..=6 => &self.safe,
            _ => &self.unsafe_,
        }
    }

    fn mean_bytes(&self) -> f64 {
        (4 * self.inconclusive.len() + 3 * self.safe.len() + self.unsafe_.len()) as f64 / 8.0
    }
}

fn spec(model: &str) -> Value {
    json!({
        "name": "bench",
        "states": [{"name": "h"}, {"name": "v"}],
        "inputs": [{"name": "q"}],
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
        "envelope": {"h": [0.0, 1.0], "v": [0.0, 1.0]},
        // Cells with a counterexample stay leaves, as when BENCHMARKS.md's figures were measured.
        "refinement": {"max_depth": 60, "split": ["h", "v"], "refine_unsafe": false}
    })
}

/// `12345` → `12,345`.
fn grouped(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::new();
    for (i, ch) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

fn pct(v: &mut [f64], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(|a, b| a.total_cmp(b));
    v[((v.len() as f64 - 1.0) * p).round() as usize]
}

/// Cells per second over HTTP.
async fn http_run(workers: usize, seconds: u64, batch: u32, verdicts: Arc<Verdicts>, separate: bool) -> anyhow::Result<f64> {
    let dir = tempfile::tempdir()?;
    let mut cfg = Config::for_tests(dir.path().join("bench.sqlite"));
    cfg.max_lease_batch = batch.max(1);
    let server = tessera_server::start(cfg).await?;
    let store = server.state.store.clone();
    let sub = store.create_token(Role::Submitter, "bench").await.map_err(|e| anyhow::anyhow!(e.detail))?;
    let work = store.create_token(Role::Worker, "bench").await.map_err(|e| anyhow::anyhow!(e.detail))?;
    let base = server.url();
    let client: Client<_, Full<Bytes>> = Client::builder(TokioExecutor::new()).build_http();
    let model = tessera_server::model_check::testing::tiny_model(1, 2, "bench");
    let m = call(&client, format!("{base}/api/v1/models"), sub.clone(), model).await?;
    let model = m["sha256"].as_str().unwrap_or_default().to_string();
    call(&client, format!("{base}/api/v1/campaigns?initial_depth=14"), sub.clone(), spec(&model).to_string().into_bytes())
        .await?;

    let d = if separate {
        // The synthetic workers in a process of their own: this binary again, with
        // `--drive`, printing its figures as one JSON line.
        let out = tokio::process::Command::new(std::env::current_exe()?)
            .args(["--drive", &base, "--workers", &workers.to_string(), "--seconds", &seconds.to_string()])
            .env("TESSERA_BENCH_TOKEN", &work)
            .args(["--batch", &batch.to_string()])
            .output()
            .await?;
        anyhow::ensure!(out.status.success(), "the workers' process failed: {}", String::from_utf8_lossy(&out.stderr));
        serde_json::from_slice::<Driven>(&out.stdout)?
    } else {
        drive(&base, &work, workers, seconds, batch, verdicts).await?
    };
    let (n, elapsed) = (d.cells, d.seconds);
    let c = server.state.writer.counts();
    println!(
        "http  workers={workers:4} batch={batch:3}  {:>9.0} cells/s  ({n} cells in {elapsed:.1} s)  lease p50 {:.2} ms p99 {:.2} ms  submit p50 {:.2} ms p99 {:.2} ms",
        n as f64 / elapsed,
        d.lease_ms[0],
        d.lease_ms[1],
        d.submit_ms[0],
        d.submit_ms[1],
    );
    println!(
        "      writer: {} group transactions, {:.1} requests each on average; busy {:.0}% of the run: \
         requests {:.0}%, COMMIT {:.0}% ({:.2} ms per COMMIT)",
        c.groups,
        c.requests as f64 / c.groups.max(1) as f64,
        100.0 * (c.work_seconds + c.commit_seconds) / elapsed,
        100.0 * c.work_seconds / elapsed,
        100.0 * c.commit_seconds / elapsed,
        1e3 * c.commit_seconds / c.groups.max(1) as f64,
    );
    server.stop().await?;
    Ok(n as f64 / elapsed)
}

type Http = Client<hyper_util::client::legacy::connect::HttpConnector, Full<Bytes>>;

/// POST `body` to `path` with `token`; the answer's JSON.
async fn call(client: &Http, path: String, token: String, body: Vec<u8>) -> anyhow::Result<Value> {
    let req = hyper::Request::post(path)
        .header("authorization", format!("Bearer {token}"))
        .header("content-type", "application/json")
        .body(Full::new(Bytes::from(body)))?;
    let resp = client.request(req).await?;
    let status = resp.status();
    let bytes = resp.into_body().collect().await?.to_bytes();
    anyhow::ensure!(status.is_success(), "{status}: {}", String::from_utf8_lossy(&bytes));
    Ok(serde_json::from_slice(&bytes)?)
}

/// What the synthetic workers did: results accepted, seconds, lease and submit
/// latency (p50, p99) in milliseconds.
#[derive(serde::Serialize, serde::Deserialize)]
struct Driven {
    cells: u64,
    seconds: f64,
    lease_ms: [f64; 2],
    submit_ms: [f64; 2],
}

/// `workers` synthetic workers against the server at `base` for `seconds`.
async fn drive(base: &str, work: &str, workers: usize, seconds: u64, batch: u32, verdicts: Arc<Verdicts>) -> anyhow::Result<Driven> {
    let client: Http = Client::builder(TokioExecutor::new()).build_http();
    let done = Arc::new(AtomicU64::new(0));
    let deadline = Instant::now() + Duration::from_secs(seconds);
    let t0 = Instant::now();
    let mut tasks = Vec::new();
    for w in 0..workers {
        let (client, base, work, done, verdicts) = (client.clone(), base.to_string(), work.to_string(), done.clone(), verdicts.clone());
        tasks.push(tokio::spawn(async move {
            let mut lease_lat = Vec::new();
            let mut submit_lat = Vec::new();
            let name = format!("bench-{w}");
            while Instant::now() < deadline {
                let t = Instant::now();
                let body = json!({"max": batch, "worker": name}).to_string().into_bytes();
                let r = call(&client, format!("{base}/api/v1/leases"), work.clone(), body).await?;
                lease_lat.push(t.elapsed().as_secs_f64());
                let cells = r["leases"].as_array().cloned().unwrap_or_default();
                if cells.is_empty() {
                    tokio::time::sleep(Duration::from_millis(5)).await;
                    continue;
                }
                let mut body = format!(r#"{{"worker":"{name}","engine_version":"bench","results":["#);
                for (i, c) in cells.iter().enumerate() {
                    if i > 0 {
                        body.push(',');
                    }
                    let verdict = verdicts.for_cell(c["cell_id"].as_str().unwrap_or(""));
                    body.push_str(&format!(r#"{{"lease_id":"{}","result":{verdict}}}"#, c["lease_id"].as_str().unwrap_or("")));
                }
                body.push_str("]}");
                let body = body.into_bytes();
                let t = Instant::now();
                let r = call(&client, format!("{base}/api/v1/results"), work.clone(), body).await?;
                submit_lat.push(t.elapsed().as_secs_f64());
                done.fetch_add(r["accepted"].as_u64().unwrap_or(0), Ordering::Relaxed);
            }
            Ok::<_, anyhow::Error>((lease_lat, submit_lat))
        }));
    }
    let mut lease_lat = Vec::new();
    let mut submit_lat = Vec::new();
    for t in tasks {
        let (l, s) = t.await??;
        lease_lat.extend(l);
        submit_lat.extend(s);
    }
    let elapsed = t0.elapsed().as_secs_f64();
    Ok(Driven {
        cells: done.load(Ordering::Relaxed),
        seconds: elapsed,
        lease_ms: [pct(&mut lease_lat, 0.5) * 1e3, pct(&mut lease_lat, 0.99) * 1e3],
        submit_ms: [pct(&mut submit_lat, 0.5) * 1e3, pct(&mut submit_lat, 0.99) * 1e3],
    })
}

/// The same lease/submit transactions, called directly on the store.
async fn raw_run(seconds: u64, batch: u32, verdicts: &Verdicts) -> anyhow::Result<()> {
    let dir = tempfile::tempdir()?;
    let cfg = Config::for_tests(dir.path().join("raw.sqlite"));
    let store = tessera_server::Store::open(&cfg.db).await?;
    let sha = store
        .put_model(&tessera_server::model_check::testing::tiny_model(1, 2, "raw"), Some(1), Some(2))
        .await
        .map_err(|e| anyhow::anyhow!(e.detail))?;
    tessera_server::campaigns::create(
        &store,
        60,
        u64::MAX / 4,
        spec(&sha).to_string().as_bytes(),
        tessera_server::campaigns::CreateOptions { priority: 0, initial_depth: 14, follow_up: None },
    )
    .await
    .map_err(|e| anyhow::anyhow!(e.detail))?;
    let limits = leases::QueueLimits { lease_ms: 120_000, max_attempts: 3, max_expiries: 10, max_cells_per_campaign: u64::MAX / 4 };
    let t0 = Instant::now();
    let mut n = 0u64;
    let (mut t_lease, mut t_submit) = (0.0, 0.0);
    while t0.elapsed() < Duration::from_secs(seconds) {
        let t = Instant::now();
        let (cells, _) = Writer::lease_alone(&store, limits, batch, "raw").await.map_err(|e| anyhow::anyhow!(e.detail))?;
        t_lease += t.elapsed().as_secs_f64();
        let t = Instant::now();
        let items: Vec<ResultItem> = cells
            .iter()
            .map(|c| ResultItem {
                lease_id: c.lease_id.clone(),
                cell_id: Some(c.cell_id.clone()),
                result: serde_json::from_str(verdicts.for_cell(&c.cell_id)).expect("verdict JSON"),
                elapsed_ms: None,
            })
            .collect();
        let (_, stats) =
            Writer::submit_alone(&store, limits, "raw", Some("bench"), &items).await.map_err(|e| anyhow::anyhow!(e.detail))?;
        n += stats.accepted;
        t_submit += t.elapsed().as_secs_f64();
    }
    let elapsed = t0.elapsed().as_secs_f64();
    println!(
        "raw   (no HTTP)     batch={batch:3}  {:>9.0} cells/s  ({n} cells in {elapsed:.1} s; lease {:.0}%, submit {:.0}% of the time)",
        n as f64 / elapsed,
        100.0 * t_lease / elapsed,
        100.0 * t_submit / elapsed
    );
    store.close().await;
    Ok(())
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let arg = |name: &str| args.iter().position(|a| a == name).and_then(|i| args.get(i + 1)).cloned();
    let workers: Vec<usize> = arg("--workers")
        .unwrap_or_else(|| "8,64,256".into())
        .split(',')
        .filter_map(|s| s.trim().parse().ok())
        .collect();
    let seconds: u64 = arg("--seconds").and_then(|s| s.parse().ok()).unwrap_or(15);
    let batch: u32 = arg("--batch").and_then(|s| s.parse().ok()).unwrap_or(32);
    let verdicts = Arc::new(Verdicts::new());
    if let Some(i) = args.iter().position(|a| a == "--drive") {
        // The workers' process of `--separate`: drive the server named, print the figures.
        let base = args.get(i + 1).cloned().unwrap_or_default();
        let work = std::env::var("TESSERA_BENCH_TOKEN").unwrap_or_default();
        let w = workers.first().copied().unwrap_or(1);
        println!("{}", serde_json::to_string(&drive(&base, &work, w, seconds, batch, verdicts).await?)?);
        return Ok(());
    }
    let separate = args.iter().any(|a| a == "--separate");
    println!(
        "tessera-server benchmark: {seconds} s per run, loopback, {}; verdicts of {} / {} / {} bytes \
         (inconclusive / safe / unsafe), {:.0} bytes on average; load average {}",
        if separate { "synthetic workers in a process of their own" } else { "server and workers in one process" },
        verdicts.inconclusive.len(),
        verdicts.safe.len(),
        verdicts.unsafe_.len(),
        verdicts.mean_bytes(),
        std::fs::read_to_string("/proc/loadavg").unwrap_or_default().split_whitespace().take(3).collect::<Vec<_>>().join(" ")
    );
    let mut rates = Vec::new();
    for w in workers {
        rates.push((w, http_run(w, seconds, batch, verdicts.clone(), separate).await?));
    }
    raw_run(seconds.min(10), batch, &verdicts).await?;
    raw_run(seconds.min(10), 256, &verdicts).await?;
    for (w, r) in rates {
        println!("sqlite, {} workers: {} cells/s over HTTP", grouped(w as u64), grouped(r.round() as u64));
    }
    Ok(())
}
