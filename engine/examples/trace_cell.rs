//! Print the per-period branch boxes of one cell (a debugging aid):
//! `cargo run -p tessera-engine --example trace_cell -- SPEC.json '{"h":[5,5.5]}'`
use std::collections::BTreeMap;
use tessera_engine::reach::{prove_traced, Proof, Trace};
use tessera_engine::verdict::Stats;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let path = std::path::Path::new(&args[1]);
    let text = std::fs::read_to_string(path).unwrap();
    let spec = tessera_engine::spec::parse_spec(&text).unwrap();
    let nets = tessera_engine::closed_loop::ClosedLoop::load_networks(&spec, path.parent().unwrap()).unwrap();
    let cl = tessera_engine::closed_loop::ClosedLoop::new(spec, nets).unwrap();
    let map: BTreeMap<String, [f64; 2]> = serde_json::from_str(&args[2]).unwrap();
    let cell = cl.cell_from_map(&map).unwrap();
    let mut trace = Trace::default();
    let mut stats = Stats::default();
    let p = prove_traced(&cl, &cell, std::time::Instant::now(), &mut stats, Some(&mut trace));
    for (k, branches) in trace.periods.iter().enumerate() {
        println!("period {k}: {} branches", branches.len());
        for (c, b) in branches {
            let s: Vec<String> = b.iter().map(|i| format!("[{:.4}, {:.4}]", i.lo(), i.hi())).collect();
            println!("  {:>10}  {}", cl.spec.commands[*c].name, s.join(" "));
        }
    }
    match p {
        Proof::Safe => println!("safe"),
        Proof::Failed(f) => println!("failed: {:?} {}", f.reason, f.detail),
    }
}
