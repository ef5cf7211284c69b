//! Closed-loop reachability of one cell: the proof attempt.
//!
//! Guarantee: [`prove`] returns `Proof::Safe` only if every trajectory from the cell,
//! for every disturbance signal and observation noise allowed by the spec and every
//! command the controller could pick (the network's decision bounded soundly), stays
//! out of the unsafe set on [0, H·T]. The analysis keeps a tree over commands: at
//! each period every branch holds a set of states and the previous command; the
//! network's outputs are bounded over the observation enclosure; each command not
//! ruled out by the bounds opens a child branch with the plant integrated under its
//! inputs. When too many branches are alive, branches with the same previous command
//! are joined (a sound over-approximation of their union), which keeps the tree's
//! width bounded by the number of commands.

use super::affine::{Affine, StateSet};
use super::closed_loop::{possible_commands, ClosedLoop};
use super::interval::Interval;
use super::plant::SubstepView;
use super::spec::{BoundsMethod, DecisionSplit, EngineOptions, SetKind};
use super::star::{Bounder, Polytope, Star};
use super::verdict::{Reason, SplitHint, Stats};
use std::time::Instant;

/// Outcome of one proof attempt.
pub enum Proof {
    Safe,
    Failed(Failure),
}

/// Why a proof attempt failed, and what blocked it.
pub struct Failure {
    pub reason: Reason,
    pub detail: String,
    /// From the sensitivity of the blocking bound; `None` leaves the choice to the
    /// caller's fallback rule ([`widest_normalized`]).
    pub split_hint: Option<SplitHint>,
    /// A point of the cell the failure points at (for the falsifier), if any.
    pub suspect: Option<Vec<f64>>,
}

struct Branch {
    /// The states of the branch, with the constraints its decisions added (none in the
    /// box and affine modes).
    set: Star,
    /// The command decided in the previous period (c_{k−1}); for a joined branch, one
    /// of them that selects the same future (see [`join_branches`]).
    prev: usize,
    /// Every command decided in the previous period by some state of the branch.
    came_by: Vec<usize>,
    /// When the set is exactly a polytope of states (a template hull without initial
    /// symbols), that polytope: later branches inside it need not be followed.
    shape: Option<Polytope>,
}

/// Sensitivity of a blocking quantity to each split dimension, read from the
/// coefficients of its affine form on the initial symbols (symbol i ↔ state i).
fn hint_from_coeffs(cl: &ClosedLoop, cell: &[Interval], coeff: impl Fn(usize) -> f64) -> Option<SplitHint> {
    let spec = &cl.spec;
    let mut best: Option<(usize, f64)> = None;
    let mut total = 0.0;
    for &d in &spec.split {
        if !(cell[d].width() > 0.0) {
            continue;
        }
        let c = coeff(d).abs();
        total += c;
        if c.is_finite() && best.is_none_or(|(_, b)| c > b) {
            best = Some((d, c));
        }
    }
    match best {
        Some((d, c)) if c > 0.0 && total > 0.0 => Some(SplitHint { dim: spec.states[d].clone(), score: c / total }),
        _ => None,
    }
}

/// The widest split dimension relative to the envelope (the fallback rule).
pub fn widest_normalized(cl: &ClosedLoop, cell: &[Interval]) -> SplitHint {
    let spec = &cl.spec;
    let mut best = spec.split[0];
    let mut best_w = -1.0;
    for &d in &spec.split {
        let env_w = spec.envelope[d].width();
        let w = if env_w > 0.0 { cell[d].width() / env_w } else { 0.0 };
        if w > best_w {
            best_w = w;
            best = d;
        }
    }
    SplitHint { dim: spec.states[best].clone(), score: 0.0 }
}

/// Per-period record of the branches (for tests): at index k, the state sets at time
/// (k+1)·T as boxes, with the command decided in period k (one entry per command a
/// joined branch stands for).
#[derive(Default, Debug)]
pub struct Trace {
    pub periods: Vec<Vec<(usize, Vec<Interval>)>>,
    /// The same branches as sets: at index k, each branch's set at time (k+1)·T with
    /// the commands decided in period k by its states.
    pub sets: Vec<Vec<(Vec<usize>, Star)>>,
}

/// Attempt to prove the cell safe. Timing and tree statistics go into `stats`.
pub fn prove(cl: &ClosedLoop, cell: &[Interval], started: Instant, stats: &mut Stats) -> Proof {
    prove_with(cl, &cl.spec.engine, cell, started, stats, None)
}

/// [`prove`], recording every branch's set at the end of every period into `trace`.
pub fn prove_traced(cl: &ClosedLoop, cell: &[Interval], started: Instant, stats: &mut Stats, trace: Option<&mut Trace>) -> Proof {
    prove_with(cl, &cl.spec.engine, cell, started, stats, trace)
}

