//! `check` and `replay`: the one-cell engine from the command line.

use std::collections::BTreeMap;
use std::path::Path;
use std::process::ExitCode;
use tessera_engine::caution::{CAUTION, CAUTION_LINE};
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::falsify;
use tessera_engine::spec;
use tessera_engine::verdict::{Verdict, VerdictKind};

/// Load a spec file and its networks (paths relative to the spec file).
pub fn load_closed_loop(path: &Path) -> Result<ClosedLoop, String> {
    let text = std::fs::read_to_string(path).map_err(|e| format!("cannot read {}: {e}", path.display()))?;
    let spec = spec::parse_spec(&text).map_err(|errs| {
        let lines: Vec<String> = errs.iter().map(|e| format!("  {}: {}", e.path, e.message)).collect();
        format!("invalid spec {}:\n{}", path.display(), lines.join("\n"))
    })?;
    let base = path.parent().unwrap_or(Path::new("."));
    let nets = ClosedLoop::load_networks(&spec, base).map_err(|e| e.to_string())?;
    ClosedLoop::new(spec, nets).map_err(|e| e.to_string())
}

pub fn check(spec_path: &Path, cell: Option<&str>, json: bool) -> ExitCode {
    let cl = match load_closed_loop(spec_path) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return ExitCode::from(2);
        }
    };
    let cell_box = match cell {
        None => cl.envelope(),
        Some(text) => {
            let map: BTreeMap<String, [f64; 2]> = match serde_json::from_str(text) {
                Ok(m) => m,
                Err(e) => {
                    eprintln!("error: --cell must be a JSON object of intervals like '{{\"x\":[0,1]}}': {e}");
                    return ExitCode::from(2);
                }
            };
            match cl.cell_from_map(&map) {
                Ok(c) => c,
                Err(e) => {
                    eprintln!("error: {e}");
                    return ExitCode::from(2);
                }
            }
        }
    };
    let v = check_cell(&cl, &cell_box);
    if json {
        let mut value = serde_json::to_value(&v).expect("verdict serializes");
        // Lets `replay` find the spec again.
        if let Ok(abs) = std::fs::canonicalize(spec_path) {
            value["spec_path"] = serde_json::json!(abs.to_string_lossy());
        }
        value["caution"] = serde_json::json!(CAUTION);
        println!("{}", serde_json::to_string_pretty(&value).expect("json"));
    } else {
        print_verdict(&cl, &v);
    }
    ExitCode::SUCCESS
}

fn print_verdict(cl: &ClosedLoop, v: &Verdict) {
    let s = &v.stats;
    match v.verdict {
        VerdictKind::Safe => println!("safe: no trajectory from the cell reaches the unsafe set within {} periods", cl.spec.horizon),
        VerdictKind::Unsafe => {
            let cx = v.counterexample.as_ref().expect("unsafe verdicts carry a counterexample");
            println!("unsafe: a checked counterexample enters unsafe region {} at t = {:.4} s", cx.unsafe_region, cx.entry_time);
            println!("  initial state: {:?}", cx.initial_state);
            println!("  commands: {}", cx.commands.join(" "));
        }
        VerdictKind::Inconclusive => {
            println!("inconclusive: {:?} — {}", v.reason.expect("reason"), v.detail.clone().unwrap_or_default());
            if let Some(h) = &v.split_hint {
                println!("  split hint: {} (score {:.2})", h.dim, h.score);
            }
        }
    }
    println!(
        "  {} tree nodes, {} periods reached, {:.1} ms (plant {:.1}, network {:.1}, falsification {:.1})",
        s.tree_nodes, s.periods_reached, s.wall_ms, s.plant_ms, s.network_ms, s.falsify_ms
    );
    println!("{CAUTION_LINE}");
}

pub fn replay(verdict_path: &Path, spec_override: Option<&Path>) -> ExitCode {
    let text = match std::fs::read_to_string(verdict_path) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("error: cannot read {}: {e}", verdict_path.display());
            return ExitCode::from(2);
        }
    };
    let value: serde_json::Value = match serde_json::from_str(&text) {
        Ok(v) => v,
        Err(e) => {
            eprintln!("error: {} is not JSON: {e}", verdict_path.display());
            return ExitCode::from(2);
        }
    };
    let spec_path = match spec_override.map(|p| p.to_path_buf()).or_else(|| value["spec_path"].as_str().map(Into::into)) {
        Some(p) => p,
        None => {
            eprintln!("error: the verdict names no spec_path; pass --spec SPEC.json");
            return ExitCode::from(2);
        }
    };
    let cl = match load_closed_loop(&spec_path) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return ExitCode::from(2);
        }
    };
    let cx_value = if value.get("counterexample").is_some() { value["counterexample"].clone() } else { value.clone() };
    let cx: tessera_engine::verdict::Counterexample = match serde_json::from_value(cx_value) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: counterexample: {e}");
            return ExitCode::from(2);
        }
    };
    let cand = match falsify::candidate_from(&cl, &cx) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return ExitCode::from(2);
        }
    };
    let (traj, picked, hit) = falsify::replay(&cl, &cand);
    println!("t\t{}", cl.spec.states.join("\t"));
    let stride = (traj.len() / 60).max(1);
    for (i, p) in traj.iter().enumerate() {
        if i % stride == 0 || i + 1 == traj.len() {
            let xs: Vec<String> = p.x.iter().map(|v| format!("{v:.6}")).collect();
            println!("{:.4}\t{}", p.t, xs.join("\t"));
        }
    }
    let names: Vec<&str> = picked.iter().map(|&c| cl.spec.commands[c].name.as_str()).collect();
    println!("commands: {}", names.join(" "));
    let recheck = falsify::recheck(&cl, &cand);
    let code = match (hit, recheck) {
        (Some((t, r)), Some((rr, during))) => {
            println!(
                "unsafe: enters region {r} at t = {t:.4} s (simulation); validated re-check proves region {rr} during [{:.4}, {:.4}] s",
                during[0], during[1]
            );
            ExitCode::SUCCESS
        }
        (Some((t, r)), None) => {
            println!("unsafe in simulation (region {r} at t = {t:.4} s) but the validated re-check did not confirm it");
            ExitCode::from(1)
        }
        (None, _) => {
            println!("the replayed trajectory does not enter the unsafe set");
            ExitCode::from(1)
        }
    };
    println!("{CAUTION_LINE}");
    code
}
