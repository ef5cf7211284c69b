//! Soundness of the output bounds, checked by sampling: for random networks and random
//! boxes, 10⁴ inputs per box (all corners included) are evaluated in f64 and must lie
//! inside the bounds, up to a rigorous bound on the f64 evaluation error (computed
//! alongside by forward error analysis; see `eval_with_error`). The tolerance is that
//! error bound and nothing more, so an unsound bound that misses the true value by
//! more than the evaluation error is caught.
//!
//! Run with `--nocapture` to see the mean width ratio symbolic / interval.

use crate::common;

use common::{eval_with_error, Rng, U64};
use ndarray::{Array1, Array2};
use tessera_engine::interval::Interval;
use tessera_engine::net::bounds::raw_symbolic_bounds;
use tessera_engine::net::{output_bounds, Layer, Network, OutputBounds};
use tessera_engine::spec::BoundsMethod;

/// A random network with the given widths; ReLU between dense layers (or the given
/// activation), weights ~ N(0, 2/fan_in), biases ~ N(0, 0.3²); optionally rounded to
/// float32 numbers (as float32 models have).
fn random_net(rng: &mut Rng, widths: &[usize], act: &Layer, f32_weights: bool) -> Network {
    let round = |v: f64| if f32_weights { v as f32 as f64 } else { v };
    let mut layers = Vec::new();
    for k in 0..widths.len() - 1 {
        let (n, m) = (widths[k], widths[k + 1]);
        let s = (2.0 / n as f64).sqrt();
        let w = Array2::from_shape_fn((m, n), |_| round(rng.normal() * s));
        let b = Array1::from_shape_fn(m, |_| round(rng.normal() * 0.3));
        layers.push(Layer::Dense { w, b });
        if k < widths.len() - 2 {
            layers.push(act.clone());
        }
    }
    Network::new(widths[0], layers, f32_weights).unwrap()
}

fn check_inside(b: &OutputBounds, y: &[f64], e: &[f64], what: &str) {
    for i in 0..y.len() {
        let o = b.outputs[i];
        assert!(
            y[i] >= o.lo() - e[i] && y[i] <= o.hi() + e[i],
            "{what}: output {i} = {} (± {:e}) outside [{}, {}]",
            y[i],
            e[i],
            o.lo(),
            o.hi()
        );
        for j in 0..y.len() {
            let d = y[i] - y[j];
            // exact difference within e_i + e_j of the true one, plus its own rounding
            let tol = e[i] + e[j] + U64 * d.abs();
            let dij = b.diff[i][j];
            assert!(
                d >= dij.lo() - tol && d <= dij.hi() + tol,
                "{what}: y{i} − y{j} = {d} (± {tol:e}) outside [{}, {}]",
                dij.lo(),
                dij.hi()
            );
        }
    }
}

fn width_sum(b: &OutputBounds) -> f64 {
    b.outputs.iter().map(|i| i.hi() - i.lo()).sum::<f64>()
        + b.diff.iter().flatten().map(|i| i.hi() - i.lo()).sum::<f64>()
}

fn never_wider(sym: &OutputBounds, ib: &OutputBounds, what: &str) {
    for (s, i) in sym.outputs.iter().zip(&ib.outputs).chain(sym.diff.iter().flatten().zip(ib.diff.iter().flatten())) {
        assert!(s.subset_of(i), "{what}: symbolic {s:?} not inside interval {i:?}");
    }
}

/// Samples of the box: every corner (up to 2⁶ of them), then uniform points, a tenth
/// of them pushed onto a random face.
fn samples(rng: &mut Rng, lo: &[f64], hi: &[f64], count: usize) -> Vec<Vec<f64>> {
    let n = lo.len();
    let mut out = Vec::with_capacity(count);
    if n <= 6 {
        for mask in 0..(1usize << n) {
            out.push((0..n).map(|k| if mask >> k & 1 == 1 { hi[k] } else { lo[k] }).collect());
        }
    }
    while out.len() < count {
        let mut x: Vec<f64> = (0..n).map(|k| rng.uniform(lo[k], hi[k])).collect();
        if rng.below(10) == 0 {
            let k = rng.below(n);
            x[k] = if rng.below(2) == 0 { lo[k] } else { hi[k] };
        }
        out.push(x);
    }
    out
}

