//! `tessera-worker`: command-line entry of the worker.

use clap::{Parser, Subcommand};
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_worker::engine::spec;

#[derive(Parser)]
#[command(name = "tessera-worker", version, about = "Tessera worker: sound reachability of campaign cells")]
struct Cli {
    #[command(subcommand)]
    cmd: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Check a campaign spec and print a verdict or every error with its JSON path.
    Validate {
        /// The spec file (JSON).
        spec: PathBuf,
        /// Print the result as JSON.
        #[arg(long)]
        json: bool,
    },
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match cli.cmd {
        Cmd::Validate { spec, json } => validate(&spec, json),
    }
}

fn validate(path: &PathBuf, json: bool) -> ExitCode {
    let text = match std::fs::read_to_string(path) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("error: cannot read {}: {e}", path.display());
            return ExitCode::from(2);
        }
    };
    match spec::parse_spec(&text) {
        Ok(s) => {
            if json {
                println!("{}", serde_json::json!({"valid": true, "name": s.doc.name}));
            } else {
                println!(
                    "valid: '{}' — {} states, {} commands, {} networks, horizon {} periods",
                    s.doc.name,
                    s.states.len(),
                    s.commands.len(),
                    s.networks.len(),
                    s.horizon
                );
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