/// Most constraints a branch keeps, per state dimension (the oldest go first).
const CONSTRAINTS_PER_DIM: usize = 12;

/// [`prove_traced`] with engine options other than the spec's (same guarantee: the
/// options trade precision for time, never soundness).
pub fn prove_with(
    cl: &ClosedLoop,
    opts: &EngineOptions,
    cell: &[Interval],
    started: Instant,
    stats: &mut Stats,
    mut trace: Option<&mut Trace>,
) -> Proof {
    let spec = &cl.spec;
    let n = spec.states.len();
    let max_gens = (opts.generators_per_dim as usize) * n;
    let max_cons = CONSTRAINTS_PER_DIM * n + 4;
    let mut frontier: Vec<Branch> = spec
        .initial_commands
        .iter()
        .map(|&c| Branch { set: Star::from_set(StateSet::from_box(cell)), prev: c, came_by: vec![c], shape: None })
        .collect();
    // Sensitivity of the observations that left a decision open (for the node budget).
    let mut ambiguity_hint: Option<SplitHint> = None;
    // Every symbol minted anywhere in the tree gets a number of its own (a constraint may
    // mention a symbol its set's forms no longer use, so numbers are never reused).
    let mut next_symbol = n;
    let kinks = cl.plant.state_kinks();
    // Polytopes that branches held at the end of earlier periods, by future (see below);
    // the cell itself comes first.
    let mut seen: Vec<((usize, usize), Polytope)> = spec
        .initial_commands
        .iter()
        .map(|&c| {
            let faces = (0..n)
                .flat_map(|i| {
                    let mut up = vec![0.0; n];
                    up[i] = 1.0;
                    let mut down = vec![0.0; n];
                    down[i] = -1.0;
                    [(up, cell[i].hi()), (down, -cell[i].lo())]
                })
                .collect();
            (future_key(cl, c), Polytope { faces })
        })
        .collect();

    for k in 0..spec.horizon {
        let mut next: Vec<Branch> = Vec::new();
        // The noise of this period's observations: one symbol per observation.
        let noise_base = next_symbol;
        next_symbol += spec.observations.len();
        for br in &frontier {
            stats.tree_nodes += 1;
            if stats.tree_nodes > opts.node_budget {
                return Proof::Failed(Failure {
                    reason: Reason::NodeBudget,
                    detail: format!("command tree passed {} nodes at period {k}", opts.node_budget),
                    split_hint: ambiguity_hint.clone(),
                    suspect: None,
                });
            }
            if started.elapsed().as_secs_f64() > opts.time_budget_s {
                return Proof::Failed(Failure {
                    reason: Reason::TimeBudget,
                    detail: format!("time budget of {} s spent at period {k}", opts.time_budget_s),
                    split_hint: ambiguity_hint.clone(),
                    suspect: None,
                });
            }

            // The decision: which commands the controller may pick on this branch, each
            // with the part of the set where it may be picked.
            let t_net = Instant::now();
            let parts = decide(cl, opts, br, noise_base, &mut next_symbol);
            stats.network_ms += t_net.elapsed().as_secs_f64() * 1e3;
            if parts.len() > 1 && ambiguity_hint.is_none() {
                let obs_forms: Vec<_> = spec.observations.iter().map(|o| br.set.set.eval_affine(&o.expr)).collect();
                ambiguity_hint = hint_from_coeffs(cl, cell, |d| {
                    obs_forms.iter().enumerate().map(|(j, f)| f.coeff(d) / spec.scale[j]).map(f64::abs).sum()
                });
            }

            // One child per possible command (and per slice where the set crosses a kink
            // of the dynamics during the period).
            let mut jobs: Vec<(usize, Star)> = Vec::new();
            for (c, part) in parts {
                // A zonotope much wider than the constrained set it stands for would
                // make the integrator work on states the branch does not hold (and see
                // kinks that are not there): enclose the set afresh first.
                let part = compact(part, &mut next_symbol);
                if opts.set == SetKind::Constrained && !kinks.is_empty() {
                    let applied = cl.applied(c, br.prev);
                    for slice in guard_slices(cl, part, applied, &kinks) {
                        jobs.push((c, compact(slice, &mut next_symbol)));
                    }
                } else {
                    jobs.push((c, part));
                }
            }
            for (c, part) in jobs {
                let applied = cl.applied(c, br.prev);
                let t_plant = Instant::now();
                let bounder = part.bounder();
                let constrained: Vec<usize> = {
                    let mut v: Vec<usize> = part.cons.iter().flat_map(|h| h.terms.iter().map(|t| t.0)).collect();
                    v.sort_unstable();
                    v.dedup();
                    v
                };
                let hull = |x: &StateSet| bounder.hull_of(x);
                let protect = |s: usize| constrained.binary_search(&s).is_ok();
                let view = SubstepView { hull: &hull, protect: &protect, max_gens: 2 * max_gens + constrained.len() };
                let mut start = part.set.clone();
                start.reserve_symbols_below(next_symbol);
                let flow = cl.plant.integrate_period_in(
                    &start,
                    &spec.commands[applied].inputs,
                    &spec.disturbance_ranges,
                    spec.period,
                    opts,
                    &view,
                );
                stats.plant_ms += t_plant.elapsed().as_secs_f64() * 1e3;
                let flow = match flow {
                    Ok(f) => f,
                    Err(e) => {
                        return Proof::Failed(Failure {
                            reason: Reason::IntegrationFailed,
                            detail: format!("period {k}, command '{}': {e}", spec.commands[applied].name),
                            split_hint: None,
                            suspect: Some(cell.iter().map(|i| i.mid()).collect()),
                        })
                    }
                };
                if let Some(f) = check_tube(cl, cell, &flow, &part.cons, &bounder, k, applied) {
                    return Proof::Failed(f);
                }
                let mut set = match opts.set {
                    SetKind::Box => Star::from_set(StateSet::from_box(&flow.end.to_box())),
                    SetKind::Affine => Star::from_set(flow.end),
                    SetKind::Constrained => Star { set: flow.end, cons: part.cons },
                };
                next_symbol = next_symbol.max(set.set.num_symbols());
                set.reserve_symbols_below(next_symbol);
                set.reduce(max_gens, max_cons);
                next_symbol = next_symbol.max(set.set.num_symbols());
                next.push(Branch { set, prev: c, came_by: vec![c], shape: None });
            }
        }
        // Keep the width bounded: join branches that share their future.
        if next.len() > opts.join_above as usize {
            next = join_branches(cl, opts, cell, next, max_gens, max_cons, &mut next_symbol);
        }
        // Branches that repeat: a set inside a polytope some branch with the same future
        // held at the end of an earlier period (or inside the cell, before period 0,
        // with an initial command of the same future) needs no more periods. The dynamics,
        // the disturbance and noise bounds and the controller do not depend on time, so
        // every run from it over the H − k periods left is a run from that earlier set
        // over no more periods than the tree followed from there (and where that set was
        // itself cut here, by induction on the period). Only constrained mode records sets.
        if opts.set == SetKind::Constrained && opts.repeat_check {
            let before = next.len();
            next.retain(|b| !seen.iter().any(|(key, p)| *key == future_key(cl, b.prev) && p.contains(&b.set)));
            stats.repeats += (before - next.len()) as u64;
            for b in &next {
                if let Some(p) = &b.shape {
                    seen.push((future_key(cl, b.prev), p.clone()));
                }
            }
        }
        stats.max_branches = stats.max_branches.max(next.len() as u64);
        if let Some(t) = trace.as_deref_mut() {
            t.periods.push(
                next.iter()
                    .flat_map(|b| {
                        let hull = b.set.hull().unwrap_or_else(|| b.set.set.to_box());
                        b.came_by.iter().map(move |&c| (c, hull.clone()))
                    })
                    .collect(),
            );
            t.sets.push(next.iter().map(|b| (b.came_by.clone(), b.set.clone())).collect());
        }
        frontier = next;
        stats.periods_reached = k + 1;
    }
    Proof::Safe
}

