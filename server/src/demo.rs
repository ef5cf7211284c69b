//! `tessera-server demo`: the whole job on its embedded default. Starts the server on a
//! SQLite file in a working folder, spawns local worker processes, submits the demo
//! campaigns (our own scenarios and networks, embedded in the binary), shows their
//! progress and the final coverage, and keeps serving until Ctrl-C (or ends with
//! `--exit-when-done`).

use crate::auth::Role;
use crate::campaigns::{self, CreateOptions};
use crate::views;
use crate::config::Config;
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;
use tessera_protocol::{CellStatus, Coverage};
use tessera_engine::caution::CAUTION;

/// The demo scenarios, embedded: (folder, spec, [(file name, bytes)]).
const SCENARIOS: &[(&str, &str, &[(&str, &[u8])])] = &[
    (
        "lander",
        include_str!("../../demo/lander/spec.json"),
        &[("lander.onnx", include_bytes!("../../demo/lander/lander.onnx"))],
    ),
    (
        "aisle",
        include_str!("../../demo/aisle/spec.json"),
        &[
            ("net_cruise.onnx", include_bytes!("../../demo/aisle/net_cruise.onnx")),
            ("net_creep.onnx", include_bytes!("../../demo/aisle/net_creep.onnx")),
            ("net_veer_port.onnx", include_bytes!("../../demo/aisle/net_veer_port.onnx")),
            ("net_veer_starboard.onnx", include_bytes!("../../demo/aisle/net_veer_starboard.onnx")),
        ],
    ),
    (
        "heading",
        include_str!("../../demo/heading/spec.json"),
        &[
            ("net_port.onnx", include_bytes!("../../demo/heading/net_port.onnx")),
            ("net_midships.onnx", include_bytes!("../../demo/heading/net_midships.onnx")),
            ("net_starboard.onnx", include_bytes!("../../demo/heading/net_starboard.onnx")),
        ],
    ),
];

/// The scenarios a plain `demo` runs: a few minutes on two cores. The heading keeper's
/// 30-period proofs take seconds per cell, so it runs only when named in `--only`.
const DEFAULT_SCENARIOS: &[&str] = &["lander", "aisle"];

#[derive(clap::Args, Debug, Clone)]
pub struct DemoOptions {
    /// Working folder for the SQLite file, tokens, worker logs and the scenario files.
    #[arg(long, default_value = "tessera-demo")]
    pub dir: PathBuf,
    /// Address to serve on.
    #[arg(long, default_value = "127.0.0.1:8470")]
    pub listen: std::net::SocketAddr,
    /// Local worker processes to spawn.
    #[arg(long, default_value_t = 2)]
    pub workers: usize,
    /// Engine threads per worker process.
    #[arg(long, default_value_t = 1)]
    pub threads: usize,
    /// The worker binary to spawn (default: `tessera-worker` beside this binary, where
    /// `cargo build -p tessera-server -p tessera-worker` puts it).
    #[arg(long, env = "TESSERA_WORKER_BIN")]
    pub worker_bin: Option<PathBuf>,
    /// Cap on the scenarios' refinement depth, so the demo ends in minutes.
    #[arg(long, default_value_t = 10)]
    pub max_depth: u32,
    /// Which scenarios to run (default: lander and aisle; heading, the long-horizon
    /// scenario, takes longer and runs when named).
    #[arg(long, value_delimiter = ',')]
    pub only: Vec<String>,
    /// End with status 0 once every campaign is done, after one line per campaign
    /// `safe=… counterexample=… unresolved=…` and the caution.
    #[arg(long)]
    pub exit_when_done: bool,
}

/// Engine knobs the demo sets on its campaigns so a cell takes at most a few seconds.
fn demo_engine_knobs(spec: &mut Value) {
    let Some(e) = spec.as_object_mut().map(|o| o.entry("engine").or_insert(serde_json::json!({}))).and_then(|e| e.as_object_mut())
    else {
        return;
    };
    e.entry("node_budget").or_insert(serde_json::json!(600));
    e.entry("time_budget_s").or_insert(serde_json::json!(5.0));
    e.entry("falsify_samples").or_insert(serde_json::json!(12));
}

