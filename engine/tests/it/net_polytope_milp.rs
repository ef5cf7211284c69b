//! Network bounds over a polytope of inputs against exact minima from a MILP solver.
//!
//! `tests/reference/net_milp_reference.py` writes 16 seeded random ReLU networks (2–3
//! inputs, one or two hidden layers of 4–8, 2–3 outputs) as float64 ONNX files with the
//! `onnx` helper API, an input box `x = m + r∘ε` and 1–3 halfspaces `g·ε ≤ rhs` on its
//! symbols, and for every ordered pair of outputs the minimum of `y_i − y_j` over that
//! polytope from scipy.optimize.milp (HiGHS, a general-purpose MILP solver) with the
//! standard big-M encoding of ReLU, polished by an LP on the minimiser's activation
//! pattern (HiGHS's MIP tolerances leave the raw objective a few 1e-9 off); the
//! minimiser is repaired into an exactly feasible input and the network evaluated there
//! in rational arithmetic (Python's `fractions`).
//!
//! Here the polytope is a [`Star`]: the box zonotope (`StateSet::from_box`, input `k` ↔
//! symbol `k`) with the halfspaces as constraints on its symbols, and
//! `output_bounds_over` gets a concretiser that bounds `λ·x + d` over the star with its
//! [`Bounder`] (the LP bound). Checked:
//! * the lower bound of `y_i − y_j` is ≤ the exact value at the repaired minimiser
//!   (zero tolerance) and ≤ the polished MILP optimum up to the polishing LP's
//!   feasibility error (≤ 3e-9 here): never above;
//! * the documented ordering: never below the same bound without the concretiser (the
//!   concretised value is intersected with the box value) nor below plain interval
//!   propagation;
//! * that the concretiser is used at all: the bound improves on the box-only bound for
//!   at least a quarter of the pairs whose exact minimum the halfspaces raise (observed:
//!   see `--nocapture`). No other tightness is asserted: the relaxation is allowed to be
//!   loose; the median gap is printed.

use crate::common;
use common::floats;

use ndarray::Array2;
use serde_json::Value;
use tessera_engine::affine::{Affine, StateSet};
use tessera_engine::interval::Interval;
use tessera_engine::net::bounds::output_bounds_over;
use tessera_engine::net::{load_onnx, output_bounds};
use tessera_engine::spec::BoundsMethod;
use tessera_engine::star::{Halfspace, Star};


/// `b ≤ q` for an f64 `b` and the exact rational `q` given as (smallest f64 ≥ q, exact?).
fn at_most(b: f64, upper: f64, exact: bool) -> bool {
    b < upper || (b == upper && exact)
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    if v.is_empty() {
        f64::NAN
    } else {
        v[v.len() / 2]
    }
}

