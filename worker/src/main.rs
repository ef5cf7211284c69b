//! `tessera-worker`: command-line entry of the worker.

mod cli_engine;

use clap::{Parser, Subcommand};
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_engine::interval::Interval;
use tessera_engine::net::{self, OutputBounds};
use tessera_engine::spec::{self, BoundsMethod};

#[derive(Parser)]
#[command(name = "tessera-worker", version, about = "Tessera worker: sound reachability of campaign cells")]
struct Cli {
    #[command(subcommand)]
    cmd: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Check a campaign spec, and the networks it names by path with the engine's own
    /// model checks; print "valid" or every error with its JSON path.
    Validate {
        /// The spec file (JSON).
        spec: PathBuf,
        /// Print the result as JSON.
        #[arg(long)]
        json: bool,
    },
    /// Bound a network's outputs, and the differences of its outputs, over a box of inputs.
    Bounds {
        /// The network (ONNX file).
        model: PathBuf,
        /// Lower corner of the input box, comma-separated (one number per input).
        #[arg(long, allow_hyphen_values = true)]
        lower: String,
        /// Upper corner of the input box, comma-separated.
        #[arg(long, allow_hyphen_values = true)]
        upper: String,
        /// How to bound: interval, symbolic or portfolio.
        #[arg(long, default_value = "symbolic", value_parser = parse_method)]
        method: BoundsMethod,
        /// Print the result as JSON: {"lower","upper","diff_lower","diff_upper"}.
        #[arg(long)]
        json: bool,
    },
    /// Decide one cell: safe (a proof), unsafe (a checked counterexample) or inconclusive.
    Check {
        /// The spec file (JSON); networks are read relative to it.
        spec: PathBuf,
        /// The cell as JSON, e.g. '{"h":[2,3]}'; states left out keep the envelope.
        /// Without it the whole envelope is checked.
        #[arg(long)]
        cell: Option<String>,
        /// Print the verdict JSON.
        #[arg(long)]
        json: bool,
    },
    /// Lease cells from a server and decide them on every core until stopped
    /// (SIGTERM / SIGINT: running cells finish, queued ones are released).
    Run {
        /// The server's address, e.g. http://127.0.0.1:8470.
        #[arg(long, env = "TESSERA_SERVER")]
        server: String,
        /// An access token with the worker role.
        #[arg(long, env = "TESSERA_TOKEN", hide_env_values = true)]
        token: String,
        /// Engine threads (default: all cores).
        #[arg(long, env = "TESSERA_THREADS")]
        threads: Option<usize>,
        /// Name reported to the server (default: host name and process id).
        #[arg(long)]
        name: Option<String>,
        /// Exit after this many cells.
        #[arg(long)]
        max_cells: Option<u64>,
        /// Exit once the server has had no work for this many seconds.
        #[arg(long)]
        idle_exit: Option<f64>,
        /// Append the lease id of every result the server acknowledged to this file
        /// (one per line; for fault-injection tests).
        #[arg(long)]
        ack_log: Option<PathBuf>,
    },
    /// Re-simulate a counterexample and print its trajectory and where it becomes unsafe.
    Replay {
        /// A verdict JSON (from `check --json` or a report) or a bare counterexample.
        verdict: PathBuf,
        /// The spec, when the verdict does not name it.
        #[arg(long)]
        spec: Option<PathBuf>,
    },
}

fn parse_method(s: &str) -> Result<BoundsMethod, String> {
    match s {
        "interval" => Ok(BoundsMethod::Interval),
        "symbolic" => Ok(BoundsMethod::Symbolic),
        "portfolio" => Ok(BoundsMethod::Portfolio),
        _ => Err(format!("unknown method '{s}' (expected interval, symbolic or portfolio)")),
    }
}

fn main() -> ExitCode {
    // Output piped into `head` and closed: end quietly, as command-line tools do.
    // SAFETY: resetting a signal's disposition to its default at start-up.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    let cli = Cli::parse();
    match cli.cmd {
        Cmd::Validate { spec, json } => validate(&spec, json),
        Cmd::Check { spec, cell, json } => cli_engine::check(&spec, cell.as_deref(), json),
        Cmd::Replay { verdict, spec } => cli_engine::replay(&verdict, spec.as_deref()),
        Cmd::Run { server, token, threads, name, max_cells, idle_exit, ack_log } => {
            run_worker(server, token, threads, name, max_cells, idle_exit, ack_log)
        }
        Cmd::Bounds { model, lower, upper, method, json } => match bounds(&model, &lower, &upper, method) {
            Ok(b) => {
                print_bounds(&b, json);
                ExitCode::SUCCESS
            }
            Err(msg) => {
                eprintln!("error: {msg}");
                ExitCode::from(2)
            }
        },
    }
}

