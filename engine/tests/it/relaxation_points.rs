//! Linear relaxations of networks (`bounds::linear_lower_bounds`) checked at random
//! points, with the network evaluated by onnxruntime (the ONNX standard's reference
//! runtime, PyPI).
//!
//! `tests/reference/relax_points_reference.py` writes 8 seeded random ReLU networks
//! (2–3 inputs, one to three hidden layers of 4–8, 2–3 outputs) as float64 ONNX files,
//! two boxes per network (a small one and a wide one with many unstable neurons) and,
//! per box, its corners and 10,000 uniform points with onnxruntime's outputs. For each
//! box the rows `+e_i`, `−e_i`, `e_i − e_j` and three random combinations of the
//! outputs are relaxed over the box, and every row must satisfy
//! `obj·y(x) ≥ lam·x + d` at every point.
//!
//! Tolerance: only the rounding of onnxruntime's float64 evaluation and of this test's
//! own sums. For a dense layer with `n` inputs any float64 evaluation (any summation
//! order, with or without FMA) is within `γ_{n+1}·(|W|·|a| + |b|)` of the exact
//! `W·a + b` (the standard dot-product error bound, `γ_k = k·u/(1 − k·u)`, `u = 2⁻⁵³`),
//! propagated through the layers (ReLU is 1-Lipschitz), see `common::eval_with_error`. The
//! allowance is of order 1e-15 of the values; a relaxation that is wrong by more is
//! caught. The test also checks that onnxruntime and `Network::eval` agree within the
//! same bound (the loaded network is the one onnxruntime ran).

use crate::common;
use common::{floats, gamma, read_f64s};

use ndarray::{Array1, Array2};
use serde_json::Value;
use tessera_engine::interval::Interval;
use tessera_engine::net::bounds::{linear_lower_bounds, linear_lower_bounds_tuned};
use tessera_engine::net::slopes::Target;
use tessera_engine::net::load_onnx;


/// The objective rows: +e_i, −e_i, e_i − e_j (i ≠ j), and three random combinations.
fn objectives(m: usize, rng: &mut common::Rng) -> Array2<f64> {
    let mut rows: Vec<Vec<f64>> = Vec::new();
    for i in 0..m {
        let mut r = vec![0.0; m];
        r[i] = 1.0;
        rows.push(r.clone());
        r[i] = -1.0;
        rows.push(r);
        for j in 0..m {
            if j != i {
                let mut r = vec![0.0; m];
                r[i] = 1.0;
                r[j] = -1.0;
                rows.push(r);
            }
        }
    }
    for _ in 0..3 {
        rows.push((0..m).map(|_| rng.normal()).collect());
    }
    Array2::from_shape_fn((rows.len(), m), |(r, i)| rows[r][i])
}

