//! Time-varying disturbances, the spec constructor, and failures as ordinary results.

use crate::plant_common as common;

use common::*;
use tessera_engine::affine::StateSet;
use tessera_engine::interval::Interval;
use tessera_engine::plant::{Plant, PlantError};
use tessera_engine::spec::{parse_spec, EngineOptions};

#[test]
fn time_varying_disturbance_stays_inside_and_is_not_absurdly_wide() {
    // dx/dt = −x + w with w(t) ∈ [−0.1, 0.1] of any shape. The reachable set from
    // [a, b] at time t is [a e^{−t} − 0.1(1 − e^{−t}), b e^{−t} + 0.1(1 − e^{−t})]
    // (variation of constants, textbook; the extremes are reached by w ≡ ∓0.1).
    //
    // Samples: piecewise-constant random w switching every 0.1 s, simulated by RK4 at
    // h = 1e-3 (for this linear ODE the RK4 local error is ~h⁵/120·|x − w| < 1e-16,
    // so the global error over 10 s is far below 1e-12). Margin 1e-10 per coordinate.
    let plant = Plant::from_text(&["x"], &[], &["w"], &["-x + w"]).unwrap();
    let opts = EngineOptions::default();
    let (a, b) = (0.9, 1.1);
    let period = 0.5;
    let periods = 20;
    let dist = [Interval::new(-0.1, 0.1)];
    let flows = run_periods(&plant, &[Interval::new(a, b)], &[], &dist, period, periods, &opts);
    let margin = 1e-10;
    let pieces_per_period = 5;
    let piece = period / pieces_per_period as f64;
    let mut rng = Rng(2024);
    let mut starts: Vec<f64> = vec![a, b, 0.5 * (a + b)];
    for _ in 0..5 {
        starts.push(rng.range(a, b));
    }
    for (j, &x0) in starts.iter().enumerate() {
        // sample 0: w ≡ −0.1, sample 1: w ≡ +0.1 (the extremes), others random
        let mut x = x0;
        for (k, flow) in flows.iter().enumerate() {
            for q in 0..pieces_per_period {
                let w = match j {
                    0 => -0.1,
                    1 => 0.1,
                    _ => {
                        if rng.unit() < 0.3 {
                            if rng.unit() < 0.5 { -0.1 } else { 0.1 }
                        } else {
                            rng.range(-0.1, 0.1)
                        }
                    }
                };
                let traj = plant.simulate_period(&[x], &[], &[w], piece, 100);
                x = traj.last().unwrap()[0];
                let t = (q + 1) as f64 * piece; // time within period k
                for p in flow.tube.iter().filter(|p| p.t.lo() <= t && t <= p.t.hi()) {
                    assert!(p.hull[0].inflate(margin).contains(x), "sample {j} period {k} t={t}: {x} not in tube hull {:?}", p.hull[0]);
                    assert!(p.enclosure.contains_point_with_margin(&[x], margin), "sample {j} period {k} t={t}: tube");
                }
            }
            assert!(flow.end.contains_point_with_margin(&[x], margin), "sample {j} period {k}: {x} not in {:?}", flow.end.to_box());
        }
    }
    // Width against the true reachable width.
    let mut worst: f64 = 0.0;
    let mut line = String::new();
    for (k, flow) in flows.iter().enumerate() {
        let t = (k + 1) as f64 * period;
        let decay = (-t).exp();
        let truth = (b - a) * decay + 0.2 * (1.0 - decay);
        let ours = flow.end.to_box()[0].width();
        let ratio = ours / truth;
        assert!(ratio >= 1.0 - 1e-9, "enclosure narrower than the reachable set: {ours} < {truth}");
        worst = worst.max(ratio);
        if k % 4 == 3 {
            line += &format!(" t={t}:{ratio:.4}");
        }
    }
    println!("disturbance: enclosure width / true reachable width:{line}; worst {worst:.4}");
    assert!(worst < 1.2, "enclosure {worst}x wider than the true reachable set");
}

#[test]
fn plant_from_spec_encloses_the_tank() {
    // The spec's tank: h' = q − 0.1 h + leak, leak ∈ [−0.01, 0.01], q an input.
    // With a constant leak L the solution is h(t) = s + (h0 − s) e^{−0.1 t},
    // s = 10 (q + L) (linear ODE, textbook); L at both extremes and 0 is checked.
    let spec = parse_spec(
        &serde_json::json!({
            "name": "tank",
            "states": [{"name": "h", "unit": "m"}],
            "inputs": [{"name": "q", "unit": "m/s"}],
            "disturbances": [{"name": "leak", "range": [-0.01, 0.01]}],
            "dynamics": {"h": "q - 0.1 * h + leak"},
            "controller": {
                "period": 0.5,
                "observations": [{"name": "level", "expr": "h"}],
                "networks": ["tank.onnx"],
                "selection": {"mode": "single"},
                "decision": "argmax",
                "commands": [{"name": "off", "set": {"q": 0.0}}, {"name": "on", "set": {"q": 0.25}}],
                "initial_command": "off"
            },
            "unsafe": [{"all": ["h >= 2"]}],
            "horizon_periods": 20,
            "envelope": {"h": [0.5, 1.5]},
            "refinement": {"max_depth": 8, "split": ["h"]}
        })
        .to_string(),
    )
    .expect("valid spec");
    let plant = Plant::new(&spec).unwrap();
    let q = spec.commands[1].inputs[0];
    let flows = run_periods(&plant, &spec.envelope, &[q], &spec.disturbance_ranges, spec.period, 20, &spec.engine);
    for h0 in [0.5, 1.0, 1.5] {
        for leak in [-0.01, 0.0, 0.01] {
            let exact = |_: usize, t: f64| {
                let s = 10.0 * (q + leak);
                vec![s + (h0 - s) * (-0.1 * t).exp()]
            };
            check_trajectories(&flows, spec.period, 1e-12, 1, &exact, "tank");
        }
    }
}

