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
use super::spec::{BoundsMethod, DecisionSplit, SetKind};
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
    set: StateSet,
    /// The command decided in the previous period (c_{k−1}).
    prev: usize,
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
/// (k+1)·T as boxes, with the command decided in period k (the branch's `prev`).
#[derive(Default, Debug)]
pub struct Trace {
    pub periods: Vec<Vec<(usize, Vec<Interval>)>>,
}

/// Attempt to prove the cell safe. Timing and tree statistics go into `stats`.
pub fn prove(cl: &ClosedLoop, cell: &[Interval], started: Instant, stats: &mut Stats) -> Proof {
    prove_traced(cl, cell, started, stats, None)
}

/// [`prove`], recording every branch's set at the end of every period into `trace`.
pub fn prove_traced(
    cl: &ClosedLoop,
    cell: &[Interval],
    started: Instant,
    stats: &mut Stats,
    mut trace: Option<&mut Trace>,
) -> Proof {
    let spec = &cl.spec;
    let opts = &spec.engine;
    let n = spec.states.len();
    let max_gens = (opts.generators_per_dim as usize) * n;
    let mut frontier: Vec<Branch> = spec
        .initial_commands
        .iter()
        .map(|&c| Branch { set: StateSet::from_box(cell), prev: c })
        .collect();
    // Sensitivity of the observations that left a decision open (for the node budget).
    let mut ambiguity_hint: Option<SplitHint> = None;

    for k in 0..spec.horizon {
        let mut next: Vec<Branch> = Vec::new();
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

            // The decision: bound the network over the observation enclosure.
            let t_net = Instant::now();
            let obs_forms: Vec<_> = spec.observations.iter().map(|o| br.set.eval_affine(&o.expr)).collect();
            let obs: Vec<Interval> =
                obs_forms.iter().zip(&spec.observations).map(|(f, o)| f.range() + o.noise).collect();
            let input = cl.network_input(&obs);
            let mut choices = Vec::new();
            let methods: &[BoundsMethod] = match opts.bounds {
                BoundsMethod::Portfolio => &[BoundsMethod::Interval, BoundsMethod::Symbolic],
                BoundsMethod::Interval => &[BoundsMethod::Interval],
                BoundsMethod::Symbolic => &[BoundsMethod::Symbolic],
            };
            for m in methods {
                let b = match opts.set {
                    SetKind::Affine => cl.bound_outputs_affine(br.prev, &obs_forms, *m),
                    SetKind::Box => cl.bound_outputs(br.prev, &input, *m),
                };
                choices = possible_commands(&b, spec.decision);
                if choices.len() == 1 {
                    break;
                }
            }
            stats.network_ms += t_net.elapsed().as_secs_f64() * 1e3;
            if choices.len() > 1 && ambiguity_hint.is_none() {
                ambiguity_hint = hint_from_coeffs(cl, cell, |d| {
                    obs_forms.iter().enumerate().map(|(j, f)| f.coeff(d) / spec.scale[j]).map(f64::abs).sum()
                });
            }

            // Each possible command keeps only the part of the set where it may be
            // chosen (a box hull of the pieces that allow it), so a branch does not
            // carry states that would have decided otherwise.
            let t_net = Instant::now();
            let parts = restrict_to_decisions(cl, &br.set, br.prev, &choices);
            stats.network_ms += t_net.elapsed().as_secs_f64() * 1e3;

            // One child per possible command.
            for (c, part) in parts {
                let applied = cl.applied(c, br.prev);
                {
                    let t_plant = Instant::now();
                    let flow = cl.plant.integrate_period(
                        &part,
                        &spec.commands[applied].inputs,
                        &spec.disturbance_ranges,
                        spec.period,
                        opts,
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
                    if let Some(f) = check_tube(cl, cell, &flow, k, applied) {
                        return Proof::Failed(f);
                    }
                let mut set = match opts.set {
                    SetKind::Affine => flow.end.clone(),
                    SetKind::Box => StateSet::from_box(&flow.end.to_box()),
                };
                set.reduce(max_gens);
                next.push(Branch { set, prev: c });
                }
            }
        }
        // Keep the width bounded: join branches that share their previous command.
        if next.len() > opts.join_above as usize {
            next = join_by_command(next, max_gens);
        }
        stats.max_branches = stats.max_branches.max(next.len() as u64);
        if let Some(t) = trace.as_deref_mut() {
            t.periods.push(next.iter().map(|b| (b.prev, b.set.to_box())).collect());
        }
        frontier = next;
        stats.periods_reached = k + 1;
    }
    Proof::Safe
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
fn restrict_to_decisions(cl: &ClosedLoop, set: &StateSet, prev: usize, choices: &[usize]) -> Vec<(usize, StateSet)> {
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
    while pieces.len() < cl.spec.engine.decision_pieces as usize {
        let Some(k) = pieces.iter().position(|(_, ch, _)| ch.len() > 1) else { break };
        let (b, _, sens) = pieces.swap_remove(k);
        let score = |i: usize| match cl.spec.engine.decision_split {
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
    let contracted = contract_to_box(set, b)?;
    let fits = contracted.to_box().iter().zip(b).all(|(c, h)| c.width() <= h.width());
    if fits {
        Some(contracted)
    } else {
        Some(boxed_with_fresh_symbols(set, b))
    }
}

/// Narrow noise symbols so that the set keeps only points whose components may lie in
/// `b`: for component i = c + g·ε_k + rest, with |rest| ≤ ρ, the constraint
/// a ≤ x_i ≤ b forces ε_k ∈ [(a − c − ρ)/g, (b − c + ρ)/g] ∩ [−1, 1]; the symbol is
/// then re-parametrised as ε_k = m + r·ε′ in every component (rounding into the error
/// radii). Only points outside `b` are removed, so the result encloses `set ∩ b`.
fn contract_to_box(set: &StateSet, b: &[Interval]) -> Option<StateSet> {
    let mut comps: Vec<Affine> = set.components().to_vec();
    for _round in 0..2 {
        for i in 0..comps.len() {
            let x = &comps[i];
            if x.is_undefined() || x.range().subset_of(&b[i]) {
                continue;
            }
            let Some(&(k, g)) = x.terms().iter().max_by(|p, q| p.1.abs().partial_cmp(&q.1.abs()).unwrap_or(std::cmp::Ordering::Equal)) else {
                if x.range().intersect(&b[i]).is_none() {
                    return None;
                }
                continue;
            };
            // ρ: everything but the chosen term, rounded up.
            let rho = x.terms().iter().filter(|t| t.0 != k).fold(Interval::point(x.err()), |acc, t| acc + Interval::point(t.1.abs()));
            let rho = rho.hi();
            let c = Interval::point(x.center());
            let lo = Interval::point(b[i].lo()) - c - Interval::point(rho);
            let hi = Interval::point(b[i].hi()) - c + Interval::point(rho);
            let gi = Interval::point(g);
            let (e1, e2) = ((lo / gi), (hi / gi));
            let range = e1.hull(&e2);
            let Some(eps) = range.intersect(&Interval::new(-1.0, 1.0)) else {
                return None; // no point of the set has component i in b
            };
            if eps.width() > 1.9 {
                continue; // not worth a re-parametrisation
            }
            let m = Interval::point(eps.mid());
            let r = Interval::point(eps.rad());
            comps = comps.iter().map(|a| substitute(a, k, m, r)).collect();
        }
    }
    Some(StateSet::from_forms(comps, set.num_symbols(), set.num_initial()))
}

/// `a` with ε_k replaced by m + r·ε_k (m, r exact doubles standing for the interval
/// [m − r, m + r] ⊆ [−1, 1] the symbol is known to lie in).
fn substitute(a: &Affine, k: usize, m: Interval, r: Interval) -> Affine {
    let g = a.coeff(k);
    if g == 0.0 || a.is_undefined() {
        return a.clone();
    }
    let gi = Interval::point(g);
    let c = Interval::point(a.center()) + gi * m;
    let gk = gi * r;
    let mut err = Interval::point(a.err()) + Interval::point(c.rad()) + Interval::point(gk.rad());
    let terms: Vec<(usize, f64)> = a.terms().iter().map(|&(s, v)| if s == k { (s, gk.mid()) } else { (s, v) }).collect();
    err = err + Interval::ZERO; // keep the sum rounded up
    Affine::from_parts(c.mid(), &terms, err.hi())
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
    k: u32,
    applied: usize,
) -> Option<Failure> {
    let spec = &cl.spec;
    for piece in &flow.tube {
        for (r, conj) in spec.unsafe_set.iter().enumerate() {
            // The region is excluded when one of its constraints g ≤ 0 provably fails
            // (g > 0) over the piece. Interval evaluation on the hull first (cheap),
            // then affine evaluation (keeps dependencies).
            let excluded = conj.iter().any(|c| c.g.eval_interval(&piece.hull).lo() > 0.0)
                || conj.iter().any(|c| piece.enclosure.eval_affine(&c.g).range().lo() > 0.0);
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

/// Join branches with the same previous command into one set each. The zonotope join
/// keeps dependencies but over-approximates the union by about the sum of the sets'
/// widths when they share few symbols; when its box is clearly wider than the box hull
/// of the union, the box hull (on fresh symbols) is taken instead. Both are sound.
fn join_by_command(branches: Vec<Branch>, max_gens: usize) -> Vec<Branch> {
    let mut groups: Vec<Vec<Branch>> = Vec::new();
    for b in branches {
        match groups.iter_mut().find(|g| g[0].prev == b.prev) {
            Some(g) => g.push(b),
            None => groups.push(vec![b]),
        }
    }
    groups
        .into_iter()
        .map(|mut g| {
            if g.len() == 1 {
                return g.pop().unwrap();
            }
            let hull = g.iter().map(|b| b.set.to_box()).reduce(|a, b| a.iter().zip(&b).map(|(x, y)| x.hull(y)).collect()).unwrap();
            let mut joined = g[0].set.clone();
            for b in &g[1..] {
                joined = joined.join(&b.set);
                joined.reduce(max_gens);
            }
            let jbox = joined.to_box();
            let too_wide = jbox.iter().zip(&hull).any(|(j, h)| j.width() > 1.1 * h.width() + 1e-12);
            let set = if too_wide { boxed_with_fresh_symbols(&g[0].set, &hull) } else { joined };
            Branch { set, prev: g[0].prev }
        })
        .collect()
}