#[test]
fn sampled_outputs_stay_inside_bounds() {
    let mut rng = Rng(2026);
    let shapes: &[&[usize]] = &[
        &[2, 5, 3],
        &[1, 6, 6, 2],
        &[3, 10, 10, 4],
        &[4, 16, 16, 16, 5],
        &[5, 24, 24, 3],
        &[2, 6, 6, 6, 6, 6, 3],
    ];
    let radii = [0.05, 0.3, 1.0];
    let (mut ratio_sum, mut ratio_n) = (0.0, 0usize);
    for &widths in shapes {
        for f32_weights in [false, true] {
            let net = random_net(&mut rng, widths, &Layer::Relu, f32_weights);
            for &r in &radii {
                let center: Vec<f64> = (0..widths[0]).map(|_| rng.normal()).collect();
                let lo: Vec<f64> = center.iter().map(|c| c - r * rng.uniform(0.5, 1.0)).collect();
                let hi: Vec<f64> = center.iter().map(|c| c + r * rng.uniform(0.5, 1.0)).collect();
                let input: Vec<Interval> = lo.iter().zip(&hi).map(|(&a, &b)| Interval::new(a, b)).collect();
                let ib = output_bounds(&net, &input, BoundsMethod::Interval);
                let sym = output_bounds(&net, &input, BoundsMethod::Symbolic);
                let pf = output_bounds(&net, &input, BoundsMethod::Portfolio);
                // The backward pass alone, before intersection with interval bounds.
                let raw = raw_symbolic_bounds(&net, &input);
                let what = format!("net {widths:?} f32={f32_weights} radius {r}");
                never_wider(&sym, &ib, &what);
                assert!(pf == ib || pf == sym, "{what}: portfolio is one of the two");
                for x in samples(&mut rng, &lo, &hi, 10_000) {
                    let (y, e) = eval_with_error(&net, &x);
                    check_inside(&ib, &y, &e, &format!("{what} interval at {x:?}"));
                    check_inside(&sym, &y, &e, &format!("{what} symbolic at {x:?}"));
                    check_inside(&raw, &y, &e, &format!("{what} raw symbolic at {x:?}"));
                }
                let ratio = width_sum(&sym) / width_sum(&ib);
                ratio_sum += ratio;
                ratio_n += 1;
                println!("{what}: width symbolic/interval = {ratio:.3}");
            }
        }
    }
    let mean = ratio_sum / ratio_n as f64;
    println!("mean width ratio symbolic/interval over {ratio_n} cases: {mean:.3}");
    // Backward propagation should be clearly tighter than intervals on these networks.
    assert!(mean < 0.9, "symbolic bounds are not tighter on average: {mean}");
}

#[test]
fn sigmoid_and_tanh_networks_are_bounded_soundly() {
    let mut rng = Rng(99);
    for act in [Layer::Sigmoid, Layer::Tanh] {
        for widths in [&[3usize, 8, 8, 3][..], &[2, 12, 4]] {
            let net = random_net(&mut rng, widths, &act, false);
            let lo: Vec<f64> = (0..widths[0]).map(|_| rng.uniform(-1.5, 0.0)).collect();
            let hi: Vec<f64> = lo.iter().map(|l| l + rng.uniform(0.1, 1.5)).collect();
            let input: Vec<Interval> = lo.iter().zip(&hi).map(|(&a, &b)| Interval::new(a, b)).collect();
            let ib = output_bounds(&net, &input, BoundsMethod::Interval);
            let sym = output_bounds(&net, &input, BoundsMethod::Symbolic);
            let what = format!("{act:?} net {widths:?}");
            never_wider(&sym, &ib, &what);
            for x in samples(&mut rng, &lo, &hi, 10_000) {
                let (y, e) = eval_with_error(&net, &x);
                check_inside(&ib, &y, &e, &what);
                check_inside(&sym, &y, &e, &what);
            }
        }
    }
}

#[test]
fn point_boxes_give_tight_enclosures() {
    // On a degenerate box the bounds must still hold the f64 value (within its error)
    // and be tight: only rounding allowances remain.
    let mut rng = Rng(5);
    let net = random_net(&mut rng, &[4, 16, 16, 3], &Layer::Relu, false);
    for _ in 0..200 {
        let x: Vec<f64> = (0..4).map(|_| rng.normal()).collect();
        let input: Vec<Interval> = x.iter().map(|&v| Interval::point(v)).collect();
        let (y, e) = eval_with_error(&net, &x);
        for method in [BoundsMethod::Interval, BoundsMethod::Symbolic] {
            let b = output_bounds(&net, &input, method);
            check_inside(&b, &y, &e, "point box");
            for o in &b.outputs {
                assert!(o.hi() - o.lo() < 1e-12 * (1.0 + o.mag()), "{method:?}: {o:?} too wide for a point");
            }
        }
    }
}
