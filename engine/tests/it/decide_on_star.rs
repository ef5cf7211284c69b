//! Decisions over constrained sets (`ClosedLoop::decide_on_star`) against the
//! controller's actual decisions, computed by onnxruntime (the ONNX standard's
//! reference runtime, PyPI) in `tests/reference/decide_reference.py`.
//!
//! Two small loops with seeded random ReLU controllers written as float64 ONNX files:
//! one with a bank of two networks chosen by the previous command, argmax, normalised
//! observations `x` and `x + 0.5·v` with asymmetric noise; one with a single network,
//! argmin, observations `v` and `x − v`. On random cells (as stars with 0–2 random
//! constraints on the cell's symbols) each bounds method decides once, and then again
//! on every part it returned (two periods of decisions on the same states, so the
//! second decision meets constraints on the first one's noise symbols).
//!
//! Points of each star (rejection sampling of its symbols under its constraints) and
//! noise values (uniform, a tenth at the ends) give network inputs; onnxruntime's
//! outputs give the command picked (arg-max / arg-min, ties to the lowest index). The
//! guarantee checked: that command is among the parts, and the point's symbols together
//! with the noise symbols' values satisfy every constraint of its part. The value of
//! the noise symbol of observation `j` is `(noise_j − mid_j) / rad_j` (the observations
//! are linear, so the observation's own error radius is a rounding error and the
//! symbol stands for the noise; tolerance 1e-9 relative for those roundings). Points
//! whose two best outputs are within 1e-9 (relative) of a tie are skipped, since
//! rounding of the input may flip them. So that vacuous constraints cannot pass, the
//! test also requires that the parts' constraints exclude most sampled points whose
//! command is a different one.

use crate::common;

use common::{read_f64s, write_f64s, Rng};
use serde_json::{json, Value};
use std::path::PathBuf;
use tessera_engine::affine::StateSet;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::interval::Interval;
use tessera_engine::net::load_onnx;
use tessera_engine::spec::{parse_spec, BoundsMethod, Decision};
use tessera_engine::star::{Halfspace, Star};

fn system_bank() -> Value {
    json!({
        "name": "bank",
        "states": [{"name": "x", "unit": "m"}, {"name": "v", "unit": "m/s"}],
        "inputs": [{"name": "u", "unit": "m/s2"}],
        "dynamics": {"x": "v", "v": "u"},
        "controller": {
            "period": 0.2,
            "observations": [
                {"name": "pos", "expr": "x", "noise": [-0.05, 0.05]},
                {"name": "mix", "expr": "x + 0.5 * v", "noise": [-0.02, 0.03]}
            ],
            "normalization": {"offset": [0.25, 0.0], "scale": [0.5, 2.0]},
            "networks": ["bank0.onnx", "bank1.onnx"],
            "selection": {"mode": "previous_command", "network_of_command": [0, 1, 0]},
            "decision": "argmax",
            "commands": [
                {"name": "back", "set": {"u": -1.0}},
                {"name": "coast", "set": {"u": 0.0}},
                {"name": "ahead", "set": {"u": 1.0}}
            ],
            "initial_command": "coast"
        },
        "unsafe": [{"all": ["x >= 3"]}],
        "horizon_periods": 2,
        "envelope": {"x": [-1.5, 1.5], "v": [-1.0, 1.0]},
        "refinement": {"max_depth": 6, "split": ["x", "v"]}
    })
}

fn system_single() -> Value {
    let mut s = system_bank();
    s["name"] = json!("single");
    s["controller"]["observations"] = json!([
        {"name": "vel", "expr": "v", "noise": [-0.04, 0.04]},
        {"name": "gap", "expr": "x - v", "noise": [-0.01, 0.01]}
    ]);
    s["controller"].as_object_mut().unwrap().remove("normalization");
    s["controller"]["networks"] = json!(["single.onnx"]);
    s["controller"]["selection"] = json!({"mode": "single"});
    s["controller"]["decision"] = json!("argmin");
    s
}

/// One sampled situation: the values of every symbol the star knows (state symbols and
/// earlier noise symbols), this decision's noise, and the network input.
struct Point {
    eps: Vec<f64>,
    noise: Vec<f64>,
    input: Vec<f64>,
}

/// A decision to check: the parts it returned and the points drawn from its star.
struct Case {
    label: String,
    prev: usize,
    noise_base: usize,
    parts: Vec<(usize, Star)>,
    points: Vec<Point>,
    outputs_file: PathBuf,
}

fn holds(h: &Halfspace, eps: &[f64], tol: f64) -> bool {
    let s: f64 = h.terms.iter().map(|&(k, a)| a * eps[k]).sum();
    let mag: f64 = h.terms.iter().map(|&(_, a)| a.abs()).sum::<f64>() + h.rhs.abs() + 1.0;
    s <= h.rhs + tol * mag
}

