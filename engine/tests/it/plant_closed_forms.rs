//! Validated integration against closed-form solutions of textbook ODEs (common
//! practice: the solutions below are the standard ones found in any ODE textbook).
//!
//! Margin: the closed forms are evaluated in f64, whose error is a few ulps of values
//! below 100 (< 1e-13); we allow 1e-12 per coordinate and nothing more.

use crate::plant_common as common;

use common::*;
use tessera_engine::interval::Interval;
use tessera_engine::plant::Plant;
use tessera_engine::spec::EngineOptions;

const MARGIN: f64 = 1e-12;

fn report(name: &str, flows: &[tessera_engine::plant::PeriodFlow]) {
    let w: Vec<String> = flows.iter().enumerate().filter(|(k, _)| k % 10 == 9 || *k == 0).map(|(k, f)| format!("{}:{:.3e}", k + 1, max_width(&f.end))).collect();
    println!("{name}: max width after period {}", w.join("  "));
}

#[test]
fn exponential_decay() {
    // dx/dt = −k x, x(t) = x0 e^{−k t} (textbook). k = 0.7 is an inexact literal: the
    // enclosure holds for the real 0.7, the f64 reference uses the nearest double; the
    // difference over t ≤ 5 is ~1e-16 relative, far inside the margin.
    let plant = Plant::from_text(&["x"], &[], &[], &["-0.7 * x"]).unwrap();
    let opts = EngineOptions::default();
    let mut rng = Rng(7);
    let period = 0.1;
    for trial in 0..5 {
        let a = rng.range(-2.0, 2.0);
        let w = rng.range(0.01, 0.5);
        let x0 = [Interval::new(a, a + w)];
        let flows = run_periods(&plant, &x0, &[], &[], period, 50, &opts);
        let pts = samples(&x0, 4, &mut rng);
        check_trajectories(&flows, period, MARGIN, pts.len(), &|j, t| vec![pts[j][0] * (-0.7 * t).exp()], "decay");
        // Tightness: the exact image of [a, a+w] at t is [a, a+w]·e^{−0.7t}.
        for (k, f) in flows.iter().enumerate() {
            let exact = w * (-0.7 * (k + 1) as f64 * period).exp();
            let ours = f.end.to_box()[0].width();
            assert!(ours <= exact * 1.01 + 1e-9, "decay trial {trial} period {k}: width {ours} vs exact {exact}");
        }
        if trial == 0 {
            report("exponential decay", &flows);
        }
    }
}

#[test]
fn harmonic_oscillator() {
    // x' = v, v' = −ω² x with ω = 2: x(t) = x0 cos ωt + (v0/ω) sin ωt,
    // v(t) = −ω x0 sin ωt + v0 cos ωt (textbook).
    let plant = Plant::from_text(&["x", "v"], &[], &[], &["v", "-4 * x"]).unwrap();
    let opts = EngineOptions::default();
    let mut rng = Rng(11);
    let period = 0.1;
    let om = 2.0f64;
    for trial in 0..4 {
        let (a, b) = (rng.range(-1.0, 1.0), rng.range(-1.0, 1.0));
        let (wa, wb) = (rng.range(0.01, 0.3), rng.range(0.01, 0.3));
        let x0 = [Interval::new(a, a + wa), Interval::new(b, b + wb)];
        let flows = run_periods(&plant, &x0, &[], &[], period, 50, &opts);
        let pts = samples(&x0, 6, &mut rng);
        let exact = |j: usize, t: f64| {
            let p = &pts[j];
            let (s, c) = (om * t).sin_cos();
            vec![p[0] * c + p[1] / om * s, -om * p[0] * s + p[1] * c]
        };
        check_trajectories(&flows, period, MARGIN, pts.len(), &exact, "oscillator");
        // Tightness: the exact set is the linear image M(t)·box; its hull half-widths
        // are Σ_j |M_ij| r_j.
        for (k, f) in flows.iter().enumerate() {
            let t = (k + 1) as f64 * period;
            let (s, c) = (om * t).sin_cos();
            let m = [[c, s / om], [-om * s, c]];
            let r = [wa / 2.0, wb / 2.0];
            let bx = f.end.to_box();
            for i in 0..2 {
                let exact = 2.0 * (m[i][0].abs() * r[0] + m[i][1].abs() * r[1]);
                let ours = bx[i].width();
                assert!(ours <= exact * 1.02 + 1e-9, "oscillator trial {trial} period {k} state {i}: {ours} vs {exact}");
            }
        }
        if trial == 0 {
            report("harmonic oscillator", &flows);
        }
    }
}

