//! The exact method against an outside MILP solver and against simulation.
//!
//! `tests/reference/exact_loop_reference.py make` writes six small random linear closed
//! loops of our own (two states, three commands, one network or a bank of two chosen by
//! the previous command, argmax and argmin, latency 0 and 1, noise, a disturbance,
//! polyhedral unsafe regions) with a 3×3 grid of cells each. Every cell is decided here
//! with `engine.method = "exact"`; then `exact_loop_reference.py check` compares the
//! verdicts with references sharing no code with the engine (see the script):
//! scipy.optimize.milp (HiGHS) on an encoding of its own — no "safe" where it finds a
//! trajectory 1e-4 deep in the unsafe set —, a numpy/scipy.linalg.expm replay of every
//! counterexample, and 300 simulated runs from every cell proven safe.
//!
//! Here, beyond the script's checks: the method must decide (safe and unsafe both occur,
//! at most a fifth of the cells left open) and every "safe" must say whether it rests on
//! the solver.

use crate::common;

use serde_json::Value;
use std::collections::BTreeMap;
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::spec::parse_spec;
use tessera_engine::verdict::VerdictKind;

#[test]
fn exact_verdicts_agree_with_scipy_milp_and_simulation() {
    let dir = common::temp_dir("exact-ref");
    common::run_reference("exact_loop_reference.py", &["make", dir.to_str().unwrap()]);
    let manifest: Value = serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).unwrap()).unwrap();
    let mut all = Vec::new();
    let (mut safe, mut unsafe_, mut inconclusive, mut by_solver) = (0, 0, 0, 0);
    for case in manifest.as_array().unwrap() {
        let spec_path = dir.join(case["spec"].as_str().unwrap());
        let spec = parse_spec(&std::fs::read_to_string(&spec_path).unwrap()).unwrap_or_else(|e| panic!("{e:?}"));
        let nets = ClosedLoop::load_networks(&spec, &dir).unwrap();
        let cl = ClosedLoop::new(spec, nets).unwrap();
        let mut row = Vec::new();
        for cell in case["cells"].as_array().unwrap() {
            let map: BTreeMap<String, [f64; 2]> = serde_json::from_value(cell.clone()).unwrap();
            let b = cl.cell_from_map(&map).unwrap();
            let v = check_cell(&cl, &b);
            match v.verdict {
                VerdictKind::Safe => {
                    safe += 1;
                    let m = v.stats.method.as_deref();
                    assert!(m == Some("exact") || m == Some("zonotope"), "{m:?}");
                    if m == Some("exact") {
                        by_solver += 1;
                        assert!(v.detail.as_deref().unwrap_or("").contains("rests on the solver"), "{:?}", v.detail);
                    }
                }
                VerdictKind::Unsafe => unsafe_ += 1,
                VerdictKind::Inconclusive => {
                    inconclusive += 1;
                    println!("inconclusive {map:?}: {}", v.detail.as_deref().unwrap_or(""));
                }
            }
            row.push(serde_json::to_value(&v).unwrap());
        }
        all.push(Value::Array(row));
    }
    std::fs::write(dir.join("verdicts.json"), serde_json::to_string(&all).unwrap()).unwrap();
    println!("engine (exact): safe {safe} ({by_solver} resting on the solver), unsafe {unsafe_}, inconclusive {inconclusive}");
    common::run_reference("exact_loop_reference.py", &["check", dir.to_str().unwrap()]);
    let check: Value = serde_json::from_str(&std::fs::read_to_string(dir.join("check.json")).unwrap()).unwrap();
    println!("{}", check["summary"].as_str().unwrap());
    assert!(by_solver > 0 && unsafe_ > 0, "the method must decide both ways: safe {safe} ({by_solver} by solver), unsafe {unsafe_}");
    // Observed when written: 49 of 54 decided (19 safe, 30 unsafe); 4 of the 5 left open
    // have trajectories that scipy finds at a quarter period, between the engine's
    // samples, and one is safe only for disturbances held per period (the engine allows
    // them to vary at any time; scipy's encoding and the sampled runs hold them).
    let cells = safe + unsafe_ + inconclusive;
    assert!(5 * inconclusive <= cells, "{inconclusive} of {cells} cells left open");
}
