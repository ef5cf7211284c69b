//! An adversary that steers the closed loop: from one initial state it explores the
//! tree of every command the observation noise lets the controller pick (found by
//! evaluating the network at sample points of the noise box) under extreme
//! disturbances, looking for a run that enters the unsafe set.
//!
//! This is a search, not a bound: it may miss runs (noise values between its sample
//! points, disturbances that are not extreme, states merged by its de-duplication).
//! A run it returns is a [`Candidate`] that still has to pass
//! [`super::falsify::recheck`] before anyone may call it a counterexample. It serves
//! the falsifier (counterexamples that random noise rarely finds) and the campaign
//! benchmark's sampled ceiling for sound engines.

use super::closed_loop::{pick, ClosedLoop};
use super::falsify::{unsafe_region_f64, Candidate, Rng};
use super::spec::Decision;

/// How hard the adversary looks.
#[derive(Clone, Copy, Debug)]
pub struct Effort {
    /// Most live runs kept per period (the others are merged or dropped).
    pub frontier: usize,
}

/// One explored run: its state, previous command, and the choice that led to it.
#[derive(Clone)]
struct Node {
    x: Vec<f64>,
    prev: usize,
    /// Index into the path arena of the step that produced this node (usize::MAX at the root).
    step: usize,
}

/// One step of a run: the parent's arena index, the command, the noise that picks it,
/// the disturbance held during the period.
struct Step {
    parent: usize,
    command: usize,
    noise: Vec<f64>,
    dist: Vec<f64>,
}

/// Noise sample points: the centre, each observation at either end with the others
/// centred, and the corners (all of them for up to 6 observations, else 64 random).
fn noise_points(cl: &ClosedLoop, rng: &mut Rng) -> Vec<Vec<f64>> {
    let obs = &cl.spec.observations;
    let n = obs.len();
    let mid: Vec<f64> = obs.iter().map(|o| o.noise.mid()).collect();
    let mut pts = vec![mid.clone()];
    for j in 0..n {
        for end in [obs[j].noise.lo(), obs[j].noise.hi()] {
            let mut p = mid.clone();
            p[j] = end;
            pts.push(p);
        }
    }
    if n <= 6 {
        for mask in 0..(1u32 << n) {
            pts.push((0..n).map(|j| if mask >> j & 1 == 0 { obs[j].noise.lo() } else { obs[j].noise.hi() }).collect());
        }
    } else {
        for _ in 0..64 {
            pts.push(obs.iter().map(|o| if rng.unit() < 0.5 { o.noise.lo() } else { o.noise.hi() }).collect());
        }
    }
    pts.dedup();
    pts
}

/// Disturbance choices: every combination of range ends (at most 16; beyond that,
/// 16 random ones).
fn disturbance_points(cl: &ClosedLoop, rng: &mut Rng) -> Vec<Vec<f64>> {
    let d = &cl.spec.disturbance_ranges;
    if d.is_empty() {
        return vec![Vec::new()];
    }
    if d.len() <= 4 {
        (0..(1u32 << d.len())).map(|mask| (0..d.len()).map(|j| if mask >> j & 1 == 0 { d[j].lo() } else { d[j].hi() }).collect()).collect()
    } else {
        (0..16).map(|_| d.iter().map(|w| if rng.unit() < 0.5 { w.lo() } else { w.hi() }).collect()).collect()
    }
}

/// The commands some sampled noise value lets the controller pick at `x` after `prev`,
/// each with the noise value that picks it with the widest margin over the runner-up.
fn allowed(cl: &ClosedLoop, prev: usize, x: &[f64], noise: &[Vec<f64>]) -> Vec<(usize, Vec<f64>)> {
    let spec = &cl.spec;
    let obs: Vec<f64> = spec.observations.iter().map(|o| o.expr.eval_f64(x)).collect();
    let mut best: Vec<Option<(f64, usize)>> = vec![None; spec.commands.len()];
    let net = cl.network_after(prev);
    for (k, nz) in noise.iter().enumerate() {
        let input: Vec<f64> = obs.iter().enumerate().map(|(j, o)| (o + nz[j] - spec.offset[j]) / spec.scale[j]).collect();
        let y = net.eval(&input);
        let c = pick(&y, spec.decision);
        let margin = y
            .iter()
            .enumerate()
            .filter(|&(i, _)| i != c)
            .map(|(_, v)| match spec.decision {
                Decision::Argmax => y[c] - v,
                Decision::Argmin => v - y[c],
            })
            .fold(f64::INFINITY, f64::min);
        if margin.is_finite() || spec.commands.len() == 1 {
            if best[c].is_none_or(|(m, _)| margin > m) {
                best[c] = Some((margin, k));
            }
        }
    }
    best.iter().enumerate().filter_map(|(c, b)| b.map(|(_, k)| (c, noise[k].clone()))).collect()
}

