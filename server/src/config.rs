//! Server settings: one struct, filled from flags or `TESSERA_*` environment variables.

use clap::Args;
use std::net::SocketAddr;
use std::path::PathBuf;

/// Settings of `tessera-server serve`.
#[derive(Clone, Debug, Args)]
pub struct Config {
    /// Address to listen on.
    #[arg(long, env = "TESSERA_LISTEN", default_value = "127.0.0.1:8470")]
    pub listen: SocketAddr,
    /// SQLite database file (created when missing).
    #[arg(long, env = "TESSERA_DB", default_value = "tessera.sqlite")]
    pub db: PathBuf,
    /// Lifetime of a lease, in seconds; workers extend it while they work.
    #[arg(long, env = "TESSERA_LEASE_SECONDS", default_value_t = 120, value_parser = clap::value_parser!(u64).range(1..=86_400))]
    pub lease_seconds: u64,
    /// Failed attempts (results reporting an engine error) after which a cell is `failed`.
    #[arg(long, env = "TESSERA_MAX_ATTEMPTS", default_value_t = 3, value_parser = clap::value_parser!(u32).range(1..=1000))]
    pub max_attempts: u32,
    /// Leases of one cell that may run out without a result before the cell is
    /// `failed` (counted apart from attempts: a killed worker or an outage is not the
    /// cell's fault, but a cell that kills every worker taking it must end somewhere).
    #[arg(long, env = "TESSERA_MAX_EXPIRIES", default_value_t = 10, value_parser = clap::value_parser!(u32).range(1..=1000))]
    pub max_expiries: u32,
    /// Most cells one lease request may take.
    #[arg(long, env = "TESSERA_MAX_LEASE_BATCH", default_value_t = 256, value_parser = clap::value_parser!(u32).range(1..=10_000))]
    pub max_lease_batch: u32,
    /// Most cells (leaves and internal nodes) one campaign may grow to; past it,
    /// inconclusive cells become `unresolved` instead of being split.
    #[arg(long, env = "TESSERA_MAX_CELLS", default_value_t = 20_000_000)]
    pub max_cells_per_campaign: u64,
    /// Highest `refinement.max_depth` a campaign may ask for (at most 60).
    #[arg(long, env = "TESSERA_MAX_DEPTH", default_value_t = 60, value_parser = clap::value_parser!(u32).range(0..=60))]
    pub max_depth: u32,
    /// Seconds between sweeps that return expired leases to the queue (leases are
    /// also swept whenever cells are leased).
    #[arg(long, env = "TESSERA_SWEEP_SECONDS", default_value_t = 5, value_parser = clap::value_parser!(u64).range(1..=3600))]
    pub sweep_seconds: u64,
    /// File holding an admin token. If the file exists its first line is registered as
    /// an admin token; if not, a new admin token is created and written there (mode 0600).
    #[arg(long, env = "TESSERA_BOOTSTRAP_TOKEN_FILE")]
    pub bootstrap_token_file: Option<PathBuf>,
}

impl Config {
    /// Defaults for a server on `db`, listening on an ephemeral loopback port.
    pub fn for_tests(db: PathBuf) -> Config {
        Config {
            listen: "127.0.0.1:0".parse().expect("literal address"),
            db,
            lease_seconds: 120,
            max_attempts: 3,
            max_expiries: 10,
            max_lease_batch: 256,
            max_cells_per_campaign: 20_000_000,
            max_depth: 60,
            sweep_seconds: 5,
            bootstrap_token_file: None,
        }
    }
}

/// Body size limits.
pub const MAX_MODEL_BYTES: usize = 16 * 1024 * 1024;
pub const MAX_JSON_BYTES: usize = 1024 * 1024;

#[cfg(test)]
mod tests {
    /// The worker keeps its requests under the limit it believes the server has.
    #[test]
    fn the_worker_knows_the_body_limit() {
        assert_eq!(tessera_worker::client::outbox::SERVER_BODY_LIMIT, super::MAX_JSON_BYTES);
    }
}