#[test]
fn failures_are_results_not_panics() {
    let opts = EngineOptions::default();
    // Finite-time blow-up: x' = x², x(0) ∈ [1, 1.1] escapes before t = 1.
    let p = Plant::from_text(&["x"], &[], &[], &["x^2"]).unwrap();
    let r = p.integrate_period(&StateSet::from_box(&[Interval::new(1.0, 1.1)]), &[], &[], 2.0, &opts);
    assert!(matches!(r, Err(PlantError::NoEnclosure { .. }) | Err(PlantError::StepLimit { .. }) | Err(PlantError::Undefined { .. })), "{r:?}");
    // Leaving the domain: x' = −sqrt(x) reaches 0 at t = 2√x0 < 0.3.
    let p = Plant::from_text(&["x"], &[], &[], &["-sqrt(x)"]).unwrap();
    let r = p.integrate_period(&StateSet::from_box(&[Interval::new(0.01, 0.02)]), &[], &[], 1.0, &opts);
    assert!(r.is_err(), "{r:?}");
    // Wrong argument sizes.
    let p = Plant::from_text(&["x", "y"], &["u"], &[], &["y", "u"]).unwrap();
    let x = StateSet::from_box(&[Interval::new(0.0, 1.0), Interval::new(0.0, 1.0)]);
    assert!(matches!(p.integrate_period(&x, &[], &[], 1.0, &opts), Err(PlantError::BadArgument(_))));
    assert!(matches!(p.integrate_period(&x, &[1.0], &[], -1.0, &opts), Err(PlantError::BadArgument(_))));
    assert!(matches!(p.integrate_period(&StateSet::point(&[0.0]), &[1.0], &[], 1.0, &opts), Err(PlantError::BadArgument(_))));
    // A bad expression names the state.
    let e = Plant::from_text(&["x"], &[], &[], &["x +"]).unwrap_err();
    assert!(e.to_string().contains("'x'"), "{e}");
}

#[test]
fn simulation_returns_every_step() {
    // RK4 on x' = −x over 1 s in 10 steps: 11 states, the last within 1e-6 of e^{−1}
    // (RK4 global error ≈ h⁴/120·t for this ODE, about 1e-6 at h = 0.1).
    let p = Plant::from_text(&["x"], &[], &[], &["-x"]).unwrap();
    let traj = p.simulate_period(&[1.0], &[], &[], 1.0, 10);
    assert_eq!(traj.len(), 11);
    assert_eq!(traj[0], vec![1.0]);
    assert!((traj[10][0] - (-1.0f64).exp()).abs() < 1e-6, "{}", traj[10][0]);
}

#[test]
fn double_integrator_with_switching_disturbance() {
    // x' = v, v' = u + w with w(t) ∈ [−1, 1]: for piecewise-constant w the exact solution
    // over a piece of length τ is x += vτ + (u + w)τ²/2, v += (u + w)τ (textbook).
    // Bang-bang w with random switching times reaches the diagonal extremes of the
    // reachable set, where constant disturbances do not. Margin 1e-12 (f64 evaluation).
    let plant = Plant::from_text(&["x", "v"], &["u"], &["w"], &["v", "u + w"]).unwrap();
    let opts = EngineOptions::default();
    let x0 = [Interval::new(-0.1, 0.1), Interval::new(0.9, 1.1)];
    let (u, period, periods) = (0.25, 0.2, 25);
    let flows = run_periods(&plant, &x0, &[u], &[Interval::new(-1.0, 1.0)], period, periods, &opts);
    let mut rng = Rng(77);
    for (j, p0) in samples(&x0, 6, &mut rng).into_iter().enumerate() {
        let (mut x, mut v) = (p0[0], p0[1]);
        for (k, flow) in flows.iter().enumerate() {
            // 1–3 switches at random times inside the period
            let mut cuts: Vec<f64> = (0..1 + (rng.next_u64() % 3) as usize).map(|_| rng.range(0.0, period)).collect();
            cuts.push(period);
            cuts.sort_by(f64::total_cmp);
            let mut t = 0.0;
            for c in cuts {
                let w = if rng.unit() < 0.5 { -1.0 } else { 1.0 };
                let tau = c - t;
                x += v * tau + 0.5 * (u + w) * tau * tau;
                v += (u + w) * tau;
                t = c;
            }
            assert!(flow.end.contains_point_with_margin(&[x, v], 1e-12), "sample {j} period {k}: {:?} not in {:?}", [x, v], flow.end.to_box());
        }
    }
    let w: Vec<String> = [0usize, 4, 9, 14, 19, 24].iter().map(|&k| format!("{}:{:.3e}", k + 1, max_width(&flows[k].end))).collect();
    println!("double integrator with disturbance: max width after period {}", w.join("  "));
}
