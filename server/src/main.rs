//! `tessera-server`: run the campaign server, or manage access tokens.

use clap::{Parser, Subcommand};
use std::path::PathBuf;
use tessera_server::auth::Role;
use tessera_server::{Config, Store};

#[derive(Parser)]
#[command(name = "tessera-server", version, about = "Tessera campaign server")]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Serve the API.
    Serve(Config),
    /// The whole job on its embedded default: a server on a SQLite file in a working
    /// folder, local worker processes and the demo campaigns.
    Demo(tessera_server::demo::DemoOptions),
    /// Access tokens.
    Token {
        #[command(subcommand)]
        command: TokenCommand,
    },
}

#[derive(Subcommand)]
enum TokenCommand {
    /// Create a token and print it once (only its SHA-256 is stored).
    Create {
        #[arg(long, value_enum)]
        role: Role,
        #[arg(long, env = "TESSERA_DB", default_value = "tessera.sqlite")]
        db: PathBuf,
        #[arg(long, default_value = "")]
        label: String,
    },
}

#[tokio::main]
async fn main() {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env()
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_writer(std::io::stderr)
        .init();
    if let Err(e) = run(Cli::parse()).await {
        eprintln!("tessera-server: {e:#}");
        std::process::exit(1);
    }
}

async fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Serve(config) => {
            let server = tessera_server::start(config).await?;
            let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())?;
            tokio::select! {
                r = tokio::signal::ctrl_c() => { r?; }
                _ = term.recv() => {}
            }
            tracing::info!("shutting down");
            server.stop().await?;
            Ok(())
        }
        Command::Demo(opts) => tessera_server::demo::run(opts).await,
        Command::Token { command: TokenCommand::Create { role, db, label } } => {
            let store = Store::open(&db).await?;
            let token = store.create_token(role, &label).await.map_err(|e| anyhow::anyhow!(e.detail))?;
            store.close().await;
            println!("{token}");
            Ok(())
        }
    }
}
