//! The demo scenarios exercise every kind of verdict, "safe" is checked outside the
//! engine, and the banks of the aisle rover and of the heading keeper really switch
//! networks.
//!
//! For each committed scenario (`demo/*/spec.json`), a row of cells at a moderate depth is
//! decided by the engine (proof, then falsifier). Checked:
//! - some cells are proven safe, some are unsafe with a counterexample, some inconclusive;
//! - every counterexample is re-checked by the engine's validated re-check, and replayed
//!   outside the engine by `tests/reference/replay_demo_counterexamples.py`: onnxruntime
//!   (a reference ONNX runtime) must pick the recorded command at every period, and an
//!   independent RK4 integration must enter the unsafe set;
//! - no cell proven safe holds a simulated unsafe trajectory (sampling concrete
//!   trajectories, common practice for checking enclosures): 100 runs per safe cell in
//!   the engine's own simulation, and 8 of them (half from the cell's corners with noise
//!   and disturbances at the ends of their ranges) replayed outside the engine by the
//!   same script, which must find the runtime picking the recorded commands and the
//!   trajectory out of the unsafe set over the whole horizon. An unsound "safe" fails
//!   here even if the engine's own simulation shared its error;
//! - along the aisle rover's trajectories the network in charge changes (the bank is
//!   used), with onnxruntime agreeing on every decision;
//! - the heading keeper's runs over its 30 periods chatter: the rudder goes over and back
//!   again and again, through all three networks of its bank.

use serde_json::{json, Value};
use std::collections::BTreeSet;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::falsify::{self, Candidate, Rng};
use tessera_engine::interval::Interval;
use tessera_engine::spec::parse_spec;
use tessera_engine::verdict::VerdictKind;

fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().expect("worker/ has a parent").to_path_buf()
}

fn load(rel: &str) -> (ClosedLoop, PathBuf) {
    let path = repo_root().join(rel);
    let text = std::fs::read_to_string(&path).unwrap();
    let spec = parse_spec(&text).unwrap_or_else(|e| panic!("{rel}: {e:?}"));
    let nets = ClosedLoop::load_networks(&spec, path.parent().unwrap()).unwrap();
    (ClosedLoop::new(spec, nets).unwrap(), path)
}

/// The envelope cut into `parts[d]` equal pieces along state d, keeping only the pieces
/// whose index along d is in `keep[d]` (None: all).
fn grid(env: &[Interval], parts: &[usize], keep: &[Option<&[usize]>]) -> Vec<Vec<Interval>> {
    let mut cells = vec![Vec::new()];
    for (d, iv) in env.iter().enumerate() {
        let n = parts[d];
        let w = (iv.hi() - iv.lo()) / n as f64;
        let idx: Vec<usize> = match keep[d] {
            Some(i) => i.to_vec(),
            None => (0..n).collect(),
        };
        let mut next = Vec::new();
        for c in &cells {
            for &i in &idx {
                let lo = iv.lo() + w * i as f64;
                let hi = if i + 1 == n { iv.hi() } else { iv.lo() + w * (i + 1) as f64 };
                let mut c2 = c.clone();
                c2.push(Interval::new(lo, hi));
                next.push(c2);
            }
        }
        cells = next;
    }
    cells
}

/// A closed-loop run from a random point of the cell with random noise and disturbances
/// in their ranges, or (`extreme`) from a random corner of the cell with noise and
/// disturbances at random ends of their ranges, simulated in f64 by the engine's own
/// runner; returns the run with the commands the controller picked.
fn random_run(cl: &ClosedLoop, cell: &[Interval], rng: &mut Rng, extreme: bool) -> Candidate {
    let spec = &cl.spec;
    let pick = |i: Interval, r: &mut Rng| if extreme { if r.unit() < 0.5 { i.lo() } else { i.hi() } } else { r.within(i) };
    let x0: Vec<f64> = cell.iter().map(|i| pick(*i, rng)).collect();
    let h = spec.horizon as usize;
    let noise = (0..h).map(|_| spec.observations.iter().map(|o| pick(o.noise, rng)).collect()).collect();
    let dist = (0..h).map(|_| spec.disturbance_ranges.iter().map(|d| pick(*d, rng)).collect()).collect();
    let mut cand = Candidate {
        x0,
        initial_command: spec.initial_commands[0],
        dist,
        noise,
        commands: vec![0; h],
        trajectory: Vec::new(),
        entry_time: 0.0,
        region: 0,
    };
    let (trajectory, commands, hit) = falsify::replay(cl, &cand);
    cand.trajectory = trajectory;
    cand.region = hit.map(|(_, r)| r).unwrap_or(usize::MAX);
    cand.entry_time = hit.map(|(t, _)| t).unwrap_or(f64::NAN);
    cand.commands = commands;
    cand
}

