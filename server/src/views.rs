//! Read views of a campaign's cells: coverage (from the counters), cell pages,
//! counterexamples, the leaves for the coverage map, recent results and history.

use crate::error::{ApiError, ApiResult};
use crate::refine::{self};
use crate::store::{self, now_ms, Store};
use serde_json::{json, Value};
use sqlx::Row;
use tessera_protocol::{CampaignState, CellStatus, Coverage, StatusCoverage, COUNTEREXAMPLE_NOTE};
use tessera_engine::caution::CAUTION;
use crate::campaigns::campaign_row;

/// Coverage: per-status cells and exact volume fractions, rates and an estimate of
/// the time left. O(1) in the number of cells.
pub async fn coverage(store: &Store, id: &str) -> ApiResult<Coverage> {
    let row = campaign_row(store, id).await?;
    let d = row.try_get::<i64, _>("max_depth")? as u32;
    let counts = store.counters(id).await?;
    let total = refine::volume(d, 0);
    let mut statuses = std::collections::BTreeMap::new();
    let mut leaves = 0;
    let mut leaf_volume = 0;
    for s in CellStatus::LEAVES {
        let (c, v) = counts.get(&s).copied().unwrap_or((0, 0));
        leaves += c;
        leaf_volume += v;
        let sc = StatusCoverage {
            cells: c,
            volume: v,
            fraction: v as f64 / total as f64,
            exact: format!("{v}/2^{d}"),
            reduced: refine::reduced_fraction(v, d),
        };
        statuses.insert(s.api_name().to_string(), sc);
    }
    let open: i64 = counts.iter().filter(|(s, _)| s.is_open()).map(|(_, c)| c.1).sum();
    let resolved = leaf_volume - open;
    let results: i64 = row.try_get("results_count")?;
    let first: Option<i64> = row.try_get("first_result_at")?;
    let last: Option<i64> = row.try_get("last_result_at")?;
    let created: i64 = row.try_get("created_at")?;
    let state: String = row.try_get("state")?;
    let state = CampaignState::parse(&state)
        .ok_or_else(|| ApiError::internal(format!("campaign {id}: unknown stored state '{state}'")))?;
    let end = if state.is_open() { now_ms() } else { last.unwrap_or(created) };
    let span_s = first.map(|f| (end - f) as f64 / 1000.0).filter(|s| *s > 0.0);
    let cells_per_second = span_s.map(|s| results as f64 / s);
    let volume_per_second = span_s.map(|s| resolved as f64 / total as f64 / s);
    let eta = match (volume_per_second, open) {
        (_, 0) => Some(0.0),
        (Some(r), _) if r > 0.0 => Some(open as f64 / total as f64 / r),
        _ => None,
    };
    Ok(Coverage {
        campaign_id: id.to_string(),
        state,
        max_depth: d,
        total_volume: total,
        total_exact: format!("2^{d}"),
        statuses,
        leaves,
        split_cells: counts.get(&CellStatus::Split).map(|c| c.0).unwrap_or(0),
        leaf_volume_matches_total: leaf_volume == total,
        results,
        cells_per_second,
        fraction_per_second: volume_per_second,
        estimated_seconds_remaining: eta,
        estimate_note: "time left = open volume / resolved volume per second since the first result; deeper cells \
                        resolve less volume each, so this is a rough estimate"
            .into(),
        counterexample_note: COUNTEREXAMPLE_NOTE.into(),
        caution: CAUTION.into(),
    })
}

/// Cells of a campaign filtered by status and depth, in creation order, paginated
/// by `after` (the `next_after` of the previous page).
pub async fn cells(
    store: &Store,
    id: &str,
    status: Option<&str>,
    depth: Option<i64>,
    limit: i64,
    after: i64,
) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let status = match status {
        None => None,
        Some(s) => Some(
            CellStatus::from_api_name(s)
                .ok_or_else(|| {
                    ApiError::bad_request(format!("unknown status '{s}' (one of {})", CellStatus::api_names())).field("status")
                })?
                .as_str(),
        ),
    };
    let rows = sqlx::query(
        "SELECT c.rowid, c.id, c.parent_id, c.depth, c.box, c.status, c.split_dim, c.attempts, c.last_error,
                c.lease_expires_at, r.verdict_json, c.expiries
         FROM cells c LEFT JOIN results r ON r.id = c.result_id
         WHERE c.campaign_id = ?1 AND c.rowid > ?2 AND (?3 IS NULL OR c.status = ?3) AND (?4 IS NULL OR c.depth = ?4)
         ORDER BY c.rowid LIMIT ?5",
    )
    .bind(id)
    .bind(after)
    .bind(status)
    .bind(depth)
    .bind(limit)
    .fetch_all(&store.pool)
    .await?;
    let mut out = Vec::new();
    let mut last = None;
    for r in &rows {
        let rowid: i64 = r.try_get(0)?;
        last = Some(rowid);
        let b: Vec<u8> = r.try_get(4)?;
        let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal("corrupt box"))?;
        let verdict: Option<String> = r.try_get(10)?;
        let split_dim: Option<i64> = r.try_get(6)?;
        out.push(json!({
            "id": r.try_get::<String, _>(1)?,
            "parent_id": r.try_get::<Option<String>, _>(2)?,
            "depth": r.try_get::<i64, _>(3)?,
            "box": info.full_box(&cell),
            "status": store::cell_status(&r.try_get::<String, _>(5)?)?,
            "split_state": split_dim.and_then(|d| info.split.get(d as usize)).map(|&k| info.states[k].clone()),
            "attempts": r.try_get::<i64, _>(7)?,
            "expiries": r.try_get::<i64, _>(11)?,
            "last_error": r.try_get::<Option<String>, _>(8)?,
            "lease_expires_at_ms": r.try_get::<Option<i64>, _>(9)?,
            "result": verdict.and_then(|v| serde_json::from_str::<Value>(&v).ok()),
        }));
    }
    let next = if rows.len() as i64 == limit { last } else { None };
    Ok(json!({ "cells": out, "next_after": next }))
}