#[test]
fn constant_turn_rate() {
    // x' = v cos θ, y' = v sin θ, θ' = ω with v, ω constant inputs (planar motion on a
    // circle, textbook kinematics): θ(t) = θ0 + ωt, x(t) = x0 + (v/ω)(sin θ(t) − sin θ0),
    // y(t) = y0 − (v/ω)(cos θ(t) − cos θ0).
    let plant = Plant::from_text(&["x", "y", "th"], &["v", "om"], &[], &["v * cos(th)", "v * sin(th)", "om"]).unwrap();
    let opts = EngineOptions::default();
    let mut rng = Rng(23);
    let period = 0.2;
    let (v, om) = (1.5, 0.8);
    for trial in 0..3 {
        let c: Vec<f64> = vec![rng.range(-5.0, 5.0), rng.range(-5.0, 5.0), rng.range(-3.0, 3.0)];
        let w: Vec<f64> = vec![rng.range(0.01, 0.2), rng.range(0.01, 0.2), rng.range(0.005, 0.05)];
        let x0: Vec<Interval> = (0..3).map(|i| Interval::new(c[i], c[i] + w[i])).collect();
        let flows = run_periods(&plant, &x0, &[v, om], &[], period, 50, &opts);
        let pts = samples(&x0, 6, &mut rng);
        let exact = |j: usize, t: f64| {
            let p = &pts[j];
            let th = p[2] + om * t;
            vec![p[0] + v / om * (th.sin() - p[2].sin()), p[1] - v / om * (th.cos() - p[2].cos()), th]
        };
        check_trajectories(&flows, period, MARGIN, pts.len(), &exact, "constant turn");
        if trial == 0 {
            report("constant turn", &flows);
        }
    }
}

#[test]
fn kink_crossed_by_every_trajectory() {
    // x' = 1 + 0.5|x| from x0 < 0 (piecewise-linear ODE, solved on each side):
    // x < 0: x(t) = 2 − (2 − x0) e^{−t/2}, reaching 0 at t* = 2 ln((2 − x0)/2);
    // x > 0: x(t) = −2 + 2 e^{(t − t*)/2}.
    let plant = Plant::from_text(&["x"], &[], &[], &["1 + 0.5 * abs(x)"]).unwrap();
    let opts = EngineOptions::default();
    let x0 = [Interval::new(-1.0, -0.5)];
    let period = 0.25;
    let flows = run_periods(&plant, &x0, &[], &[], period, 12, &opts);
    let mut rng = Rng(5);
    let pts = samples(&x0, 5, &mut rng);
    let exact = |j: usize, t: f64| {
        let x0 = pts[j][0];
        let ts = 2.0 * ((2.0 - x0) / 2.0).ln();
        vec![if t <= ts { 2.0 - (2.0 - x0) * (-t / 2.0).exp() } else { -2.0 + 2.0 * ((t - ts) / 2.0).exp() }]
    };
    check_trajectories(&flows, period, MARGIN, pts.len(), &exact, "kink");
    report("kink", &flows);
}

#[test]
fn stiff_decay_forces_smaller_sub_steps() {
    // dx/dt = −50 x over a period of 0.5 s: the a-priori test fails at the initial
    // sub-step 0.125 s (h·50 > 1), so the integrator must halve the step. Closed form
    // x(t) = x0 e^{−50 t} (textbook).
    let plant = Plant::from_text(&["x"], &[], &[], &["-50 * x"]).unwrap();
    let opts = EngineOptions::default();
    let x0 = [Interval::new(1.0, 1.2)];
    let period = 0.5;
    let flows = run_periods(&plant, &x0, &[], &[], period, 3, &opts);
    assert!(flows[0].tube.len() > opts.substeps as usize, "{} sub-steps", flows[0].tube.len());
    assert!(flows[0].tube.len() <= opts.max_substeps as usize);
    // The pieces tile the period in order.
    let mut t = 0.0;
    for p in &flows[0].tube {
        assert_eq!(p.t.lo(), t);
        t = p.t.hi();
    }
    assert_eq!(t, period);
    let mut rng = Rng(1);
    let pts = samples(&x0, 3, &mut rng);
    check_trajectories(&flows, period, MARGIN, pts.len(), &|j, t| vec![pts[j][0] * (-50.0 * t).exp()], "stiff decay");
    println!("stiff decay: {} sub-steps in the first period, end width {:.3e}", flows[0].tube.len(), max_width(&flows[0].end));
}
