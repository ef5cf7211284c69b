//! The exact method against the set methods on the demo's linear scenario (the heading
//! keeper), cell by cell (printed figures, not a test): verdict of each method per cell,
//! disagreements, time, programs and binaries.
//!
//! `cargo run --release -p tessera-engine --example bench_exact -- [HORIZON] [CELLS_PER_DIM] [TIME_BUDGET_S]`

use std::path::Path;
use std::time::Instant;
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::interval::Interval;
use tessera_engine::spec::Method;
use tessera_engine::verdict::{Verdict, VerdictKind};

fn load(spec: &Path) -> ClosedLoop {
    let text = std::fs::read_to_string(spec).expect("spec");
    let s = tessera_engine::spec::parse_spec(&text).expect("valid spec");
    let nets = ClosedLoop::load_networks(&s, spec.parent().unwrap()).expect("networks");
    ClosedLoop::new(s, nets).expect("closed loop")
}

fn short(v: &Verdict) -> &'static str {
    match v.verdict {
        VerdictKind::Safe => "safe",
        VerdictKind::Unsafe => "unsafe",
        VerdictKind::Inconclusive => "inconcl.",
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let horizon: u32 = args.get(1).and_then(|s| s.parse().ok()).unwrap_or(6);
    let per_dim: usize = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(4);
    let budget: f64 = args.get(3).and_then(|s| s.parse().ok()).unwrap_or(10.0);
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo/heading/spec.json");
    let mut sets = load(&path);
    sets.spec.horizon = horizon;
    sets.spec.engine.time_budget_s = budget;
    let mut exact = load(&path);
    exact.spec.horizon = horizon;
    exact.spec.engine.time_budget_s = budget;
    exact.spec.engine.method = Method::Exact;
    let env = sets.envelope();
    println!("heading keeper, horizon {horizon} periods, {per_dim}x{per_dim} cells, time budget {budget} s");
    println!("| cell psi | cell r | sets | ms | exact | ms | solver ms | programs | binaries |");
    println!("|---|---|---|---|---|---|---|---|---|");
    let (mut agree, mut decided_sets, mut decided_exact, mut conflicts) = (0, 0, 0, 0);
    let (mut t_sets, mut t_exact) = (0.0, 0.0);
    for a in 0..per_dim {
        for b in 0..per_dim {
            let cut = |e: Interval, k: usize| {
                let w = e.width() / per_dim as f64;
                Interval::new(e.lo() + w * k as f64, e.lo() + w * (k + 1) as f64)
            };
            let cell = vec![cut(env[0], a), cut(env[1], b)];
            let t0 = Instant::now();
            let vs = check_cell(&sets, &cell);
            let ms_s = t0.elapsed().as_secs_f64() * 1e3;
            let t1 = Instant::now();
            let ve = check_cell(&exact, &cell);
            let ms_e = t1.elapsed().as_secs_f64() * 1e3;
            t_sets += ms_s;
            t_exact += ms_e;
            decided_sets += usize::from(vs.verdict != VerdictKind::Inconclusive);
            decided_exact += usize::from(ve.verdict != VerdictKind::Inconclusive);
            agree += usize::from(vs.verdict == ve.verdict);
            let conflict = matches!(
                (vs.verdict, ve.verdict),
                (VerdictKind::Safe, VerdictKind::Unsafe) | (VerdictKind::Unsafe, VerdictKind::Safe)
            );
            conflicts += usize::from(conflict);
            println!(
                "| [{:.3}, {:.3}] | [{:.3}, {:.3}] | {} | {:.0} | {} | {:.0} | {:.0} | {} | {} |{}",
                cell[0].lo(),
                cell[0].hi(),
                cell[1].lo(),
                cell[1].hi(),
                short(&vs),
                ms_s,
                short(&ve),
                ms_e,
                ve.stats.solver_ms,
                ve.stats.milp_programs,
                ve.stats.milp_binaries,
                if conflict { " CONFLICT" } else { "" }
            );
            if std::env::var("BENCH_EXACT_DETAIL").is_ok() {
                println!("    exact: {:?}", ve.detail);
            }
        }
    }
    let n = per_dim * per_dim;
    println!(
        "\n{n} cells: decided by sets {decided_sets}, by exact {decided_exact}; same verdict {agree}; safe-vs-unsafe conflicts {conflicts}; total ms sets {t_sets:.0}, exact {t_exact:.0}"
    );
}
