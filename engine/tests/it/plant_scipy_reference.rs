//! Validated integration against scipy's `solve_ivp` (DOP853, rtol = atol = 1e-12) on
//! the Van der Pol oscillator (μ = 1) and a damped pendulum with a constant torque
//! input. The reference script is `tests/reference/plant_ode_reference.py`.
//!
//! Margin: the reference's own global error. The script also solves at rtol = atol =
//! 1e-13 and reports the largest difference (about 1e-11 here); we allow
//! `MARGIN = 1e-10` per coordinate and assert that the estimate is below a quarter of
//! it, so nothing beyond the reference's accuracy is granted.

use crate::plant_common as common;

use common::*;
use serde_json::{json, Value};
use std::io::Write;
use std::process::{Command, Stdio};
use tessera_engine::interval::Interval;
use tessera_engine::plant::Plant;
use tessera_engine::spec::EngineOptions;

const MARGIN: f64 = 1e-10;

/// Runs the reference script on all `cases` at once (one Python start-up).
fn reference(cases: Vec<Value>) -> Vec<Vec<Vec<Vec<f64>>>> {
    let script = concat!(env!("CARGO_MANIFEST_DIR"), "/../tests/reference/plant_ode_reference.py");
    let mut child = Command::new("python3")
        .arg(script)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("python3 must be installed for this test");
    child.stdin.take().unwrap().write_all(json!({ "cases": cases }).to_string().as_bytes()).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "reference script failed (numpy/scipy installed?): {}", String::from_utf8_lossy(&out.stderr));
    let v: Value = serde_json::from_slice(&out.stdout).expect("reference output is JSON");
    v["results"]
        .as_array()
        .expect("results")
        .iter()
        .map(|r| {
            let err = r["error_estimate"].as_f64().unwrap();
            assert!(err < MARGIN / 4.0, "reference error estimate {err} too large for the margin {MARGIN}");
            serde_json::from_value(r["trajectories"].clone()).unwrap()
        })
        .collect()
}

struct Case {
    name: String,
    inputs: Vec<f64>,
    x0: Vec<Interval>,
    period: f64,
    periods: usize,
    req: Value,
}

/// Encloses every case, asks scipy for the sampled trajectories, checks them.
fn run_cases(plant: &Plant, cases: Vec<Case>) {
    let opts = EngineOptions::default();
    let mut rng = Rng(99);
    let mut reqs = Vec::new();
    let mut all_flows = Vec::new();
    for c in &cases {
        let flows = run_periods(plant, &c.x0, &c.inputs, &[], c.period, c.periods, &opts);
        let pts = samples(&c.x0, 4, &mut rng);
        let mut req = c.req.clone();
        req["points"] = json!(pts);
        req["period"] = json!(c.period);
        req["periods"] = json!(c.periods);
        reqs.push(req);
        all_flows.push((flows, pts.len()));
    }
    let refs = reference(reqs);
    for ((c, (flows, npts)), trajs) in cases.iter().zip(&all_flows).zip(&refs) {
        assert_eq!(trajs.len(), *npts);
        for (j, traj) in trajs.iter().enumerate() {
            assert_eq!(traj.len(), c.periods + 1);
            for (k, flow) in flows.iter().enumerate() {
                let p = &traj[k + 1];
                assert!(
                    flow.end.contains_point_with_margin(p, MARGIN),
                    "{}: sample {j} period {k}: {p:?} not in {:?}",
                    c.name,
                    flow.end.to_box()
                );
            }
        }
        let w: Vec<String> = [0usize, 9, 19, 29, 39, 49]
            .iter()
            .filter(|&&k| k < flows.len())
            .map(|&k| format!("{}:{:.3e}", k + 1, max_width(&flows[k].end)))
            .collect();
        println!("{}: max width after period {}", c.name, w.join("  "));
    }
}

fn square(c: [f64; 2], w: f64) -> Vec<Interval> {
    vec![Interval::new(c[0] - w / 2.0, c[0] + w / 2.0), Interval::new(c[1] - w / 2.0, c[1] + w / 2.0)]
}

#[test]
fn van_der_pol_against_scipy() {
    // x' = y, y' = μ(1 − x²)y − x with μ = 1.
    let plant = Plant::from_text(&["x", "y"], &[], &[], &["y", "(1 - x^2) * y - x"]).unwrap();
    let cases = [([2.0, 0.0], 0.02), ([0.5, 0.5], 0.05), ([-1.0, 1.0], 0.1)]
        .into_iter()
        .map(|(c, w)| Case {
            name: format!("van der Pol around {c:?}"),
            inputs: vec![],
            x0: square(c, w),
            period: 0.1,
            periods: 50,
            req: json!({"system": "van_der_pol", "mu": 1.0}),
        })
        .collect();
    run_cases(&plant, cases);
}

#[test]
fn pendulum_with_torque_against_scipy() {
    // θ' = ω, ω' = −(g/L) sin θ − c ω + τ with g/L = 9.81, c = 0.1 and the torque τ = 0.5
    // as a constant input. 9.81 and 0.1 are inexact literals: our enclosure holds for
    // the real numbers, scipy uses the nearest doubles (inside those enclosures).
    let plant = Plant::from_text(&["th", "om"], &["tau"], &[], &["om", "-9.81 * sin(th) - 0.1 * om + tau"]).unwrap();
    let cases = [([0.95, 0.0], 0.1), ([2.55, 0.05], 0.1)]
        .into_iter()
        .map(|(c, w)| Case {
            name: format!("pendulum around {c:?}"),
            inputs: vec![0.5],
            x0: square(c, w),
            period: 0.05,
            periods: 50,
            req: json!({"system": "pendulum", "g_over_l": 9.81, "damping": 0.1, "torque": 0.5}),
        })
        .collect();
    run_cases(&plant, cases);
}
