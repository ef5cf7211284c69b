//! Campaign lifecycle: creation (validation against stored models), the campaign's
//! own record (get, list, spec) and state changes. The read views over its cells are
//! in `views`, the report in `report`, the tiling check in `tiling`.

use crate::error::{ApiError, ApiResult};
use crate::leases::{self, QueueLimits};
use crate::model_check;
use crate::refine::{self};
use crate::store::{now_ms, CampaignInfo, Deltas, Store};
use serde_json::{json, Value};
use sha2::Digest;
use sqlx::Row;
use std::collections::HashMap;
use crate::seed;
use tessera_protocol::{CampaignState, CellStatus};
use tessera_engine::spec::{self, NetworkShape};

/// Deepest uniform pre-split allowed at creation (2^16 leaves).
pub const MAX_INITIAL_DEPTH: u32 = 16;

/// Options of campaign creation besides the spec.
#[derive(Debug, Clone, Copy, Default)]
pub struct CreateOptions<'a> {
    pub priority: i64,
    /// Cut the envelope uniformly to this depth before any cell is leased.
    pub initial_depth: u32,
    /// Start from the leaves of this finished campaign instead of the root
    /// (see [`crate::followup`]).
    pub follow_up: Option<&'a str>,
}

/// Validate `body` as a spec whose networks are uploaded models, and create the
/// campaign with its root cell (or a uniform tree down to `initial_depth`, or, for a
/// follow-up, the tree of the earlier campaign with its leaves pending again).
/// Every problem is a 4xx [`ApiError`] naming the JSON path (or query field) at fault.
pub async fn create(store: &Store, max_depth_limit: u32, max_cells: u64, body: &[u8], opts: CreateOptions<'_>) -> ApiResult<Value> {
    let text = std::str::from_utf8(body)
        .map_err(|e| ApiError::bad_request(format!("the spec must be UTF-8 JSON: {e}")))?;
    let spec = spec::parse_spec(text).map_err(ApiError::invalid_spec)?;

    // The engine's model checks (`Spec::check_network`) on every referenced model.
    let mut model_errors = Vec::new();
    for (i, r) in spec.networks.iter().enumerate() {
        let field = format!("controller.networks[{i}]");
        let Some(hash) = r.strip_prefix("sha256:") else {
            return Err(ApiError::unprocessable(
                "model_ref",
                format!("'{r}': a campaign refers to uploaded models as 'sha256:HEX' (upload with POST /api/v1/models)"),
            )
            .field(field));
        };
        let shape = match store.model_shape(hash).await? {
            None => {
                return Err(ApiError::unprocessable("model_not_found", format!("no uploaded model with sha256 {hash}"))
                    .field(field))
            }
            Some((Some(i), Some(o))) => NetworkShape { inputs: i as usize, outputs: o as usize },
            // Widths not recorded with the model: read it again with the engine's reader.
            Some(_) => {
                let bytes = store.get_model(hash).await?.ok_or_else(|| ApiError::internal("stored model vanished"))?;
                model_check::inspect_model(&bytes)
                    .map_err(|e| ApiError::unprocessable("invalid_model", format!("stored model {hash}: {e}")).field(field))?
            }
        };
        model_errors.extend(spec.check_network(i, shape));
    }
    if !model_errors.is_empty() {
        return Err(ApiError::invalid_spec(model_errors));
    }
    if spec.max_depth > max_depth_limit {
        return Err(ApiError::unprocessable(
            "limit",
            format!("refinement.max_depth {} is above this server's limit {max_depth_limit}", spec.max_depth),
        )
        .field("refinement.max_depth"));
    }
    let initial = opts.initial_depth;
    if initial > spec.max_depth || initial > MAX_INITIAL_DEPTH || (1u64 << (initial + 1)) > max_cells {
        return Err(ApiError::bad_request(format!(
            "initial_depth {initial} must be at most max_depth ({}) and {MAX_INITIAL_DEPTH}, and fit the cell limit",
            spec.max_depth
        ))
        .field("initial_depth"));
    }

    let canonical = spec.canonical_json();
    let hash = hex::encode(sha2::Sha256::digest(canonical.as_bytes()));
    let id = crate::store::new_id();
    let info = CampaignInfo::from_spec(&id, &hash, &spec);
    let now = now_ms();

    if opts.follow_up.is_some() && initial > 0 {
        return Err(ApiError::bad_request("a follow-up starts from the earlier campaign's cells: initial_depth must be 0")
            .field("initial_depth"));
    }
    let nodes = match opts.follow_up {
        Some(prev) => crate::followup::seed(store, prev, &info, max_cells).await?,
        None => seed::uniform_tree(&info, initial),
    };

    let mut w = store.write().await?;
    sqlx::query(
        "INSERT INTO campaigns (id, name, spec_json, spec_hash, state, priority, max_depth, created_at, updated_at, follow_up_of)
         VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
    )
    .bind(&id)
    .bind(&spec.doc.name)
    .bind(&canonical)
    .bind(&hash)
    .bind(CampaignState::Running.as_str())
    .bind(opts.priority)
    .bind(spec.max_depth as i64)
    .bind(now)
    .bind(now)
    .bind(opts.follow_up)
    .execute(&mut *w.tx)
    .await?;
    let mut counts: HashMap<CellStatus, (i64, i64)> = CellStatus::ALL.iter().map(|s| (*s, (0, 0))).collect();
    for n in &nodes {
        let e = counts.entry(n.status).or_insert((0, 0));
        e.0 += 1;
        if n.status.is_leaf() {
            e.1 += refine::volume(spec.max_depth, n.depth);
        }
    }
    for s in CellStatus::ALL {
        let (c, v) = counts[&s];
        sqlx::query("INSERT INTO campaign_counters (campaign_id, status, cells, volume) VALUES (?, ?, ?, ?)")
            .bind(&id)
            .bind(s.as_str())
            .bind(c)
            .bind(v)
            .execute(&mut *w.tx)
            .await?;
    }
    for chunk in nodes.chunks(400) {
        let sql = format!(
            "INSERT INTO cells (id, campaign_id, parent_id, depth, box, status, split_dim, coarse_dim, created_at, updated_at) VALUES {}",
            vec!["(?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"; chunk.len()].join(", ")
        );
        let mut q = sqlx::query(&sql);
        for n in chunk {
            q = q
                .bind(n.id.as_str())
                .bind(id.as_str())
                .bind(n.parent.clone())
                .bind(n.depth as i64)
                .bind(refine::encode_box(&n.cell))
                .bind(n.status.as_str())
                .bind(n.split_dim)
                .bind(n.coarse_dim)
                .bind(now)
                .bind(now);
        }
        q.execute(&mut *w.tx).await?;
    }
    w.commit().await?;
    get(store, &id).await
}

