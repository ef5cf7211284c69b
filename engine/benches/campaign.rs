//! Campaign performance on the demo scenarios (a benchmark, not a test): adaptive
//! bisection against uniform grids, proven-safe volume against a Monte Carlo estimate,
//! per-cell cost by depth, thread scaling, and engine options compared in one run.
//!
//!     cargo bench -p tessera-engine --bench campaign            # full run, writes BENCHMARKS.md
//!     cargo bench -p tessera-engine --bench campaign -- --quick # smaller depths, prints only
//!     cargo bench -p tessera-engine --bench campaign -- --only heading   # one scenario, prints only
//!
//! The campaigns run in process with the engine's own `check_cell` (no server), with the
//! refinement rule the server applies: largest cells first, an inconclusive cell is cut
//! at the midpoint of its hinted state (else the widest relative to the envelope), unsafe
//! cells are refined as well (as with `refine_unsafe`), down to the scenario's max depth. CPU time is the sum of the
//! per-cell engine times. Verdicts are deterministic, so a cell met by two runs (the
//! adaptive campaign and a grid) is decided once and its measured time counted in both.

use std::collections::HashMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::Instant;
use tessera_engine::adversary;
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::falsify::{self, Candidate, Rng};
use tessera_engine::interval::Interval;
use tessera_engine::spec::{EngineOptions, SetKind};
use tessera_engine::verdict::{Stats, VerdictKind};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap().to_path_buf()
}

fn load(name: &str) -> ClosedLoop {
    let path = root().join("demo").join(name).join("spec.json");
    let text = std::fs::read_to_string(&path).expect("spec");
    let mut s = tessera_engine::spec::parse_spec(&text).expect("valid spec");
    // Budgets as the demo sets them: where the spec's `engine` section leaves them out.
    let raw: serde_json::Value = serde_json::from_str(&text).expect("spec JSON");
    let stated = |k: &str| raw["engine"].get(k).is_some();
    if !stated("node_budget") {
        s.engine.node_budget = 600;
    }
    if !stated("time_budget_s") {
        s.engine.time_budget_s = 5.0;
    }
    if !stated("falsify_samples") {
        s.engine.falsify_samples = 12;
    }
    let nets = ClosedLoop::load_networks(&s, path.parent().unwrap()).expect("networks");
    ClosedLoop::new(s, nets).expect("closed loop")
}

#[derive(Clone, Copy, PartialEq)]
enum Kind {
    Safe,
    Unsafe,
    Inconclusive,
}

#[derive(Clone)]
struct Decided {
    kind: Kind,
    /// State index to cut next (for inconclusive cells).
    cut: Option<usize>,
    stats: Stats,
    /// For unsafe cells: whether the adversary (rather than random and extreme runs)
    /// found the counterexample.
    by_adversary: bool,
}

type Key = Vec<u64>;
fn key(cell: &[Interval]) -> Key {
    cell.iter().flat_map(|i| [i.lo().to_bits(), i.hi().to_bits()]).collect()
}

/// Decides cells on `threads` threads, remembering every verdict.
struct Engine<'a> {
    cl: &'a ClosedLoop,
    memo: Mutex<HashMap<Key, Decided>>,
    threads: usize,
    /// Per-cell method: `None` runs the spec's options; `Some` runs this cheaper
    /// configuration first and the spec's only when it is inconclusive.
    cheap_first: Option<&'a ClosedLoop>,
}

impl<'a> Engine<'a> {
    fn new(cl: &'a ClosedLoop, threads: usize) -> Self {
        Engine { cl, memo: Mutex::new(HashMap::new()), threads, cheap_first: None }
    }

