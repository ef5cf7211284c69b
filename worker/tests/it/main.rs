//! The worker crate's integration tests: the `tessera-worker` binary's engine commands,
//! one module per subject, linked into one binary. They share the engine tests' helpers
//! (`engine/tests/it/common/`). Run one subject with `cargo test -p tessera-engine --test it SUBJECT::`.

#[path = "../../../engine/tests/it/common/mod.rs"]
mod common;

mod bounds_cli;
mod spec_cli;