pub async fn run(opts: DemoOptions) -> anyhow::Result<()> {
    if let Some(unknown) = opts.only.iter().find(|o| !SCENARIOS.iter().any(|(name, _, _)| name == o)) {
        let known: Vec<&str> = SCENARIOS.iter().map(|(name, _, _)| *name).collect();
        anyhow::bail!("--only: no demo scenario named '{unknown}' (there are: {})", known.join(", "));
    }
    // Before anything is started: the workers are a binary of their own.
    let worker_exe = worker_binary(&opts)?;
    std::fs::create_dir_all(&opts.dir)?;
    write_scenarios(&opts.dir)?;
    let mut config = Config::for_tests(opts.dir.join("tessera.sqlite"));
    config.listen = opts.listen;
    config.bootstrap_token_file = Some(opts.dir.join("admin.token"));
    config.lease_seconds = 60;
    let server = crate::start(config.clone()).await?;
    let url = server.url();
    let store = server.state.store.clone();
    let worker_token = store.create_token(Role::Worker, "demo workers").await.map_err(|e| anyhow::anyhow!(e.detail))?;

    // Submit the demo campaigns (or find them from an earlier run in this folder).
    let existing = campaigns::list(&store, None).await.map_err(|e| anyhow::anyhow!(e.detail))?;
    let mut ids: Vec<(String, String)> = Vec::new();
    for (name, spec_text, files) in SCENARIOS {
        let wanted = if opts.only.is_empty() { DEFAULT_SCENARIOS.contains(name) } else { opts.only.iter().any(|o| o == name) };
        if !wanted {
            continue;
        }
        if let Some(c) = existing["campaigns"].as_array().and_then(|a| a.iter().find(|c| c["name"] == *name)) {
            println!("campaign {name}: continuing {} from an earlier run in {}", c["id"], opts.dir.display());
            ids.push((name.to_string(), c["id"].as_str().unwrap_or_default().to_string()));
            continue;
        }
        let mut spec: Value = serde_json::from_str(spec_text)?;
        for (i, net) in spec["controller"]["networks"].clone().as_array().into_iter().flatten().enumerate() {
            let file = net.as_str().unwrap_or_default();
            let bytes = files.iter().find(|(f, _)| *f == file).map(|(_, b)| *b).ok_or_else(|| anyhow::anyhow!("{name}: {file} not embedded"))?;
            let shape = campaigns::inspect_upload(bytes).map_err(|e| anyhow::anyhow!(e.detail))?;
            let sha = store
                .put_model(bytes, Some(shape.inputs), Some(shape.outputs))
                .await
                .map_err(|e| anyhow::anyhow!(e.detail))?;
            spec["controller"]["networks"][i] = Value::String(format!("sha256:{sha}"));
        }
        let depth = spec["refinement"]["max_depth"].as_u64().unwrap_or(8).min(opts.max_depth as u64);
        spec["refinement"]["max_depth"] = depth.into();
        // Cells with counterexamples are refined down to max depth: the default, which
        // the embedded specs keep; set here as well so that a spec edited to turn it off
        // still gets a coverage map, since otherwise one counterexample in a large cell
        // ends the search for the safe volume inside it.
        spec["refinement"]["refine_unsafe"] = true.into();
        demo_engine_knobs(&mut spec);
        let body = serde_json::to_vec(&spec)?;
        let c = campaigns::create(
            &store,
            config.max_depth,
            config.max_cells_per_campaign,
            &body,
            CreateOptions { priority: 0, initial_depth: depth.min(2) as u32, follow_up: None },
        )
        .await
        .map_err(|e| anyhow::anyhow!("{name}: {}", e.detail))?;
        let id = c["id"].as_str().unwrap_or_default().to_string();
        println!("campaign {name}: {id} (max depth {depth})");
        ids.push((name.to_string(), id));
    }

    let mut workers = spawn_workers(&worker_exe, &opts, &url, &worker_token)?;
    println!(
        "server at {url} — dashboard {url}/dashboard, API under {url}/api/v1, admin token in {}",
        opts.dir.join("admin.token").display()
    );
    println!("{} worker processes × {} threads; logs in {}", opts.workers, opts.threads, opts.dir.display());

    use CellStatus::*;
    let started = std::time::Instant::now();
    loop {
        let mut all_done = true;
        let mut line = format!("{:>6.0}s", started.elapsed().as_secs_f64());
        for (name, id) in &ids {
            let cov = views::coverage(&store, id).await.map_err(|e| anyhow::anyhow!(e.detail))?;
            all_done &= !cov.state.is_open();
            line.push_str(&format!(
                "  {name}: safe {:.1}% counterexample {:.1}% unresolved {:.1}% open {:.1}%",
                pct(&cov, Safe),
                pct(&cov, Counterexample),
                pct(&cov, Unresolved) + pct(&cov, Failed),
                pct(&cov, Pending) + pct(&cov, Leased)
            ));
        }
        println!("{line}");
        if all_done {
            break;
        }
        if workers.iter_mut().all(|c| c.try_wait().ok().flatten().is_some()) {
            anyhow::bail!("every worker process has exited; see the logs in {}", opts.dir.display());
        }
        tokio::select! {
            _ = tokio::time::sleep(Duration::from_secs(2)) => {}
            _ = tokio::signal::ctrl_c() => {
                println!("stopping");
                stop_workers(&mut workers);
                server.stop().await?;
                return Ok(());
            }
        }
    }

    println!();
    println!("{:<10} {:>9} {:>15} {:>11} {:>8} {:>7}", "campaign", "safe", "counterexample", "unresolved", "failed", "cells");
    let mut finals = Vec::new();
    for (name, id) in &ids {
        let cov = views::coverage(&store, id).await.map_err(|e| anyhow::anyhow!(e.detail))?;
        println!(
            "{:<10} {:>8.2}% {:>14.2}% {:>10.2}% {:>7.2}% {:>7}",
            name,
            pct(&cov, Safe),
            pct(&cov, Counterexample),
            pct(&cov, Unresolved),
            pct(&cov, Failed),
            cov.results
        );
        finals.push(format!(
            "{name}: safe={} counterexample={} unresolved={}",
            exact(&cov, Safe),
            exact(&cov, Counterexample),
            exact_sum(&cov, &[Unresolved, Failed])
        ));
    }
    println!("dashboard: {url}/dashboard (log in with the token in {})", opts.dir.join("admin.token").display());
    println!("reports: {url}/api/v1/campaigns/<id>/report.md");
    println!("{}.", tessera_protocol::COUNTEREXAMPLE_NOTE);
    if opts.exit_when_done {
        stop_workers(&mut workers);
        server.stop().await?;
        for f in finals {
            println!("{f}");
        }
        println!("{CAUTION}");
        return Ok(());
    }
    println!("{CAUTION}");
    println!("serving at {url}; Ctrl-C to stop");
    tokio::signal::ctrl_c().await?;
    stop_workers(&mut workers);
    server.stop().await?;
    Ok(())
}

