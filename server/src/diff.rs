//! Exact coverage diff between two campaigns over the same envelope and split states.
//! Pure functions, no I/O.
//!
//! Both campaigns' cells are bisection trees of the same root box, cut by
//! [`refine::bisect`]. Along one split dimension, a cell's interval is determined by
//! how many times that dimension was cut on the way from the root (`level`) and on
//! which side each time (`index`, the sides as binary digits): the f64 cut points
//! depend on nothing else. So a cell is a dyadic box `index_k / 2^level_k` per
//! dimension, two cells overlap exactly when, in every dimension, the coarser index
//! is a prefix of the finer one, and their intersection has volume
//! `2^-(Σ_k max(level_k))` of the envelope. The diff sums those volumes per pair of
//! statuses in integers: nothing is measured in floating point.

use crate::refine::{self, CellBox};
use std::collections::BTreeMap;
use tessera_protocol::CellStatus;

/// Fixed denominator exponent of the accumulated volumes: an intersection of two
/// cells of depth ≤ 60 each is at least `2^-120` of the envelope.
const UNIT_EXP: u32 = 120;

/// One cell of a campaign's tree, as loaded from the store.
#[derive(Debug, Clone)]
pub struct TreeCell {
    pub id: String,
    pub parent_id: Option<String>,
    pub depth: u32,
    pub cell: CellBox,
    pub status: CellStatus,
}

/// A tree with each cell's dyadic coordinates.
struct Tree {
    cells: Vec<TreeCell>,
    children: Vec<Vec<usize>>,
    /// Per cell and split dimension: (level, index).
    code: Vec<Vec<(u32, u64)>>,
    root: usize,
}

/// Rebuild the tree and its dyadic coordinates; an error text if the cells are not
/// one bisection tree of `envelope` (the tiling check describes such damage in
/// detail).
fn build(cells: Vec<TreeCell>, envelope: &[[f64; 2]]) -> Result<Tree, String> {
    let index: std::collections::HashMap<&str, usize> = cells.iter().enumerate().map(|(k, c)| (c.id.as_str(), k)).collect();
    let mut children = vec![Vec::new(); cells.len()];
    let mut root = None;
    for (k, c) in cells.iter().enumerate() {
        match &c.parent_id {
            None => {
                if root.replace(k).is_some() {
                    return Err("more than one root cell".into());
                }
            }
            Some(p) => {
                let &pk = index.get(p.as_str()).ok_or_else(|| format!("cell {}: parent {p} missing", c.id))?;
                children[pk].push(k);
            }
        }
    }
    let root = root.ok_or("no root cell")?;
    if cells[root].cell != envelope {
        return Err("the root cell is not the envelope".into());
    }
    let dims = envelope.len();
    let mut code = vec![Vec::new(); cells.len()];
    code[root] = vec![(0u32, 0u64); dims];
    let mut stack = vec![root];
    let mut seen = 1usize;
    while let Some(p) = stack.pop() {
        for &c in &children[p] {
            let (pb, cb) = (&cells[p].cell, &cells[c].cell);
            let cut: Vec<usize> = (0..dims).filter(|&j| pb[j] != cb[j]).collect();
            let [j] = cut[..] else { return Err(format!("cell {} is not a half of its parent", cells[c].id)) };
            let (a, b) = refine::bisect(pb, j).ok_or_else(|| format!("cell {}: its parent cannot be cut", cells[c].id))?;
            let side = if *cb == a {
                0
            } else if *cb == b {
                1
            } else {
                return Err(format!("cell {} is not a half of its parent", cells[c].id));
            };
            let mut k = code[p].clone();
            let (level, idx) = k[j];
            if level >= 63 {
                return Err(format!("cell {} is cut too often", cells[c].id));
            }
            k[j] = (level + 1, (idx << 1) | side);
            code[c] = k;
            seen += 1;
            stack.push(c);
        }
    }
    if seen != cells.len() {
        return Err("some cells are not reachable from the root".into());
    }
    Ok(Tree { cells, children, code, root })
}

/// Whether two dyadic boxes overlap (in more than a boundary).
fn overlap(a: &[(u32, u64)], b: &[(u32, u64)]) -> bool {
    a.iter().zip(b).all(|(&(la, ia), &(lb, ib))| if la <= lb { ib >> (lb - la) == ia } else { ia >> (la - lb) == ib })
}

/// One piece of the diff: the intersection of a leaf of each campaign.
#[derive(Debug, Clone, PartialEq)]
pub struct Piece {
    pub from: CellStatus,
    pub to: CellStatus,
    /// The piece's volume is `2^-exp` of the envelope.
    pub exp: u32,
    /// Its box over the split dimensions (per dimension, the finer of the two cells').
    pub cell: CellBox,
}