/// Results with verdict `unsafe`, with their cells' boxes, oldest first.
pub async fn counterexamples(store: &Store, id: &str, limit: i64, after: i64) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let rows = sqlx::query(
        "SELECT r.rowid, r.id, r.cell_id, r.verdict_json, r.worker, r.received_at, c.depth, c.box, c.status
         FROM results r JOIN cells c ON c.id = r.cell_id
         WHERE r.campaign_id = ? AND r.kind = 'unsafe' AND r.rowid > ? ORDER BY r.rowid LIMIT ?",
    )
    .bind(id)
    .bind(after)
    .bind(limit)
    .fetch_all(&store.pool)
    .await?;
    let mut out = Vec::new();
    let mut last = None;
    for r in &rows {
        last = Some(r.try_get::<i64, _>(0)?);
        let v: Value = serde_json::from_str(&r.try_get::<String, _>(3)?).unwrap_or(Value::Null);
        let b: Vec<u8> = r.try_get(7)?;
        let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal("corrupt box"))?;
        out.push(json!({
            "result_id": r.try_get::<String, _>(1)?,
            "cell_id": r.try_get::<String, _>(2)?,
            "depth": r.try_get::<i64, _>(6)?,
            "box": info.full_box(&cell),
            "cell_status": store::cell_status(&r.try_get::<String, _>(8)?)?,
            "reason": v.get("reason").cloned().unwrap_or(Value::Null),
            "counterexample": v.get("counterexample").cloned().unwrap_or(Value::Null),
            "worker": r.try_get::<String, _>(4)?,
            "received_at_ms": r.try_get::<i64, _>(5)?,
        }));
    }
    let next = if rows.len() as i64 == limit { last } else { None };
    Ok(json!({ "counterexamples": out, "next_after": next }))
}

/// Most rows of one page of [`leaves`].
pub const MAX_LEAVES_PAGE: i64 = 50_000;

/// Cells for drawing a coverage map, compactly: one row `[rowid, status, depth, lo0,
/// hi0, lo1, hi1, …]` per cell, the bounds over the split states in `split_states`
/// order, `status` an index into `statuses`. Without `since_ms`: the leaves (no
/// `split` cells). With `since_ms`: every cell (split ones included, which tells the
/// reader to drop it as a leaf) whose status or lease changed at or after that time.
/// Paginated by `after` (the `next_after` of the previous page); `as_of_ms` is read
/// before the query, so a reader that asks next with `since_ms` a little before it
/// (writes are stamped before they commit) misses no change.
pub async fn leaves(store: &Store, id: &str, since_ms: Option<i64>, after: i64, limit: i64) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let as_of = now_ms();
    // Two statements, so that each can use its index (cells_changed for `since_ms`).
    let leaves_sql = format!(
        "SELECT rowid, status, depth, box FROM cells
         WHERE campaign_id = ?1 AND rowid > ?2 AND status != '{}' ORDER BY rowid LIMIT ?3",
        CellStatus::Split.as_str()
    );
    let rows = match since_ms {
        None => sqlx::query(&leaves_sql).bind(id).bind(after).bind(limit),
        Some(since) => sqlx::query(
            "SELECT rowid, status, depth, box FROM cells INDEXED BY cells_changed
             WHERE campaign_id = ?1 AND updated_at >= ?2 AND rowid > ?3 ORDER BY rowid LIMIT ?4",
        )
        .bind(id)
        .bind(since)
        .bind(after)
        .bind(limit),
    }
    .fetch_all(&store.pool)
    .await?;
    let mut out = Vec::with_capacity(rows.len());
    let mut last = None;
    for r in &rows {
        let rowid: i64 = r.try_get(0)?;
        last = Some(rowid);
        let status: String = r.try_get(1)?;
        let code = CellStatus::parse(&status).ok_or_else(|| ApiError::internal("unknown cell status"))?.index();
        let b: Vec<u8> = r.try_get(3)?;
        let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal("corrupt box"))?;
        let mut row = Vec::with_capacity(3 + 2 * cell.len());
        row.push(json!(rowid));
        row.push(json!(code));
        row.push(json!(r.try_get::<i64, _>(2)?));
        for [lo, hi] in cell {
            row.push(json!(lo));
            row.push(json!(hi));
        }
        out.push(Value::Array(row));
    }
    let next = if rows.len() as i64 == limit { last } else { None };
    let split_states: Vec<&str> = info.split.iter().map(|&k| info.states[k].as_str()).collect();
    Ok(json!({
        "campaign_id": id,
        "states": info.states,
        "envelope": info.envelope,
        "split_states": split_states,
        "statuses": CellStatus::ALL,
        "columns": "rowid, status index, depth, then lo and hi of each split state",
        "as_of_ms": as_of,
        "rows": out,
        "next_after": next,
    }))
}

