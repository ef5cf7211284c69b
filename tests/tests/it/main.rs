//! The crate's integration tests, one module per subject, linked into one binary
//! (one link instead of one per file). Run one subject with `cargo test -p tessera-tests --test it SUBJECT::`.


mod bad_input;
mod chaos_campaign;
mod dashboard_browser;
mod deploy_files;
mod e2e_campaign;
mod followup_degraded;
mod layering;
mod load;
mod pipeline_gate;
mod server_outage;
