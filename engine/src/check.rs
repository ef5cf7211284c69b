//! One cell, start to finish: the proof attempt, then (if it fails) the falsifier, and
//! the verdict. "Safe" only from a completed proof, "unsafe" only with a re-checked
//! counterexample, "inconclusive" otherwise.

use super::closed_loop::ClosedLoop;
use super::exact::{self, Outcome};
use super::falsify;
use super::interval::Interval;
use super::reach::{self, Proof};
use super::spec::{BoundsMethod, EngineOptions, Method, SetKind};
use super::verdict::{Reason, Stats, Verdict, VerdictKind, ENGINE_VERSION};
use std::time::{Duration, Instant};

/// Decide one cell (a box of initial states, one interval per state), by the method the
/// spec pins (`engine.method`); `auto` is the set methods today.
pub fn check_cell(cl: &ClosedLoop, cell: &[Interval]) -> Verdict {
    if cl.spec.engine.method == Method::Exact {
        return check_exact(cl, cell);
    }
    let started = Instant::now();
    let mut stats = Stats::default();
    let outcome = prove_by_choice(cl, cell, started, &mut stats);
    let mut verdict = match outcome {
        Proof::Safe => bare(VerdictKind::Safe),
        Proof::Failed(f) => {
            let t_f = Instant::now();
            let mut sims = 0;
            let cx = falsify::falsify(
                cl,
                cell,
                f.suspect.as_deref(),
                cl.spec.engine.falsify_samples,
                seed_of(cell),
                &mut sims,
            );
            stats.falsify_ms += t_f.elapsed().as_secs_f64() * 1e3;
            stats.simulations = sims;
            match cx {
                Some(cx) => Verdict {
                    detail: Some(format!(
                        "counterexample enters unsafe region {} at t = {:.4} s",
                        cx.unsafe_region, cx.entry_time
                    )),
                    counterexample: Some(cx),
                    ..bare(VerdictKind::Unsafe)
                },
                None => Verdict {
                    reason: Some(f.reason),
                    detail: Some(f.detail),
                    split_hint: Some(f.split_hint.unwrap_or_else(|| reach::widest_normalized(cl, cell))),
                    ..bare(VerdictKind::Inconclusive)
                },
            }
        }
    };
    stats.wall_ms = started.elapsed().as_secs_f64() * 1e3;
    verdict.stats = stats;
    verdict
}

/// The exact method ([`exact`]): "safe" from the solver's infeasibility claim on the
/// widened program (the verdict's `stats.method` is `exact` and its detail says so) or
/// from the method's zonotope bounds alone (`stats.method` `zonotope`); "unsafe" only
/// with a re-checked counterexample. When it decides nothing, the falsifier still runs.
pub fn check_exact(cl: &ClosedLoop, cell: &[Interval]) -> Verdict {
    let started = Instant::now();
    let deadline = started + Duration::from_secs_f64(cl.spec.engine.time_budget_s);
    let mut stats = Stats { method: Some("exact".into()), ..Stats::default() };
    let report = match exact::prepare(cl) {
        Ok(p) => exact::decide(cl, &p, cell, deadline),
        Err(why) => exact::Report {
            outcome: Outcome::Inconclusive(format!("the exact method does not apply: {why}")),
            programs: 0,
            max_binaries: 0,
            solver_ms: 0.0,
        },
    };
    stats.solver_ms = report.solver_ms;
    stats.milp_programs = report.programs;
    stats.milp_binaries = report.max_binaries as u64;
    let mut verdict = match report.outcome {
        Outcome::Safe { solver_needed: true } => Verdict {
            detail: Some(format!(
                "exact method: the MILP solver found no trajectory from the cell into the unsafe set over the \
                 horizon (program widened by a relative margin of {:e}); this verdict rests on the solver's \
                 floating-point infeasibility claim, not on outward-rounded set arithmetic",
                exact::MARGIN
            )),
            ..bare(VerdictKind::Safe)
        },
        Outcome::Safe { solver_needed: false } => {
            stats.method = Some("zonotope".into());
            Verdict {
                detail: Some("exact method's zonotope bounds (outward rounded) keep every sample step out of the unsafe set; no solver was needed".into()),
                ..bare(VerdictKind::Safe)
            }
        }
        Outcome::Unsafe(cx) => Verdict {
            detail: Some(format!(
                "counterexample (found by the exact method, re-checked) enters unsafe region {} at t = {:.4} s",
                cx.unsafe_region, cx.entry_time
            )),
            counterexample: Some(*cx),
            ..bare(VerdictKind::Unsafe)
        },
        Outcome::Inconclusive(why) => {
            let t_f = Instant::now();
            let mut sims = 0;
            let cx = falsify::falsify(cl, cell, None, cl.spec.engine.falsify_samples, seed_of(cell), &mut sims);
            stats.falsify_ms += t_f.elapsed().as_secs_f64() * 1e3;
            stats.simulations = sims;
            match cx {
                Some(cx) => Verdict {
                    detail: Some(format!(
                        "counterexample enters unsafe region {} at t = {:.4} s ({why})",
                        cx.unsafe_region, cx.entry_time
                    )),
                    counterexample: Some(cx),
                    ..bare(VerdictKind::Unsafe)
                },
                None => Verdict {
                    reason: Some(if Instant::now() >= deadline { Reason::TimeBudget } else { Reason::UnsafeNotExcluded }),
                    detail: Some(why),
                    split_hint: Some(reach::widest_normalized(cl, cell)),
                    ..bare(VerdictKind::Inconclusive)
                },
            }
        }
    };
    stats.wall_ms = started.elapsed().as_secs_f64() * 1e3;
    verdict.stats = stats;
    verdict
}

