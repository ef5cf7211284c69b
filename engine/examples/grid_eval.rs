// Scratch (not committed): proven-safe fraction of a uniform grid, proof only.
// grid_eval SPEC DEPTH '{engine json overrides}'
use std::time::Instant;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::interval::Interval;
use tessera_engine::reach::{prove, Proof};
use tessera_engine::verdict::Stats;
fn main() {
    let args: Vec<String> = std::env::args().collect();
    let path = std::path::Path::new(&args[1]);
    let depth: u32 = args[2].parse().unwrap();
    let mut doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    if let Some(o) = args.get(3) {
        let o: serde_json::Value = serde_json::from_str(o).unwrap();
        let eng = doc.as_object_mut().unwrap().entry("engine").or_insert(serde_json::json!({}));
        for (k, v) in o.as_object().unwrap() { eng[k] = v.clone(); }
    }
    let spec = tessera_engine::spec::parse_spec(&doc.to_string()).unwrap();
    let nets = ClosedLoop::load_networks(&spec, path.parent().unwrap()).unwrap();
    let cl = ClosedLoop::new(spec, nets).unwrap();
    let env = cl.envelope();
    let split = cl.spec.split.clone();
    // cuts per split dim, round robin
    let mut cuts = vec![0u32; env.len()];
    for k in 0..depth { cuts[split[(k as usize) % split.len()]] += 1; }
    let mut cells: Vec<Vec<Interval>> = vec![vec![]];
    for (d, e) in env.iter().enumerate() {
        let n = 1usize << cuts[d];
        let w = e.width() / n as f64;
        let mut next = vec![];
        for c in &cells { for i in 0..n { let mut c2 = c.clone(); let lo = e.lo() + w * i as f64; let hi = if i + 1 == n { e.hi() } else { e.lo() + w * (i + 1) as f64 }; c2.push(Interval::new(lo, hi)); next.push(c2); } }
        cells = next;
    }
    let t0 = Instant::now();
    let results: Vec<(bool, f64, String)> = std::thread::scope(|s| {
        let chunks: Vec<&[Vec<Interval>]> = cells.chunks((cells.len() + 1) / 2).collect();
        let hs: Vec<_> = chunks.into_iter().map(|ch| { let cl = &cl; s.spawn(move || ch.iter().map(|c| { let t = Instant::now(); let mut st = Stats::default(); let (ok, why) = if std::env::var("CHECK").is_ok() { let v = tessera_engine::check::check_cell(cl, c); (v.verdict == tessera_engine::verdict::VerdictKind::Safe, format!("{:?}-{}@{}", v.verdict, v.stats.method.clone().unwrap_or_default(), v.stats.periods_reached)) } else { let p = prove(cl, c, t, &mut st); (matches!(p, Proof::Safe), match p { Proof::Safe => "safe".to_string(), Proof::Failed(f) => { if std::env::var("DETAIL").is_ok() { println!("cell {:?}: {:?} {} (nodes {}, branches {}, net {:.0} ms, plant {:.0} ms)", c.iter().map(|i| (i.lo(), i.hi())).collect::<Vec<_>>(), f.reason, f.detail, st.tree_nodes, st.max_branches, st.network_ms, st.plant_ms); } format!("{:?}@{}", f.reason, st.periods_reached) } }) };
            let el = t.elapsed().as_secs_f64();
            if std::env::var("PROBE").is_ok() { let mut cl2 = ClosedLoop::new(cl.spec.clone(), cl.nets.clone()).unwrap(); cl2.spec.engine.set = tessera_engine::spec::SetKind::Box; cl2.spec.engine.bounds = tessera_engine::spec::BoundsMethod::Interval; cl2.spec.engine.decision_pieces = 4; let t2 = Instant::now(); let mut st2 = Stats::default(); let p2 = prove(&cl2, c, t2, &mut st2); println!("PROBE {} reached {} ({:.1} ms) constrained {} reached {} ({:.1} ms)", matches!(p2, Proof::Safe), st2.periods_reached, t2.elapsed().as_secs_f64()*1e3, ok, st.periods_reached, el*1e3); }
            (ok, el, why) }).collect::<Vec<_>>()) }).collect();
        hs.into_iter().flat_map(|h| h.join().unwrap()).collect()
    });
    let safe = results.iter().filter(|r| r.0).count();
    let mut times: Vec<f64> = results.iter().map(|r| r.1).collect();
    times.sort_by(|a, b| a.partial_cmp(b).unwrap());
    let mut reasons = std::collections::BTreeMap::new();
    for r in &results { *reasons.entry(r.2.split('@').next().unwrap().to_string()).or_insert(0) += 1; }
    println!("depth {depth}: {} cells, proven safe {} ({:.3}), median {:.1} ms, p90 {:.1} ms, wall {:.1} s, reasons {:?}", cells.len(), safe, safe as f64 / cells.len() as f64, times[times.len()/2]*1e3, times[times.len()*9/10]*1e3, t0.elapsed().as_secs_f64(), reasons);
    if std::env::var("MAP").is_ok() && env.len() == 2 {
        // print map: rows v (high to low), cols h
        let nh = 1usize << cuts[0]; let nv = 1usize << cuts[1];
        for j in (0..nv).rev() { let row: String = (0..nh).map(|i| if results[i * nv + j].0 { '#' } else { '.' }).collect(); println!("{row}"); }
    }
}
