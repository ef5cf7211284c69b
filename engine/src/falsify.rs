//! Falsification: search for a concrete trajectory that enters the unsafe set, and
//! re-check it soundly before it may be reported.
//!
//! Search (not a bound): fine fixed-step RK4 from chosen initial points (the point the
//! failed proof suspects, the centre, corners, then random points), with the exact
//! controller semantics evaluated in f64, and disturbances held at an extreme or at a
//! random value per period.
//!
//! Re-check (a proof): validated integration from the exact initial point with the
//! disturbances the simulation chose (point values per period) and its observation
//! noise; every decision must be unambiguous under sound network bounds (exactly one
//! command possible, and it is the simulated one), and some enclosure of the tube must
//! lie entirely inside one unsafe region. Only then the trajectory is a counterexample.

use super::affine::StateSet;
use super::closed_loop::{possible_commands, ClosedLoop};
use super::interval::Interval;
use super::spec::BoundsMethod;
use super::verdict::{Counterexample, TrajectoryPoint};
use std::collections::BTreeMap;

/// A simulated candidate: everything needed to replay it.
#[derive(Clone, Debug)]
pub struct Candidate {
    pub x0: Vec<f64>,
    pub initial_command: usize,
    /// Disturbance values per period: `dist[k][j]`.
    pub dist: Vec<Vec<f64>>,
    /// Observation noise per period: `noise[k][j]`.
    pub noise: Vec<Vec<f64>>,
    pub commands: Vec<usize>,
    pub trajectory: Vec<TrajectoryPoint>,
    pub entry_time: f64,
    pub region: usize,
}

/// Small deterministic generator (SplitMix64), so verdicts are reproducible.
pub struct Rng(u64);
impl Rng {
    pub fn new(seed: u64) -> Rng {
        Rng(seed)
    }
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        z ^ (z >> 31)
    }
    pub fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }
    pub fn within(&mut self, i: Interval) -> f64 {
        (i.lo() + (i.hi() - i.lo()) * self.unit()).clamp(i.lo(), i.hi())
    }
}

/// Which unsafe region (if any) holds the point, in f64 (simulation only).
pub fn unsafe_region_f64(cl: &ClosedLoop, x: &[f64]) -> Option<usize> {
    cl.spec.unsafe_set.iter().position(|conj| conj.iter().all(|c| c.g.eval_f64(x) <= 0.0))
}

/// How disturbances and noise are chosen along one simulation.
#[derive(Clone, Copy, Debug)]
pub enum Pick {
    Low,
    High,
    Random,
}

fn pick_in(r: &mut Rng, i: Interval, p: Pick) -> f64 {
    match p {
        Pick::Low => i.lo(),
        Pick::High => i.hi(),
        Pick::Random => r.within(i),
    }
}

/// The closed loop in f64 from `x0` over `periods` periods, with the observation noise
/// and disturbance values of period k given by `choose(k)` (held for the period), until
/// the first sampled state inside the unsafe set. Returns the sampled trajectory, the
/// command decided in each period, and the entry time and region if there is one.
fn run_loop(
    cl: &ClosedLoop,
    x0: &[f64],
    c0: usize,
    periods: usize,
    mut choose: impl FnMut(usize) -> (Vec<f64>, Vec<f64>),
) -> (Vec<TrajectoryPoint>, Vec<usize>, Option<(f64, usize)>) {
    let spec = &cl.spec;
    let steps = spec.engine.sim_steps;
    let h = spec.period / steps as f64;
    let mut x = x0.to_vec();
    let mut prev = c0;
    let mut traj = vec![TrajectoryPoint { t: 0.0, x: x.clone() }];
    let mut picked = Vec::new();
    if let Some(r) = unsafe_region_f64(cl, &x) {
        return (traj, picked, Some((0.0, r)));
    }
    for k in 0..periods {
        let (noise, dist) = choose(k);
        let c = cl.decide_f64(prev, &x, &noise);
        picked.push(c);
        let applied = cl.applied(c, prev);
        let states = cl.plant.simulate_period(&x, &spec.commands[applied].inputs, &dist, spec.period, steps);
        for (s, xs) in states.iter().enumerate().skip(1) {
            let t = k as f64 * spec.period + s as f64 * h;
            traj.push(TrajectoryPoint { t, x: xs.clone() });
            if let Some(r) = unsafe_region_f64(cl, xs) {
                return (traj, picked, Some((t, r)));
            }
        }
        x = states.last().cloned().unwrap_or(x);
        prev = c;
    }
    (traj, picked, None)
}