fn state_at(set: &StateSet, eps: &[f64]) -> Vec<f64> {
    set.components().iter().map(|a| a.center() + a.terms().iter().map(|&(s, g)| g * eps[s]).sum::<f64>()).collect()
}

/// Points of `star` (symbols `0..space` by rejection under its constraints) with noise.
fn draw(rng: &mut Rng, cl: &ClosedLoop, star: &Star, space: usize, count: usize) -> Vec<Point> {
    let spec = &cl.spec;
    let mut out = Vec::new();
    let mut tries = 0;
    while out.len() < count && tries < 100_000 {
        tries += 1;
        let eps: Vec<f64> = (0..space).map(|_| rng.uniform(-1.0, 1.0)).collect();
        if !star.cons.iter().all(|h| holds(h, &eps, -1e-12)) {
            continue;
        }
        let x = state_at(&star.set, &eps);
        let noise: Vec<f64> = spec
            .observations
            .iter()
            .map(|o| match rng.below(20) {
                0 => o.noise.lo(),
                1 => o.noise.hi(),
                _ => rng.uniform(o.noise.lo(), o.noise.hi()),
            })
            .collect();
        let input: Vec<f64> = spec
            .observations
            .iter()
            .enumerate()
            .map(|(j, o)| (o.expr.eval_f64(&x) + noise[j] - spec.offset[j]) / spec.scale[j])
            .collect();
        out.push(Point { eps, noise, input });
    }
    out
}

/// arg-max / arg-min with ties to the lowest index, and the margin to the runner-up.
fn picked(y: &[f64], decision: Decision) -> (usize, f64) {
    let better = |a: f64, b: f64| match decision {
        Decision::Argmax => a > b,
        Decision::Argmin => a < b,
    };
    let mut best = 0;
    for i in 1..y.len() {
        if better(y[i], y[best]) {
            best = i;
        }
    }
    let margin = (0..y.len()).filter(|&j| j != best).map(|j| (y[best] - y[j]).abs()).fold(f64::INFINITY, f64::min);
    (best, margin)
}


/// Random constraints on the cell's symbols that keep a random anchor point inside.
fn cell_constraints(rng: &mut Rng, n: usize) -> Vec<Halfspace> {
    (0..rng.below(3))
        .map(|_| {
            let anchor: Vec<f64> = (0..n).map(|_| rng.uniform(-0.5, 0.5)).collect();
            let terms: Vec<(usize, f64)> = (0..n).map(|s| (s, rng.normal())).collect();
            let at: f64 = terms.iter().map(|&(s, a)| a * anchor[s]).sum();
            let l1: f64 = terms.iter().map(|t| t.1.abs()).sum();
            Halfspace::new(terms, at + rng.uniform(0.1, 0.6) * l1)
        })
        .collect()
}

