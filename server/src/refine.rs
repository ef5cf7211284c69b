//! Bisection of cells and exact volume bookkeeping. Pure functions, no I/O.
//!
//! A cell is a box over the split dimensions of a campaign. Its volume is counted
//! not in real units but as the integer `2^(max_depth − depth)`: the envelope has
//! volume `2^max_depth`, and each cut halves the count exactly. Fractions of the
//! envelope are therefore exact rationals `n / 2^max_depth`.

use tessera_protocol::{CellStatus, Outcome};

/// `[lo, hi]` for each split dimension, in the order of `refinement.split`.
pub type CellBox = Vec<[f64; 2]>;

/// Volume count of a cell at `depth` in a campaign with `max_depth` (≤ 62).
/// Guarantees: `volume(D, d) == 2 * volume(D, d + 1)` and `volume(D, 0) == 2^D`.
pub fn volume(max_depth: u32, depth: u32) -> i64 {
    debug_assert!(depth <= max_depth && max_depth <= 62);
    1i64 << (max_depth - depth)
}

/// The cut point of `[lo, hi]`: `lo + (hi − lo)/2` in f64 (or `lo/2 + hi/2` if the
/// width overflows). Returns `None` when no f64 lies strictly between the ends, so
/// the interval cannot be cut into two halves of positive width.
pub fn midpoint(lo: f64, hi: f64) -> Option<f64> {
    let mut m = lo + (hi - lo) / 2.0;
    if !m.is_finite() {
        m = lo / 2.0 + hi / 2.0;
    }
    if m.is_finite() && lo < m && m < hi {
        Some(m)
    } else {
        None
    }
}

/// Which dimension (index into the box) to cut: the hinted one when it can be cut,
/// else the widest relative to its envelope width (ties: the first). `None` when no
/// dimension can be cut at all.
pub fn choose_dim(cell: &[[f64; 2]], envelope: &[[f64; 2]], hint: Option<usize>) -> Option<usize> {
    if let Some(h) = hint {
        if h < cell.len() && midpoint(cell[h][0], cell[h][1]).is_some() {
            return Some(h);
        }
    }
    let mut best: Option<(usize, f64)> = None;
    for (k, (c, e)) in cell.iter().zip(envelope).enumerate() {
        if midpoint(c[0], c[1]).is_none() {
            continue;
        }
        let w = (c[1] - c[0]) / (e[1] - e[0]);
        if best.is_none_or(|(_, bw)| w > bw) {
            best = Some((k, w));
        }
    }
    best.map(|(k, _)| k)
}

/// Cut `cell` at the midpoint of dimension `dim`. The two halves share the cut value
/// exactly (`lower[dim][1] == upper[dim][0]`) and equal `cell` elsewhere, so together
/// they cover `cell` exactly once. `None` if that dimension cannot be cut.
pub fn bisect(cell: &[[f64; 2]], dim: usize) -> Option<(CellBox, CellBox)> {
    let [lo, hi] = *cell.get(dim)?;
    let m = midpoint(lo, hi)?;
    let mut a = cell.to_vec();
    let mut b = cell.to_vec();
    a[dim] = [lo, m];
    b[dim] = [m, hi];
    Some((a, b))
}

/// If `a` and `b` are the two halves of `parent` (in either order) as produced by
/// [`bisect`], the dimension that was cut.
pub fn halves_of(parent: &[[f64; 2]], a: &[[f64; 2]], b: &[[f64; 2]]) -> Option<usize> {
    if a.len() != parent.len() || b.len() != parent.len() {
        return None;
    }
    for d in 0..parent.len() {
        if let Some((x, y)) = bisect(parent, d) {
            if (x == a && y == b) || (x == b && y == a) {
                return Some(d);
            }
        }
    }
    None
}

