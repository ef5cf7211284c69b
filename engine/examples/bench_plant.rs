//! Benchmark of the validated plant integrator (not a test): time per period and the
//! growth of the enclosure over 50 periods.
//!
//! `cargo run --release -p tessera-engine --example bench_plant`

use std::time::Instant;
use tessera_engine::affine::StateSet;
use tessera_engine::interval::Interval;
use tessera_engine::plant::Plant;
use tessera_engine::spec::EngineOptions;

/// Runs per case; the fastest is reported.
const REPEATS: usize = 5;

struct Case {
    name: &'static str,
    states: &'static [&'static str],
    inputs: &'static [&'static str],
    dists: &'static [&'static str],
    rhs: &'static [&'static str],
    x0: Vec<Interval>,
    u: Vec<f64>,
    w: Vec<Interval>,
    period: f64,
}

fn main() {
    let cases = vec![
        Case {
            name: "linear 2-state (damped oscillator)",
            states: &["x", "v"],
            inputs: &["u"],
            dists: &[],
            rhs: &["v", "-2 * x - 0.5 * v + u"],
            x0: vec![Interval::new(0.9, 1.1), Interval::new(-0.1, 0.1)],
            u: vec![0.5],
            w: vec![],
            period: 0.1,
        },
        Case {
            name: "unicycle 4-state, w = 0",
            states: &["x", "y", "th", "v"],
            inputs: &["u", "a"],
            dists: &["w"],
            rhs: &["v * cos(th)", "v * sin(th)", "u", "a + w"],
            x0: vec![Interval::new(-0.1, 0.1), Interval::new(-0.1, 0.1), Interval::new(-0.05, 0.05), Interval::new(0.95, 1.05)],
            u: vec![0.4, 0.1],
            w: vec![Interval::ZERO],
            period: 0.1,
        },
        Case {
            name: "unicycle 4-state, w in [-0.05, 0.05]",
            states: &["x", "y", "th", "v"],
            inputs: &["u", "a"],
            dists: &["w"],
            rhs: &["v * cos(th)", "v * sin(th)", "u", "a + w"],
            x0: vec![Interval::new(-0.1, 0.1), Interval::new(-0.1, 0.1), Interval::new(-0.05, 0.05), Interval::new(0.95, 1.05)],
            u: vec![0.4, 0.1],
            w: vec![Interval::new(-0.05, 0.05)],
            period: 0.1,
        },
    ];
    let opts = EngineOptions::default();
    println!("options: taylor_order {}, substeps {}, generators_per_dim {}", opts.taylor_order, opts.substeps, opts.generators_per_dim);
    println!("{:<40} {:>12} {:>10} {:>10} {:>10} {:>10} {:>10}", "system", "us/period*", "w(0)", "w(10)", "w(20)", "w(50)", "gens");
    println!("* fastest of {REPEATS} runs of 50 periods; w(k) = largest hull width after k periods; gens = generators at the end");
    for c in &cases {
        let plant = Plant::from_text(c.states, c.inputs, c.dists, c.rhs).expect("plant");
        let widths_at = [0usize, 10, 20, 50];
        let mut widths = Vec::new();
        let mut best = f64::INFINITY;
        let mut ok = true;
        let mut set = StateSet::from_box(&c.x0);
        // The machine is shared: repeat and keep the fastest run.
        for _rep in 0..REPEATS {
            widths.clear();
            set = StateSet::from_box(&c.x0);
            widths.push(set.to_box().iter().map(|i| i.width()).fold(0.0, f64::max));
            let start = Instant::now();
            for k in 1..=50 {
                match plant.integrate_period(&set, &c.u, &c.w, c.period, &opts) {
                    Ok(flow) => set = flow.end,
                    Err(e) => {
                        println!("{}: period {k}: {e}", c.name);
                        ok = false;
                        break;
                    }
                }
                if widths_at.contains(&k) {
                    widths.push(set.to_box().iter().map(|i| i.width()).fold(0.0, f64::max));
                }
            }
            best = best.min(start.elapsed().as_secs_f64() * 1e6 / 50.0);
            if !ok {
                break;
            }
        }
        let per = best;
        if ok {
            println!(
                "{:<40} {:>12.1} {:>10.3e} {:>10.3e} {:>10.3e} {:>10.3e} {:>10}",
                c.name, per, widths[0], widths[1], widths[2], widths[3], set.num_generators()
            );
        }
    }
}
