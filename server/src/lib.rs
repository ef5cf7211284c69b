//! Tessera campaign server: SQLite store, REST API, leases, bisection and exact
//! coverage accounting.
//!
//! [`start`] opens the store, binds the listener and serves; tests and the demo use
//! it to run the server in-process.

pub mod api;
pub mod auth;
pub mod campaigns;
pub mod config;
pub mod dashboard;
pub mod demo;
pub mod diff;
pub mod error;
pub mod followup;
pub mod leases;
pub mod metrics;
pub mod model_check;
pub mod openapi;
pub mod refine;
pub mod report;
pub mod seed;
pub mod store;
pub mod tiling;
pub mod views;
pub mod writer;

pub use api::{router, routes, AppState};
pub use config::Config;
pub use store::Store;

use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;
use tokio::sync::oneshot;

/// A server running in this process.
pub struct RunningServer {
    pub addr: SocketAddr,
    pub state: AppState,
    shutdown: Option<oneshot::Sender<()>>,
    serve: tokio::task::JoinHandle<std::io::Result<()>>,
    sweeper: tokio::task::JoinHandle<()>,
}

impl RunningServer {
    /// Base URL, e.g. `http://127.0.0.1:8470`.
    pub fn url(&self) -> String {
        format!("http://{}", self.addr)
    }

    /// Stop accepting, finish in-flight requests, stop the sweeper and close the
    /// database. Everything committed stays on disk.
    pub async fn stop(mut self) -> anyhow::Result<()> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        self.sweeper.abort();
        let _ = (&mut self.sweeper).await;
        (&mut self.serve).await??;
        self.state.store.close().await;
        Ok(())
    }

    /// Resolves when the server stops by itself (an I/O error).
    pub async fn wait(mut self) -> anyhow::Result<()> {
        (&mut self.serve).await??;
        Ok(())
    }
}

/// Open the store at `config.db`, apply the bootstrap token file if configured,
/// bind `config.listen` and serve until [`RunningServer::stop`].
pub async fn start(config: Config) -> anyhow::Result<RunningServer> {
    let store = Store::open(&config.db).await?;
    if let Some(path) = &config.bootstrap_token_file {
        bootstrap_token(&store, path).await?;
    }
    let listener = tokio::net::TcpListener::bind(config.listen).await?;
    let addr = listener.local_addr()?;
    let state = AppState::new(store, config);
    let app = router(state.clone());
    let (tx, rx) = oneshot::channel::<()>();
    let serve = tokio::spawn(async move {
        axum::serve(listener, app)
            .with_graceful_shutdown(async {
                let _ = rx.await;
            })
            .await
    });
    let sweeper = tokio::spawn(sweep(state.clone()));
    tracing::info!(%addr, "tessera-server listening");
    Ok(RunningServer { addr, state, shutdown: Some(tx), serve, sweeper })
}

/// Periodically return expired leases to the queue.
async fn sweep(state: AppState) {
    let mut tick = tokio::time::interval(std::time::Duration::from_secs(state.config.sweep_seconds));
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        tick.tick().await;
        match leases::reclaim_expired(&state.store, state.limits()).await {
            Ok(0) => {}
            Ok(n) => {
                metrics::Metrics::add(&state.metrics.leases_reclaimed, n);
                tracing::info!(reclaimed = n, "expired leases returned to the queue");
            }
            Err(e) => tracing::warn!("lease sweep failed: {}", e.detail),
        }
    }
}

/// If `path` exists, register its first line as an admin token; otherwise create
/// an admin token and write it to `path` (mode 0600 on Unix). Returns the token.
pub async fn bootstrap_token(store: &Arc<Store>, path: &Path) -> anyhow::Result<String> {
    if path.exists() {
        let text = std::fs::read_to_string(path)?;
        let token = text.lines().next().unwrap_or("").trim().to_string();
        if token.len() < 16 {
            anyhow::bail!("{}: a bootstrap token must be at least 16 characters", path.display());
        }
        store.register_token(&token, auth::Role::Admin, "bootstrap").await.map_err(|e| anyhow::anyhow!(e.detail))?;
        tracing::info!(file = %path.display(), "bootstrap admin token registered");
        Ok(token)
    } else {
        let token = store.create_token(auth::Role::Admin, "bootstrap").await.map_err(|e| anyhow::anyhow!(e.detail))?;
        write_private(path, &format!("{token}\n"))?;
        tracing::info!(file = %path.display(), "bootstrap admin token created");
        Ok(token)
    }
}

fn write_private(path: &Path, text: &str) -> std::io::Result<()> {
    use std::io::Write;
    let mut opts = std::fs::OpenOptions::new();
    opts.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        opts.mode(0o600);
    }
    opts.open(path)?.write_all(text.as_bytes())
}