/// Explore from `x0` (previous command `c0`) over the horizon; return the first run
/// found that enters the unsafe set (its choices recorded), or `None`.
pub fn search(cl: &ClosedLoop, x0: &[f64], c0: usize, effort: Effort, rng: &mut Rng, sims: &mut u64) -> Option<Candidate> {
    let mut margin = f64::INFINITY;
    explore(cl, x0, c0, effort, rng, sims, &mut margin)
}

/// How far a state is from the unsafe set, in the spec's own terms: for each region the
/// largest of its constraint values `g_j(x)` (the region needs all `g_j ≤ 0`), and the
/// smallest of those over the regions. Positive outside, ≤ 0 inside (f64, not a bound).
pub fn unsafe_margin(cl: &ClosedLoop, x: &[f64]) -> f64 {
    cl.spec
        .unsafe_set
        .iter()
        .map(|conj| conj.iter().map(|c| c.g.eval_f64(x)).fold(f64::NEG_INFINITY, f64::max))
        .fold(f64::INFINITY, f64::min)
}

/// [`search`], also lowering `margin` to the smallest [`unsafe_margin`] of every state
/// it simulated.
fn explore(cl: &ClosedLoop, x0: &[f64], c0: usize, effort: Effort, rng: &mut Rng, sims: &mut u64, margin: &mut f64) -> Option<Candidate> {
    let spec = &cl.spec;
    let noise = noise_points(cl, rng);
    let dists = disturbance_points(cl, rng);
    // A coarser simulation than the falsifier's (a fifth of its steps, at least 5):
    // this is only a search; the run it returns is replayed at full resolution and
    // re-checked before anyone may call it a counterexample.
    let steps = (spec.engine.sim_steps / 5).max(5);
    if unsafe_region_f64(cl, x0).is_some() {
        return Some(rebuild(cl, x0, c0, &[], usize::MAX));
    }
    let mut arena: Vec<Step> = Vec::new();
    let mut frontier = vec![Node { x: x0.to_vec(), prev: c0, step: usize::MAX }];
    // De-duplication grid: 1/256 of the envelope per state.
    let cellw: Vec<f64> = spec.envelope.iter().map(|e| (e.width() / 256.0).max(1e-12)).collect();
    for _k in 0..spec.horizon {
        let mut next: Vec<Node> = Vec::new();
        let mut seen = std::collections::HashSet::new();
        for node in &frontier {
            for (c, nz) in allowed(cl, node.prev, &node.x, &noise) {
                let applied = cl.applied(c, node.prev);
                for d in &dists {
                    *sims += 1;
                    let states = cl.plant.simulate_period(&node.x, &spec.commands[applied].inputs, d, spec.period, steps);
                    arena.push(Step { parent: node.step, command: c, noise: nz.clone(), dist: d.clone() });
                    let here = arena.len() - 1;
                    for st in states.iter().skip(1) {
                        *margin = margin.min(unsafe_margin(cl, st));
                    }
                    if states.iter().skip(1).any(|s| unsafe_region_f64(cl, s).is_some()) {
                        return Some(rebuild(cl, x0, c0, &arena, here));
                    }
                    let end = states.last().cloned().unwrap_or_else(|| node.x.clone());
                    if end.iter().any(|v| !v.is_finite()) {
                        continue;
                    }
                    let key: Vec<i64> = end.iter().zip(&cellw).map(|(v, w)| (v / w).floor() as i64).chain([c as i64]).collect();
                    if seen.insert(key) {
                        next.push(Node { x: end, prev: c, step: here });
                    }
                }
            }
        }
        if next.is_empty() {
            return None;
        }
        frontier = thin(next, effort.frontier, rng);
    }
    None
}