    fn decide_one(&self, cell: &[Interval]) -> Decided {
        let mut v = match &self.cheap_first {
            Some(cheap) => {
                let v = check_cell(cheap, cell);
                if v.verdict == VerdictKind::Inconclusive {
                    let mut precise = check_cell(self.cl, cell);
                    let s = &mut precise.stats;
                    s.wall_ms += v.stats.wall_ms;
                    s.plant_ms += v.stats.plant_ms;
                    s.network_ms += v.stats.network_ms;
                    s.falsify_ms += v.stats.falsify_ms;
                    precise
                } else {
                    v
                }
            }
            None => check_cell(self.cl, cell),
        };
        let kind = match v.verdict {
            VerdictKind::Safe => Kind::Safe,
            VerdictKind::Unsafe => Kind::Unsafe,
            _ => Kind::Inconclusive,
        };
        let spec = &self.cl.spec;
        let hinted = v.split_hint.take().and_then(|h| spec.states.iter().position(|s| *s == h.dim)).filter(|d| spec.split.contains(d));
        let cut = hinted.or_else(|| widest(self.cl, cell));
        let by_adversary = v.counterexample.as_ref().and_then(|c| c.found_by.as_deref()) == Some("adversary");
        Decided { kind, cut, stats: v.stats, by_adversary }
    }

    /// Decide all `cells` (in parallel), returning their results in order.
    fn decide(&self, cells: &[Vec<Interval>]) -> Vec<Decided> {
        let todo: Vec<usize> = {
            let memo = self.memo.lock().unwrap();
            (0..cells.len()).filter(|&i| !memo.contains_key(&key(&cells[i]))).collect()
        };
        let next = AtomicUsize::new(0);
        std::thread::scope(|s| {
            for _ in 0..self.threads {
                s.spawn(|| loop {
                    let j = next.fetch_add(1, Ordering::Relaxed);
                    let Some(&i) = todo.get(j) else { break };
                    let d = self.decide_one(&cells[i]);
                    self.memo.lock().unwrap().insert(key(&cells[i]), d);
                });
            }
        });
        let memo = self.memo.lock().unwrap();
        cells.iter().map(|c| memo[&key(c)].clone()).collect()
    }
}

/// The split state widest relative to the envelope that can still be cut.
fn widest(cl: &ClosedLoop, cell: &[Interval]) -> Option<usize> {
    let env = cl.envelope();
    cl.spec
        .split
        .iter()
        .copied()
        .filter(|&d| cell[d].width() > 0.0 && { let (a, b) = cell[d].bisect(); a.width() > 0.0 && b.width() > 0.0 })
        .max_by(|&a, &b| (cell[a].width() / env[a].width()).partial_cmp(&(cell[b].width() / env[b].width())).unwrap())
}

/// One decided cell of a campaign, in the order the campaign decided it.
struct Step {
    depth: u32,
    kind: Kind,
    /// Not cut further: its status is final in the campaign's partition.
    leaf: bool,
    stats: Stats,
    by_adversary: bool,
}

/// Adaptive campaign to `max_depth`, starting from the uniform grid of `start` cuts
/// (0: the whole envelope), level by level (largest first).
fn adaptive(eng: &Engine, start: u32, max_depth: u32) -> Vec<Step> {
    let mut level: Vec<Vec<Interval>> = grid(eng.cl, start);
    let mut steps = Vec::new();
    for depth in start..=max_depth {
        if level.is_empty() {
            break;
        }
        let decided = eng.decide(&level);
        let mut next = Vec::new();
        for (cell, d) in level.iter().zip(&decided) {
            let cut = if d.kind != Kind::Safe && depth < max_depth { d.cut } else { None };
            steps.push(Step { depth, kind: d.kind, leaf: cut.is_none(), stats: d.stats.clone(), by_adversary: d.by_adversary });
            // Unsafe cells are refined too (the demo's `refine_unsafe`): a counterexample
            // proves one point unsafe, and the rest of the cell may still be provable.
            {
                if let Some(k) = cut {
                    let (a, b) = cell[k].bisect();
                    let (mut lo, mut hi) = (cell.clone(), cell.clone());
                    lo[k] = a;
                    hi[k] = b;
                    next.push(lo);
                    next.push(hi);
                }
            }
        }
        level = next;
    }
    steps
}

/// The uniform grid of `depth` cuts, spread over the split states round-robin.
fn grid(cl: &ClosedLoop, depth: u32) -> Vec<Vec<Interval>> {
    let mut cells = vec![cl.envelope()];
    for c in 0..depth as usize {
        let d = cl.spec.split[c % cl.spec.split.len()];
        cells = cells
            .into_iter()
            .flat_map(|cell| {
                let (a, b) = cell[d].bisect();
                let (mut lo, mut hi) = (cell.clone(), cell);
                lo[d] = a;
                hi[d] = b;
                [lo, hi]
            })
            .collect();
    }
    cells
}