/// Slices of a part that will cross a kink of the dynamics (a switching function
/// `g(x) = 0` of `abs`, `min` or `max`) during the period: the part is cut along `g` into
/// slices about as thick as `g` moves in a quarter period, at most 8, so that each slice
/// straddles the kink only briefly (the integrator's remainder across a kink is coarse).
/// The slices together hold every point of the part. Only the first kink crossed is
/// used; a part that crosses none is returned whole.
fn guard_slices(cl: &ClosedLoop, part: Star, applied: usize, kinks: &[(super::expr::Expr, super::expr::Expr)]) -> Vec<Star> {
    let spec = &cl.spec;
    let Some(hull) = part.hull() else { return vec![part] };
    if hull.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
        return vec![part];
    }
    let inputs: Vec<Interval> = spec.commands[applied].inputs.iter().map(|&v| Interval::point(v)).collect();
    let vars = |b: &[Interval]| -> Vec<Interval> { b.iter().copied().chain(inputs.iter().copied()).chain(spec.disturbance_ranges.iter().copied()).collect() };
    // A rough box of the period's states: hull + [0, T]·f(hull), twice.
    let t = Interval::new(0.0, spec.period);
    let mut reach = hull.clone();
    for _ in 0..2 {
        let v = vars(&reach);
        let f: Vec<Interval> = spec.dynamics.iter().map(|e| e.eval_interval(&v)).collect();
        reach = hull.iter().zip(&f).map(|(h, fi)| *h + t * *fi).collect();
        if reach.iter().any(|i| i.is_undefined() || !i.is_bounded()) {
            return vec![part];
        }
    }
    let v = vars(&reach);
    for (g, gdot) in kinks {
        let gr = g.eval_interval(&v);
        if !(gr.lo() < 0.0 && gr.hi() > 0.0) {
            continue;
        }
        // How fast g moves at the start (over the reach box the contact force itself
        // would make the estimate useless).
        let rate = gdot.eval_interval(&vars(&hull)).mag();
        if !(rate > 0.0 && rate.is_finite()) {
            continue;
        }
        let form = part.set.eval_affine(g);
        let Some(range) = part.bounder().range(&form) else { return vec![part] };
        let thickness = rate * spec.period / 4.0;
        let k = ((range.width() / thickness).ceil() as usize).clamp(1, 8);
        if k == 1 || form.is_undefined() {
            return vec![part];
        }
        let step = range.width() / k as f64;
        let mut slices = Vec::new();
        for i in 0..k {
            let mut extra = Vec::new();
            if i > 0 {
                extra.extend(above(&form, range.lo() + step * i as f64));
            }
            if i + 1 < k {
                extra.extend(below(&form, range.lo() + step * (i + 1) as f64));
            }
            if let Some(p) = part.restricted(extra) {
                slices.push(p);
            }
        }
        return slices;
    }
    vec![part]
}

