//! The crate's integration tests, one module per subject, linked into one binary
//! (one link instead of one per file). Run one subject with `cargo test -p tessera-server --test it SUBJECT::`.

mod common;

mod access;
mod api_surface;
mod campaign;
mod dashboard_api;
mod followup;
mod group_commit;
mod onnx_reference;
mod store_cancel;