fn volume(depth: u32) -> f64 {
    0.5f64.powi(depth as i32)
}

/// (cumulative CPU seconds, cumulative safe fraction) after each step.
fn curve(steps: &[Step]) -> Vec<(f64, f64)> {
    let (mut t, mut v) = (0.0, 0.0);
    steps
        .iter()
        .map(|s| {
            t += s.stats.wall_ms / 1e3;
            if s.kind == Kind::Safe {
                v += volume(s.depth);
            }
            (t, v)
        })
        .collect()
}

/// Final safe and unsafe fractions of the partition (its leaves) and the CPU seconds.
fn fractions(steps: &[Step]) -> (f64, f64, f64) {
    let (mut s, mut u, mut total) = (0.0, 0.0, 0.0);
    for st in steps {
        match st.kind {
            Kind::Safe if st.leaf => s += volume(st.depth),
            Kind::Unsafe if st.leaf => u += volume(st.depth),
            _ => {}
        }
        total += st.stats.wall_ms / 1e3;
    }
    (s, u, total)
}

/// Wilson score interval at 95 % for k successes in n trials (standard formula).
fn wilson(k: usize, n: usize) -> (f64, f64) {
    let (p, n, z) = (k as f64 / n as f64, n as f64, 1.959964);
    let d = 1.0 + z * z / n;
    let c = (p + z * z / (2.0 * n)) / d;
    let h = z * ((p * (1.0 - p) / n + z * z / (4.0 * n * n)).sqrt()) / d;
    (c - h, c + h)
}

/// One trajectory from a random initial state with noise and disturbance drawn per
/// period, uniformly (`extreme` false) or at a random end of their range; unsafe?
fn mc_run(cl: &ClosedLoop, rng: &mut Rng, extreme: bool) -> bool {
    let spec = &cl.spec;
    let pick = |i: Interval, r: &mut Rng| if extreme { if r.unit() < 0.5 { i.lo() } else { i.hi() } } else { r.within(i) };
    let x0: Vec<f64> = cl.envelope().iter().map(|i| rng.within(*i)).collect();
    let h = spec.horizon as usize;
    let noise = (0..h).map(|_| spec.observations.iter().map(|o| pick(o.noise, rng)).collect()).collect();
    let dist = (0..h).map(|_| spec.disturbance_ranges.iter().map(|d| pick(*d, rng)).collect()).collect();
    let cand = Candidate {
        x0,
        initial_command: spec.initial_commands[0],
        dist,
        noise,
        commands: vec![0; h],
        trajectory: Vec::new(),
        entry_time: 0.0,
        region: 0,
    };
    falsify::replay(cl, &cand).2.is_some()
}

/// Monte Carlo unsafe count over `n` initial states (half random, half extreme choices).
fn monte_carlo(cl: &ClosedLoop, n: usize, threads: usize) -> usize {
    let bad = AtomicUsize::new(0);
    std::thread::scope(|s| {
        for t in 0..threads {
            let bad = &bad;
            s.spawn(move || {
                let mut rng = Rng::new(1000 + t as u64);
                let mut k = 0;
                for i in (t..n).step_by(threads) {
                    if mc_run(cl, &mut rng, i % 2 == 1) {
                        k += 1;
                    }
                }
                bad.fetch_add(k, Ordering::Relaxed);
            });
        }
    });
    bad.into_inner()
}