/// The star itself, or when its zonotope's box is more than 1.5 times as wide as the
/// constrained set in some state, [`Star::template_hull`] of it.
fn compact(star: Star, next_symbol: &mut usize) -> Star {
    if star.cons.is_empty() {
        return star;
    }
    let Some(hull) = star.hull() else { return star };
    let zbox = star.set.to_box();
    if zbox.iter().zip(&hull).all(|(z, h)| z.width() <= 1.5 * h.width() + 1e-12) {
        return star;
    }
    let c = Star::template_hull(std::slice::from_ref(&star), next_symbol);
    *next_symbol = (*next_symbol).max(c.set.num_symbols());
    c
}

/// The commands the controller may pick on a branch, each with the part of the branch's
/// set where it may be picked (a sound enclosure of that part).
fn decide(cl: &ClosedLoop, opts: &EngineOptions, br: &Branch, noise_base: usize, next_symbol: &mut usize) -> Vec<(usize, Star)> {
    let spec = &cl.spec;
    let methods: &[BoundsMethod] = match opts.bounds {
        BoundsMethod::Portfolio => &[BoundsMethod::Interval, BoundsMethod::Symbolic],
        BoundsMethod::Interval => &[BoundsMethod::Interval],
        BoundsMethod::Symbolic => &[BoundsMethod::Symbolic],
    };
    if opts.set == SetKind::Constrained {
        return decide_sliced(cl, opts, br, methods, noise_base, next_symbol);
    }
    let set = &br.set.set;
    let obs_forms: Vec<_> = spec.observations.iter().map(|o| set.eval_affine(&o.expr)).collect();
    let obs: Vec<Interval> = obs_forms.iter().zip(&spec.observations).map(|(f, o)| f.range() + o.noise).collect();
    let input = cl.network_input(&obs);
    let mut choices = Vec::new();
    for m in methods {
        let b = match opts.set {
            SetKind::Box => cl.bound_outputs(br.prev, &input, *m),
            _ => cl.bound_outputs_affine(br.prev, &obs_forms, *m),
        };
        choices = possible_commands(&b, spec.decision);
        if choices.len() == 1 {
            break;
        }
    }
    // Each possible command keeps only the part of the set where it may be chosen (a
    // box hull of the pieces that allow it), so a branch does not carry states that
    // would have decided otherwise.
    restrict_to_decisions(cl, opts, set, br.prev, &choices).into_iter().map(|(c, s)| (c, Star::from_set(s))).collect()
}

