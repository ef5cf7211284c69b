//! Benchmark of follow-up campaigns (not a test): how much sooner a retrained
//! controller bank reaches the same proven-safe fraction when its campaign starts from
//! the previous campaign's partition instead of the whole envelope.
//!
//!     cargo run --release -p tessera-server --example bench_followup -- \
//!         [--scenario aisle|lander|heading] [--depth D] [--horizon N] [--seed S] [--threads T]
//!
//! Steps, with an in-process server and an in-process worker (T engine threads):
//! 1. campaign A: the committed demo bank (`demo/SCENARIO/`, read at run time), to the
//!    end, with `max_depth` D and unsafe cells cut to max_depth (`refine_unsafe`);
//! 2. the bank retrained with seed S (`python3 demo/retrain.py`, into a temp folder);
//! 3. campaign B from the root with the retrained bank, to the end;
//! 4. campaign B' with the retrained bank as a follow-up of A, to the end.
//!
//! Printed: for B and B', the time until the proven-safe fraction first reached 50 %,
//! 90 % and 100 % of the target (the lower of the two final safe fractions), with the
//! number of results by then, the time to the end, and B' against A (the exact diff
//! summary). Coverage is polled every 50 ms.

use serde_json::Value;
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use std::time::{Duration, Instant};
use tessera_server::auth::Role;
use tessera_server::campaigns::{self, CreateOptions};
use tessera_server::views;
use tessera_server::{Config, Store};
use tessera_worker::client::run::{run, RunOptions};

struct Args {
    scenario: String,
    depth: u32,
    horizon: Option<u64>,
    seed: u64,
    threads: usize,
}

fn parse_args() -> anyhow::Result<Args> {
    let mut a = Args { scenario: "aisle".into(), depth: 8, horizon: None, seed: 20301, threads: 2 };
    let mut it = std::env::args().skip(1);
    while let Some(k) = it.next() {
        let mut val = || it.next().ok_or_else(|| anyhow::anyhow!("{k} needs a value"));
        match k.as_str() {
            "--scenario" => a.scenario = val()?,
            "--depth" => a.depth = val()?.parse()?,
            "--horizon" => a.horizon = Some(val()?.parse()?),
            "--seed" => a.seed = val()?.parse()?,
            "--threads" => a.threads = val()?.parse()?,
            _ => anyhow::bail!("unknown argument {k}"),
        }
    }
    anyhow::ensure!(["aisle", "lander", "heading"].contains(&a.scenario.as_str()), "--scenario is aisle, lander or heading");
    Ok(a)
}

/// The scenario's spec with the benchmark's depth and horizon, its networks uploaded.
async fn prepared_spec(store: &Store, spec_path: &Path, args: &Args) -> anyhow::Result<Vec<u8>> {
    let mut spec: Value = serde_json::from_str(&std::fs::read_to_string(spec_path)?)?;
    spec["refinement"]["max_depth"] = args.depth.into();
    spec["refinement"]["refine_unsafe"] = true.into();
    if let Some(h) = args.horizon {
        spec["horizon_periods"] = h.into();
    }
    let base = spec_path.parent().unwrap_or(Path::new("."));
    let nets: Vec<String> = spec["controller"]["networks"]
        .as_array()
        .ok_or_else(|| anyhow::anyhow!("{}: controller.networks is not a list", spec_path.display()))?
        .iter()
        .map(|n| n.as_str().unwrap_or("").to_string())
        .collect();
    let mut refs = Vec::new();
    for n in nets {
        let bytes = std::fs::read(base.join(&n))?;
        let shape = campaigns::inspect_upload(&bytes).map_err(|e| anyhow::anyhow!("{n}: {}", e.detail))?;
        let sha = store.put_model(&bytes, Some(shape.inputs), Some(shape.outputs)).await.map_err(|e| anyhow::anyhow!(e.detail))?;
        refs.push(Value::String(format!("sha256:{sha}")));
    }
    spec["controller"]["networks"] = Value::Array(refs);
    Ok(serde_json::to_vec(&spec)?)
}

/// One campaign run to the end: (seconds, safe fraction, results so far) at each poll.
struct Trace {
    id: String,
    points: Vec<(f64, f64, i64)>,
}

impl Trace {
    fn final_safe(&self) -> f64 {
        self.points.last().map(|p| p.1).unwrap_or(0.0)
    }
    /// First poll at which the safe fraction reached `target`.
    fn reach(&self, target: f64) -> Option<(f64, i64)> {
        self.points.iter().find(|p| p.1 >= target).map(|p| (p.0, p.2))
    }
    fn end(&self) -> (f64, i64) {
        self.points.last().map(|p| (p.0, p.2)).unwrap_or((0.0, 0))
    }
}