/// The diff of two trees: volume per (status before, status after), exactly.
#[derive(Debug, Clone, Default)]
pub struct Diff {
    /// (from, to) → (number of pieces, volume in units of `2^-120` of the envelope).
    pub transitions: BTreeMap<(CellStatus, CellStatus), (u64, u128)>,
    /// The pieces, in walk order, at most the `keep` asked for.
    pub pieces: Vec<Piece>,
    /// Number of pieces in all.
    pub piece_count: u64,
}

/// Exact volume `units / 2^120` as a fraction in lowest terms, `(p, k)` meaning `p / 2^k`.
pub fn lowest_terms(units: u128) -> (u128, u32) {
    if units == 0 {
        return (0, 0);
    }
    let tz = units.trailing_zeros().min(UNIT_EXP);
    (units >> tz, UNIT_EXP - tz)
}

/// Volume `units / 2^120` counted in `2^-max_depth` of the envelope, when that is an
/// integer.
pub fn in_depth_units(units: u128, max_depth: u32) -> Option<i64> {
    let shift = UNIT_EXP - max_depth;
    (units.trailing_zeros() >= shift || units == 0).then(|| (units >> shift) as i64)
}

/// `units / 2^120` as the nearest f64.
pub fn as_fraction(units: u128) -> f64 {
    units as f64 / 2f64.powi(UNIT_EXP as i32)
}