/// Encode a box as little-endian f64 pairs (bit-exact).
pub fn encode_box(cell: &[[f64; 2]]) -> Vec<u8> {
    let mut out = Vec::with_capacity(cell.len() * 16);
    for [lo, hi] in cell {
        out.extend_from_slice(&lo.to_le_bytes());
        out.extend_from_slice(&hi.to_le_bytes());
    }
    out
}

/// Decode [`encode_box`]'s output; `None` if the length is not a multiple of 16.
pub fn decode_box(bytes: &[u8]) -> Option<CellBox> {
    let chunks = bytes.chunks_exact(16);
    if !chunks.remainder().is_empty() {
        return None;
    }
    Some(
        chunks
            .map(|c| {
                let lo = f64::from_le_bytes(c[0..8].try_into().unwrap_or([0; 8]));
                let hi = f64::from_le_bytes(c[8..16].try_into().unwrap_or([0; 8]));
                [lo, hi]
            })
            .collect(),
    )
}

/// Greatest common divisor, for reducing fractions.
fn gcd(mut a: u128, mut b: u128) -> u128 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// `n / 2^max_depth` reduced to lowest terms, as "p/q" (q a power of two).
pub fn reduced_fraction(n: i64, max_depth: u32) -> String {
    let q = 1u128 << max_depth;
    let p = n.max(0) as u128;
    if p == 0 {
        return "0/1".into();
    }
    let g = gcd(p, q);
    format!("{}/{}", p / g, q / g)
}

/// Where a cell goes once a result for it is accepted: the queue policy, without SQL
/// (the caller stores what it says and moves the counters).
#[derive(Debug, Clone, PartialEq)]
pub enum NextState {
    /// The cell takes this status: a leaf verdict (`Safe`, `Counterexample`,
    /// `Unresolved`), `Failed` after its last allowed error, or `Pending` to be leased
    /// again after an error.
    Takes(CellStatus),
    /// The cell becomes an inner node cut along `dim` (an index into its box) into two
    /// pending halves that tile it exactly.
    Split { dim: usize, halves: (CellBox, CellBox) },
}

/// What the policy needs to know of the cell when the result arrives.
pub struct CellNow<'a> {
    pub cell: &'a [[f64; 2]],
    pub depth: u32,
    /// Engine errors charged to the cell before this result.
    pub attempts: i64,
    /// A follow-up's re-joined cell: cut here, into the earlier campaign's halves,
    /// unless proven safe.
    pub coarse_dim: Option<usize>,
}

/// The campaign's rules for its cells.
pub struct Rules<'a> {
    pub max_depth: u32,
    /// Cut cells with a counterexample too (else they stay leaves).
    pub refine_unsafe: bool,
    /// The envelope of the split dimensions (for the widest-relative fallback).
    pub split_envelope: &'a [[f64; 2]],
    /// Engine errors after which a cell is `Failed`.
    pub max_attempts: u32,
}

