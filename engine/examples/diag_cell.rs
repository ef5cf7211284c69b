// Scratch (not committed): compare the proof's branch boxes with sampled runs for one cell.
// diag_cell SPEC 'h_lo,h_hi,v_lo,v_hi'
use std::time::Instant;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::falsify::{Pick, Rng};
use tessera_engine::interval::Interval;
use tessera_engine::reach::{prove_traced, Proof, Trace};
use tessera_engine::verdict::Stats;
fn main() {
    let args: Vec<String> = std::env::args().collect();
    let path = std::path::Path::new(&args[1]);
    let b: Vec<f64> = args[2].split(',').map(|s| s.parse().unwrap()).collect();
    let spec = tessera_engine::spec::parse_spec(&std::fs::read_to_string(path).unwrap()).unwrap();
    let nets = ClosedLoop::load_networks(&spec, path.parent().unwrap()).unwrap();
    let cl = ClosedLoop::new(spec, nets).unwrap();
    let cell: Vec<Interval> = b.chunks(2).map(|p| Interval::new(p[0], p[1])).collect();
    let mut st = Stats::default();
    let mut tr = Trace::default();
    let p = prove_traced(&cl, &cell, Instant::now(), &mut st, Some(&mut tr));
    match p { Proof::Safe => println!("SAFE"), Proof::Failed(f) => println!("FAILED {:?} {}", f.reason, f.detail) }
    if let Ok(o) = std::env::var("DUMP") { dump(&cl, &cell, &tr, &o); }
    // samples: per period min/max per state, per command
    let n = cell.len();
    let k = tr.periods.len();
    let mut lo = vec![vec![f64::INFINITY; n]; k];
    let mut hi = vec![vec![f64::NEG_INFINITY; n]; k];
    let mut rng = Rng::new(7);
    let steps = cl.spec.engine.sim_steps;
    let mut unsafe_runs = 0;
    let mut touch_min_v = f64::INFINITY;
    let mut touch_runs = 0;
    for _ in 0..4000 {
        let mut touched = false;
        let x0: Vec<f64> = cell.iter().map(|i| rng.within(*i)).collect();
        // run with random noise & gust via simulate? need trajectory even if safe: reimplement
        let mut x = x0.clone();
        let mut prev = cl.spec.initial_commands[0];
        for per in 0..cl.spec.horizon as usize {
            let noise: Vec<f64> = cl.spec.observations.iter().map(|o| if rng.unit() < 0.5 { o.noise.lo() } else { o.noise.hi() }).collect();
            let gm = std::env::var("GUST").unwrap_or_default();
            let dist: Vec<f64> = cl.spec.disturbance_ranges.iter().map(|d| match gm.as_str() { "lo" => d.lo(), "hi" => d.hi(), "ends" => if rng.unit() < 0.5 { d.lo() } else { d.hi() }, _ => rng.within(*d) }).collect();
            let c = cl.decide_f64(prev, &x, &noise);
            let applied = cl.applied(c, prev);
            let states = cl.plant.simulate_period(&x, &cl.spec.commands[applied].inputs, &dist, cl.spec.period, steps);
            if states.iter().any(|s| tessera_engine::falsify::unsafe_region_f64(&cl, s).is_some()) { unsafe_runs += 1; break; }
            for s in &states { if s[0] <= 0.0 { touched = true; touch_min_v = touch_min_v.min(s[1]); } }
            x = states.last().unwrap().clone();
            prev = c;
            if per >= k { continue; }
            for d in 0..n { lo[per][d] = lo[per][d].min(x[d]); hi[per][d] = hi[per][d].max(x[d]); }
        }
        let _ = Pick::Random;
        if touched { touch_runs += 1; }
    }
    println!("runs touching down: {touch_runs}; worst speed at h<=0: {touch_min_v:.4}");
    println!("unsafe sampled runs: {unsafe_runs} / 4000; nodes {} branches {}", st.tree_nodes, st.max_branches);
    for per in 0..k {
        let br = &tr.periods[per];
        let mut ulo = vec![f64::INFINITY; n]; let mut uhi = vec![f64::NEG_INFINITY; n];
        for (_, bx) in br { for d in 0..n { ulo[d] = ulo[d].min(bx[d].lo()); uhi[d] = uhi[d].max(bx[d].hi()); } }
        let fmt = |l: &[f64], h: &[f64]| (0..n).map(|d| format!("[{:.3},{:.3}]", l[d], h[d])).collect::<Vec<_>>().join(" ");
        println!("period {:2}: proof {}  samples {}  branches {}", per + 1, fmt(&ulo, &uhi), fmt(&lo[per], &hi[per]), br.len());
    }
}

#[allow(dead_code)]
pub fn dump(cl: &ClosedLoop, cell: &[Interval], tr: &Trace, out: &str) {
    use tessera_engine::affine::Affine;
    let mut js = serde_json::json!({"sets": [], "pts": []});
    let ndir = 64;
    for (k, brs) in tr.sets.iter().enumerate() {
        let mut per = vec![];
        for (cmds, star) in brs {
            let b = star.bounder();
            let comps = star.set.components();
            let sup: Vec<f64> = (0..ndir).map(|i| { let th = i as f64 * std::f64::consts::TAU / ndir as f64; let f: Affine = comps[0].scale(th.cos()).add(&comps[1].scale(th.sin())); b.range(&f).map(|r| r.hi()).unwrap_or(f64::NAN) }).collect();
            per.push(serde_json::json!({"cmds": cmds, "sup": sup}));
        }
        js["sets"].as_array_mut().unwrap().push(serde_json::json!(per));
    }
    // adversarial point clouds
    let mut rng = Rng::new(11);
    let steps = cl.spec.engine.sim_steps;
    let mut pts: Vec<(Vec<f64>, usize)> = (0..600).map(|_| (cell.iter().map(|i| rng.within(*i)).collect(), cl.spec.initial_commands[0])).collect();
    let corners: Vec<Vec<f64>> = { let o = &cl.spec.observations; (0..(1u32 << o.len())).map(|m| (0..o.len()).map(|j| if m >> j & 1 == 0 { o[j].noise.lo() } else { o[j].noise.hi() }).collect()).chain(std::iter::once(o.iter().map(|x| x.noise.mid()).collect())).collect() };
    for _k in 0..tr.sets.len() {
        let mut nxt = vec![];
        for (x, prev) in &pts {
            let mut cs: Vec<usize> = corners.iter().map(|nz| cl.decide_f64(*prev, x, nz)).collect();
            cs.sort(); cs.dedup();
            for c in cs {
                let dist: Vec<f64> = cl.spec.disturbance_ranges.iter().map(|d| if rng.unit() < 0.5 { d.lo() } else { d.hi() }).collect();
                let applied = cl.applied(c, *prev);
                let states = cl.plant.simulate_period(x, &cl.spec.commands[applied].inputs, &dist, cl.spec.period, steps);
                nxt.push((states.last().unwrap().clone(), c));
            }
        }
        while nxt.len() > 3000 { let i = (rng.unit() * nxt.len() as f64) as usize; nxt.swap_remove(i); }
        js["pts"].as_array_mut().unwrap().push(serde_json::json!(nxt.iter().map(|(x, c)| (x.clone(), *c)).collect::<Vec<_>>()));
        pts = nxt;
    }
    std::fs::write(out, js.to_string()).unwrap();
}