/// The sampled ceiling for any sound engine at `depth`: of `n` cells drawn from the
/// uniform grid of that depth (all of them when the grid is smaller), the fraction whose
/// sampled starts (centre, corners for up to 4 states, random points up to 9) all
/// survive the adversary (every command the noise allows, extreme disturbances). A cell
/// with a run that enters the unsafe set cannot be proven safe by any sound engine; a
/// surviving cell may still hold unsafe runs the sampling missed, so this bounds the
/// provable volume from above only approximately. Returns (surviving, drawn).
fn ceiling(cl: &ClosedLoop, depth: u32, n: usize, threads: usize) -> (usize, usize, Vec<f64>) {
    let mut cells = grid(cl, depth);
    let mut rng = Rng::new(77);
    if cells.len() > n {
        for i in 0..n {
            let j = i + (rng.next_u64() as usize) % (cells.len() - i);
            cells.swap(i, j);
        }
        cells.truncate(n);
    }
    let margins = Mutex::new(Vec::new());
    let next = AtomicUsize::new(0);
    std::thread::scope(|s| {
        for _ in 0..threads {
            s.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                let Some(cell) = cells.get(i) else { break };
                if let Ok(m) = adversary::cell_survives(cl, cell, 9, adversary::Effort { frontier: 48 }, 5000 + i as u64) {
                    margins.lock().unwrap().push(m);
                }
            });
        }
    });
    let margins = margins.into_inner().unwrap();
    (margins.len(), cells.len(), margins)
}

/// The unsafe constraints as written in the spec (the units of the margins).
fn spec_margin_unit(cl: &ClosedLoop) -> String {
    cl.spec.unsafe_set.iter().map(|conj| conj.iter().map(|c| c.text.as_str()).collect::<Vec<_>>().join(" and ")).collect::<Vec<_>>().join("; ")
}

/// Seconds of one fine simulation of the closed loop (from the envelope's centre).
fn one_simulation_s(cl: &ClosedLoop) -> f64 {
    let mut rng = Rng::new(3);
    let reps = 200;
    let t = Instant::now();
    for _ in 0..reps {
        std::hint::black_box(mc_run(cl, &mut rng, false));
    }
    t.elapsed().as_secs_f64() / reps as f64
}