fn pct(cov: &Coverage, status: CellStatus) -> f64 {
    100.0 * cov.fraction(status)
}

/// The exact fraction of a status as a decimal with enough digits to be exact for the
/// campaign's depth (a sum of multiples of 2^-depth has at most `depth` decimals).
fn exact(cov: &Coverage, status: CellStatus) -> String {
    exact_sum(cov, &[status])
}

fn exact_sum(cov: &Coverage, statuses: &[CellStatus]) -> String {
    let depth = cov.max_depth as usize;
    let total = cov.total_volume as f64;
    let v: f64 = statuses.iter().map(|s| cov.volume(*s) as f64).sum();
    // v / 2^depth is exact in f64 for depth ≤ 60 and v < 2^53; print all its digits.
    format!("{:.*}", depth.max(1), v / total)
}

fn write_scenarios(dir: &Path) -> anyhow::Result<()> {
    for (name, spec, files) in SCENARIOS {
        let d = dir.join("scenarios").join(name);
        std::fs::create_dir_all(&d)?;
        std::fs::write(d.join("spec.json"), spec)?;
        for (f, bytes) in *files {
            std::fs::write(d.join(f), bytes)?;
        }
    }
    Ok(())
}

/// The `tessera-worker` binary the demo runs: `--worker-bin`, else the one beside this
/// binary.
fn worker_binary(opts: &DemoOptions) -> anyhow::Result<PathBuf> {
    let exe = match &opts.worker_bin {
        Some(p) => p.clone(),
        None => std::env::current_exe()?.with_file_name(format!("tessera-worker{}", std::env::consts::EXE_SUFFIX)),
    };
    anyhow::ensure!(
        exe.is_file(),
        "no worker binary at {}: build it beside the server (cargo build --release -p tessera-server -p tessera-worker) \
         or name it with --worker-bin",
        exe.display()
    );
    Ok(exe)
}

fn spawn_workers(exe: &Path, opts: &DemoOptions, url: &str, token: &str) -> anyhow::Result<Vec<Child>> {
    let mut out = Vec::new();
    for i in 0..opts.workers {
        let log = std::fs::File::create(opts.dir.join(format!("worker-{i}.log")))?;
        let child = Command::new(exe)
            .args(["run", "--server", url, "--threads", &opts.threads.to_string(), "--name", &format!("demo-{i}")])
            .env("TESSERA_TOKEN", token)
            .stdin(Stdio::null())
            .stdout(log.try_clone()?)
            .stderr(log)
            .spawn()?;
        out.push(child);
    }
    Ok(out)
}

/// SIGTERM each worker (they finish their cells and release the rest), then wait.
fn stop_workers(children: &mut [Child]) {
    for c in children.iter() {
        // SAFETY: plain kill(2) on our own child's pid.
        unsafe {
            libc::kill(c.id() as libc::pid_t, libc::SIGTERM);
        }
    }
    for c in children.iter_mut() {
        let _ = c.wait();
    }
}