fn parse_numbers(text: &str, what: &str) -> Result<Vec<f64>, String> {
    text.split(',')
        .enumerate()
        .map(|(i, t)| match t.trim().parse::<f64>() {
            Ok(v) if v.is_finite() => Ok(v),
            _ => Err(format!("--{what}: entry {} ('{}') is not a finite number", i + 1, t.trim())),
        })
        .collect()
}

fn bounds(model: &PathBuf, lower: &str, upper: &str, method: BoundsMethod) -> Result<OutputBounds, String> {
    let bytes = std::fs::read(model).map_err(|e| format!("cannot read {}: {e}", model.display()))?;
    let net = net::load_onnx(&bytes).map_err(|e| format!("{}: {e}", model.display()))?;
    let lo = parse_numbers(lower, "lower")?;
    let hi = parse_numbers(upper, "upper")?;
    for (what, v) in [("lower", &lo), ("upper", &hi)] {
        if v.len() != net.input_dim() {
            return Err(format!("--{what} has {} numbers but the network takes {} inputs", v.len(), net.input_dim()));
        }
    }
    let mut input = Vec::with_capacity(lo.len());
    for (i, (&a, &b)) in lo.iter().zip(&hi).enumerate() {
        if a > b {
            return Err(format!("input {}: lower bound {a} is above upper bound {b}", i + 1));
        }
        input.push(Interval::new(a, b));
    }
    Ok(net::output_bounds(&net, &input, method))
}

#[derive(serde::Serialize)]
struct BoundsJson {
    lower: Vec<f64>,
    upper: Vec<f64>,
    diff_lower: Vec<Vec<f64>>,
    diff_upper: Vec<Vec<f64>>,
}

/// Print the bounds; a closed output pipe (e.g. `| head`) ends printing quietly.
fn print_bounds(b: &OutputBounds, json: bool) {
    use std::io::Write;
    let text = format_bounds(b, json);
    let _ = std::io::stdout().lock().write_all(text.as_bytes());
}

fn format_bounds(b: &OutputBounds, json: bool) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    if json {
        // Infinite (vacuous) ends print as null, since JSON has no infinity.
        let doc = BoundsJson {
            lower: b.outputs.iter().map(|i| i.lo()).collect(),
            upper: b.outputs.iter().map(|i| i.hi()).collect(),
            diff_lower: b.diff.iter().map(|r| r.iter().map(|i| i.lo()).collect()).collect(),
            diff_upper: b.diff.iter().map(|r| r.iter().map(|i| i.hi()).collect()).collect(),
        };
        return serde_json::to_string(&doc).expect("numbers serialise") + "\n";
    }
    let _ = writeln!(out, "Sound bounds for every input in the box, on the network as stored (real arithmetic on its");
    let _ = writeln!(out, "weights). Engineering evidence under these assumptions, not a certification.");
    let _ = writeln!(out, "output  lower                     upper");
    for (i, o) in b.outputs.iter().enumerate() {
        let _ = writeln!(out, "y{i:<6} {:<25e} {:<25e}", o.lo(), o.hi());
    }
    if b.outputs.len() > 1 {
        let _ = writeln!(out, "\ndifferences y_i - y_j (lower, upper):");
        for (i, row) in b.diff.iter().enumerate() {
            for (j, d) in row.iter().enumerate().filter(|(j, _)| *j != i) {
                let verdict = if d.lo() > 0.0 {
                    "  y_i > y_j on the whole box"
                } else if d.hi() < 0.0 {
                    "  y_i < y_j on the whole box"
                } else {
                    ""
                };
                let _ = writeln!(out, "  y{i} - y{j}: [{:e}, {:e}]{verdict}", d.lo(), d.hi());
            }
        }
    }
    out
}