/// The decision on a constrained set, sliced where it stays open: while some piece
/// leaves more than one command possible and the piece budget allows, the piece is cut
/// in two along the symbol that moves the open score differences most (constraints
/// `ε_s ≤ mid` and `ε_s ≥ mid`, which together keep every point), and decided again on
/// each half, where the network's linear bounds are tighter. The pieces of one command
/// are then enclosed together ([`Star::template_hull`]).
fn decide_sliced(cl: &ClosedLoop, opts: &EngineOptions, br: &Branch, methods: &[BoundsMethod], noise_base: usize, next_symbol: &mut usize) -> Vec<(usize, Star)> {
    let budget = opts.decision_pieces.max(1) as usize;
    let decide_one = |star: &Star| {
        let mut d = cl.decide_on_star(br.prev, star, methods[0], noise_base, opts.slope_steps);
        for m in &methods[1..] {
            if d.parts.len() <= 1 {
                break;
            }
            d = cl.decide_on_star(br.prev, star, *m, noise_base, opts.slope_steps);
        }
        d
    };
    let mut open: Vec<(Star, super::closed_loop::StarDecision)> = vec![(br.set.clone(), decide_one(&br.set))];
    let mut done: Vec<(usize, Star)> = Vec::new();
    let mut pieces = 1;
    // Best first: the piece whose open decision moves most with its symbols.
    let weight = |d: &super::closed_loop::StarDecision| d.sensitivity.iter().map(|p| p.1).fold(0.0, f64::max);
    while let Some(k) = (0..open.len()).max_by(|&a, &b| weight(&open[a].1).total_cmp(&weight(&open[b].1))) {
        let (star, d) = open.swap_remove(k);
        let splittable = d.parts.len() > 1 && pieces < budget;
        let best = d.sensitivity.iter().copied().filter(|p| p.1 > 0.0).max_by(|a, b| a.1.total_cmp(&b.1));
        let (true, Some((sym, _))) = (splittable, best) else {
            done.extend(d.parts);
            continue;
        };
        // The symbol's range under the constraints, cut at its midpoint.
        let range = star.bounder().range(&Affine::symbol(0.0, sym, 1.0));
        let Some(range) = range else { continue }; // empty piece
        let mid = range.mid().clamp(-1.0, 1.0);
        pieces += 1;
        for (coef, rhs) in [(1.0, mid), (-1.0, -mid)] {
            if let Some(half) = star.restricted(vec![super::star::Halfspace::new(vec![(sym, coef)], rhs)]) {
                let dh = decide_one(&half);
                open.push((half, dh));
            }
        }
    }
    // One part per command.
    let mut by_command: Vec<(usize, Vec<Star>)> = Vec::new();
    for (c, s) in done {
        match by_command.iter_mut().find(|p| p.0 == c) {
            Some(p) => p.1.push(s),
            None => by_command.push((c, vec![s])),
        }
    }
    by_command
        .into_iter()
        .map(|(c, stars)| if stars.len() == 1 { (c, stars.into_iter().next().unwrap()) } else { (c, Star::template_hull(&stars, next_symbol)) })
        .collect()
}

/// Commands possible over a box of states (observations evaluated as affine forms),
/// and how strongly the network's inputs move with each state over the box: the sum
/// over observations of |∂obs/∂x_d| · rad(x_d) / scale (the coefficient of the piece's
/// symbol d). Bisecting the dimension with the largest value cuts the decision's
/// input range the most.
fn choices_on_box(cl: &ClosedLoop, b: &[Interval], prev: usize) -> (Vec<usize>, Vec<f64>) {
    let spec = &cl.spec;
    // Observations as affine forms over the piece (one symbol per state), so the
    // network bounds see how the observations move together.
    let piece = StateSet::from_box(b);
    let forms: Vec<Affine> = spec.observations.iter().map(|o| piece.eval_affine(&o.expr)).collect();
    let bounds = cl.bound_outputs_affine(prev, &forms, BoundsMethod::Symbolic);
    let sensitivity = (0..b.len())
        .map(|d| forms.iter().enumerate().map(|(j, f)| (f.coeff(d) / spec.scale[j]).abs()).sum::<f64>())
        .collect();
    (possible_commands(&bounds, spec.decision), sensitivity)
}

/// For each command in `choices`, the part of `set` on which it may be chosen. When a
/// command may be chosen everywhere it keeps the whole set (affine dependencies
/// intact); otherwise it gets the box hull of the pieces that allow it, with fresh
/// symbols. Sound: every state of the set lies in a piece, and in that piece every
/// command the controller could pick is listed by the piece's bounds.
fn restrict_to_decisions(cl: &ClosedLoop, opts: &EngineOptions, set: &StateSet, prev: usize, choices: &[usize]) -> Vec<(usize, StateSet)> {
    if choices.len() <= 1 {
        return choices.iter().map(|&c| (c, set.clone())).collect();
    }
    let hull = set.to_box();
    if hull.iter().any(|i| !i.is_bounded()) {
        return choices.iter().map(|&c| (c, set.clone())).collect();
    }
    // Bisect ambiguous pieces up to the limit, each along the state the option names:
    // the one the network's inputs are most sensitive to over the piece, or the widest
    // relative to the hull. Neither wins everywhere (see BENCHMARKS.md).
    let (_, first_sens) = choices_on_box(cl, &hull, prev);
    let mut pieces: Vec<(Vec<Interval>, Vec<usize>, Vec<f64>)> = vec![(hull.clone(), choices.to_vec(), first_sens)];
    while pieces.len() < opts.decision_pieces as usize {
        let Some(k) = pieces.iter().position(|(_, ch, _)| ch.len() > 1) else { break };
        let (b, _, sens) = pieces.swap_remove(k);
        let score = |i: usize| match opts.decision_split {
            DecisionSplit::Sensitivity => sens[i],
            DecisionSplit::Widest if hull[i].width() > 0.0 => b[i].width() / hull[i].width(),
            DecisionSplit::Widest => 0.0,
        };
        let d = (0..b.len())
            .filter(|&i| b[i].width() > 0.0)
            .max_by(|&i, &j| score(i).partial_cmp(&score(j)).unwrap_or(std::cmp::Ordering::Equal))
            .unwrap_or(0);
        if !(b[d].width() > 0.0) || !(score(d) > 0.0) {
            pieces.push((b, choices.to_vec(), sens));
            break;
        }
        let (lo, hi) = b[d].bisect();
        for half in [lo, hi] {
            let mut nb = b.clone();
            nb[d] = half;
            // A piece never allows more than its parent: intersect with the choices.
            let (ch, s) = choices_on_box(cl, &nb, prev);
            let ch: Vec<usize> = ch.into_iter().filter(|c| choices.contains(c)).collect();
            pieces.push((nb, ch, s));
        }
    }
    choices
        .iter()
        .filter_map(|&c| {
            let mine: Vec<&Vec<Interval>> = pieces.iter().filter(|(_, ch, _)| ch.contains(&c)).map(|(b, _, _)| b).collect();
            if mine.is_empty() {
                return None; // ruled out on every piece
            }
            if mine.len() == pieces.len() {
                return Some((c, set.clone()));
            }
            let mut h = mine[0].clone();
            for b in &mine[1..] {
                for (x, y) in h.iter_mut().zip(b.iter()) {
                    *x = x.hull(y);
                }
            }
            Some((c, restrict_to_box(set, &h)?))
        })
        .collect()
}