/// Simulate the closed loop from `x0`; return the candidate if it enters the unsafe set.
pub fn simulate(cl: &ClosedLoop, x0: &[f64], c0: usize, dpick: Pick, npick: Pick, rng: &mut Rng) -> Option<Candidate> {
    let spec = &cl.spec;
    let (mut noises, mut dists) = (Vec::new(), Vec::new());
    let (trajectory, commands, hit) = run_loop(cl, x0, c0, spec.horizon as usize, |_| {
        let noise: Vec<f64> = spec.observations.iter().map(|o| pick_in(rng, o.noise, npick)).collect();
        let dist: Vec<f64> = spec.disturbance_ranges.iter().map(|d| pick_in(rng, *d, dpick)).collect();
        noises.push(noise.clone());
        dists.push(dist.clone());
        (noise, dist)
    });
    let (entry_time, region) = hit?;
    if trajectory.iter().any(|p| p.x.iter().any(|v| !v.is_finite())) {
        return None;
    }
    Some(Candidate { x0: x0.to_vec(), initial_command: c0, dist: dists, noise: noises, commands, trajectory, entry_time, region })
}

/// Soundly re-check a candidate. Returns the time range over which the state is
/// proven to be inside region `candidate.region` (or another region), or `None`.
pub fn recheck(cl: &ClosedLoop, cand: &Candidate) -> Option<(usize, [f64; 2])> {
    let spec = &cl.spec;
    let mut set = StateSet::point(&cand.x0);
    // Inside already at t = 0?
    if let Some(r) = inside_region(cl, &set.to_box(), &set) {
        return Some((r, [0.0, 0.0]));
    }
    let mut prev = cand.initial_command;
    for (k, &c) in cand.commands.iter().enumerate() {
        let obs: Vec<Interval> = spec
            .observations
            .iter()
            .enumerate()
            .map(|(j, o)| set.eval_affine(&o.expr).range() + Interval::point(cand.noise[k][j]))
            .collect();
        let input = cl.network_input(&obs);
        let b = cl.bound_outputs(prev, &input, BoundsMethod::Symbolic);
        if possible_commands(&b, spec.decision) != vec![c] {
            return None; // the decision is not certain at this point: no proof
        }
        let applied = cl.applied(c, prev);
        let dist: Vec<Interval> = cand.dist[k].iter().map(|&w| Interval::point(w)).collect();
        let flow = cl
            .plant
            .integrate_period(&set, &spec.commands[applied].inputs, &dist, spec.period, &spec.engine)
            .ok()?;
        for piece in &flow.tube {
            if let Some(r) = inside_region(cl, &piece.hull, &piece.enclosure) {
                let t0 = k as f64 * spec.period;
                return Some((r, [t0 + piece.t.lo(), t0 + piece.t.hi()]));
            }
        }
        set = flow.end;
        prev = c;
    }
    None
}

/// A region that provably holds every state of the enclosure: all its constraints
/// `g ≤ 0` hold over the whole set.
fn inside_region(cl: &ClosedLoop, hull: &[Interval], set: &StateSet) -> Option<usize> {
    cl.spec.unsafe_set.iter().position(|conj| {
        conj.iter().all(|c| c.g.eval_interval(hull).hi() <= 0.0 || set.eval_affine(&c.g).range().hi() <= 0.0)
    })
}

/// Search the cell for a counterexample and return the first one that re-checks.
/// `suspect` is a point a failed proof points at; it is tried first. Random and extreme
/// runs come first (cheap); then the adversary searches from the suspect, the centre
/// and, for up to 2 states, the corners.
pub fn falsify(
    cl: &ClosedLoop,
    cell: &[Interval],
    suspect: Option<&[f64]>,
    budget: u32,
    seed: u64,
    simulations: &mut u64,
) -> Option<Counterexample> {
    let spec = &cl.spec;
    let n = cell.len();
    let mut rng = Rng::new(seed);
    let mut points: Vec<Vec<f64>> = Vec::new();
    if let Some(s) = suspect {
        points.push(s.to_vec());
    }
    points.push(cell.iter().map(|i| i.mid()).collect());
    if n <= 6 {
        for mask in 0..(1u32 << n) {
            points.push((0..n).map(|d| if mask >> d & 1 == 0 { cell[d].lo() } else { cell[d].hi() }).collect());
        }
    }
    while (points.len() as u32) < budget {
        points.push(cell.iter().map(|i| rng.within(*i)).collect());
    }
    points.truncate(budget.max(1) as usize);
    let picks = [(Pick::Low, Pick::Random), (Pick::High, Pick::Random), (Pick::Random, Pick::Random)];
    let has_dist = !spec.disturbance_ranges.is_empty();
    for x0 in &points {
        for &c0 in &spec.initial_commands {
            for &(dp, np) in picks.iter().take(if has_dist { 3 } else { 1 }) {
                *simulations += 1;
                let Some(cand) = simulate(cl, x0, c0, dp, np, &mut rng) else { continue };
                if let Some((region, during)) = recheck(cl, &cand) {
                    return Some(Counterexample { found_by: Some("sampling".into()), ..to_counterexample(cl, &cand, region, during) });
                }
            }
        }
    }
    // The adversary: from the suspect, the centre and the corners, every command the
    // noise allows, under extreme disturbances.
    if !spec.engine.adversary {
        return None;
    }
    let effort = super::adversary::Effort { frontier: 16 };
    let corners = if n <= 2 { 1 + (1usize << n) } else { 1 };
    for x0 in points.iter().take(corners + usize::from(suspect.is_some())) {
        for &c0 in &spec.initial_commands {
            let Some(cand) = super::adversary::search(cl, x0, c0, effort, &mut rng, simulations) else { continue };
            if let Some((region, during)) = recheck(cl, &cand) {
                return Some(Counterexample { found_by: Some("adversary".into()), ..to_counterexample(cl, &cand, region, during) });
            }
        }
    }
    None
}