fn validate(path: &PathBuf, json: bool) -> ExitCode {
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("error: cannot read {}: {e}", path.display());
            return ExitCode::from(2);
        }
    };
    let base = path.parent().unwrap_or(std::path::Path::new("."));
    let checked = spec::parse_spec(&text).and_then(|s| {
        let (errs, stored) = check_models(&s, base);
        if errs.is_empty() {
            Ok((s, stored))
        } else {
            Err(errs)
        }
    });
    match checked {
        Ok((s, stored)) => {
            if json {
                println!(
                    "{}",
                    serde_json::json!({"valid": true, "name": s.doc.name, "networks_checked": s.networks.len() - stored.len(),
                                       "networks_stored": stored})
                );
            } else {
                println!(
                    "valid: '{}' — {} states, {} commands, {} networks, horizon {} periods",
                    s.doc.name,
                    s.states.len(),
                    s.commands.len(),
                    s.networks.len(),
                    s.horizon
                );
                for p in &stored {
                    println!("  {p}: a stored model; the server checks it against the spec at submission");
                }
            }
            ExitCode::SUCCESS
        }
        Err(errs) => {
            if json {
                println!("{}", serde_json::json!({"valid": false, "errors": errs}));
            } else {
                eprintln!("invalid spec: {} error(s)", errs.len());
                for e in &errs {
                    eprintln!("  {}: {}", e.path, e.message);
                }
            }
            ExitCode::from(1)
        }
    }
}

/// The engine's model checks on the networks a spec names by path (relative to
/// `base`): each must load in the engine's ONNX reader and fit the spec
/// ([`spec::Spec::check_network`], the check the engine and the server run too).
/// Returns the errors, each naming `controller.networks[i]`, and the JSON paths of the
/// networks given as stored models (`sha256:…`), which only the server holds.
fn check_models(s: &spec::Spec, base: &std::path::Path) -> (Vec<spec::SpecError>, Vec<String>) {
    let mut errs = Vec::new();
    let mut stored = Vec::new();
    for (i, r) in s.networks.iter().enumerate() {
        let field = format!("controller.networks[{i}]");
        if r.starts_with("sha256:") {
            stored.push(field);
            continue;
        }
        let file = base.join(r);
        let loaded = std::fs::read(&file)
            .map_err(|e| format!("cannot read {}: {e}", file.display()))
            .and_then(|bytes| net::load_onnx(&bytes).map_err(|e| format!("{}: {e}", file.display())));
        match loaded {
            Ok(n) => errs.extend(s.check_network(i, n.shape())),
            Err(message) => errs.push(spec::SpecError { path: field, message }),
        }
    }
    (errs, stored)
}

fn run_worker(
    server: String,
    token: String,
    threads: Option<usize>,
    name: Option<String>,
    max_cells: Option<u64>,
    idle_exit: Option<f64>,
    ack_log: Option<PathBuf>,
) -> ExitCode {
    use std::sync::atomic::AtomicBool;
    use std::sync::Arc;
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_writer(std::io::stderr)
        .init();
    let stop = Arc::new(AtomicBool::new(false));
    for sig in [signal_hook::consts::SIGTERM, signal_hook::consts::SIGINT] {
        if let Err(e) = signal_hook::flag::register(sig, stop.clone()) {
            eprintln!("error: cannot handle signal {sig}: {e}");
            return ExitCode::from(2);
        }
    }
    let threads = threads.unwrap_or_else(|| std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1));
    let host = std::fs::read_to_string("/etc/hostname").map(|s| s.trim().to_string()).unwrap_or_else(|_| "worker".into());
    let opts = tessera_worker::client::run::RunOptions {
        server,
        token,
        threads,
        name: name.unwrap_or_else(|| format!("{host}-{}", std::process::id())),
        max_cells,
        idle_exit: idle_exit.map(std::time::Duration::from_secs_f64),
        ack_log,
    };
    tracing::info!("worker {} on {} threads, server {}", opts.name, threads, opts.server);
    match tessera_worker::client::run::run(opts, stop) {
        Ok(s) => {
            println!(
                "worker done: {} cells in {:.1} s ({:.2} cells/s), {} leases released",
                s.cells,
                s.seconds,
                s.cells as f64 / s.seconds.max(1e-9),
                s.released
            );
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::from(2)
        }
    }
}