/// Intersect the leaves of `before` with the leaves of `after` (both bisection trees
/// of `envelope`, each cell with its status) and add up the volume of each pair of
/// statuses. Guarantees: the volumes of all transitions sum to exactly the envelope
/// (`2^120` units) when both trees tile it; each piece is the intersection of one leaf
/// of each tree. Keeps the first `keep` pieces for drawing.
pub fn diff(before: Vec<TreeCell>, after: Vec<TreeCell>, envelope: &[[f64; 2]], keep: usize) -> Result<Diff, String> {
    let a = build(before, envelope).map_err(|e| format!("earlier campaign: {e}"))?;
    let b = build(after, envelope).map_err(|e| format!("this campaign: {e}"))?;
    let a_leaves: Vec<usize> = (0..a.cells.len()).filter(|&k| a.children[k].is_empty()).collect();
    let mut out = Diff::default();
    // Walk the later tree, carrying the earlier leaves that overlap each cell.
    let mut stack: Vec<(usize, Vec<usize>)> = vec![(b.root, a_leaves)];
    while let Some((node, over)) = stack.pop() {
        if b.children[node].is_empty() {
            let bc = &b.code[node];
            for &al in &over {
                let ac = &a.code[al];
                let exp: u32 = ac.iter().zip(bc).map(|(x, y)| x.0.max(y.0)).sum();
                if exp > UNIT_EXP {
                    return Err("cells too deep to intersect exactly".into());
                }
                let (from, to) = (a.cells[al].status, b.cells[node].status);
                if out.pieces.len() < keep {
                    let cell = ac
                        .iter()
                        .zip(bc)
                        .enumerate()
                        .map(|(j, (x, y))| if x.0 >= y.0 { a.cells[al].cell[j] } else { b.cells[node].cell[j] })
                        .collect();
                    out.pieces.push(Piece { from, to, exp, cell });
                }
                let e = out.transitions.entry((from, to)).or_insert((0, 0));
                e.0 += 1;
                e.1 += 1u128 << (UNIT_EXP - exp);
                out.piece_count += 1;
            }
            continue;
        }
        for &c in b.children[node].iter().rev() {
            let cc = &b.code[c];
            let sub: Vec<usize> = over.iter().copied().filter(|&al| overlap(&a.code[al], cc)).collect();
            stack.push((c, sub));
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A tree from a list of (path, status) leaves: each path is a list of (dim, side)
    /// cuts from the root, built with `refine::bisect`.
    fn tree(env: &[[f64; 2]], leaves: &[(&[(usize, u8)], &str)]) -> Vec<TreeCell> {
        let mut cells: Vec<TreeCell> =
            vec![TreeCell { id: "r".into(), parent_id: None, depth: 0, cell: env.to_vec(), status: CellStatus::Split }];
        for (path, status) in leaves {
            let mut id = "r".to_string();
            for (n, &(d, side)) in path.iter().enumerate() {
                let parent = cells.iter().find(|c| c.id == id).unwrap().clone();
                let (lo, hi) = refine::bisect(&parent.cell, d).unwrap();
                for (s, half) in [(0u8, lo), (1u8, hi)] {
                    let cid = format!("{id}/{d}{s}");
                    if !cells.iter().any(|c| c.id == cid) {
                        cells.push(TreeCell { id: cid, parent_id: Some(id.clone()), depth: n as u32 + 1, cell: half, status: CellStatus::Split });
                    }
                }
                id = format!("{id}/{d}{side}");
            }
            cells.iter_mut().find(|c| c.id == id).unwrap().status = CellStatus::parse(status).unwrap();
        }
        cells
    }

    fn vol(d: &Diff, from: &str, to: &str) -> (u128, u32) {
        let key = (CellStatus::parse(from).unwrap(), CellStatus::parse(to).unwrap());
        lowest_terms(d.transitions.get(&key).map(|t| t.1).unwrap_or(0))
    }

    #[test]
    fn same_tree_diffs_to_the_identity() {
        let env = [[0.0, 1.0], [-2.0, 2.0]];
        let t = tree(&env, &[(&[(0, 0)], "safe"), (&[(0, 1), (1, 0)], "unsafe"), (&[(0, 1), (1, 1)], "unresolved")]);
        let d = diff(t.clone(), t, &env, 10).unwrap();
        assert_eq!(vol(&d, "safe", "safe"), (1, 1));
        assert_eq!(vol(&d, "unsafe", "unsafe"), (1, 2));
        assert_eq!(vol(&d, "unresolved", "unresolved"), (1, 2));
        assert_eq!(d.transitions.len(), 3);
        assert_eq!(d.piece_count, 3);
    }

    #[test]
    fn finer_and_coarser_cells_intersect_exactly() {
        // Hand computation: before, [0, 1/2] safe and [1/2, 1] unresolved (cut in x).
        // After, x ∈ [0, 1/2] is cut in y: lower half unsafe (1/4), upper safe (1/4);
        // x ∈ [1/2, 1] is safe as a whole (1/2).
        let env = [[0.0, 1.0], [0.0, 1.0]];
        let a = tree(&env, &[(&[(0, 0)], "safe"), (&[(0, 1)], "unresolved")]);
        let b = tree(&env, &[(&[(0, 0), (1, 0)], "unsafe"), (&[(0, 0), (1, 1)], "safe"), (&[(0, 1)], "safe")]);
        let d = diff(a.clone(), b.clone(), &env, 10).unwrap();
        assert_eq!(vol(&d, "safe", "unsafe"), (1, 2));
        assert_eq!(vol(&d, "safe", "safe"), (1, 2));
        assert_eq!(vol(&d, "unresolved", "safe"), (1, 1));
        let p = d.pieces.iter().find(|p| p.from == CellStatus::Safe && p.to == CellStatus::Counterexample).unwrap();
        assert_eq!(p.cell, vec![[0.0, 0.5], [0.0, 0.5]]);
        // And backwards.
        let d = diff(b, a, &env, 0).unwrap();
        assert_eq!(vol(&d, "unsafe", "safe"), (1, 2));
        assert_eq!(vol(&d, "safe", "unresolved"), (1, 1));
        assert!(d.pieces.is_empty());
    }

    #[test]
    fn trees_cut_in_different_orders_still_add_up() {
        // Before: cut x then y; after: cut y then x. Every depth-2 leaf of one is a
        // leaf of the other; with depth-1 leaves the pieces are quarters.
        let env = [[0.0, 1.0], [0.0, 1.0]];
        let a = tree(&env, &[(&[(0, 0)], "safe"), (&[(0, 1), (1, 0)], "unsafe"), (&[(0, 1), (1, 1)], "safe")]);
        let b = tree(&env, &[(&[(1, 0)], "safe"), (&[(1, 1), (0, 0)], "safe"), (&[(1, 1), (0, 1)], "unresolved")]);
        let d = diff(a, b, &env, 100).unwrap();
        // Quarters: (x0,y0) safe→safe, (x0,y1) safe→safe, (x1,y0) unsafe→safe, (x1,y1) safe→unresolved.
        assert_eq!(vol(&d, "safe", "safe"), (1, 1));
        assert_eq!(vol(&d, "unsafe", "safe"), (1, 2));
        assert_eq!(vol(&d, "safe", "unresolved"), (1, 2));
        let total: u128 = d.transitions.values().map(|t| t.1).sum();
        assert_eq!(total, 1u128 << UNIT_EXP);
        assert_eq!(d.piece_count, 4);
    }

    #[test]
    fn damaged_trees_are_refused() {
        let env = [[0.0, 1.0]];
        let mut t = tree(&env, &[(&[(0, 0)], "safe"), (&[(0, 1)], "safe")]);
        t[1].cell = vec![[0.0, 0.4]];
        assert!(diff(t.clone(), t, &env, 0).unwrap_err().contains("not a half"));
        let t = tree(&env, &[(&[(0, 0)], "safe")]);
        assert!(diff(t.clone(), t, &[[0.0, 2.0]], 0).unwrap_err().contains("envelope"));
    }

    #[test]
    fn fractions_in_lowest_terms() {
        assert_eq!(lowest_terms(0), (0, 0));
        assert_eq!(lowest_terms(1u128 << UNIT_EXP), (1, 0));
        assert_eq!(lowest_terms(3u128 << (UNIT_EXP - 5)), (3, 5));
        assert_eq!(in_depth_units(3u128 << (UNIT_EXP - 5), 6), Some(6));
        assert_eq!(in_depth_units(3u128 << (UNIT_EXP - 5), 4), None);
        assert_eq!(as_fraction(1u128 << (UNIT_EXP - 1)), 0.5);
    }
}