/// The latest results of a campaign, newest first: verdict kind, cell, worker, times.
pub async fn recent_results(store: &Store, id: &str, limit: i64) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let rows = sqlx::query(
        "SELECT r.id, r.cell_id, r.kind, r.worker, r.elapsed_ms, r.received_at, r.verdict_json, c.depth, c.box
         FROM results r JOIN cells c ON c.id = r.cell_id
         WHERE r.campaign_id = ? ORDER BY r.rowid DESC LIMIT ?",
    )
    .bind(id)
    .bind(limit)
    .fetch_all(&store.pool)
    .await?;
    let mut out = Vec::new();
    for r in &rows {
        let v: Value = serde_json::from_str(&r.try_get::<String, _>(6)?).unwrap_or(Value::Null);
        let b: Vec<u8> = r.try_get(8)?;
        let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal("corrupt box"))?;
        out.push(json!({
            "result_id": r.try_get::<String, _>(0)?,
            "cell_id": r.try_get::<String, _>(1)?,
            "kind": r.try_get::<String, _>(2)?,
            "worker": r.try_get::<String, _>(3)?,
            "elapsed_ms": r.try_get::<Option<f64>, _>(4)?,
            "received_at_ms": r.try_get::<i64, _>(5)?,
            "reason": v.get("reason").cloned().unwrap_or(Value::Null),
            "error": v.get("error").cloned().unwrap_or(Value::Null),
            "depth": r.try_get::<i64, _>(7)?,
            "box": info.full_box(&cell),
        }));
    }
    Ok(json!({ "results": out }))
}

/// Most points of [`history`].
pub const MAX_HISTORY_POINTS: usize = 1000;

/// The decided volume over time: for `points` equal steps from the first to the last
/// decisive result, the fraction of the envelope that was then proven safe, in
/// counterexample cells and unresolved. Each decided leaf counts from the time of the
/// result that decided it, with its exact volume 2^(max_depth − depth); the last point
/// equals the current coverage. Cells that were decided and later split (cells with a
/// counterexample, cut further under `refine_unsafe`) count only through their children.
pub async fn history(store: &Store, id: &str, points: usize) -> ApiResult<Value> {
    const DECIDED: [CellStatus; 3] = [CellStatus::Safe, CellStatus::Counterexample, CellStatus::Unresolved];
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let rows = sqlx::query(
        "SELECT r.received_at, c.depth, c.status FROM cells c JOIN results r ON r.id = c.result_id
         WHERE c.campaign_id = ? AND c.status IN (?, ?, ?) ORDER BY r.received_at",
    )
    .bind(id)
    .bind(DECIDED[0].as_str())
    .bind(DECIDED[1].as_str())
    .bind(DECIDED[2].as_str())
    .fetch_all(&store.pool)
    .await?;
    let d = info.max_depth;
    let total = refine::volume(d, 0) as f64;
    let mut events: Vec<(i64, usize, i64)> = Vec::with_capacity(rows.len());
    for r in &rows {
        let status: String = r.try_get(2)?;
        let k = DECIDED.iter().position(|s| s.as_str() == status).unwrap_or(0);
        events.push((r.try_get(0)?, k, refine::volume(d, r.try_get::<i64, _>(1)? as u32)));
    }
    let mut out = Vec::new();
    if let (Some(first), Some(last)) = (events.first().map(|e| e.0), events.last().map(|e| e.0)) {
        let n = points.clamp(1, MAX_HISTORY_POINTS);
        let mut acc = [0i64; 3];
        let mut i = 0;
        for p in 1..=n {
            // The last step ends exactly at the last result, so nothing is left out.
            let t = if p == n { last } else { first + (last - first) * p as i64 / n as i64 };
            while i < events.len() && events[i].0 <= t {
                acc[events[i].1] += events[i].2;
                i += 1;
            }
            let mut point = serde_json::Map::new();
            point.insert("t_ms".into(), json!(t));
            for (s, v) in DECIDED.iter().zip(acc) {
                point.insert(s.api_name().into(), json!(v as f64 / total));
            }
            out.push(Value::Object(point));
            if first == last {
                break;
            }
        }
    }
    Ok(json!({"campaign_id": id, "max_depth": d, "points": out}))
}
