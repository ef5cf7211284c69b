//! `tessera`: the command-line client of a Tessera server (submit, follow, gate and
//! report campaigns). Server and token come from flags or `TESSERA_SERVER` /
//! `TESSERA_TOKEN`.

use clap::{Parser, Subcommand, ValueEnum};
use serde_json::Value;
use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::time::Duration;
use tessera_protocol::{CampaignState, Coverage};
use tessera_protocol::CellStatus::{Counterexample, Failed, Leased, Pending, Safe, Unresolved};
use tessera_engine::caution::CAUTION_LINE;
use tessera_worker::client::api::{Api, ApiError};
use tessera_engine::spec;

#[derive(Parser)]
#[command(name = "tessera", version, about = "Submit, follow, gate and report Tessera campaigns")]
struct Cli {
    /// The server's address.
    #[arg(long, env = "TESSERA_SERVER", default_value = "http://127.0.0.1:8470", global = true)]
    server: String,
    /// An access token (submitter role to submit; viewer is enough to read).
    #[arg(long, env = "TESSERA_TOKEN", hide_env_values = true, global = true, default_value = "")]
    token: String,
    #[command(subcommand)]
    cmd: Cmd,
}

#[derive(Clone, Copy, ValueEnum)]
enum Format {
    Md,
    Json,
}

#[derive(Subcommand)]
enum Cmd {
    /// Upload the models named in the spec, create the campaign, print its id.
    Submit {
        spec: PathBuf,
        /// Higher priority campaigns lease first.
        #[arg(long, default_value_t = 0)]
        priority: i64,
        /// Start from the cells of this finished campaign (same envelope and split
        /// states) instead of the whole envelope.
        #[arg(long, value_name = "CAMPAIGN_ID")]
        follow_up: Option<String>,
    },
    /// Print a campaign's coverage.
    Status { id: String },
    /// Follow a campaign until it ends, with a progress bar of its volume.
    Wait {
        id: String,
        /// Seconds between polls.
        #[arg(long, default_value_t = 2.0)]
        interval: f64,
    },
    /// Exit 0 when the proven-safe fraction reaches --min-safe (and, with
    /// --no-new-counterexample, no volume proven safe by the campaign it follows up
    /// lies in a cell with a counterexample now), 1 when the finished campaign falls
    /// short, 2 on error. Waits for the campaign to end first.
    Gate {
        id: String,
        /// Least proven-safe fraction of the envelope, in [0, 1].
        #[arg(long, required_unless_present = "no_new_counterexample")]
        min_safe: Option<f64>,
        /// Also fail when any volume that was safe in the earlier campaign (the one
        /// this campaign follows up, or --against) lies in a cell with a checked
        /// counterexample now. (`--no-new-unsafe` is the same flag's earlier name.)
        #[arg(long, alias = "no-new-unsafe")]
        no_new_counterexample: bool,
        /// The campaign to compare with for --no-new-counterexample (default: the one followed up).
        #[arg(long, value_name = "CAMPAIGN_ID", requires = "no_new_counterexample")]
        against: Option<String>,
        /// Seconds between polls while waiting.
        #[arg(long, default_value_t = 2.0)]
        interval: f64,
    },
    /// Print the campaign report.
    Report {
        id: String,
        #[arg(long, value_enum, default_value = "md")]
        format: Format,
    },
}

fn main() -> ExitCode {
    // SAFETY: resetting SIGPIPE to its default at start-up, so `tessera report | head` ends quietly.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    let cli = Cli::parse();
    let api = Api::new(&cli.server, &cli.token);
    let r = match cli.cmd {
        Cmd::Submit { spec, priority, follow_up } => submit(&api, &spec, priority, follow_up.as_deref()),
        Cmd::Status { id } => status(&api, &id),
        Cmd::Wait { id, interval } => wait(&api, &id, interval, true).map(|_| ExitCode::SUCCESS),
        Cmd::Gate { id, min_safe, no_new_counterexample, against, interval } => {
            gate(&api, &id, min_safe.unwrap_or(0.0), no_new_counterexample.then_some(against.as_deref()), interval)
        }
        Cmd::Report { id, format } => report(&api, &id, format),
    };
    match r {
        Ok(code) => code,
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::from(2)
        }
    }
}

