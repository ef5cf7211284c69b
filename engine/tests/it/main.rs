//! The crate's integration tests, one module per subject, linked into one binary
//! (one link instead of one per file). Run one subject with `cargo test -p tessera-engine --test it SUBJECT::`.

mod common;
mod plant_common;

mod bounds_exact;
mod bounds_soundness;
mod closed_loop_soundness;
mod decide_on_star;
mod demo_networks;
mod demo_scenarios;
mod discretise_expm;
mod exact_reference;
mod fuzz_regressions;
mod interval_reference;
mod lp_reference;
mod net_polytope_milp;
mod onnx_import;
mod plant_closed_forms;
mod plant_disturbance;
mod plant_scipy_reference;
mod relaxation_points;
mod shadow_adversarial;
mod star_sampling;
