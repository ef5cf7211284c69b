//! Follow-up campaigns: a new campaign (new models or a changed spec) that starts
//! from the partition a finished campaign over the same envelope already found, and
//! the exact coverage diff between two such campaigns.
//!
//! Seeding rule: the earlier campaign's tree is copied (same boxes, depths and cuts);
//! every leaf becomes `pending` again, except that where both halves of a cut were
//! `safe` before, the two are re-joined: their parent is `pending` instead, with
//! `coarse_dim` set to the cut. If the parent proves safe, one cell has done the work
//! of two; otherwise (unsafe or inconclusive) it is cut there again, into exactly the
//! earlier halves (see [`crate::leases::submit`]).

use crate::seed::SeedCell;
use crate::diff::{self, TreeCell};
use crate::error::{ApiError, ApiResult};
use crate::refine;
use crate::store::{self, CampaignInfo, Store};
use axum::http::StatusCode;
use serde_json::{json, Value};
use sqlx::Row;
use std::collections::HashMap;
use std::sync::Arc;
use tessera_protocol::{CampaignState, CellStatus};

/// Check that `next` covers the same envelope as `prev`, bit for bit, and is split
/// over the same states in the same order. The error names the field that differs
/// (`refinement.split` or `envelope.STATE`).
pub fn check_compatible(prev: &CampaignInfo, next: &CampaignInfo) -> ApiResult<()> {
    let names = |i: &CampaignInfo| i.split.iter().map(|&k| i.states[k].clone()).collect::<Vec<_>>();
    if names(prev) != names(next) {
        return Err(ApiError::unprocessable(
            "invalid_request",
            format!("refinement.split is {:?} but the earlier campaign {} splits {:?}", names(next), prev.id, names(prev)),
        )
        .field("refinement.split"));
    }
    let bits = |iv: &[f64; 2]| (iv[0].to_bits(), iv[1].to_bits());
    for (k, s) in next.states.iter().enumerate() {
        let before = prev.states.iter().position(|p| p == s).map(|j| prev.envelope[j]);
        if before.map(|b| bits(&b)) != Some(bits(&next.envelope[k])) {
            let was = before.map(|b| format!("{b:?}")).unwrap_or_else(|| "absent".into());
            return Err(ApiError::unprocessable(
                "invalid_request",
                format!("envelope.{s} is {:?} but {was} in the earlier campaign {} (they must be equal bit for bit)", next.envelope[k], prev.id),
            )
            .field(format!("envelope.{s}")));
        }
    }
    if let Some(s) = prev.states.iter().find(|p| !next.states.contains(p)) {
        return Err(ApiError::unprocessable(
            "invalid_request",
            format!("the earlier campaign {} has state '{s}' in its envelope, this spec does not", prev.id),
        )
        .field(format!("envelope.{s}")));
    }
    Ok(())
}

/// Every cell of a campaign, for rebuilding its tree.
pub async fn load_tree(store: &Store, id: &str) -> ApiResult<Vec<TreeCell>> {
    let rows = sqlx::query("SELECT id, parent_id, depth, box, status FROM cells WHERE campaign_id = ?")
        .bind(id)
        .fetch_all(&store.pool)
        .await?;
    let mut out = Vec::with_capacity(rows.len());
    for r in &rows {
        let id: String = r.try_get(0)?;
        let b: Vec<u8> = r.try_get(3)?;
        let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal(format!("cell {id}: corrupt box")))?;
        let status = store::cell_status(&r.try_get::<String, _>(4)?)?;
        out.push(TreeCell { id, parent_id: r.try_get(1)?, depth: r.try_get::<i64, _>(2)? as u32, cell, status });
    }
    Ok(out)
}

/// The earlier campaign of a follow-up, checked: it exists, is `done`, covers the
/// same envelope with the same split states, and its max_depth is not above the new
/// one. Errors name `follow_up` (or the spec field that differs).
async fn earlier(store: &Store, prev_id: &str, next: &CampaignInfo) -> ApiResult<Arc<CampaignInfo>> {
    let state: Option<String> =
        sqlx::query_scalar("SELECT state FROM campaigns WHERE id = ?").bind(prev_id).fetch_optional(&store.pool).await?;
    let Some(state) = state else {
        return Err(ApiError::unprocessable("invalid_request", format!("no campaign {prev_id} to follow up")).field("follow_up"));
    };
    if state != CampaignState::Done.as_str() {
        return Err(ApiError::conflict(format!(
            "campaign {prev_id} is {state}: only a finished (done) campaign can be followed up"
        ))
        .field("follow_up"));
    }
    let prev = store.info(prev_id).await?.ok_or_else(|| ApiError::not_found("campaign", prev_id))?;
    check_compatible(&prev, next)?;
    if next.max_depth < prev.max_depth {
        return Err(ApiError::unprocessable(
            "invalid_request",
            format!(
                "refinement.max_depth {} is below the earlier campaign's {}, whose cells would not fit",
                next.max_depth, prev.max_depth
            ),
        )
        .field("refinement.max_depth"));
    }
    Ok(prev)
}