/// Keep at most `cap` runs: the extreme ones along every state first (the adversary's
/// best hopes), then a random sample of the rest.
fn thin(mut nodes: Vec<Node>, cap: usize, rng: &mut Rng) -> Vec<Node> {
    if nodes.len() <= cap {
        return nodes;
    }
    let n = nodes[0].x.len();
    let per_end = (cap / (4 * n.max(1))).max(1);
    let mut keep = vec![false; nodes.len()];
    let mut order: Vec<usize> = (0..nodes.len()).collect();
    for d in 0..n {
        order.sort_by(|&a, &b| nodes[a].x[d].total_cmp(&nodes[b].x[d]));
        for &i in order.iter().take(per_end).chain(order.iter().rev().take(per_end)) {
            keep[i] = true;
        }
    }
    let mut rest: Vec<usize> = (0..nodes.len()).filter(|&i| !keep[i]).collect();
    let room = cap.saturating_sub(keep.iter().filter(|k| **k).count());
    for i in 0..room.min(rest.len()) {
        let j = i + (rng.next_u64() as usize) % (rest.len() - i);
        rest.swap(i, j);
        keep[rest[i]] = true;
    }
    let mut out = Vec::with_capacity(cap);
    for (i, node) in nodes.drain(..).enumerate() {
        if keep[i] {
            out.push(node);
        }
    }
    out
}

/// The candidate of the run ending at arena step `last`: its recorded choices, and the
/// trajectory from replaying them.
fn rebuild(cl: &ClosedLoop, x0: &[f64], c0: usize, arena: &[Step], last: usize) -> Candidate {
    let mut chain = Vec::new();
    let mut i = last;
    while i != usize::MAX {
        chain.push(i);
        i = arena[i].parent;
    }
    chain.reverse();
    let mut cand = Candidate {
        x0: x0.to_vec(),
        initial_command: c0,
        dist: chain.iter().map(|&i| arena[i].dist.clone()).collect(),
        noise: chain.iter().map(|&i| arena[i].noise.clone()).collect(),
        commands: chain.iter().map(|&i| arena[i].command).collect(),
        trajectory: Vec::new(),
        entry_time: 0.0,
        region: 0,
    };
    let (trajectory, _, hit) = super::falsify::replay(cl, &cand);
    cand.trajectory = trajectory;
    if let Some((t, r)) = hit {
        cand.entry_time = t;
        cand.region = r;
    }
    cand
}

/// Whether every sampled start of the cell (its centre, its corners for up to 6 states,
/// then random points up to `starts`) survives the adversary from every initial
/// command. `false` comes with the first run found that enters the unsafe set.
///
/// `Ok` carries the smallest [`unsafe_margin`] met by any explored run: how close the
/// adversary came to the unsafe set (a sound engine has to be at least that precise to
/// prove the cell).
pub fn cell_survives(cl: &ClosedLoop, cell: &[super::interval::Interval], starts: usize, effort: Effort, seed: u64) -> Result<f64, Candidate> {
    let mut rng = Rng::new(seed);
    let n = cell.len();
    let mut points: Vec<Vec<f64>> = vec![cell.iter().map(|i| i.mid()).collect()];
    if n <= 6 {
        for mask in 0..(1u32 << n) {
            points.push((0..n).map(|d| if mask >> d & 1 == 0 { cell[d].lo() } else { cell[d].hi() }).collect());
        }
    }
    while points.len() < starts {
        points.push(cell.iter().map(|i| rng.within(*i)).collect());
    }
    let mut sims = 0;
    let mut margin = f64::INFINITY;
    for x0 in &points {
        margin = margin.min(unsafe_margin(cl, x0));
        for &c0 in &cl.spec.initial_commands {
            if let Some(c) = explore(cl, x0, c0, effort, &mut rng, &mut sims, &mut margin) {
                return Err(c);
            }
        }
    }
    Ok(margin)
}
