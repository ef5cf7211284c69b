//! The exact method's zero-order-hold discretisation against outside references.
//!
//! `tests/reference/expm_reference.py` computes `e^{At}` and `∫_0^t e^{As} ds` for six
//! matrices (diagonal, the demo's yaw model, a rotation, a nilpotent, a dense 3×3, an
//! unstable one) with mpmath's `expm` at 60 digits (Van Loan's block matrix, common
//! practice), each entry as the two adjacent float64 values that bracket it, and with
//! scipy.linalg.expm in float64. Checked here for `linear::discretise`:
//! * every enclosure holds the mpmath value (its lower end ≤ the float64 below the real
//!   value, its upper end ≥ the float64 above; zero tolerance);
//! * every enclosure is within 1e-13 of scipy.linalg.expm's value (scipy is accurate to
//!   a few ulps, not exact, so this is a closeness check, not a containment check);
//! * every enclosure is thinner than 1e-12 (tightness: a wide enclosure would hold
//!   anything);
//! * for each step cut in samples, the enclosure for every τ in [0, t] holds the mpmath
//!   values at t and the identity at 0.

use crate::common;

use serde_json::Value;
use tessera_engine::interval::Interval;
use tessera_engine::linear::{discretise, substeps_for, IMat};

fn mat(v: &Value) -> Vec<Vec<f64>> {
    v.as_array().unwrap().iter().map(|r| r.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()).collect()
}

fn brackets(v: &Value) -> Vec<Vec<(f64, f64)>> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|r| r.as_array().unwrap().iter().map(|p| (p[0].as_f64().unwrap(), p[1].as_f64().unwrap())).collect())
        .collect()
}

#[test]
fn enclosures_of_the_matrix_exponential_and_its_integral_hold_the_references() {
    let dir = common::temp_dir("expm");
    let out = dir.join("expm.json");
    common::run_reference("expm_reference.py", &[out.to_str().unwrap()]);
    let cases: Value = serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap();
    let mut checked = 0;
    for case in cases.as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let a: IMat = mat(&case["a"]).into_iter().map(|r| r.into_iter().map(Interval::point).collect()).collect();
        let t = case["t"].as_f64().unwrap();
        // The step must satisfy ‖A‖ t ≤ 1/2 (the cases do); one sample.
        assert_eq!(substeps_for(&a, t, 1), 1, "{name}: a case the test meant to take in one step");
        let (phi, gamma) = discretise(&a, Interval::point(t)).unwrap_or_else(|| panic!("{name}: not enclosed"));
        let (phi_r, gamma_r) = discretise(&a, Interval::new(0.0, t)).unwrap();
        for (got, got_r, want, scipy, what) in [
            (&phi, &phi_r, brackets(&case["phi"]), mat(&case["phi_scipy"]), "e^{At}"),
            (&gamma, &gamma_r, brackets(&case["gamma"]), mat(&case["gamma_scipy"]), "integral"),
        ] {
            for i in 0..a.len() {
                for j in 0..a.len() {
                    let (below, above) = want[i][j];
                    let g = got[i][j];
                    // mpmath (60 digits): containment, zero tolerance.
                    assert!(g.lo() <= below && above <= g.hi(), "{name} {what}[{i}][{j}]: {g:?} misses [{below:e}, {above:e}]");
                    // scipy.linalg.expm: closeness.
                    assert!((g.mid() - scipy[i][j]).abs() <= 1e-13, "{name} {what}[{i}][{j}]: {g:?} vs scipy {:e}", scipy[i][j]);
                    assert!(g.width() < 1e-12, "{name} {what}[{i}][{j}]: too wide {g:?}");
                    // The enclosure over [0, t] holds the value at t, and the value at 0.
                    let r = got_r[i][j];
                    assert!(r.lo() <= below && above <= r.hi(), "{name} {what} over [0, t]");
                    let at0 = if what == "e^{At}" && i == j { 1.0 } else { 0.0 };
                    assert!(r.contains(at0), "{name} {what} over [0, t] misses the value at 0");
                    checked += 1;
                }
            }
        }
    }
    assert!(checked >= 50, "{checked} entries checked");
    println!("{checked} entries of e^(At) and its integral checked against mpmath and scipy");
}
