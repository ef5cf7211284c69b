//! Per-cell cost of the engine on the demo scenarios (printed figures, not a test):
//! median and 90th percentile wall time, the plant / network / falsification split,
//! the verdict mix, and the ratio of a decided proof's time to one fine simulation of
//! the same cell (the closed loop simulated once from the cell's centre).
//!
//! `cargo run --release -p tessera-engine --example bench_cells [-- CELLS_PER_SIZE]`

use std::path::Path;
use std::time::Instant;
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::falsify::{self, Rng};
use tessera_engine::interval::Interval;
use tessera_engine::verdict::VerdictKind;

fn load(spec: &Path) -> ClosedLoop {
    let text = std::fs::read_to_string(spec).expect("spec");
    let s = tessera_engine::spec::parse_spec(&text).expect("valid spec");
    let nets = ClosedLoop::load_networks(&s, spec.parent().unwrap()).expect("networks");
    ClosedLoop::new(s, nets).expect("closed loop")
}

fn pct(v: &mut [f64], p: f64) -> f64 {
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    v[((v.len() - 1) as f64 * p).round() as usize]
}

fn main() {
    let per_size: usize = std::env::args().nth(1).and_then(|s| s.parse().ok()).unwrap_or(20);
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo");
    println!("| scenario | cell (fraction of envelope per split dim) | cells | safe/unsafe/inconcl. | median ms | p90 ms | plant % | network % | falsify % | decided proof / one simulation |");
    println!("|---|---|---|---|---|---|---|---|---|---|");
    for name in ["lander", "aisle", "heading"] {
        let path = root.join(name).join("spec.json");
        let mut cl = load(&path);
        // Budgets as the demo sets them: where the spec's `engine` section leaves them out.
        let raw: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&path).expect("spec")).expect("spec JSON");
        let stated = |k: &str| raw["engine"].get(k).is_some();
        if !stated("node_budget") {
            cl.spec.engine.node_budget = 600;
        }
        if !stated("time_budget_s") {
            cl.spec.engine.time_budget_s = 5.0;
        }
        if !stated("falsify_samples") {
            cl.spec.engine.falsify_samples = 12;
        }
        let env = cl.envelope();
        let mut rng = Rng::new(7);
        for frac in [1.0 / 4.0, 1.0 / 16.0, 1.0 / 64.0] {
            let (mut walls, mut plant, mut network, mut fals) = (Vec::new(), 0.0, 0.0, 0.0);
            let (mut safe, mut unsafe_, mut inc) = (0, 0, 0);
            let mut ratios = Vec::new();
            for _ in 0..per_size {
                let cell: Vec<Interval> = env
                    .iter()
                    .enumerate()
                    .map(|(d, e)| {
                        if !cl.spec.split.contains(&d) {
                            return *e;
                        }
                        let w = e.width() * frac;
                        let lo = e.lo() + (e.width() - w) * rng.unit();
                        Interval::new(lo, lo + w)
                    })
                    .collect();
                let v = check_cell(&cl, &cell);
                walls.push(v.stats.wall_ms);
                plant += v.stats.plant_ms;
                network += v.stats.network_ms;
                fals += v.stats.falsify_ms;
                match v.verdict {
                    VerdictKind::Safe => safe += 1,
                    VerdictKind::Unsafe => unsafe_ += 1,
                    VerdictKind::Inconclusive => inc += 1,
                }
                if v.verdict != VerdictKind::Inconclusive {
                    // One fine simulation of the same cell: centre, initial command,
                    // random disturbances and noise, full horizon.
                    let centre: Vec<f64> = cell.iter().map(|i| i.mid()).collect();
                    let t = Instant::now();
                    let reps = 20;
                    for _ in 0..reps {
                        let mut r = Rng::new(1);
                        let _ = falsify::simulate(
                            &cl,
                            &centre,
                            cl.spec.initial_commands[0],
                            falsify::Pick::Random,
                            falsify::Pick::Random,
                            &mut r,
                        );
                    }
                    let sim_ms = t.elapsed().as_secs_f64() * 1e3 / reps as f64;
                    ratios.push(v.stats.wall_ms / sim_ms);
                }
            }
            let total: f64 = walls.iter().sum();
            let ratio = if ratios.is_empty() { "no decided proof".to_string() } else { format!("{:.0}× (median)", pct(&mut ratios, 0.5)) };
            println!(
                "| {name} | {frac} | {per_size} | {safe}/{unsafe_}/{inc} | {:.1} | {:.1} | {:.0} | {:.0} | {:.0} | {ratio} |",
                pct(&mut walls.clone(), 0.5),
                pct(&mut walls, 0.9),
                100.0 * plant / total,
                100.0 * network / total,
                100.0 * fals / total,
            );
        }
    }
}