/// The proof attempt with the method chosen per cell. With constrained sets and
/// `cheap_first`, boxes with interval network bounds go first (milliseconds): when they
/// prove the cell, that is the answer. Otherwise the constrained sets try, unless the
/// boxes failed before `PROBE_REACH` of the horizon: on the demo scenarios no cell was
/// proven with constrained sets whose box attempt failed that early (lander at depth 8:
/// none below 13 of 20 periods; aisle at depth 9: none below 8 of 17), and such cells
/// are better cut by the campaign. The verdict's stats keep both attempts' times and the
/// method that decided.
fn prove_by_choice(cl: &ClosedLoop, cell: &[Interval], started: Instant, stats: &mut Stats) -> Proof {
    let opts = &cl.spec.engine;
    if opts.set != SetKind::Constrained || !opts.cheap_first {
        stats.method = Some(format!("{:?}", opts.set).to_lowercase());
        return reach::prove(cl, cell, started, stats);
    }
    let probe = EngineOptions { set: SetKind::Box, bounds: BoundsMethod::Interval, decision_pieces: 4, ..opts.clone() };
    let mut probe_stats = Stats::default();
    let t_probe = Instant::now();
    let outcome = reach::prove_with(cl, &probe, cell, started, &mut probe_stats, None);
    stats.probe_ms = t_probe.elapsed().as_secs_f64() * 1e3;
    stats.plant_ms += probe_stats.plant_ms;
    stats.network_ms += probe_stats.network_ms;
    let early = (probe_stats.periods_reached as f64) < PROBE_REACH * cl.spec.horizon as f64;
    if matches!(outcome, Proof::Safe) || early {
        stats.method = Some("box".into());
        stats.tree_nodes = probe_stats.tree_nodes;
        stats.periods_reached = probe_stats.periods_reached;
        stats.max_branches = probe_stats.max_branches;
        return outcome;
    }
    stats.method = Some("constrained".into());
    reach::prove(cl, cell, started, stats)
}

/// Share of the horizon the box attempt must reach before constrained sets are tried.
const PROBE_REACH: f64 = 0.4;

/// A verdict of this kind with nothing else filled in yet.
fn bare(kind: VerdictKind) -> Verdict {
    Verdict {
        verdict: kind,
        reason: None,
        detail: None,
        split_hint: None,
        counterexample: None,
        stats: Stats::default(),
        engine_version: ENGINE_VERSION.to_string(),
    }
}

/// A seed derived from the cell, so the same cell always gets the same verdict.
fn seed_of(cell: &[Interval]) -> u64 {
    cell.iter().fold(0x5EED_u64, |h, i| {
        (h ^ i.lo().to_bits()).wrapping_mul(0x100000001B3) ^ i.hi().to_bits().rotate_left(17)
    })
}