fn as_run(cl: &ClosedLoop, c: &Candidate) -> Value {
    let names: Vec<&str> = cl.spec.commands.iter().map(|c| c.name.as_str()).collect();
    json!({
        "x0": c.x0,
        "initial_command": names[c.initial_command],
        "noise": c.noise[..c.commands.len()],
        "disturbances": c.dist[..c.commands.len()],
        "commands": c.commands.iter().map(|&k| names[k]).collect::<Vec<_>>(),
    })
}

/// Runs the Python replay (`tests/reference/replay_demo_counterexamples.py`); fails loudly (never skips) when python3 or a package is missing.
fn python_replay(spec_path: &Path, runs: &[Value]) -> Vec<Value> {
    let script = repo_root().join("tests/reference/replay_demo_counterexamples.py");
    let mut child = Command::new("python3")
        .arg(&script)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("cannot run python3 {}: {e}", script.display()));
    let body = json!({"spec": spec_path, "runs": runs}).to_string();
    std::io::Write::write_all(child.stdin.as_mut().unwrap(), body.as_bytes()).unwrap();
    drop(child.stdin.take());
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "{} failed:\n{}", script.display(), String::from_utf8_lossy(&out.stderr));
    let v: Value = serde_json::from_slice(&out.stdout).expect("the replay prints JSON");
    v["runs"].as_array().unwrap().clone()
}

struct Outcome {
    safe: usize,
    unsafe_: usize,
    inconclusive: usize,
    /// Counterexample runs and sampled runs, replayed outside the engine.
    replays: Vec<Value>,
}

fn decide_row(rel: &str, cells: &[Vec<Interval>]) -> (ClosedLoop, Outcome) {
    let (cl, path) = load(rel);
    let mut rng = Rng::new(7);
    let (mut safe, mut unsafe_, mut inconclusive) = (0, 0, 0);
    let mut cx_runs = Vec::new();
    let mut sampled_runs = Vec::new();
    for cell in cells {
        let v = check_cell(&cl, cell);
        match v.verdict {
            VerdictKind::Safe => {
                safe += 1;
                for i in 0..100 {
                    let run = random_run(&cl, cell, &mut rng, i % 2 == 0);
                    assert!(run.entry_time.is_nan(), "{rel}: cell {cell:?} proven safe, but a simulated run enters unsafe region {} at t = {}", run.region, run.entry_time);
                    if i < 8 {
                        sampled_runs.push(as_run(&cl, &run));
                    }
                }
            }
            VerdictKind::Unsafe => {
                unsafe_ += 1;
                let cx = v.counterexample.expect("an unsafe verdict carries its counterexample");
                let cand = falsify::candidate_from(&cl, &cx).unwrap();
                assert!(falsify::recheck(&cl, &cand).is_some(), "{rel}: counterexample of {cell:?} fails the validated re-check");
                cx_runs.push(as_run(&cl, &cand));
            }
            _ => inconclusive += 1,
        }
    }
    let n_cx = cx_runs.len();
    let mut runs = cx_runs;
    runs.extend(sampled_runs);
    let replays = python_replay(&path, &runs);
    assert_eq!(replays.len(), runs.len(), "{rel}: the replay answered for another number of runs");
    for (i, r) in replays.iter().enumerate() {
        assert_eq!(r["commands_agree"], json!(true), "{rel}: run {i}: onnxruntime picks another command ({r})");
        if i < n_cx {
            assert!(r["unsafe_time"].is_number(), "{rel}: counterexample {i} does not enter the unsafe set when replayed outside the engine ({r})");
        } else {
            // A run from a cell proven safe: outside the engine, it must stay out of the
            // unsafe set for the whole horizon.
            assert!(
                r["unsafe_time"].is_null(),
                "{rel}: a run sampled from a cell proven safe enters unsafe region {} at t = {} when replayed outside the engine ({}; {r})",
                r["unsafe_region"],
                r["unsafe_time"],
                runs[i]
            );
            assert_eq!(r["periods_safe"].as_u64(), Some(cl.spec.horizon as u64), "{rel}: run {i} was not replayed over the whole horizon ({r})");
        }
    }
    println!("{rel}: {} counterexamples and {} runs from safe cells replayed outside the engine", n_cx, runs.len() - n_cx);
    (cl, Outcome { safe, unsafe_, inconclusive, replays })
}