/// The JSON form of a checked candidate.
pub fn to_counterexample(cl: &ClosedLoop, cand: &Candidate, region: usize, during: [f64; 2]) -> Counterexample {
    let spec = &cl.spec;
    let initial_state: BTreeMap<String, f64> = spec.states.iter().cloned().zip(cand.x0.iter().copied()).collect();
    let disturbances = spec
        .disturbances
        .iter()
        .enumerate()
        .map(|(j, name)| (name.clone(), cand.dist.iter().map(|d| d[j]).collect()))
        .collect();
    let noise = spec
        .observations
        .iter()
        .enumerate()
        .map(|(j, o)| (o.name.clone(), cand.noise.iter().map(|v| v[j]).collect()))
        .collect();
    Counterexample {
        initial_state,
        initial_command: spec.commands[cand.initial_command].name.clone(),
        disturbances,
        noise,
        commands: cand.commands.iter().map(|&c| spec.commands[c].name.clone()).collect(),
        trajectory: cand.trajectory.clone(),
        entry_time: cand.entry_time,
        proven_unsafe_during: during,
        unsafe_region: region,
        found_by: None,
    }
}

/// Rebuild a candidate from a reported counterexample (for `replay`), by simulating
/// again with its recorded choices. Errors name the field that does not fit the spec.
pub fn candidate_from(cl: &ClosedLoop, cx: &Counterexample) -> Result<Candidate, String> {
    let spec = &cl.spec;
    let mut x0 = Vec::new();
    for s in &spec.states {
        x0.push(*cx.initial_state.get(s).ok_or(format!("counterexample.initial_state: no value for '{s}'"))?);
    }
    let c0 = spec
        .commands
        .iter()
        .position(|c| c.name == cx.initial_command)
        .ok_or(format!("counterexample.initial_command: '{}' is not a command", cx.initial_command))?;
    let periods = cx.commands.len();
    let mut dist = vec![Vec::new(); periods];
    for name in &spec.disturbances {
        let v = cx.disturbances.get(name).ok_or(format!("counterexample.disturbances: no values for '{name}'"))?;
        if v.len() != periods {
            return Err(format!("counterexample.disturbances.{name}: {} values for {periods} periods", v.len()));
        }
        for (k, w) in v.iter().enumerate() {
            dist[k].push(*w);
        }
    }
    let mut noise = vec![Vec::new(); periods];
    for o in &spec.observations {
        let v = cx.noise.get(&o.name).ok_or(format!("counterexample.noise: no values for '{}'", o.name))?;
        if v.len() != periods {
            return Err(format!("counterexample.noise.{}: {} values for {periods} periods", o.name, v.len()));
        }
        for (k, w) in v.iter().enumerate() {
            noise[k].push(*w);
        }
    }
    let commands = cx
        .commands
        .iter()
        .enumerate()
        .map(|(k, n)| {
            spec.commands.iter().position(|c| &c.name == n).ok_or(format!("counterexample.commands[{k}]: '{n}' is not a command"))
        })
        .collect::<Result<Vec<_>, _>>()?;
    Ok(Candidate {
        x0,
        initial_command: c0,
        dist,
        noise,
        commands,
        trajectory: cx.trajectory.clone(),
        entry_time: cx.entry_time,
        region: cx.unsafe_region,
    })
}

/// Re-simulate a recorded counterexample with its own choices (f64), returning the
/// trajectory, the commands the controller picks on it, and the first unsafe time.
pub fn replay(cl: &ClosedLoop, cand: &Candidate) -> (Vec<TrajectoryPoint>, Vec<usize>, Option<(f64, usize)>) {
    run_loop(cl, &cand.x0, cand.initial_command, cand.commands.len(), |k| (cand.noise[k].clone(), cand.dist[k].clone()))
}