/// A sound enclosure of `set ∩ b`, or `None` when they provably do not meet. The
/// zonotope is contracted first (noise symbols narrowed where a component must stay
/// in `b`), which keeps its dependencies; when the contracted set is still wider than
/// `b` in some state, the box `b` itself (on fresh symbols) is used instead. Keeping a
/// contracted set up to twice the volume of `b` (the earlier rule) proved 3 of 128
/// lander cells at depth 7 against 7 with this rule, and changed nothing on the rover
/// (12 of 256 at depth 8 either way).
fn restrict_to_box(set: &StateSet, b: &[Interval]) -> Option<StateSet> {
    let contracted = set.contract_to_box(b, &|_| true)?;
    let fits = contracted.to_box().iter().zip(b).all(|(c, h)| c.width() <= h.width());
    if fits {
        Some(contracted)
    } else {
        Some(boxed_with_fresh_symbols(set, b))
    }
}

/// The box `b` as a set in the symbol space of `like`, on fresh symbols (the initial
/// symbols keep their meaning; this set no longer depends on them).
fn boxed_with_fresh_symbols(like: &StateSet, b: &[Interval]) -> StateSet {
    let mut s = like.clone();
    let comps: Vec<Affine> = b
        .iter()
        .map(|iv| {
            let sym = s.fresh_symbol();
            match super::affine::mid_rad(*iv) {
                Some((m, r)) => Affine::symbol(m, sym, r),
                None => Affine::undefined(),
            }
        })
        .collect();
    StateSet::from_forms(comps, s.num_symbols(), like.num_initial())
}

/// Check every tube piece against every unsafe region; a failure names the first
/// region that could not be excluded and the state the split should cut.
fn check_tube(
    cl: &ClosedLoop,
    cell: &[Interval],
    flow: &super::plant::PeriodFlow,
    cons: &[super::star::Halfspace],
    bounder: &Bounder,
    k: u32,
    applied: usize,
) -> Option<Failure> {
    let spec = &cl.spec;
    for piece in &flow.tube {
        for (r, conj) in spec.unsafe_set.iter().enumerate() {
            // The region is excluded when one of its constraints g ≤ 0 provably fails
            // (g > 0) over the piece. Interval evaluation on the hull first (cheap),
            // then affine evaluation (keeps dependencies), then the affine form's
            // bound under the branch's constraints, and finally all of the region's
            // constraints at once: with `g_j ≤ 0` added as linear constraints
            // (`a·ε ≤ −c + e` from g_j's affine form), an empty set means no point of
            // the piece meets every one of them.
            let excluded = conj.iter().any(|c| c.g.eval_interval(&piece.hull).lo() > 0.0)
                || conj.iter().any(|c| piece.enclosure.eval_affine(&c.g).range().lo() > 0.0)
                || conj.iter().any(|c| bounder.lower(&piece.enclosure.eval_affine(&c.g)) > 0.0)
                || (conj.len() > 1 && {
                    let extra: Option<Vec<super::star::Halfspace>> = conj.iter().map(|c| below(&piece.enclosure.eval_affine(&c.g), 0.0)).collect();
                    extra.is_some_and(|extra| Star { set: piece.enclosure.clone(), cons: cons.to_vec() }.restricted(extra).is_none())
                });
            if excluded {
                continue;
            }
            // Blocking quantity: the constraint of the region closest to being excluded.
            let forms: Vec<_> = conj.iter().map(|c| piece.enclosure.eval_affine(&c.g)).collect();
            let best = forms
                .iter()
                .enumerate()
                .max_by(|a, b| a.1.range().lo().partial_cmp(&b.1.range().lo()).unwrap_or(std::cmp::Ordering::Equal))
                .map(|(i, _)| i)
                .unwrap_or(0);
            let form = &forms[best];
            let hint = hint_from_coeffs(cl, cell, |d| form.coeff(d));
            // The initial point whose image the blocking constraint is lowest at: move
            // each initial symbol to the sign that decreases g.
            let suspect: Vec<f64> = (0..spec.states.len())
                .map(|d| {
                    let c = form.coeff(d);
                    let x = cell[d];
                    if c > 0.0 {
                        x.lo()
                    } else if c < 0.0 {
                        x.hi()
                    } else {
                        x.mid()
                    }
                })
                .collect();
            return Some(Failure {
                reason: Reason::UnsafeNotExcluded,
                detail: format!(
                    "unsafe region {r} ({}) not excluded in period {k} at t ∈ [{:.4}, {:.4}] s under command '{}'",
                    conj.iter().map(|c| c.text.as_str()).collect::<Vec<_>>().join(" and "),
                    k as f64 * spec.period + piece.t.lo(),
                    k as f64 * spec.period + piece.t.hi(),
                    spec.commands[applied].name
                ),
                split_hint: hint,
                suspect: Some(suspect),
            });
        }
    }
    None
}