/// Check that `bytes` is a model, for upload.
pub fn inspect_upload(bytes: &[u8]) -> ApiResult<NetworkShape> {
    model_check::inspect_model(bytes).map_err(|e| ApiError::unprocessable("invalid_model", e).field("body"))
}

fn campaign_json(r: &sqlx::sqlite::SqliteRow, counts: &HashMap<CellStatus, (i64, i64)>) -> ApiResult<Value> {
    let cells: serde_json::Map<String, Value> =
        CellStatus::ALL.iter().map(|s| (s.api_name().to_string(), json!(counts.get(s).map(|c| c.0).unwrap_or(0)))).collect();
    Ok(json!({
        "id": r.try_get::<String, _>("id")?,
        "name": r.try_get::<String, _>("name")?,
        "state": r.try_get::<String, _>("state")?,
        "priority": r.try_get::<i64, _>("priority")?,
        "spec_hash": r.try_get::<String, _>("spec_hash")?,
        "max_depth": r.try_get::<i64, _>("max_depth")?,
        "results_count": r.try_get::<i64, _>("results_count")?,
        "created_at_ms": r.try_get::<i64, _>("created_at")?,
        "updated_at_ms": r.try_get::<i64, _>("updated_at")?,
        "finished_at_ms": r.try_get::<Option<i64>, _>("finished_at")?,
        "follow_up_of": r.try_get::<Option<String>, _>("follow_up_of")?,
        "cells": cells,
    }))
}

