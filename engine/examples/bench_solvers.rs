//! The exact method's MILP solvers on the same programs (printed figures, not a test):
//! the widened programs of a grid of cells of the demo's heading keeper at a given
//! horizon, each solved by microlp (pure Rust) and, when the worker is built with the
//! `highs` feature, by HiGHS; answer and time per program, and totals.
//!
//! `cargo run --release -p tessera-worker --features highs --example bench_solvers -- [HORIZON] [CELLS_PER_DIM] [LIMIT_S]`

use std::path::Path;
use std::time::{Duration, Instant};
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::exact;
use tessera_engine::interval::Interval;
use tessera_engine::milp::{Answer, Backend};

fn load(spec: &Path) -> ClosedLoop {
    let text = std::fs::read_to_string(spec).expect("spec");
    let s = tessera_engine::spec::parse_spec(&text).expect("valid spec");
    let nets = ClosedLoop::load_networks(&s, spec.parent().unwrap()).expect("networks");
    ClosedLoop::new(s, nets).expect("closed loop")
}

fn word(a: &Answer) -> &'static str {
    match a {
        Answer::Infeasible => "infeasible",
        Answer::Point(_) => "feasible",
        Answer::Unknown(_) => "no answer",
    }
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let horizon: u32 = args.get(1).and_then(|s| s.parse().ok()).unwrap_or(4);
    let per_dim: usize = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(4);
    let limit: f64 = args.get(3).and_then(|s| s.parse().ok()).unwrap_or(30.0);
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo/heading/spec.json");
    let mut cl = load(&path);
    cl.spec.horizon = horizon;
    let p = exact::prepare(&cl).expect("the heading keeper is linear");
    #[allow(unused_mut)]
    let mut backends = vec![Backend::Microlp];
    #[cfg(feature = "highs")]
    backends.push(Backend::Highs);
    let env = cl.envelope();
    println!("heading keeper, horizon {horizon}, {per_dim}x{per_dim} cells, {} samples per period, limit {limit} s per program", p.m);
    print!("| cell | binaries | rows |");
    for b in &backends {
        print!(" {} | ms |", b.name());
    }
    println!();
    let mut totals = vec![(0.0f64, 0usize); backends.len()];
    let mut programs = 0;
    let mut disagreements = 0;
    for a in 0..per_dim {
        for c in 0..per_dim {
            let cut = |e: Interval, k: usize| {
                let w = e.width() / per_dim as f64;
                Interval::new(e.lo() + w * k as f64, e.lo() + w * (k + 1) as f64)
            };
            let cell = vec![cut(env[0], a), cut(env[1], c)];
            for model in exact::widened_programs(&cl, &p, &cell).expect("finite bounds") {
                programs += 1;
                print!("| ({a},{c}) | {} | {} |", model.integers(), model.rows.len());
                let mut words = Vec::new();
                for (k, b) in backends.iter().enumerate() {
                    let t = Instant::now();
                    let ans = model.solve_with(*b, Duration::from_secs_f64(limit));
                    let ms = t.elapsed().as_secs_f64() * 1e3;
                    totals[k].0 += ms;
                    if !matches!(ans, Answer::Unknown(_)) {
                        totals[k].1 += 1;
                        words.push(word(&ans));
                    }
                    print!(" {} | {:.0} |", word(&ans), ms);
                    if let Answer::Unknown(why) = &ans {
                        eprintln!("{}: {why}", b.name());
                    }
                }
                if words.windows(2).any(|w| w[0] != w[1]) {
                    disagreements += 1;
                    print!(" DISAGREE");
                }
                println!();
            }
        }
    }
    println!();
    for (k, b) in backends.iter().enumerate() {
        println!("{}: {} of {programs} programs answered, total {:.0} ms", b.name(), totals[k].1, totals[k].0);
    }
    println!("answers that disagree: {disagreements}");
}