/// Bound the number of branches. Plain sets (box and affine modes) are joined per
/// previous command into one set each by [`StateSet::join`], which keeps dependencies but
/// over-approximates the union by about the sum of the sets' widths when they share few
/// symbols; when its box is clearly wider than the box hull of the union, the box hull
/// (on fresh symbols) is taken instead.
///
/// Constrained sets are grouped by what their future depends on (the network selected
/// next, and with latency 1 the previous command itself; the group keeps its first
/// member's previous command, which is sound because nothing else depends on it), and a
/// group larger than `join_above` is cut into `join_above` slabs along the state in which
/// it is widest (relative to the envelope): the members whose centres fall in one slab
/// are enclosed together by [`Star::template_hull`]. Slabs keep the pieces local, so a
/// curved or slanted set stays covered by small, tight pieces. All of it is sound.
fn join_branches(cl: &ClosedLoop, opts: &EngineOptions, cell: &[Interval], branches: Vec<Branch>, max_gens: usize, max_cons: usize, next_symbol: &mut usize) -> Vec<Branch> {
    let spec = &cl.spec;
    let budget = opts.join_above.max(1) as usize;
    let constrained = opts.set == SetKind::Constrained;
    let key = |prev: usize| if constrained { future_key(cl, prev) } else { (spec.network_of_command[prev], prev) };
    let mut groups: Vec<Vec<Branch>> = Vec::new();
    for b in branches {
        match groups.iter_mut().find(|g| key(g[0].prev) == key(b.prev)) {
            Some(g) => g.push(b),
            None => groups.push(vec![b]),
        }
    }
    let mut out = Vec::new();
    for mut g in groups {
        if g.len() == 1 {
            out.push(g.pop().unwrap());
            continue;
        }
        let prev = g[0].prev;
        if !constrained {
            out.push(Branch { set: Star::from_set(join_plain(g.iter().map(|b| &b.set.set).collect(), max_gens)), prev, came_by: vec![prev], shape: None });
            continue;
        }
        if g.len() <= budget {
            out.extend(g);
            continue;
        }
        // A grid over the group's states, one grid cell per piece: start from the
        // cell's own widths and coarsen the most divided state until the grid cells the
        // members' hulls overlap fit the budget. Members are cut at grid lines (a cut
        // adds the constraints `x_d ≤ t` and `x_d ≥ t`, keeping every point), and the
        // pieces that fall in one grid cell are enclosed together.
        let hulls: Vec<Vec<Interval>> = g.iter().map(|b| b.set.hull().unwrap_or_else(|| b.set.set.to_box())).collect();
        let n = spec.states.len();
        let union: Vec<Interval> = (0..n).map(|i| hulls.iter().map(|h| h[i]).reduce(|a, b| a.hull(&b)).unwrap()).collect();
        let mut step: Vec<f64> = (0..n).map(|i| if cell[i].width() > 0.0 { cell[i].width() } else { f64::INFINITY }).collect();
        let slots_of = |step: &[f64], h: &[Interval]| -> Vec<(i64, i64)> {
            (0..n)
                .map(|i| {
                    if step[i].is_finite() && h[i].is_bounded() && !h[i].is_undefined() {
                        (((h[i].lo() - union[i].lo()) / step[i]).floor() as i64, ((h[i].hi() - union[i].lo()) / step[i]).floor() as i64)
                    } else {
                        (0, 0)
                    }
                })
                .collect()
        };
        loop {
            let mut occupied: std::collections::BTreeSet<Vec<i64>> = std::collections::BTreeSet::new();
            for h in &hulls {
                let r = slots_of(&step, h);
                let mut idx: Vec<Vec<i64>> = vec![Vec::new()];
                for &(a, b) in &r {
                    idx = idx.into_iter().flat_map(|v| (a..=b.min(a + 64)).map(move |t| { let mut w = v.clone(); w.push(t); w })).collect();
                    if idx.len() > 4 * budget {
                        break;
                    }
                }
                occupied.extend(idx);
                if occupied.len() > budget {
                    break;
                }
            }
            if occupied.len() <= budget || !step.iter().any(|s| s.is_finite()) {
                break;
            }
            let d = (0..n).filter(|&i| step[i].is_finite()).max_by(|&a, &b| (union[a].width() / step[a]).total_cmp(&(union[b].width() / step[b]))).unwrap_or(0);
            step[d] *= 2.0;
        }
        // Cut the members at the grid lines they cross.
        let mut pieces: Vec<(Vec<i64>, Vec<Star>, Vec<usize>)> = Vec::new();
        for (b, h) in g.into_iter().zip(&hulls) {
            let came_by = b.came_by;
            let mut parts = vec![b.set];
            for (d, &(a, z)) in slots_of(&step, h).iter().enumerate() {
                if z <= a {
                    continue;
                }
                let mut cut = Vec::new();
                for part in parts {
                    let form = part.set.components()[d].clone();
                    for t in a..=z {
                        let lo = union[d].lo() + step[d] * t as f64;
                        let hi = union[d].lo() + step[d] * (t + 1) as f64;
                        let mut extra = Vec::new();
                        if t > a {
                            extra.push(above(&form, lo));
                        }
                        if t < z {
                            extra.push(below(&form, hi));
                        }
                        if let Some(p) = part.restricted(extra.into_iter().flatten().collect()) {
                            cut.push(p);
                        }
                    }
                }
                parts = cut;
            }
            for part in parts {
                let ph = part.hull().unwrap_or_else(|| part.set.to_box());
                let key: Vec<i64> = slots_of(&step, &ph).iter().map(|&(a, z)| (a + z).div_euclid(2)).collect();
                match pieces.iter_mut().find(|p| p.0 == key) {
                    Some(p) => {
                        p.1.push(part);
                        for &c in &came_by {
                            if !p.2.contains(&c) {
                                p.2.push(c);
                            }
                        }
                    }
                    None => pieces.push((key, vec![part], came_by.clone())),
                }
            }
        }
        for (_, piece, came_by) in pieces {
            let (set, shape) = if piece.len() == 1 {
                (piece.into_iter().next().unwrap(), None)
            } else {
                let (mut joined, shape) = Star::template_hull_described(&piece, next_symbol);
                joined.reduce(max_gens, max_cons);
                (joined, shape)
            };
            *next_symbol = (*next_symbol).max(set.set.num_symbols());
            out.push(Branch { set, prev, came_by, shape });
        }
    }
    out
}