const CAMPAIGN_COLS: &str =
    "id, name, state, priority, spec_hash, max_depth, results_count, created_at, updated_at, finished_at, first_result_at, last_result_at, follow_up_of";

/// One campaign's row ([`CAMPAIGN_COLS`]); 404 when unknown.
pub(crate) async fn campaign_row(store: &Store, id: &str) -> ApiResult<sqlx::sqlite::SqliteRow> {
    sqlx::query(&format!("SELECT {CAMPAIGN_COLS} FROM campaigns WHERE id = ?"))
        .bind(id)
        .fetch_optional(&store.pool)
        .await?
        .ok_or_else(|| ApiError::not_found("campaign", id))
}

/// One campaign's summary; 404 when unknown.
pub async fn get(store: &Store, id: &str) -> ApiResult<Value> {
    let row = campaign_row(store, id).await?;
    campaign_json(&row, &store.counters(id).await?)
}

/// All campaigns, newest first, optionally of one state.
pub async fn list(store: &Store, state: Option<&str>) -> ApiResult<Value> {
    let rows = sqlx::query(&format!(
        "SELECT {CAMPAIGN_COLS} FROM campaigns WHERE (?1 IS NULL OR state = ?1) ORDER BY created_at DESC, id LIMIT 1000"
    ))
    .bind(state)
    .fetch_all(&store.pool)
    .await?;
    let mut out = Vec::new();
    for r in &rows {
        let id: String = r.try_get("id")?;
        out.push(campaign_json(r, &store.counters(&id).await?)?);
    }
    Ok(json!({ "campaigns": out }))
}

/// The stored (canonical) spec document and its hash.
pub async fn spec_of(store: &Store, id: &str) -> ApiResult<(String, String)> {
    let row = sqlx::query("SELECT spec_json, spec_hash FROM campaigns WHERE id = ?")
        .bind(id)
        .fetch_optional(&store.pool)
        .await?
        .ok_or_else(|| ApiError::not_found("campaign", id))?;
    Ok((row.try_get(0)?, row.try_get(1)?))
}

/// Change a campaign's state: `pause` (running → paused), `resume` (paused →
/// running), `cancel` (running/paused → cancelled, leases withdrawn). Asking for the
/// state it is already in is accepted; other changes are 409.
pub async fn transition(store: &Store, limits: QueueLimits, id: &str, action: &str) -> ApiResult<Value> {
    let mut w = store.write().await?;
    let state: String = sqlx::query_scalar("SELECT state FROM campaigns WHERE id = ?")
        .bind(id)
        .fetch_optional(&mut *w.tx)
        .await?
        .ok_or_else(|| ApiError::not_found("campaign", id))?;
    use CampaignState::*;
    let (from, to): (&[CampaignState], CampaignState) = match action {
        "pause" => (&[Running], Paused),
        "resume" => (&[Paused], Running),
        _ => (&[Running, Paused], Cancelled),
    };
    if state != to.as_str() {
        if !from.iter().any(|f| f.as_str() == state) {
            return Err(ApiError::conflict(format!("cannot {action} a campaign that is {state}")).field("state"));
        }
        sqlx::query("UPDATE campaigns SET state = ?, updated_at = ? WHERE id = ?")
            .bind(to.as_str())
            .bind(now_ms())
            .bind(id)
            .execute(&mut *w.tx)
            .await?;
        if to == Cancelled {
            let mut deltas = Deltas::default();
            leases::withdraw_leases(store, &mut w.tx, limits, id, &mut deltas).await?;
            // Counters only; a cancelled campaign is not marked done.
            deltas.apply(&mut w.tx).await?;
        }
    }
    w.commit().await?;
    get(store, id).await
}
