//! Output bounds against the exact real value of the network at points of tiny boxes,
//! computed in exact rational arithmetic by `tests/reference/exact_bounds_check.py`
//! (Python's `fractions`). Boxes are points or a few ulps wide and the weights are
//! chosen to cancel (large products summing to small values), so the bounds are only
//! as wide as the rounding allowances: a missing or too small allowance for the
//! rounding of f64 operations shows up as an exact value outside the bounds. The raw
//! backward pass (before its intersection with interval bounds, which would hide it)
//! is checked too.

use crate::common;

use common::Rng;
use ndarray::{Array1, Array2};
use serde_json::{json, Value};
use std::process::Command;
use tessera_engine::interval::Interval;
use tessera_engine::net::bounds::raw_symbolic_bounds;
use tessera_engine::net::{output_bounds, Layer, Network, OutputBounds};
use tessera_engine::spec::BoundsMethod;

fn bounds_json(b: &OutputBounds) -> Value {
    json!({
        "lower": b.outputs.iter().map(|i| i.lo()).collect::<Vec<_>>(),
        "upper": b.outputs.iter().map(|i| i.hi()).collect::<Vec<_>>(),
        "diff_lower": b.diff.iter().map(|r| r.iter().map(|i| i.lo()).collect::<Vec<_>>()).collect::<Vec<_>>(),
        "diff_upper": b.diff.iter().map(|r| r.iter().map(|i| i.hi()).collect::<Vec<_>>()).collect::<Vec<_>>(),
    })
}

fn layers_json(net: &Network) -> Value {
    Value::Array(
        net.layers()
            .iter()
            .map(|l| match l {
                Layer::Dense { w, b } => json!({
                    "w": w.rows().into_iter().map(|r| r.to_vec()).collect::<Vec<_>>(),
                    "b": b.to_vec(),
                }),
                Layer::Relu => json!("relu"),
                other => panic!("only ReLU networks here, not {other:?}"),
            })
            .collect(),
    )
}

/// Weights of magnitude `scale` with mixed signs, so that sums cancel heavily.
fn cancelling_net(rng: &mut Rng, widths: &[usize], scale: f64, f32_weights: bool) -> Network {
    let round = |v: f64| if f32_weights { v as f32 as f64 } else { v };
    let mut layers = Vec::new();
    for k in 0..widths.len() - 1 {
        let (n, m) = (widths[k], widths[k + 1]);
        let s = if k == 0 { scale } else { (2.0 / n as f64).sqrt() };
        layers.push(Layer::Dense {
            w: Array2::from_shape_fn((m, n), |_| round(rng.normal() * s)),
            b: Array1::from_shape_fn(m, |_| round(rng.normal() * 0.3)),
        });
        if k < widths.len() - 2 {
            layers.push(Layer::Relu);
        }
    }
    Network::new(widths[0], layers, f32_weights).unwrap()
}

/// Two affine layers whose product cancels almost exactly: rows of `W1` come in nearly
/// equal pairs and `W2` takes their differences with inexact coefficients, so a
/// computed `Λ·W2·W1` has rounding errors far above its own size. Then ReLU and a
/// final dense layer. A backward pass that ignores the rounding of `Λ·W` is caught here.
fn adversarial_net(rng: &mut Rng, n: usize, pairs: usize) -> Network {
    let mut w1 = Array2::zeros((2 * pairs, n));
    for p in 0..pairs {
        for k in 0..n {
            let a = rng.normal() * 1000.0;
            w1[[2 * p, k]] = a;
            w1[[2 * p + 1, k]] = a * (1.0 + 1e-9 * rng.normal());
        }
    }
    let mut w2 = Array2::zeros((pairs, 2 * pairs));
    for p in 0..pairs {
        let c = 0.1 + rng.unit();
        w2[[p, 2 * p]] = c;
        w2[[p, 2 * p + 1]] = -c;
    }
    let w3 = Array2::from_shape_fn((2, pairs), |_| rng.normal());
    let layers = vec![
        Layer::Dense { w: w1, b: Array1::zeros(2 * pairs) },
        Layer::Dense { w: w2, b: Array1::from_shape_fn(pairs, |_| rng.normal() * 1e-6) },
        Layer::Relu,
        Layer::Dense { w: w3, b: Array1::zeros(2) },
    ];
    Network::new(n, layers, false).unwrap()
}