/// What the rest of the tree needs of a branch's previous command: the network it
/// selects, and with latency 1 the command itself (it is applied in the next period).
fn future_key(cl: &ClosedLoop, prev: usize) -> (usize, usize) {
    let spec = &cl.spec;
    (spec.network_of_command[prev], if spec.latency == 0 { usize::MAX } else { prev })
}

/// The constraint `form ≤ t` on the form's symbols (`None` when the form is undefined):
/// `Σ g·ε ≤ t − c + e`, rounded up.
fn below(form: &Affine, t: f64) -> Option<super::star::Halfspace> {
    if form.is_undefined() {
        return None;
    }
    let rhs = (Interval::point(t) - Interval::point(form.center()) + Interval::point(form.err())).hi();
    Some(super::star::Halfspace::new(form.terms().to_vec(), rhs))
}

/// The constraint `form ≥ t`.
fn above(form: &Affine, t: f64) -> Option<super::star::Halfspace> {
    below(&form.neg(), -t)
}

/// [`StateSet::join`] of several sets, or the box hull of their union on fresh symbols
/// when the join's box is clearly wider than that hull.
fn join_plain(sets: Vec<&StateSet>, max_gens: usize) -> StateSet {
    let hull = sets.iter().map(|s| s.to_box()).reduce(|a, b| a.iter().zip(&b).map(|(x, y)| x.hull(y)).collect()).unwrap();
    let mut joined = sets[0].clone();
    for s in &sets[1..] {
        joined = joined.join(s);
        joined.reduce(max_gens);
    }
    let jbox = joined.to_box();
    let too_wide = jbox.iter().zip(&hull).any(|(j, h)| j.width() > 1.1 * h.width() + 1e-12);
    if too_wide {
        boxed_with_fresh_symbols(sets[0], &hull)
    } else {
        joined
    }
}