#[test]
fn decisions_on_stars_hold_the_controllers_choices() {
    let dir = common::temp_dir("decide-on-star");
    common::run_reference("decide_reference.py", &["nets", dir.to_str().unwrap()]);
    let mut rng = Rng(0xDEC1_0017);
    let mut cases: Vec<Case> = Vec::new();
    let mut queries: Vec<Value> = Vec::new();
    let mut loops: Vec<ClosedLoop> = Vec::new();
    for system in [system_bank(), system_single()] {
        let spec = parse_spec(&system.to_string()).expect("valid spec");
        let nets = spec.networks.iter().map(|f| load_onnx(&std::fs::read(dir.join(f)).unwrap()).unwrap()).collect();
        loops.push(ClosedLoop::new(spec, nets).expect("closed loop"));
    }
    for (sys, cl) in loops.iter().enumerate() {
        let spec = &cl.spec;
        let n = spec.envelope.len();
        let n_obs = spec.observations.len();
        for cell_no in 0..8 {
            // A random cell of 1/8 to 1/2 of the envelope per dimension.
            let cell: Vec<Interval> = spec
                .envelope
                .iter()
                .map(|e| {
                    let w = e.width() * rng.uniform(0.125, 0.5);
                    let lo = e.lo() + (e.width() - w) * rng.unit();
                    Interval::new(lo, lo + w)
                })
                .collect();
            let star = Star { set: StateSet::from_box(&cell), cons: cell_constraints(&mut rng, n) };
            let prev0 = spec.initial_commands[0];
            // The fixed ReLU slopes, and slopes optimised by 12 steps (`engine.slope_steps`).
            for (method, slope_steps) in
                [(BoundsMethod::Interval, 0), (BoundsMethod::Symbolic, 0), (BoundsMethod::Portfolio, 0), (BoundsMethod::Symbolic, 12)]
            {
                let label = format!("system {sys} cell {cell_no} {method:?} slope steps {slope_steps}");
                // Period 1: noise symbols n..n+n_obs; period 2: n+n_obs..n+2·n_obs.
                let d1 = cl.decide_on_star(prev0, &star, method, n, slope_steps);
                let points = draw(&mut rng, cl, &star, n, 400);
                let mut level2 = Vec::new();
                for (c1, part1) in &d1.parts {
                    let d2 = cl.decide_on_star(*c1, part1, method, n + n_obs, slope_steps);
                    let points2 = draw(&mut rng, cl, part1, n + n_obs, 200);
                    level2.push((format!("{label}, after {c1}"), *c1, d2.parts, points2));
                }
                for (label, prev, noise_base, parts, points) in
                    std::iter::once((label.clone(), prev0, n, d1.parts, points)).chain(level2.into_iter().map(|(l, c, p, q)| (l, c, n + n_obs, p, q)))
                {
                    let k = cases.len();
                    let inputs_file = dir.join(format!("in{k}.f64"));
                    let outputs_file = dir.join(format!("out{k}.f64"));
                    write_f64s(&inputs_file, &points.iter().flat_map(|p| p.input.clone()).collect::<Vec<_>>());
                    let model = dir.join(&spec.networks[spec.network_of_command[prev]]);
                    queries.push(json!({
                        "model": model, "inputs": inputs_file, "outputs": outputs_file,
                        "count": points.len(), "n_in": n_obs,
                    }));
                    cases.push(Case { label, prev, noise_base, parts, points, outputs_file });
                }
            }
        }
    }
    let qfile = dir.join("queries.json");
    std::fs::write(&qfile, serde_json::to_string(&json!({ "queries": queries })).unwrap()).unwrap();
    common::run_reference("decide_reference.py", &["eval", qfile.to_str().unwrap()]);

    let mut failures = Vec::new();
    let (mut checked, mut near_ties, mut open, mut excluded, mut others) = (0usize, 0usize, 0usize, 0usize, 0usize);
    for case in &cases {
        let cl = &loops[if case.label.starts_with("system 0") { 0 } else { 1 }];
        let spec = &cl.spec;
        let m = cl.network_after(case.prev).output_dim();
        let ys = read_f64s(&case.outputs_file);
        assert_eq!(ys.len(), case.points.len() * m, "{}: outputs", case.label);
        if case.parts.len() > 1 {
            open += 1;
        }
        for (p, point) in case.points.iter().enumerate() {
            let y = &ys[p * m..(p + 1) * m];
            let (c, margin) = picked(y, spec.decision);
            if margin <= 1e-9 * (1.0 + y.iter().fold(0.0f64, |a, v| a.max(v.abs()))) {
                near_ties += 1;
                continue;
            }
            checked += 1;
            // The symbols' values: the point's, then this decision's noise symbols.
            let mut eps = point.eps.clone();
            eps.resize(case.noise_base, 0.0);
            for (j, o) in spec.observations.iter().enumerate() {
                eps.push((point.noise[j] - o.noise.mid()) / o.noise.rad());
            }
            match case.parts.iter().find(|(k, _)| *k == c) {
                None => failures.push(format!(
                    "{}: onnxruntime picks {c} at input {:?} (outputs {y:?}) but the decision lists {:?}",
                    case.label,
                    point.input,
                    case.parts.iter().map(|p| p.0).collect::<Vec<_>>()
                )),
                Some((_, part)) => {
                    for h in &part.cons {
                        if !holds(h, &eps, 1e-9) {
                            failures.push(format!("{}: command {c} picked at symbols {eps:?}, which violate {h:?}", case.label));
                        }
                    }
                }
            }
            // How well the other parts' constraints exclude this point.
            for (k, part) in &case.parts {
                if *k != c && !part.cons.is_empty() {
                    others += 1;
                    if part.cons.iter().any(|h| !holds(h, &eps, 0.0)) {
                        excluded += 1;
                    }
                }
            }
        }
    }
    println!(
        "{} decisions ({open} open), {checked} sampled choices checked, {near_ties} near-ties skipped; \
         points of another command excluded by a part's constraints: {excluded}/{others}",
        cases.len()
    );
    assert!(failures.is_empty(), "{} failures, first ones:\n{}", failures.len(), failures.iter().take(20).cloned().collect::<Vec<_>>().join("\n"));
    assert!(open >= 10 && checked >= 20_000, "too few open decisions ({open}) or checks ({checked})");
    assert!(excluded * 2 >= others && others > 0, "constraints exclude only {excluded}/{others} points of other commands");
}