#[test]
fn linear_relaxations_hold_at_onnxruntime_points() {
    let dir = common::temp_dir("relax-points");
    common::run_reference("relax_points_reference.py", &[dir.to_str().unwrap()]);
    let manifest: Value = serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).unwrap()).unwrap();
    let mut rng = common::Rng(0x0E1A_0017);
    let (mut points_checked, mut row_checks, mut boxes, mut rows_tightened) = (0usize, 0usize, 0usize, 0usize);
    let mut worst_eval_diff = 0.0f64; // onnxruntime vs Network::eval, in units of the bound
    let mut min_rel_slack: Vec<f64> = Vec::new(); // per row: min slack / spread of obj·y
    let mut failures = Vec::new();
    for net_case in manifest["nets"].as_array().unwrap() {
        let file = net_case["file"].as_str().unwrap();
        let net = load_onnx(&std::fs::read(dir.join(file)).unwrap()).unwrap_or_else(|e| panic!("{file}: {e}"));
        let (n, m) = (net.input_dim(), net.output_dim());
        for (b, bx) in net_case["boxes"].as_array().unwrap().iter().enumerate() {
            boxes += 1;
            let (lo, hi) = (floats(&bx["lo"]), floats(&bx["hi"]));
            let input: Vec<Interval> = lo.iter().zip(&hi).map(|(&l, &h)| Interval::new(l, h)).collect();
            let obj = objectives(m, &mut rng);
            let fixed = linear_lower_bounds(&net, &input, obj.clone()).unwrap_or_else(|| panic!("{file} box {b}: no relaxation"));
            let tuned = linear_lower_bounds_tuned(&net, &input, obj.clone(), 20, Target::Lowest).unwrap_or_else(|| panic!("{file} box {b}: no tuned relaxation"));
            // The optimised slopes start from the fixed rule and keep the best: over the
            // box they are never looser (up to the rigorous pass's own rounding).
            let over_box = |(lam, d): &(Array2<f64>, Vec<f64>)| -> Vec<f64> {
                (0..lam.nrows()).map(|r| d[r] + lam.row(r).iter().zip(&input).map(|(&c, x)| (c * x.lo()).min(c * x.hi())).sum::<f64>()).collect()
            };
            for (r, (f, t)) in over_box(&fixed).iter().zip(over_box(&tuned)).enumerate() {
                assert!(t >= f - 1e-9 * (1.0 + f.abs()), "{file} box {b} row {r}: optimised slopes give {t} < fixed rule {f}");
                rows_tightened += usize::from(t > f + 1e-9 * (1.0 + f.abs()));
            }
            let count = bx["count"].as_u64().unwrap() as usize;
            let xs = read_f64s(&dir.join(bx["points"].as_str().unwrap()));
            let ys = read_f64s(&dir.join(bx["outputs"].as_str().unwrap()));
            assert_eq!((xs.len(), ys.len()), (count * n, count * m), "{file} box {b}: file sizes");
            for (variant, (lam, d)) in [("fixed slopes", &fixed), ("optimised slopes", &tuned)] {
                let rows = obj.nrows();
                let mut min_slack = vec![f64::INFINITY; rows];
                let (mut ymin, mut ymax) = (vec![f64::INFINITY; rows], vec![f64::NEG_INFINITY; rows]);
                for p in 0..count {
                    let x = &xs[p * n..(p + 1) * n];
                    let y = &ys[p * m..(p + 1) * m];
                    assert!(x.iter().zip(lo.iter().zip(&hi)).all(|(v, (l, h))| l <= v && v <= h), "point outside its box");
                    let e = common::eval_with_error(&net, x).1;
                    let ours = net.eval(x);
                    for i in 0..m {
                        // Both evaluations are within e of the exact value.
                        let diff = (ours[i] - y[i]).abs();
                        if diff > 2.0 * e[i] {
                            failures.push(format!("{file} box {b}: onnxruntime {} vs eval {} at {x:?} (bound {:e})", y[i], ours[i], e[i]));
                        }
                        worst_eval_diff = worst_eval_diff.max(diff / (2.0 * e[i]));
                    }
                    let xv = Array1::from(x.to_vec());
                    let lx = lam.dot(&xv);
                    for r in 0..rows {
                        let (mut lhs, mut lhs_mag, mut lhs_err) = (0.0, 0.0, 0.0);
                        for i in 0..m {
                            lhs += obj[[r, i]] * y[i];
                            lhs_mag += (obj[[r, i]] * y[i]).abs();
                            lhs_err += obj[[r, i]].abs() * e[i];
                        }
                        let rhs = lx[r] + d[r];
                        let rhs_mag: f64 = lam.row(r).iter().zip(x).map(|(a, v)| (a * v).abs()).sum::<f64>() + d[r].abs();
                        // exact obj·y ≥ obj·ŷ − |obj|·e; the two sums and the subtraction
                        // below round by at most γ_{2(n+m)+2}·(magnitudes).
                        let tol = lhs_err + gamma(2 * (n + m) + 2) * (lhs_mag + rhs_mag) * 2.0;
                        let slack = lhs - rhs;
                        if slack < -tol {
                            failures.push(format!(
                                "{file} box {b} row {r} ({:?}, {variant}): obj·y = {lhs} < lam·x + d = {rhs} at x = {x:?} (tolerance {tol:e})",
                                obj.row(r).to_vec()
                            ));
                        }
                        min_slack[r] = min_slack[r].min(slack);
                        ymin[r] = ymin[r].min(lhs);
                        ymax[r] = ymax[r].max(lhs);
                        row_checks += 1;
                    }
                    points_checked += 1;
                }
                for r in 0..rows {
                    let spread = (ymax[r] - ymin[r]).max(1e-300);
                    min_rel_slack.push(min_slack[r] / spread);
                }
            }
        }
    }
    min_rel_slack.sort_by(f64::total_cmp);
    let tight = min_rel_slack.iter().filter(|&&s| s < 0.05).count();
    println!(
        "{boxes} boxes, {points_checked} point checks (each point under both relaxations), {row_checks} row checks; onnxruntime vs Network::eval: at most {worst_eval_diff:.3} of the \
         error bound; per row, the smallest slack over the points relative to the spread of obj·y: median {:.3}, \
         {tight}/{} rows come within 5 % of touching; optimised slopes tightened {rows_tightened} rows over their box",
        min_rel_slack[min_rel_slack.len() / 2],
        min_rel_slack.len()
    );
    // The wide boxes have many unstable neurons: some rows must gain, or the optimiser
    // does nothing.
    assert!(rows_tightened > 0, "optimised slopes tightened no row");
    assert!(failures.is_empty(), "{} failures, first ones:\n{}", failures.len(), failures.iter().take(20).cloned().collect::<Vec<_>>().join("\n"));
    assert!(boxes == 16 && points_checked >= 16 * 10_000, "{boxes} boxes, {points_checked} points");
}
