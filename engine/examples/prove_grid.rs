//! Proof power on a uniform grid (printed figures, not a test): the cells of the
//! envelope cut `DEPTH` times, round robin over the spec's split states, each given to
//! the proof attempt alone (no falsifier), on two threads. Prints the proven-safe
//! count and fraction, the median and 90th-percentile cell time, and why the other
//! cells failed. Engine options can be overridden with a JSON object, which is how
//! an engine change is A/B-measured (BENCHMARKS.md).
//!
//! `cargo run --release -p tessera-engine --example prove_grid -- SPEC.json DEPTH ['{"slope_steps": 12}']`
//!
//! With `DETAIL=1` in the environment every failed cell is printed with its reason.

use std::collections::BTreeMap;
use std::path::Path;
use std::time::Instant;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::interval::Interval;
use tessera_engine::reach::{prove, Proof};
use tessera_engine::verdict::Stats;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if args.len() < 3 {
        eprintln!("usage: prove_grid SPEC.json DEPTH ['{{engine option overrides}}']");
        std::process::exit(2);
    }
    let path = Path::new(&args[1]);
    let depth: u32 = args[2].parse().expect("DEPTH: a whole number");
    let mut doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(path).expect("read SPEC")).expect("SPEC: JSON");
    if let Some(o) = args.get(3) {
        let o: serde_json::Value = serde_json::from_str(o).expect("overrides: a JSON object");
        let engine = doc.as_object_mut().expect("SPEC: an object").entry("engine").or_insert(serde_json::json!({}));
        for (k, v) in o.as_object().expect("overrides: a JSON object") {
            engine[k] = v.clone();
        }
    }
    let spec = tessera_engine::spec::parse_spec(&doc.to_string()).unwrap_or_else(|e| panic!("SPEC: {e:?}"));
    let nets = ClosedLoop::load_networks(&spec, path.parent().unwrap_or(Path::new("."))).expect("networks");
    let cl = ClosedLoop::new(spec, nets).expect("closed loop");
    let cells = grid(&cl.envelope(), &cl.spec.split, depth);

    let started = Instant::now();
    let results: Vec<(bool, f64, String)> = std::thread::scope(|s| {
        let handles: Vec<_> = cells
            .chunks(cells.len().div_ceil(2))
            .map(|chunk| {
                let cl = &cl;
                s.spawn(move || chunk.iter().map(|c| prove_one(cl, c)).collect::<Vec<_>>())
            })
            .collect();
        handles.into_iter().flat_map(|h| h.join().expect("worker thread")).collect()
    });
    let safe = results.iter().filter(|r| r.0).count();
    let mut times: Vec<f64> = results.iter().map(|r| r.1).collect();
    times.sort_by(f64::total_cmp);
    let mut reasons: BTreeMap<&str, usize> = BTreeMap::new();
    for r in &results {
        *reasons.entry(r.2.as_str()).or_insert(0) += 1;
    }
    println!(
        "depth {depth}: {} cells, proven safe {safe} ({:.3}), median {:.1} ms, p90 {:.1} ms, wall {:.1} s, reasons {reasons:?}",
        cells.len(),
        safe as f64 / cells.len() as f64,
        times[times.len() / 2] * 1e3,
        times[times.len() * 9 / 10] * 1e3,
        started.elapsed().as_secs_f64()
    );
}

/// The envelope cut `depth` times, round robin over the split states (as a campaign
/// that bisects every cell would).
fn grid(envelope: &[Interval], split: &[usize], depth: u32) -> Vec<Vec<Interval>> {
    let mut cuts = vec![0u32; envelope.len()];
    for k in 0..depth as usize {
        cuts[split[k % split.len()]] += 1;
    }
    let mut cells: Vec<Vec<Interval>> = vec![Vec::new()];
    for (d, e) in envelope.iter().enumerate() {
        let n = 1usize << cuts[d];
        let w = e.width() / n as f64;
        cells = cells
            .iter()
            .flat_map(|c| {
                (0..n).map(move |i| {
                    let hi = if i + 1 == n { e.hi() } else { e.lo() + w * (i + 1) as f64 };
                    let mut c2 = c.clone();
                    c2.push(Interval::new(e.lo() + w * i as f64, hi));
                    c2
                })
            })
            .collect();
    }
    cells
}

/// One proof attempt: (proven, seconds, "safe" or the failure's reason).
fn prove_one(cl: &ClosedLoop, cell: &[Interval]) -> (bool, f64, String) {
    let t = Instant::now();
    let mut stats = Stats::default();
    let proof = prove(cl, cell, t, &mut stats);
    let seconds = t.elapsed().as_secs_f64();
    match proof {
        Proof::Safe => (true, seconds, "safe".into()),
        Proof::Failed(f) => {
            if std::env::var("DETAIL").is_ok() {
                let b: Vec<_> = cell.iter().map(|i| (i.lo(), i.hi())).collect();
                println!("cell {b:?}: {:?} at period {}: {}", f.reason, stats.periods_reached, f.detail);
            }
            (false, seconds, format!("{:?}", f.reason))
        }
    }
}
