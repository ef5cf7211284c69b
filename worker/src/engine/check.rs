//! One cell, start to finish: the proof attempt, then (if it fails) the falsifier, and
//! the verdict. "Safe" only from a completed proof, "unsafe" only with a re-checked
//! counterexample, "inconclusive" otherwise.

use super::closed_loop::ClosedLoop;
use super::falsify;
use super::interval::Interval;
use super::reach::{self, Proof};
use super::spec::{BoundsMethod, EngineOptions, SetKind};
use super::verdict::{Counterexample, Stats, Verdict, VerdictKind, ENGINE_VERSION};
use std::time::Instant;

/// Decide one cell (a box of initial states, one interval per state).
///
/// The method is chosen per cell. With constrained sets and `cheap_first`, boxes with
/// interval network bounds go first (milliseconds): when they prove the cell, that is
/// the answer. When they fail before `PROBE_REACH` of the horizon, the cell is likely to
/// hold unsafe starts, so the falsifier goes next and the constrained sets try only if it
/// finds nothing (on the lander and the aisle, cells whose box attempt fails that early
/// are mostly unsafe; on the heading keeper's 30 periods, boxes fail by period 10 on
/// cells that constrained sets prove). Otherwise the constrained sets try, and the
/// falsifier runs if they fail. The falsifier runs at most once per cell. The verdict's
/// stats keep every attempt's time and the method that decided.
pub fn check_cell(cl: &ClosedLoop, cell: &[Interval]) -> Verdict {
    let started = Instant::now();
    let mut stats = Stats::default();
    let opts = &cl.spec.engine;
    if opts.set != SetKind::Constrained || !opts.cheap_first {
        stats.method = Some(format!("{:?}", opts.set).to_lowercase());
        let outcome = reach::prove(cl, cell, started, &mut stats);
        return finish(cl, cell, outcome, true, started, stats);
    }
    let probe = EngineOptions { set: SetKind::Box, bounds: BoundsMethod::Interval, decision_pieces: 4, ..opts.clone() };
    let mut probe_stats = Stats::default();
    let t_probe = Instant::now();
    let outcome = reach::prove_with(cl, &probe, cell, started, &mut probe_stats, None);
    stats.probe_ms = t_probe.elapsed().as_secs_f64() * 1e3;
    stats.plant_ms += probe_stats.plant_ms;
    stats.network_ms += probe_stats.network_ms;
    let early = (probe_stats.periods_reached as f64) < PROBE_REACH * cl.spec.horizon as f64;
    let keep_probe = |stats: &mut Stats| {
        stats.method = Some("box".into());
        stats.tree_nodes = probe_stats.tree_nodes;
        stats.periods_reached = probe_stats.periods_reached;
        stats.max_branches = probe_stats.max_branches;
    };
    match outcome {
        Proof::Safe => {
            keep_probe(&mut stats);
            finish(cl, cell, Proof::Safe, false, started, stats)
        }
        Proof::Failed(f) if early => {
            if let Some(cx) = search(cl, cell, f.suspect.as_deref(), &mut stats) {
                keep_probe(&mut stats);
                return unsafe_verdict(cx, started, stats);
            }
            stats.method = Some("constrained".into());
            let outcome = reach::prove(cl, cell, started, &mut stats);
            finish(cl, cell, outcome, false, started, stats)
        }
        Proof::Failed(_) => {
            stats.method = Some("constrained".into());
            let outcome = reach::prove(cl, cell, started, &mut stats);
            finish(cl, cell, outcome, true, started, stats)
        }
    }
}

/// The verdict from a proof attempt's outcome: "safe" from a proof; otherwise, when
/// `falsify` holds, the falsifier's counterexample if it finds one; else "inconclusive"
/// with the proof's reason.
fn finish(cl: &ClosedLoop, cell: &[Interval], outcome: Proof, falsify: bool, started: Instant, mut stats: Stats) -> Verdict {
    let f = match outcome {
        Proof::Safe => {
            stats.wall_ms = started.elapsed().as_secs_f64() * 1e3;
            return Verdict { stats, ..bare(VerdictKind::Safe) };
        }
        Proof::Failed(f) => f,
    };
    if falsify {
        if let Some(cx) = search(cl, cell, f.suspect.as_deref(), &mut stats) {
            return unsafe_verdict(cx, started, stats);
        }
    }
    stats.wall_ms = started.elapsed().as_secs_f64() * 1e3;
    Verdict {
        reason: Some(f.reason),
        detail: Some(f.detail),
        split_hint: Some(f.split_hint.unwrap_or_else(|| reach::widest_normalized(cl, cell))),
        stats,
        ..bare(VerdictKind::Inconclusive)
    }
}

/// The falsifier on the cell (starting from the point a failed proof suspects), its
/// time and simulations added to the stats.
fn search(cl: &ClosedLoop, cell: &[Interval], suspect: Option<&[f64]>, stats: &mut Stats) -> Option<Counterexample> {
    let t_f = Instant::now();
    let mut sims = 0;
    let cx = falsify::falsify(cl, cell, suspect, cl.spec.engine.falsify_samples, seed_of(cell), &mut sims);
    stats.falsify_ms += t_f.elapsed().as_secs_f64() * 1e3;
    stats.simulations += sims;
    cx
}

fn unsafe_verdict(cx: Counterexample, started: Instant, mut stats: Stats) -> Verdict {
    stats.wall_ms = started.elapsed().as_secs_f64() * 1e3;
    Verdict {
        detail: Some(format!("counterexample enters unsafe region {} at t = {:.4} s", cx.unsafe_region, cx.entry_time)),
        counterexample: Some(cx),
        stats,
        ..bare(VerdictKind::Unsafe)
    }
}

/// Share of the horizon the box attempt must reach before the constrained sets try
/// ahead of the falsifier.
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
