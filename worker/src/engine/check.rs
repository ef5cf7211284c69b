//! One cell, start to finish: the proof attempt, then (if it fails) the falsifier, and
//! the verdict. "Safe" only from a completed proof, "unsafe" only with a re-checked
//! counterexample, "inconclusive" otherwise.

use super::closed_loop::ClosedLoop;
use super::falsify;
use super::interval::Interval;
use super::reach::{self, Proof};
use super::verdict::{Stats, Verdict, VerdictKind, ENGINE_VERSION};
use std::time::Instant;

/// Decide one cell (a box of initial states, one interval per state).
pub fn check_cell(cl: &ClosedLoop, cell: &[Interval]) -> Verdict {
    let started = Instant::now();
    let mut stats = Stats::default();
    let outcome = reach::prove(cl, cell, started, &mut stats);
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