/// The initial tree of a follow-up of `prev_id` (see the module doc for the rule).
/// Guarantees: the leaves tile the envelope exactly once; every cell has the box and
/// depth of a cell of the earlier campaign; a re-joined cell's `coarse_dim` is the
/// dimension whose cut gives back the earlier halves.
pub async fn seed(store: &Store, prev_id: &str, next: &CampaignInfo, max_cells: u64) -> ApiResult<Vec<SeedCell>> {
    earlier(store, prev_id, next).await?;
    let cells = load_tree(store, prev_id).await?;
    if cells.len() as u64 > max_cells {
        return Err(ApiError::unprocessable(
            "limit",
            format!("campaign {prev_id} has {} cells, more than this server's limit of {max_cells} per campaign", cells.len()),
        )
        .field("follow_up"));
    }
    let index: HashMap<&str, usize> = cells.iter().enumerate().map(|(k, c)| (c.id.as_str(), k)).collect();
    let mut children: Vec<Vec<usize>> = vec![Vec::new(); cells.len()];
    let mut root = None;
    for (k, c) in cells.iter().enumerate() {
        match c.parent_id.as_deref().and_then(|p| index.get(p)) {
            Some(&p) => children[p].push(k),
            None => root = Some(k),
        }
    }
    let root = root.ok_or_else(|| ApiError::internal(format!("campaign {prev_id} has no root cell")))?;
    let mut out = Vec::with_capacity(cells.len());
    let mut stack: Vec<(usize, Option<String>)> = vec![(root, None)];
    while let Some((k, parent)) = stack.pop() {
        let c = &cells[k];
        let id = crate::store::new_id();
        let kids = &children[k];
        let mut node = SeedCell {
            id: id.clone(),
            parent,
            depth: c.depth,
            cell: c.cell.clone(),
            status: CellStatus::Pending,
            split_dim: None,
            coarse_dim: None,
        };
        if !kids.is_empty() {
            let [x, y] = kids[..] else {
                return Err(ApiError::internal(format!("cell {} of campaign {prev_id} has {} children", c.id, kids.len())));
            };
            let dim = refine::halves_of(&c.cell, &cells[x].cell, &cells[y].cell)
                .ok_or_else(|| ApiError::internal(format!("children of cell {} are not its halves", c.id)))?;
            let leaf_safe = |j: usize| children[j].is_empty() && cells[j].status == CellStatus::Safe;
            if leaf_safe(x) && leaf_safe(y) {
                node.coarse_dim = Some(dim as i64);
            } else {
                node.status = CellStatus::Split;
                node.split_dim = Some(dim as i64);
                // Lower half first, so that rows come in a stable order.
                let (lo, hi) = if cells[x].cell[dim][0] <= cells[y].cell[dim][0] { (x, y) } else { (y, x) };
                stack.push((hi, Some(id.clone())));
                stack.push((lo, Some(id)));
            }
        }
        out.push(node);
    }
    Ok(out)
}

/// An exact volume as JSON: `units` is in `2^-120` of the envelope, shown also in
/// `2^-max_depth` units when that is an integer.
fn amount(units: u128, max_depth: u32, pieces: u64) -> Value {
    let (p, k) = diff::lowest_terms(units);
    let volume = diff::in_depth_units(units, max_depth);
    json!({
        "pieces": pieces,
        "volume": volume,
        "fraction": diff::as_fraction(units),
        "exact": match volume { Some(v) => format!("{v}/2^{max_depth}"), None => format!("{p}/2^{k}") },
        "reduced": format!("{p}/{}", 1u128 << k),
    })
}

/// Most pieces [`changes`] returns for drawing.
pub const MAX_CHANGE_ROWS: usize = 100_000;