#[test]
fn lander_cells_of_every_kind() {
    let (cl, _) = load("demo/lander/spec.json");
    // Depth 6 (8 × 8 cells over h and v): the lowest and the highest altitude band.
    let cells = grid(&cl.envelope(), &[8, 8], &[Some(&[0, 7]), None]);
    let (_, o) = decide_row("demo/lander/spec.json", &cells);
    println!("lander: {} cells: {} safe, {} unsafe, {} inconclusive", cells.len(), o.safe, o.unsafe_, o.inconclusive);
    assert!(o.safe > 0 && o.unsafe_ > 0 && o.inconclusive > 0, "lander: safe {} unsafe {} inconclusive {}", o.safe, o.unsafe_, o.inconclusive);
}

#[test]
fn aisle_cells_of_every_kind_and_the_bank_switches() {
    let (cl, _) = load("demo/aisle/spec.json");
    // Depth 10 over (py, th, px): the port half of a column across the aisle (py, 8 of
    // 16 cells, from the centre line to the port rack), at one heading band (th, 1/8)
    // and one start band (px, 1/8); v unsplit. Starts near the centre line pass both
    // crates; starts near the port rack reach the port crate.
    let th_band = 3; // th ∈ [−0.0375, 0]
    let port_half: Vec<usize> = (8..16).collect();
    let cells = grid(&cl.envelope(), &[8, 16, 8, 1], &[Some(&[0]), Some(&port_half), Some(&[th_band]), None]);
    let (cl, o) = decide_row("demo/aisle/spec.json", &cells);
    println!("aisle: {} cells: {} safe, {} unsafe, {} inconclusive", cells.len(), o.safe, o.unsafe_, o.inconclusive);
    assert!(o.safe > 0 && o.unsafe_ > 0 && o.inconclusive > 0, "aisle: safe {} unsafe {} inconclusive {}", o.safe, o.unsafe_, o.inconclusive);
    // The bank: networks in charge along the replayed runs.
    let mut used = BTreeSet::new();
    let mut switching_runs = 0;
    for r in &o.replays {
        let nets: Vec<u64> = r["networks"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap()).collect();
        used.extend(nets.iter().copied());
        if nets.windows(2).any(|w| w[0] != w[1]) {
            switching_runs += 1;
        }
    }
    println!("aisle: {} replayed runs, {} switch networks, networks used {:?}", o.replays.len(), switching_runs, used);
    assert!(switching_runs > 0, "no aisle run switched networks");
    assert!(used.len() >= 3, "aisle runs used only networks {used:?} of {}", cl.spec.commands.len());
}

#[test]
fn heading_cells_of_every_kind_over_the_long_horizon() {
    let (cl, _) = load("demo/heading/spec.json");
    assert!(cl.spec.horizon >= 24, "the heading scenario is the long-horizon one");
    // Depth 8 (16 × 16 cells over psi and r): one heading band to starboard of the course
    // (psi ∈ [0.125, 0.15] rad) at three yaw rates turning further away from it
    // (r ∈ [0.045, 0.09] rad/s). The slowest turn is recovered (the engine proves it safe
    // over the whole 30 periods), the fastest leaves the corridor, and the middle cell
    // straddles the boundary between them.
    let turning_away: Vec<usize> = (11..14).collect();
    let cells = grid(&cl.envelope(), &[16, 16], &[Some(&[13]), Some(&turning_away)]);
    let (cl, o) = decide_row("demo/heading/spec.json", &cells);
    println!("heading: {} cells: {} safe, {} unsafe, {} inconclusive", cells.len(), o.safe, o.unsafe_, o.inconclusive);
    assert!(o.safe > 0 && o.unsafe_ > 0 && o.inconclusive > 0, "heading: safe {} unsafe {} inconclusive {}", o.safe, o.unsafe_, o.inconclusive);
    // The runs replayed from the safe cell (30 periods each, every one after a
    // counterexample's shorter run): the network in charge is the previous command's, so
    // a network switch is a rudder command change.
    let full: Vec<Vec<u64>> = o
        .replays
        .iter()
        .map(|r| r["networks"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap()).collect::<Vec<u64>>())
        .filter(|n| n.len() == cl.spec.horizon as usize)
        .collect();
    assert!(!full.is_empty(), "no full-horizon heading run was replayed");
    let mut used = BTreeSet::new();
    let mut counts = Vec::new();
    for nets in &full {
        used.extend(nets.iter().copied());
        let switches = nets.windows(2).filter(|w| w[0] != w[1]).count();
        assert!(switches >= 4, "a heading run switched networks only {switches} times in 30 periods: {nets:?}");
        counts.push(switches);
    }
    println!("heading: {} full-horizon runs replayed, network switches {:?}, networks used {:?}", full.len(), counts, used);
    assert_eq!(used.len(), 3, "heading runs used only networks {used:?}");
}