/// Upload every model referenced by path and return the spec with `sha256:` refs.
pub fn upload_models(api: &Api, spec_path: &Path) -> Result<Value, String> {
    let text = std::fs::read_to_string(spec_path).map_err(|e| format!("cannot read {}: {e}", spec_path.display()))?;
    let parsed = spec::parse_spec(&text).map_err(|errs| {
        let lines: Vec<String> = errs.iter().map(|e| format!("  {}: {}", e.path, e.message)).collect();
        format!("invalid spec:\n{}", lines.join("\n"))
    })?;
    let mut doc: Value = serde_json::from_str(&text).map_err(|e| e.to_string())?;
    let base = spec_path.parent().unwrap_or(Path::new("."));
    for (i, r) in parsed.networks.iter().enumerate() {
        if r.starts_with("sha256:") {
            continue;
        }
        let path = base.join(r);
        let bytes = std::fs::read(&path).map_err(|e| format!("controller.networks[{i}]: cannot read {}: {e}", path.display()))?;
        let answer: Value =
            api.post_bytes("/api/v1/models", &bytes).map_err(|e| format!("controller.networks[{i}]: upload refused: {e}"))?;
        let hex = answer["sha256"].as_str().ok_or("the server's upload answer has no sha256")?;
        doc["controller"]["networks"][i] = Value::String(format!("sha256:{hex}"));
    }
    Ok(doc)
}

fn submit(api: &Api, spec_path: &Path, priority: i64, follow_up: Option<&str>) -> Result<ExitCode, String> {
    let doc = upload_models(api, spec_path)?;
    let mut path = format!("/api/v1/campaigns?priority={priority}");
    if let Some(f) = follow_up {
        path.push_str(&format!("&follow_up={}", query_value(f)?));
    }
    let c: Value = api.post_json(&path, &doc).map_err(describe)?;
    let id = c["id"].as_str().ok_or("the server's answer has no campaign id")?;
    println!("{id}");
    Ok(ExitCode::SUCCESS)
}

/// A campaign id for a query string: ids are UUIDs, so anything else is refused here
/// rather than escaped.
fn query_value(v: &str) -> Result<&str, String> {
    if !v.is_empty() && v.bytes().all(|b| b.is_ascii_alphanumeric() || b == b'-') {
        Ok(v)
    } else {
        Err(format!("'{v}' is not a campaign id"))
    }
}

fn describe(e: ApiError) -> String {
    e.to_string()
}


fn status(api: &Api, id: &str) -> Result<ExitCode, String> {
    let cov: Coverage = api.get_json(&format!("/api/v1/campaigns/{id}/coverage")).map_err(describe)?;
    println!("campaign {id}: {}", cov.state.as_str());
    println!("{:<12} {:>10} {:>12}  exact", "status", "cells", "fraction");
    for (s, v) in &cov.statuses {
        println!("{:<12} {:>10} {:>11.4}%  {}", s, v.cells, 100.0 * v.fraction, v.exact);
    }
    if let Some(r) = cov.cells_per_second {
        println!("{r:.1} cells/s");
    }
    if let Some(eta) = cov.estimated_seconds_remaining {
        println!("about {eta:.0} s left");
    }
    println!("{}", cov.counterexample_note);
    println!("{CAUTION_LINE}");
    Ok(ExitCode::SUCCESS)
}

fn bar(cov: &Coverage) -> String {
    let width = 40usize;
    let parts = [(Safe, '#'), (Counterexample, 'x'), (Unresolved, '?'), (Failed, '!')];
    let mut s = String::new();
    for (status, ch) in parts {
        let n = (cov.fraction(status) * width as f64).round() as usize;
        s.extend(std::iter::repeat_n(ch, n.min(width - s.len().min(width))));
    }
    while s.len() < width {
        s.push('.');
    }
    let pending = cov.fraction(Pending) + cov.fraction(Leased);
    format!(
        "[{s}] safe {:.1}%  counterexample {:.1}%  unresolved {:.1}%  pending {:.1}%",
        100.0 * cov.fraction(Safe),
        100.0 * cov.fraction(Counterexample),
        100.0 * cov.fraction(Unresolved),
        100.0 * pending
    )
}