/// The coverage diff of campaign `id` against `against` (default: the campaign it
/// follows up): for each pair (status before, status now), the exact volume of the
/// envelope that had the first status in the earlier campaign and has the second now,
/// from intersecting the leaves of both trees. With `rows` > 0, also up to that many
/// pieces `[from index, to index, exponent, lo, hi, …]` (volume 2^-exponent) for a map.
pub async fn changes(store: &Store, id: &str, against: Option<&str>, rows: usize) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let row = sqlx::query("SELECT follow_up_of, state FROM campaigns WHERE id = ?").bind(id).fetch_one(&store.pool).await?;
    let follow_up_of: Option<String> = row.try_get(0)?;
    let state: String = row.try_get(1)?;
    let Some(other) = against.map(str::to_string).or(follow_up_of.clone()) else {
        return Err(ApiError::unprocessable(
            "invalid_request",
            "this campaign is not a follow-up: name the campaign to compare with in 'against'",
        )
        .field("against"));
    };
    let Some(prev) = store.info(&other).await? else {
        return Err(ApiError::new(StatusCode::NOT_FOUND, "not_found", format!("no campaign {other}")).field("against"));
    };
    check_compatible(&prev, &info).map_err(|e| e.field("against"))?;
    let prev_state: String =
        sqlx::query_scalar("SELECT state FROM campaigns WHERE id = ?").bind(&other).fetch_one(&store.pool).await?;
    let before = load_tree(store, &other).await?;
    let after = load_tree(store, id).await?;
    let keep = rows.min(MAX_CHANGE_ROWS);
    let d = diff::diff(before, after, &info.split_envelope, keep).map_err(ApiError::internal)?;
    let depth = prev.max_depth.max(info.max_depth);

    let mut transitions = Vec::new();
    for from in CellStatus::LEAVES {
        for to in CellStatus::LEAVES {
            if let Some(&(n, units)) = d.transitions.get(&(from, to)) {
                let mut a = amount(units, depth, n);
                a["from"] = json!(from);
                a["to"] = json!(to);
                transitions.push(a);
            }
        }
    }
    let sum = |pred: &dyn Fn(CellStatus, CellStatus) -> bool| -> (u128, u64) {
        d.transitions.iter().filter(|((f, t), _)| pred(*f, *t)).fold((0, 0), |acc, (_, &(n, u))| (acc.0 + u, acc.1 + n))
    };
    let named = |pred: &dyn Fn(CellStatus, CellStatus) -> bool| {
        let (u, n) = sum(pred);
        amount(u, depth, n)
    };
    let pieces: Vec<Value> = d
        .pieces
        .iter()
        .map(|p| {
            let mut r = vec![json!(p.from.index()), json!(p.to.index()), json!(p.exp)];
            for [lo, hi] in &p.cell {
                r.push(json!(lo));
                r.push(json!(hi));
            }
            Value::Array(r)
        })
        .collect();
    let split_states: Vec<&str> = info.split.iter().map(|&k| info.states[k].as_str()).collect();
    use CellStatus::{Counterexample, Safe, Unresolved};
    Ok(json!({
        "campaign_id": id,
        "against": other,
        "follow_up_of": follow_up_of,
        "state": state,
        "against_state": prev_state,
        "final": state == CampaignState::Done.as_str() && prev_state == CampaignState::Done.as_str(),
        "max_depth": depth,
        "transitions": transitions,
        "summary": {
            "safe_to_counterexample": named(&|f, t| f == Safe && t == Counterexample),
            "safe_to_unresolved": named(&|f, t| f == Safe && t == Unresolved),
            "unresolved_to_safe": named(&|f, t| f == Unresolved && t == Safe),
            "counterexample_to_safe": named(&|f, t| f == Counterexample && t == Safe),
            "still_safe": named(&|f, t| f == Safe && t == Safe),
            "no_longer_safe": named(&|f, t| f == Safe && t != Safe),
            "newly_safe": named(&|f, t| f != Safe && t == Safe),
        },
        "note": format!("a volume counts a cell at depth d as 2^-d of the envelope; {}", tessera_protocol::COUNTEREXAMPLE_NOTE),
        "statuses": CellStatus::ALL,
        "split_states": split_states,
        "envelope": info.split_envelope,
        "columns": "from status index, to status index, exponent e (the piece is 2^-e of the envelope), then lo and hi of each split state",
        "rows": pieces,
        "rows_total": d.piece_count,
        "rows_truncated": (d.pieces.len() as u64) < d.piece_count,
    }))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn info(envelope: Vec<[f64; 2]>, split: Vec<usize>) -> CampaignInfo {
        CampaignInfo {
            id: "earlier".into(),
            spec_hash: String::new(),
            states: vec!["h".into(), "v".into()],
            split_envelope: split.iter().map(|&k| envelope[k]).collect(),
            envelope,
            split,
            max_depth: 4,
            refine_unsafe: false,
        }
    }

    #[test]
    fn envelopes_must_match_bit_for_bit() {
        let a = info(vec![[0.0, 1.0], [-1.0, 1.0]], vec![0]);
        assert!(check_compatible(&a, &a).is_ok());
        // -0.0 == 0.0 as numbers, but not as bits: refused, naming the state.
        let b = info(vec![[-0.0, 1.0], [-1.0, 1.0]], vec![0]);
        assert_eq!(check_compatible(&a, &b).unwrap_err().field.as_deref(), Some("envelope.h"));
        // A non-split state's interval counts too.
        let b = info(vec![[0.0, 1.0], [-1.0, 2.0]], vec![0]);
        assert_eq!(check_compatible(&a, &b).unwrap_err().field.as_deref(), Some("envelope.v"));
        let b = info(vec![[0.0, 1.0], [-1.0, 1.0]], vec![1]);
        assert_eq!(check_compatible(&a, &b).unwrap_err().field.as_deref(), Some("refinement.split"));
    }
}