#[test]
fn bounds_hold_the_exact_value_on_tiny_boxes() {
    let mut rng = Rng(31337);
    let mut cases = Vec::new();
    let shapes: &[&[usize]] = &[&[3, 8, 3], &[4, 12, 12, 3], &[2, 6, 6, 6, 2]];
    for (s, &widths) in shapes.iter().enumerate() {
        for (scale, f32w) in [(1.0, false), (1000.0, false), (1000.0, true)] {
            let net = if scale == 1.0 && s == 2 { adversarial_net(&mut rng, 3, 6) } else { cancelling_net(&mut rng, widths, scale, f32w) };
            let widths: &[usize] = if scale == 1.0 && s == 2 { &[3, 12, 6, 2] } else { widths };
            for ulps in [0u32, 4, 4096] {
                let n = widths[0];
                let lo: Vec<f64> = (0..n).map(|_| rng.normal() * 1000.0).collect();
                let hi: Vec<f64> = lo
                    .iter()
                    .map(|&l| {
                        let mut h = l;
                        for _ in 0..ulps {
                            h = h.next_up();
                        }
                        h
                    })
                    .collect();
                let input: Vec<Interval> = lo.iter().zip(&hi).map(|(&a, &b)| Interval::new(a, b)).collect();
                let mut points: Vec<Vec<f64>> =
                    (0..1usize << n).map(|mask| (0..n).map(|k| if mask >> k & 1 == 1 { hi[k] } else { lo[k] }).collect()).collect();
                for _ in 0..24 {
                    points.push((0..n).map(|k| rng.uniform(lo[k], hi[k]).clamp(lo[k], hi[k])).collect());
                }
                cases.push(json!({
                    "name": format!("shape{s} scale{scale} f32={f32w} width {ulps} ulps"),
                    "layers": layers_json(&net),
                    "points": points,
                    "bounds": {
                        "interval": bounds_json(&output_bounds(&net, &input, BoundsMethod::Interval)),
                        "symbolic": bounds_json(&output_bounds(&net, &input, BoundsMethod::Symbolic)),
                        "raw_symbolic": bounds_json(&raw_symbolic_bounds(&net, &input)),
                    },
                }));
            }
        }
    }
    // Cancellation in the last step, lam·x over the box: inputs nearly equal in pairs,
    // weights that take their differences with inexact coefficients.
    for t in 0..12 {
        let c = 0.1 + rng.unit();
        let w1 = ndarray::array![[c, -c], [-1.3 * c, 1.3 * c]];
        let w2 = Array2::from_shape_fn((2, 2), |_| rng.normal());
        let net = Network::new(
            2,
            vec![
                Layer::Dense { w: w1, b: Array1::zeros(2) },
                Layer::Relu,
                Layer::Dense { w: w2, b: Array1::zeros(2) },
            ],
            false,
        )
        .unwrap();
        let a = rng.normal() * 1000.0;
        let x = [a, a * (1.0 + 1e-9 * rng.normal())];
        let input: Vec<Interval> = x.iter().map(|&v| Interval::point(v)).collect();
        cases.push(json!({
            "name": format!("cancelling differences {t}"),
            "layers": layers_json(&net),
            "points": [x],
            "bounds": {
                "interval": bounds_json(&output_bounds(&net, &input, BoundsMethod::Interval)),
                "symbolic": bounds_json(&output_bounds(&net, &input, BoundsMethod::Symbolic)),
                "raw_symbolic": bounds_json(&raw_symbolic_bounds(&net, &input)),
            },
        }));
    }
    let dir = common::temp_dir("bounds-exact");
    let file = dir.join("cases.json");
    std::fs::write(&file, serde_json::to_string(&json!({ "cases": cases })).unwrap()).unwrap();
    let script = std::path::PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../tests/reference/exact_bounds_check.py");
    let out = Command::new("python3").arg(&script).arg(&file).output().expect("run python3");
    let report = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "exact check failed: {report}\n{}", String::from_utf8_lossy(&out.stderr));
    let v: Value = serde_json::from_str(report.trim()).unwrap();
    assert!(v["checked"].as_u64().unwrap() > 3000, "{report}");
    println!("exact check: {report}");
}