/// Poll until the campaign is no longer running or paused; returns the last coverage.
fn wait(api: &Api, id: &str, interval: f64, show: bool) -> Result<Coverage, String> {
    let tty = std::io::stderr().is_terminal();
    let mut failures = 0;
    loop {
        match api.get_json::<Coverage>(&format!("/api/v1/campaigns/{id}/coverage")) {
            Ok(cov) => {
                failures = 0;
                let state = cov.state.as_str();
                if show {
                    if tty {
                        eprint!("\r{} {state}   ", bar(&cov));
                    } else {
                        eprintln!("{} {state}", bar(&cov));
                    }
                    let _ = std::io::stderr().flush();
                }
                if !cov.state.is_open() {
                    if show {
                        if tty {
                            eprintln!();
                        }
                        eprintln!("{CAUTION_LINE}");
                    }
                    return Ok(cov);
                }
            }
            Err(e) if e.is_transient() && failures < 30 => {
                failures += 1;
                eprintln!("server unreachable ({e}); retrying");
            }
            Err(e) => return Err(e.to_string()),
        }
        std::thread::sleep(Duration::from_secs_f64(interval.max(0.1)));
    }
}

/// `no_new_counterexample`: `None` to skip the check, `Some(against)` to compare with
/// `against` (or, when that is `None`, the campaign followed up).
fn gate(
    api: &Api,
    id: &str,
    min_safe: f64,
    no_new_counterexample: Option<Option<&str>>,
    interval: f64,
) -> Result<ExitCode, String> {
    if !(0.0..=1.0).contains(&min_safe) {
        return Err("--min-safe must be a fraction between 0 and 1".into());
    }
    let cov = wait(api, id, interval, false)?;
    let safe = cov.fraction(Safe);
    if cov.state != CampaignState::Done {
        return Err(format!("campaign ended as '{}', not done", cov.state.as_str()));
    }
    let mut pass = true;
    if safe >= min_safe {
        println!("pass: proven-safe fraction {safe:.6} ≥ {min_safe}");
    } else {
        println!("fail: proven-safe fraction {safe:.6} < {min_safe}");
        pass = false;
    }
    if let Some(against) = no_new_counterexample {
        let mut path = format!("/api/v1/campaigns/{id}/changes");
        if let Some(a) = against {
            path.push_str(&format!("?against={}", query_value(a)?));
        }
        let ch: Value = api.get_json(&path).map_err(describe)?;
        let s2c = &ch["summary"]["safe_to_counterexample"];
        let exact = s2c["reduced"].as_str().ok_or("the server's changes answer has no summary.safe_to_counterexample")?;
        let before = ch["against"].as_str().unwrap_or("?");
        if exact == "0/1" {
            println!("pass: no volume proven safe in {before} lies in a cell with a counterexample now");
        } else {
            println!(
                "fail: {exact} of the envelope ({:.6}) was proven safe in {before} and lies in cells with a counterexample now",
                s2c["fraction"].as_f64().unwrap_or(f64::NAN)
            );
            pass = false;
        }
    }
    println!("{CAUTION_LINE}");
    Ok(if pass { ExitCode::SUCCESS } else { ExitCode::from(1) })
}

fn report(api: &Api, id: &str, format: Format) -> Result<ExitCode, String> {
    let text = match format {
        Format::Md => api.get_text(&format!("/api/v1/campaigns/{id}/report.md")),
        Format::Json => api.get_text(&format!("/api/v1/campaigns/{id}/report")),
    }
    .map_err(describe)?;
    println!("{text}");
    Ok(ExitCode::SUCCESS)
}