fn median(v: &mut [f64]) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(|a, b| a.partial_cmp(b).unwrap());
    v[v.len() / 2]
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let quick = args.iter().any(|a| a == "--quick");
    // `--only NAME`: one scenario, printed only (BENCHMARKS.md keeps every scenario).
    let only = args.iter().position(|a| a == "--only").and_then(|i| args.get(i + 1)).cloned();
    let threads = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(1).min(2);
    let mut md = String::new();
    let mc_n = if quick { 20_000 } else { 100_000 };
    let started = Instant::now();
    let mut flags: Vec<String> = Vec::new();
    if quick {
        flags.push("--quick".into());
    }
    if let Some(o) = &only {
        flags.push(format!("--only {o}"));
    }
    let flags = if flags.is_empty() { String::new() } else { format!(" -- {}", flags.join(" ")) };
    writeln!(md, "Command: `cargo bench -p tessera-engine --bench campaign{flags}`.").unwrap();
    writeln!(md, "Engine budgets as in the demo (node budget 600, 5 s per cell, 12 falsifier samples, where a spec's `engine` section leaves them out: the heading spec keeps 20 s per cell); {threads} engine threads; CPU time = sum of per-cell engine times.\n").unwrap();

    let mut t1 = String::from("### 1. Adaptive bisection against uniform grids\n\n| scenario | max depth | adaptive from the root: safe / unsafe fraction, cells, CPU s | adaptive from a grid of depth S: S: safe, cells, CPU s | grid depths: safe fraction (cells, CPU s) | F | from the root: CPU s to F | from depth S: CPU s to F | best grid: CPU s to F | grid / adaptive (root / S) |\n|---|---|---|---|---|---|---|---|---|---|\n");
    let mut t2 = String::from("### 2. Tightness: Monte Carlo and the sampled ceiling\n\n| scenario | depth | proven safe | unresolved | MC safe (95 % CI), n | proven / MC safe | ceiling (95 % CI), cells | proven / ceiling | counterexample volume (adversary's share) | MC unsafe |\n|---|---|---|---|---|---|---|---|---|---|\n");
    let mut t3 = String::from("### 3. Per-cell cost by depth (adaptive campaign)\n\n| scenario | depth | cells | safe/unsafe/inconcl. | median ms | plant % | network % | falsify % | decided: median proof / one simulation |\n|---|---|---|---|---|---|---|---|---|\n");
    let mut t4 = String::from("### 4. Thread scaling (the same cells on 1 and 2 threads)\n\n| scenario | cells | 1 thread s | 2 threads s | parallel efficiency |\n|---|---|---|---|---|\n");
    let mut t6 = String::from("### 6. How close the adversary came to the unsafe set in surviving cells\n\nFor each cell of the ceiling sample that survives, the smallest margin of any explored run: for each unsafe region the largest of its constraint values g(x) (the region needs every g ≤ 0), then the smallest over the regions, so in the units of those constraints. A proof of the cell needs an enclosure at least that tight.\n\n| scenario | depth | surviving cells | 10th percentile | 25th percentile | median | constraints |\n|---|---|---|---|---|---|---|\n");
    let mut t5 = String::from("### 5. Which step bought what (adaptive campaign at a reduced depth)\n\n| scenario | depth | engine | safe | counterexample | cells | CPU s |\n|---|---|---|---|---|---|---|\n");

    for name in ["lander", "aisle", "heading"] {
        if only.as_deref().is_some_and(|o| o != name) {
            continue;
        }
        let cl = load(name);
        let max_depth = if quick { cl.spec.max_depth.min(7) } else { cl.spec.max_depth.min(10) };
        eprintln!("[{:>6.0} s] {name}: adaptive campaign to depth {max_depth}", started.elapsed().as_secs_f64());
        let eng = Engine::new(&cl, threads);
        let steps = adaptive(&eng, 0, max_depth);
        let (a_safe, a_unsafe, a_cpu) = fractions(&steps);
        let a_curve = curve(&steps);
        // The same refinement started from a uniform grid four cuts above the max depth
        // (the server's `initial_depth`), which skips the coarse levels that never prove.
        let start = max_depth.saturating_sub(4);
        let steps_s = adaptive(&eng, start, max_depth);
        let (s_safe, _, s_cpu) = fractions(&steps_s);
        let s_curve = curve(&steps_s);

        // Grids at several depths, the finest the adaptive campaign's max depth.
        let ns = cl.spec.split.len() as u32;
        let mut depths: Vec<u32> = (1..=max_depth).filter(|d| d % ns == max_depth % ns).collect();
        depths.retain(|&d| d + 2 * ns >= max_depth);
        let mut grid_rows = Vec::new();
        for &g in &depths {
            eprintln!("[{:>6.0} s] {name}: grid of depth {g}", started.elapsed().as_secs_f64());
            let cells = grid(&cl, g);
            let ds = eng.decide(&cells);
            let safe = ds.iter().filter(|d| d.kind == Kind::Safe).count() as f64 * volume(g);
            let cpu: f64 = ds.iter().map(|d| d.stats.wall_ms / 1e3).sum();
            grid_rows.push((g, safe, cells.len(), cpu));
        }
        let best = grid_rows.iter().map(|r| r.1).fold(a_safe.max(s_safe), f64::max);
        let grid_txt: Vec<String> = grid_rows.iter().map(|(g, s, n, c)| format!("{g}: {s:.4} ({n}, {c:.1})")).collect();
        for (i, f) in [0.5, 0.8, 0.95].iter().enumerate() {
            let target = f * best;
            let a_t = a_curve.iter().find(|(_, v)| *v >= target && target > 0.0).map(|(t, _)| *t);
            let s_t = s_curve.iter().find(|(_, v)| *v >= target && target > 0.0).map(|(t, _)| *t);
            let g_t = grid_rows.iter().filter(|r| r.1 >= target && target > 0.0).map(|r| r.3).fold(f64::INFINITY, f64::min);
            let fmt = |x: Option<f64>| x.map(|v| format!("{v:.1}")).unwrap_or("not reached".into());
            let ratio = |x: Option<f64>| match x {
                Some(a) if g_t.is_finite() => format!("{:.1}×", g_t / a),
                _ => "–".into(),
            };
            let head = if i == 0 {
                format!(
                    "| {name} | {max_depth} | {a_safe:.4} / {a_unsafe:.4}, {}, {a_cpu:.1} | {start}: {s_safe:.4}, {}, {s_cpu:.1} | {} ",
                    steps.len(),
                    steps_s.len(),
                    grid_txt.join("; ")
                )
            } else {
                "| | | | | ".into()
            };
            writeln!(
                t1,
                "{head}| {:.0} % of {best:.4} | {} | {} | {} | {} / {} |",
                f * 100.0,
                fmt(a_t),
                fmt(s_t),
                if g_t.is_finite() { format!("{g_t:.1}") } else { "not reached".into() },
                ratio(a_t),
                ratio(s_t)
            )
            .unwrap();
        }

        // Tightness.
        eprintln!("[{:>6.0} s] {name}: Monte Carlo, {mc_n} initial states", started.elapsed().as_secs_f64());
        let bad = monte_carlo(&cl, mc_n, threads);
        let good = mc_n - bad;
        let (lo, hi) = wilson(good, mc_n);
        let mc_safe = good as f64 / mc_n as f64;
        eprintln!("[{:>6.0} s] {name}: sampled ceiling at depth {max_depth}", started.elapsed().as_secs_f64());
        let (c_ok, c_n, margins) = ceiling(&cl, max_depth, if quick { 48 } else { 256 }, threads);
        let mut sorted = margins.clone();
        sorted.sort_by(|a, b| a.total_cmp(b));
        let q = |p: f64| sorted.get(((sorted.len() as f64 - 1.0) * p).round() as usize).copied().unwrap_or(f64::NAN);
        writeln!(
            t6,
            "| {name} | {max_depth} | {c_ok} | {:.3} | {:.3} | {:.3} | {} |",
            q(0.1),
            q(0.25),
            q(0.5),
            spec_margin_unit(&cl)
        )
        .unwrap();
        let (c_lo, c_hi) = wilson(c_ok, c_n);
        let c_frac = c_ok as f64 / c_n as f64;
        let adv_unsafe: f64 = 0.0 + steps.iter().filter(|s| s.leaf && s.kind == Kind::Unsafe && s.by_adversary).map(|s| volume(s.depth)).sum::<f64>();
        writeln!(
            t2,
            "| {name} | {max_depth} | {a_safe:.4} | {:.4} | {mc_safe:.4} ({lo:.4}–{hi:.4}), {mc_n} | {:.3} | {c_frac:.4} ({c_lo:.4}–{c_hi:.4}), {c_n} | {:.3} | {a_unsafe:.4} ({adv_unsafe:.4}) | {:.4} |",
            1.0 - a_safe - a_unsafe,
            a_safe / mc_safe,
            a_safe / c_frac,
            bad as f64 / mc_n as f64
        )
        .unwrap();

        // Per-cell cost by depth.
        let sim_s = one_simulation_s(&cl);
        for d in 0..=max_depth {
            let at: Vec<&Step> = steps.iter().filter(|s| s.depth == d).collect();
            if at.is_empty() {
                continue;
            }
            let mut walls: Vec<f64> = at.iter().map(|s| s.stats.wall_ms).collect();
            let (p, n, f): (f64, f64, f64) = at.iter().fold((0.0, 0.0, 0.0), |a, s| (a.0 + s.stats.plant_ms, a.1 + s.stats.network_ms, a.2 + s.stats.falsify_ms));
            let w: f64 = walls.iter().sum();
            let count = |k: Kind| at.iter().filter(|s| s.kind == k).count();
            let mut ratios: Vec<f64> = at.iter().filter(|s| s.kind != Kind::Inconclusive).map(|s| s.stats.wall_ms / 1e3 / sim_s).collect();
            let r = median(&mut ratios);
            writeln!(
                t3,
                "| {name} | {d} | {} | {}/{}/{} | {:.1} | {:.0} | {:.0} | {:.0} | {} |",
                at.len(),
                count(Kind::Safe),
                count(Kind::Unsafe),
                count(Kind::Inconclusive),
                median(&mut walls),
                100.0 * p / w,
                100.0 * n / w,
                100.0 * f / w,
                if r.is_nan() { "–".into() } else { format!("{r:.0}×") }
            )
            .unwrap();
        }
        writeln!(t3, "| {name} | | | | | | | | one fine simulation: {:.3} ms |", sim_s * 1e3).unwrap();

        // Scaling: the same cells, fresh memo, 1 then 2 threads (wall time).
        let cells: Vec<Vec<Interval>> = grid(&cl, max_depth.min(6)).into_iter().take(if quick { 16 } else { 48 }).collect();
        let mut walls = Vec::new();
        for t in [1, 2] {
            let e = Engine::new(&cl, t);
            let t0 = Instant::now();
            e.decide(&cells);
            walls.push(t0.elapsed().as_secs_f64());
        }
        writeln!(t4, "| {name} | {} | {:.2} | {:.2} | {:.0} % |", cells.len(), walls[0], walls[1], 100.0 * walls[0] / (2.0 * walls[1])).unwrap();

        // Engine options at a reduced depth.
        let od = if quick { 5 } else { max_depth.min(7) };
        let base = cl.spec.engine.clone();
        let with = |f: &dyn Fn(&mut EngineOptions)| {
            let mut o = base.clone();
            f(&mut o);
            o
        };
        // Which step bought what: the engine as it was (zonotopes, open decisions cut
        // into boxes), then the steps of the proof-power work switched on in turn.
        // (Optimised ReLU slopes, step 2 of that work, are not built.)
        let options: Vec<(&str, EngineOptions, Option<EngineOptions>)> = vec![
            ("before: zonotopes, open decisions cut into boxes, random falsifier", with(&|o| { o.set = SetKind::Affine; o.adversary = false }), None),
            ("1 + 3: decisions as constraints, shapes kept across periods", with(&|o| { o.set = SetKind::Constrained; o.repeat_check = false; o.adversary = false }), None),
            ("4: + branches that repeat end", with(&|o| { o.set = SetKind::Constrained; o.repeat_check = true; o.adversary = false }), None),
            ("5: + adversarial falsifier", with(&|o| { o.set = SetKind::Constrained; o.repeat_check = true; o.adversary = true }), None),
        ];
        for (label, opts, cheap) in options {
            eprintln!("[{:>6.0} s] {name}: option '{label}' to depth {od}", started.elapsed().as_secs_f64());
            let mut c2 = load(name);
            c2.spec.engine = opts;
            let cheap_cl = cheap.map(|o| {
                let mut c3 = load(name);
                c3.spec.engine = o;
                c3
            });
            let mut e = Engine::new(&c2, threads);
            e.cheap_first = cheap_cl.as_ref();
            let st = adaptive(&e, 0, od);
            let (s, u, cpu) = fractions(&st);
            writeln!(t5, "| {name} | {od} | {label} | {s:.4} | {u:.4} | {} | {cpu:.1} |", st.len()).unwrap();
        }
    }

    for t in [&t1, &t2, &t6, &t3, &t4, &t5] {
        md.push_str(t);
        md.push('\n');
    }
    writeln!(md, "Whole run: {:.0} s wall.", started.elapsed().as_secs_f64()).unwrap();
    println!("{md}");
    if !quick && only.is_none() {
        write_section(&md);
    }
}