async fn run_campaign(
    store: &Arc<Store>,
    url: &str,
    worker_token: &str,
    body: &[u8],
    follow_up: Option<&str>,
    threads: usize,
) -> anyhow::Result<Trace> {
    let t0 = Instant::now();
    let c = campaigns::create(store, 60, 20_000_000, body, CreateOptions { priority: 0, initial_depth: 0, follow_up })
        .await
        .map_err(|e| anyhow::anyhow!("{}: {}", e.error, e.detail))?;
    let id = c["id"].as_str().unwrap_or("").to_string();
    let opts = RunOptions {
        server: url.to_string(),
        token: worker_token.to_string(),
        threads,
        name: "bench".into(),
        max_cells: None,
        idle_exit: Some(Duration::from_millis(1500)),
        ack_log: None,
    };
    let worker = std::thread::spawn(move || run(opts, Arc::new(AtomicBool::new(false))));
    let mut points = Vec::new();
    loop {
        let cov = views::coverage(store, &id).await.map_err(|e| anyhow::anyhow!(e.detail))?;
        let safe = cov.fraction(tessera_protocol::CellStatus::Safe);
        points.push((t0.elapsed().as_secs_f64(), safe, cov.results));
        if cov.state != tessera_protocol::CampaignState::Running {
            break;
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let _ = tokio::task::spawn_blocking(move || worker.join()).await;
    Ok(Trace { id, points })
}

fn load_average() -> String {
    std::fs::read_to_string("/proc/loadavg").map(|s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" ")).unwrap_or_default()
}

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let args = parse_args()?;
    let load_before = load_average();
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("..");
    let demo_spec = root.join("demo").join(&args.scenario).join("spec.json");
    let tmp = tempfile::tempdir()?;

    eprintln!("retraining the {} bank with seed {} …", args.scenario, args.seed);
    let out = std::process::Command::new("python3")
        .arg(root.join("demo/retrain.py"))
        .arg(&args.scenario)
        .arg(args.seed.to_string())
        .arg(tmp.path())
        .output()?;
    anyhow::ensure!(out.status.success(), "retraining failed: {}", String::from_utf8_lossy(&out.stderr));
    eprint!("{}", String::from_utf8_lossy(&out.stdout));
    let retrained_spec = tmp.path().join(&args.scenario).join("spec.json");

    let server = tessera_server::start(Config::for_tests(tmp.path().join("bench.sqlite"))).await?;
    let store = server.state.store.clone();
    let worker_token = store.create_token(Role::Worker, "bench").await.map_err(|e| anyhow::anyhow!(e.detail))?;
    let url = server.url();
    let body_a = prepared_spec(&store, &demo_spec, &args).await?;
    let body_b = prepared_spec(&store, &retrained_spec, &args).await?;

    eprintln!("campaign A (committed bank) from the root …");
    let a = run_campaign(&store, &url, &worker_token, &body_a, None, args.threads).await?;
    eprintln!("campaign B (retrained bank) from the root …");
    let b_root = run_campaign(&store, &url, &worker_token, &body_b, None, args.threads).await?;
    eprintln!("campaign B' (retrained bank) as a follow-up of A …");
    let b_follow = run_campaign(&store, &url, &worker_token, &body_b, Some(&a.id), args.threads).await?;
    let diff = tessera_server::followup::changes(&store, &b_follow.id, None, 0).await.map_err(|e| anyhow::anyhow!(e.detail))?;

    let target = b_root.final_safe().min(b_follow.final_safe());
    println!(
        "scenario {}, max_depth {}, horizon {}, {} engine threads, retrain seed {}, load average before/after {} / {}",
        args.scenario,
        args.depth,
        args.horizon.map(|h| h.to_string()).unwrap_or_else(|| "as in the spec".into()),
        args.threads,
        args.seed,
        load_before,
        load_average()
    );
    println!("campaign A (committed bank, from the root): {:.1} s, {} results, proven safe {:.4}", a.end().0, a.end().1, a.final_safe());
    println!("target proven-safe fraction (lower of the two final ones): {target:.4}");
    println!("| run | 50 % of target | 90 % of target | target reached (results) | end (results) | final safe |");
    println!("|---|---:|---:|---:|---:|---:|");
    for (name, t) in [("retrained bank from the root", &b_root), ("retrained bank as a follow-up of A", &b_follow)] {
        let at = |f: f64| t.reach(f * target).map(|(s, n)| (format!("{s:.1} s"), n.to_string())).unwrap_or(("—".into(), "—".into()));
        let (h, _) = at(0.5);
        let (n, _) = at(0.9);
        let (rt, rn) = at(1.0);
        let (et, en) = t.end();
        println!("| {name} | {h} | {n} | {rt} ({rn}) | {et:.1} s ({en}) | {:.4} |", t.final_safe());
    }
    if target <= 0.0 {
        println!("nothing was proven safe: the times to reach the target say nothing; compare the times to the end");
    }
    let sm = &diff["summary"];
    println!(
        "follow-up against A: safe→counterexample {}, no longer safe {}, newly safe {}, still safe {}",
        sm["safe_to_counterexample"]["reduced"], sm["no_longer_safe"]["reduced"], sm["newly_safe"]["reduced"], sm["still_safe"]["reduced"]
    );
    server.stop().await?;
    Ok(())
}