#[test]
fn bounds_over_a_polytope_never_exceed_the_milp_minimum() {
    let dir = common::temp_dir("net-milp");
    common::run_reference("net_milp_reference.py", &[dir.to_str().unwrap()]);
    let manifest: Value = serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).unwrap()).unwrap();
    let mut failures = Vec::new();
    let (mut pairs_checked, mut raised, mut improved_where_raised) = (0, 0, 0);
    let mut gaps = Vec::new();
    let mut gaps_box = Vec::new();
    // Share of the interval-arithmetic gap that remains: (opt − bound) / (opt − interval).
    let mut remaining = Vec::new();
    let mut worst_milp = 0.0f64; // |raw MILP objective − polished optimum|
    for net_case in manifest["nets"].as_array().unwrap() {
        let file = net_case["file"].as_str().unwrap();
        let net = load_onnx(&std::fs::read(dir.join(file)).unwrap()).unwrap_or_else(|e| panic!("{file}: {e}"));
        let mid = floats(&net_case["mid"]);
        let rad = floats(&net_case["rad"]);
        let n = mid.len();
        let input: Vec<Interval> = mid.iter().zip(&rad).map(|(&m, &r)| Interval::new(m - r, m + r)).collect();
        let set = StateSet::from_box(&input);
        for (k, comp) in set.components().iter().enumerate() {
            // m and r are multiples of 1/16: the zonotope is exactly m + r·ε_k.
            assert!(comp.center() == mid[k] && comp.coeff(k) == rad[k] && comp.err() == 0.0 && comp.terms().len() == 1, "{comp:?}");
        }
        let cons: Vec<Halfspace> = net_case["halfspaces"]
            .as_array()
            .unwrap()
            .iter()
            .map(|h| {
                let g = floats(&h["g"]);
                Halfspace::new(g.iter().enumerate().map(|(k, &v)| (k, v)).collect(), h["rhs"].as_f64().unwrap())
            })
            .collect();
        let star = Star { set, cons };
        let bounder = star.bounder();
        // Rigorous lower bounds of lam_r·x + d_r over the star: x_k is the star's k-th
        // component (an affine form over the symbols), combined with outward rounding.
        let over_star = |lam: &Array2<f64>, d: &[f64]| -> Vec<f64> {
            (0..lam.nrows())
                .map(|r| {
                    let mut f = Affine::constant(d[r]);
                    for k in 0..n {
                        if lam[[r, k]] != 0.0 {
                            f = f.add(&star.set.components()[k].scale(lam[[r, k]]));
                        }
                    }
                    let v = bounder.lower(&f);
                    if v == f64::INFINITY {
                        f64::NAN
                    } else {
                        v
                    }
                })
                .collect()
        };
        let with_star = output_bounds_over(&net, &input, BoundsMethod::Symbolic, Some(&over_star));
        let box_only = output_bounds_over(&net, &input, BoundsMethod::Symbolic, None);
        let interval = output_bounds(&net, &input, BoundsMethod::Interval);
        for p in net_case["pairs"].as_array().unwrap() {
            let (i, j) = (p["i"].as_u64().unwrap() as usize, p["j"].as_u64().unwrap() as usize);
            let name = format!("{file} y{i} − y{j}");
            pairs_checked += 1;
            let lo = with_star.diff[i][j].lo();
            let upper = p["upper"].as_f64().unwrap();
            let exact = p["upper_exact"].as_bool().unwrap();
            let milp = p["milp"].as_f64().unwrap();
            let box_milp = p["box_milp"].as_f64().unwrap();
            // Reference: the exact network value at the repaired MILP minimiser (a
            // feasible input), zero tolerance.
            if !at_most(lo, upper, exact) {
                failures.push(format!("{name}: lower bound {lo} above the exact value {upper} at a feasible input"));
            }
            // Reference: scipy.optimize.milp's optimum, polished by an LP on its
            // activation pattern (scipy.optimize.linprog), within that LP's feasibility
            // error (the script's `polished_tol`, from its multipliers).
            let polished = p["polished"].as_f64().unwrap_or(milp);
            let tol = p["polished_tol"].as_f64().unwrap_or(1e-6 * (1.0 + milp.abs()));
            if !(lo <= polished + tol) {
                failures.push(format!("{name}: lower bound {lo} above the MILP optimum {polished} (raw MILP {milp}, tolerance {tol:e})"));
            }
            worst_milp = worst_milp.max((milp - polished).abs());
            // Documented ordering (intersection with the box and interval results).
            let lo_box = box_only.diff[i][j].lo();
            if lo < lo_box || lo < interval.diff[i][j].lo() {
                failures.push(format!(
                    "{name}: {lo} below the box-only bound {lo_box} or the interval bound {}",
                    interval.diff[i][j].lo()
                ));
            }
            gaps.push(polished - lo);
            let iv_gap = polished - interval.diff[i][j].lo();
            if iv_gap > 1e-9 {
                remaining.push((polished - lo) / iv_gap);
            }
            gaps_box.push(box_milp - lo_box);
            if polished > box_milp + 1e-6 {
                raised += 1;
                if lo > lo_box {
                    improved_where_raised += 1;
                }
            }
        }
    }
    let (med, med_box, med_rem) = (median(&mut gaps), median(&mut gaps_box), median(&mut remaining));
    println!(
        "{pairs_checked} pairs: median gap MILP optimum − bound {med:.3e} over the polytope (max {:.3e}, min {:.3e}), \
         {med_box:.3e} over the box alone; median share of the interval bound's gap left {med_rem:.2}; \
         the halfspaces raise the exact minimum for {raised} pairs, and the concretiser raises the bound for \
         {improved_where_raised} of them; {} bounds are within 1e-9 of the optimum (exact there); \
         raw MILP objectives within {worst_milp:.1e} of the polished optima",
        gaps.last().copied().unwrap_or(f64::NAN),
        gaps.first().copied().unwrap_or(f64::NAN),
        gaps.iter().filter(|&&g| g < 1e-9).count()
    );
    assert!(failures.is_empty(), "{} failures:\n{}", failures.len(), failures.join("\n"));
    assert!(pairs_checked >= 40, "only {pairs_checked} pairs");
    assert!(raised >= 10 && 4 * improved_where_raised >= raised, "concretiser unused? {improved_where_raised}/{raised}");
}