/// Replace this benchmark's section of BENCHMARKS.md (between its markers), keeping
/// every other section.
fn write_section(body: &str) {
    let path = root().join("BENCHMARKS.md");
    let begin = "<!-- campaign-bench:begin -->";
    let end = "<!-- campaign-bench:end -->";
    let old = std::fs::read_to_string(&path).unwrap_or_else(|_| "# Benchmarks\n\n".into());
    let machine = machine();
    let section = format!("{begin}\n## Campaign performance (written by the benchmark)\n\nMachine: {machine}.\n\n{body}{end}");
    let new = match (old.find(begin), old.find(end)) {
        (Some(a), Some(b)) if b > a => format!("{}{}{}", &old[..a], section, &old[b + end.len()..]),
        _ => format!("{}\n{}\n", old.trim_end(), section),
    };
    std::fs::write(&path, new).expect("write BENCHMARKS.md");
    eprintln!("wrote {}", path.display());
}

fn machine() -> String {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|s| s.lines().find(|l| l.starts_with("model name")).map(|l| l.split(':').nth(1).unwrap_or("").trim().to_string()))
        .unwrap_or_else(|| "unknown CPU".into());
    let cores = std::thread::available_parallelism().map(|n| n.get()).unwrap_or(0);
    let mem = std::fs::read_to_string("/proc/meminfo")
        .ok()
        .and_then(|s| s.lines().next().map(|l| l.split_whitespace().nth(1).unwrap_or("0").parse::<f64>().unwrap_or(0.0) / 1048576.0))
        .unwrap_or(0.0);
    format!("{cpu}, {cores} cores, {mem:.0} GiB, Linux, release build")
}