/// The next state of a cell given the outcome of its result. `hint` is the worker's
/// split hint as an index into the box. `may_split` is asked only when a cut is
/// otherwise due (it spends the batch's room for new cells), so a `false` leaves the
/// cell with its leaf status. Guarantees: a split's halves are [`bisect`]'s (they tile
/// the cell); a cell at `max_depth` is never split; a safe cell is never split.
pub fn next_state(outcome: &Outcome, hint: Option<usize>, now: &CellNow, rules: &Rules, may_split: impl FnOnce() -> bool) -> NextState {
    let leaf = match outcome {
        Outcome::Safe => return NextState::Takes(CellStatus::Safe),
        Outcome::Error(_) => {
            let failed = now.attempts + 1 >= rules.max_attempts as i64;
            return NextState::Takes(if failed { CellStatus::Failed } else { CellStatus::Pending });
        }
        Outcome::Unsafe => CellStatus::Counterexample,
        Outcome::Inconclusive(_) => CellStatus::Unresolved,
    };
    // A re-joined cell of a follow-up that is not proven safe falls back to the earlier
    // campaign's two halves, whatever the verdict.
    let coarse = now.coarse_dim.filter(|&d| d < now.cell.len());
    let wants_split = leaf == CellStatus::Unresolved || rules.refine_unsafe || coarse.is_some();
    if !wants_split || now.depth >= rules.max_depth {
        return NextState::Takes(leaf);
    }
    let Some(dim) = coarse.or_else(|| choose_dim(now.cell, rules.split_envelope, hint)) else {
        return NextState::Takes(leaf);
    };
    if !may_split() {
        return NextState::Takes(leaf);
    }
    match bisect(now.cell, dim) {
        Some(halves) => NextState::Split { dim, halves },
        None => NextState::Takes(leaf),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rules(envelope: &[[f64; 2]]) -> Rules<'_> {
        Rules { max_depth: 3, refine_unsafe: false, split_envelope: envelope, max_attempts: 3 }
    }

    fn now(cell: &[[f64; 2]], depth: u32) -> CellNow<'_> {
        CellNow { cell, depth, attempts: 0, coarse_dim: None }
    }

    fn never() -> bool {
        panic!("the room for new cells must not be asked for")
    }

    #[test]
    fn safe_cells_stay_leaves_and_never_ask_for_room() {
        let env = [[0.0, 1.0], [0.0, 4.0]];
        let r = rules(&env);
        assert_eq!(next_state(&Outcome::Safe, Some(0), &now(&env, 0), &r, never), NextState::Takes(CellStatus::Safe));
        let coarse = CellNow { coarse_dim: Some(1), ..now(&env, 0) };
        assert_eq!(next_state(&Outcome::Safe, None, &coarse, &r, never), NextState::Takes(CellStatus::Safe));
    }

    #[test]
    fn errors_requeue_until_the_last_attempt() {
        let env = [[0.0, 1.0]];
        let r = rules(&env);
        let err = Outcome::Error("boom".into());
        for (before, want) in [(0, CellStatus::Pending), (1, CellStatus::Pending), (2, CellStatus::Failed), (7, CellStatus::Failed)] {
            let c = CellNow { attempts: before, ..now(&env, 1) };
            assert_eq!(next_state(&err, None, &c, &r, never), NextState::Takes(want), "{before} attempts before");
        }
    }

    #[test]
    fn inconclusive_cells_split_along_the_hint_until_max_depth() {
        let env = [[0.0, 1.0], [0.0, 4.0]];
        let r = rules(&env);
        let inc = Outcome::Inconclusive(None);
        // The hint wins over the widest-relative rule (which would pick either: both are full width).
        match next_state(&inc, Some(1), &now(&env, 0), &r, || true) {
            NextState::Split { dim, halves: (a, b) } => {
                assert_eq!(dim, 1);
                assert_eq!((a[1], b[1]), ([0.0, 2.0], [2.0, 4.0]), "halves meet at the midpoint");
                assert_eq!((a[0], b[0]), (env[0], env[0]), "the other dimension is kept");
            }
            other => panic!("expected a split, got {other:?}"),
        }
        // Without a hint: the widest relative to the envelope.
        let cell = [[0.0, 0.25], [0.0, 4.0]];
        assert!(matches!(next_state(&inc, None, &now(&cell, 2), &r, || true), NextState::Split { dim: 1, .. }));
        // At the deepest level, or without room, the cell stays an unresolved leaf.
        assert_eq!(next_state(&inc, Some(0), &now(&env, 3), &r, never), NextState::Takes(CellStatus::Unresolved));
        assert_eq!(next_state(&inc, Some(0), &now(&env, 0), &r, || false), NextState::Takes(CellStatus::Unresolved));
        // A cell too thin to cut in any dimension stays a leaf.
        let thin = [[1.0, 1.0], [2.0, 2.0]];
        assert_eq!(next_state(&inc, None, &now(&thin, 0), &r, never), NextState::Takes(CellStatus::Unresolved));
    }

    #[test]
    fn counterexamples_split_only_when_asked_or_when_rejoined() {
        let env = [[0.0, 1.0], [0.0, 4.0]];
        let uns = Outcome::Unsafe;
        let plain = rules(&env);
        assert_eq!(next_state(&uns, Some(0), &now(&env, 0), &plain, never), NextState::Takes(CellStatus::Counterexample));
        let refine = Rules { refine_unsafe: true, ..rules(&env) };
        assert!(matches!(next_state(&uns, Some(0), &now(&env, 0), &refine, || true), NextState::Split { dim: 0, .. }));
        // A follow-up's re-joined cell is cut along its earlier cut, not along the hint.
        let coarse = CellNow { coarse_dim: Some(1), ..now(&env, 0) };
        assert!(matches!(next_state(&uns, Some(0), &coarse, &plain, || true), NextState::Split { dim: 1, .. }));
        assert!(matches!(next_state(&Outcome::Inconclusive(None), Some(0), &coarse, &plain, || true), NextState::Split { dim: 1, .. }));
    }

    #[test]
    fn volumes_halve_exactly() {
        assert_eq!(volume(60, 0), 1i64 << 60);
        for d in 0..60 {
            assert_eq!(volume(60, d), 2 * volume(60, d + 1));
        }
    }

    #[test]
    fn halves_share_the_cut_and_cover_the_parent() {
        let cell = vec![[0.1, 0.7], [-3.0, 5.0]];
        let (a, b) = bisect(&cell, 0).unwrap();
        assert_eq!(a[0][1], b[0][0]);
        assert_eq!(a[0][0], 0.1);
        assert_eq!(b[0][1], 0.7);
        assert_eq!(a[1], cell[1]);
        assert_eq!(b[1], cell[1]);
        assert_eq!(halves_of(&cell, &b, &a), Some(0));
        assert_eq!(halves_of(&cell, &a, &a), None);
    }

    #[test]
    fn adjacent_floats_cannot_be_cut() {
        let lo = 1.0f64;
        let hi = f64::from_bits(lo.to_bits() + 1);
        assert!(midpoint(lo, hi).is_none());
        assert!(bisect(&[[lo, hi]], 0).is_none());
        // Overflowing width still has a midpoint.
        assert_eq!(midpoint(-f64::MAX, f64::MAX), Some(0.0));
    }

    #[test]
    fn hint_wins_else_widest_normalized() {
        let env = vec![[0.0, 1.0], [0.0, 100.0]];
        // Raw width of dim 1 is larger, normalized width of dim 0 is larger.
        let cell = vec![[0.0, 0.5], [0.0, 40.0]];
        assert_eq!(choose_dim(&cell, &env, None), Some(0));
        assert_eq!(choose_dim(&cell, &env, Some(1)), Some(1));
        // A hint that cannot be cut falls back.
        let lo = 1.0f64;
        let cell = vec![[0.0, 0.25], [lo, f64::from_bits(lo.to_bits() + 1)]];
        assert_eq!(choose_dim(&cell, &env, Some(1)), Some(0));
    }

    #[test]
    fn boxes_roundtrip_bit_exactly() {
        let cell = vec![[0.1 + 0.2, f64::MAX], [-0.0, 5e-324]];
        let back = decode_box(&encode_box(&cell)).unwrap();
        for (x, y) in cell.iter().zip(&back) {
            assert_eq!(x[0].to_bits(), y[0].to_bits());
            assert_eq!(x[1].to_bits(), y[1].to_bits());
        }
        assert!(decode_box(&[0; 15]).is_none());
    }

    #[test]
    fn fractions_reduce() {
        assert_eq!(reduced_fraction(7, 4), "7/16");
        assert_eq!(reduced_fraction(8, 4), "1/2");
        assert_eq!(reduced_fraction(0, 4), "0/1");
        assert_eq!(reduced_fraction(1 << 60, 60), "1/1");
    }
}
