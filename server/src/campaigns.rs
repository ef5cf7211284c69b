//! Campaigns: creation (validation against stored models), state changes, and the
//! read views: coverage, cells, counterexamples, report, tiling check.

use crate::error::{ApiError, ApiResult};
use crate::leases::{self, QueueLimits};
use crate::model_check;
use crate::refine::{self, CellBox};
use crate::store::{self, now_ms, CampaignInfo, Deltas, Store};
use serde_json::{json, Value};
use sha2::Digest;
use sqlx::Row;
use std::collections::HashMap;
use crate::seed;
use tessera_protocol::{CampaignState, CellStatus, Coverage, StatusCoverage, COUNTEREXAMPLE_NOTE};
use tessera_engine::caution::CAUTION;
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

/// One campaign's summary; 404 when unknown.
pub async fn get(store: &Store, id: &str) -> ApiResult<Value> {
    let row = sqlx::query(&format!("SELECT {CAMPAIGN_COLS} FROM campaigns WHERE id = ?"))
        .bind(id)
        .fetch_optional(&store.pool)
        .await?
        .ok_or_else(|| ApiError::not_found("campaign", id))?;
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

/// Coverage: per-status cells and exact volume fractions, rates and an estimate of
/// the time left. O(1) in the number of cells.
pub async fn coverage(store: &Store, id: &str) -> ApiResult<Coverage> {
    let row = sqlx::query(&format!("SELECT {CAMPAIGN_COLS} FROM campaigns WHERE id = ?"))
        .bind(id)
        .fetch_optional(&store.pool)
        .await?
        .ok_or_else(|| ApiError::not_found("campaign", id))?;
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

/// The campaign report as JSON: identity (spec and model hashes, versions), times,
/// coverage, counterexamples (first 100) and the safety caution.
pub async fn report(store: &Store, id: &str) -> ApiResult<Value> {
    let campaign = get(store, id).await?;
    let cov = coverage(store, id).await?;
    let (spec_json, spec_hash) = spec_of(store, id).await?;
    let doc: Value = serde_json::from_str(&spec_json).unwrap_or(Value::Null);
    let models: Vec<Value> = doc["controller"]["networks"]
        .as_array()
        .map(|a| a.iter().map(|n| json!(n.as_str().unwrap_or("").trim_start_matches("sha256:"))).collect())
        .unwrap_or_default();
    let engines: Vec<Option<String>> = sqlx::query_scalar(
        "SELECT DISTINCT engine_version FROM results WHERE campaign_id = ? ORDER BY engine_version LIMIT 20",
    )
    .bind(id)
    .fetch_all(&store.pool)
    .await?;
    let engines: Vec<String> = engines.into_iter().map(|e| e.unwrap_or_else(|| "unreported".into())).collect();
    let cex = counterexamples(store, id, 100, 0).await?;
    // A follow-up's report says what changed since the campaign it follows up.
    let changes = match campaign["follow_up_of"].as_str() {
        Some(_) => {
            let mut c = crate::followup::changes(store, id, None, 0).await?;
            if let Some(o) = c.as_object_mut() {
                for k in ["rows", "rows_total", "rows_truncated", "columns", "statuses", "envelope", "split_states"] {
                    o.remove(k);
                }
            }
            c
        }
        None => Value::Null,
    };
    Ok(json!({
        "report_version": 1,
        "caution": CAUTION,
        "campaign": campaign,
        "spec_name": doc["name"],
        "spec_hash": spec_hash,
        "model_sha256": models,
        "server_version": env!("CARGO_PKG_VERSION"),
        "engine_versions": engines,
        "generated_at_ms": now_ms(),
        "generated_at": iso8601(now_ms()),
        "created_at": campaign["created_at_ms"].as_i64().map(iso8601),
        "finished_at": campaign["finished_at_ms"].as_i64().map(iso8601),
        "horizon_periods": doc["horizon_periods"],
        "envelope": doc["envelope"],
        "split": doc["refinement"]["split"],
        "coverage": serde_json::to_value(&cov).map_err(ApiError::internal)?,
        "counterexamples": cex["counterexamples"],
        "changes": changes,
    }))
}

fn ms_text(v: &Value) -> String {
    match v.as_i64() {
        Some(ms) => iso8601(ms),
        None => "—".into(),
    }
}

/// UTC time `YYYY-MM-DDThh:mm:ss.sssZ` of `ms` milliseconds since the Unix epoch
/// (proleptic Gregorian calendar; days-to-civil conversion as in common practice).
pub fn iso8601(ms: i64) -> String {
    let days = ms.div_euclid(86_400_000);
    let rem = ms.rem_euclid(86_400_000);
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + if m <= 2 { 1 } else { 0 };
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}.{:03}Z",
        rem / 3_600_000,
        rem / 60_000 % 60,
        rem / 1000 % 60,
        rem % 1000
    )
}


/// The report as Markdown.
pub fn report_markdown(r: &Value) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let c = &r["campaign"];
    let _ = writeln!(s, "# Verification report: {}\n", r["spec_name"].as_str().unwrap_or("?"));
    let _ = writeln!(s, "> **Caution.** {}\n", CAUTION);
    let _ = writeln!(s, "| | |\n|---|---|");
    let _ = writeln!(s, "| Campaign | `{}` |", c["id"].as_str().unwrap_or(""));
    let _ = writeln!(s, "| State | {} |", c["state"].as_str().unwrap_or(""));
    let _ = writeln!(s, "| Spec SHA-256 | `{}` |", r["spec_hash"].as_str().unwrap_or(""));
    for (i, m) in r["model_sha256"].as_array().into_iter().flatten().enumerate() {
        let _ = writeln!(s, "| Network {i} SHA-256 | `{}` |", m.as_str().unwrap_or(""));
    }
    let _ = writeln!(s, "| Server version | {} |", r["server_version"].as_str().unwrap_or(""));
    let engines: Vec<&str> = r["engine_versions"].as_array().into_iter().flatten().filter_map(|v| v.as_str()).collect();
    let _ = writeln!(s, "| Engine version(s) | {} |", if engines.is_empty() { "none yet".into() } else { engines.join(", ") });
    let _ = writeln!(s, "| Horizon | {} control periods |", r["horizon_periods"]);
    let _ = writeln!(s, "| Envelope | `{}` |", r["envelope"]);
    let _ = writeln!(s, "| Split states | `{}` |", r["split"]);
    let _ = writeln!(s, "| Created | {} |", ms_text(&c["created_at_ms"]));
    let _ = writeln!(s, "| Finished | {} |", ms_text(&c["finished_at_ms"]));
    let _ = writeln!(s, "| Report generated | {} |\n", ms_text(&r["generated_at_ms"]));
    let cov = &r["coverage"];
    let _ = writeln!(s, "## Coverage of the envelope (over the split states)\n");
    let _ = writeln!(s, "| Status | Cells | Fraction | Exact |\n|---|---:|---:|---|");
    for st in CellStatus::LEAVES.map(CellStatus::api_name) {
        let x = &cov["statuses"][st];
        let _ = writeln!(
            s,
            "| {st} | {} | {:.6} | {} |",
            x["cells"],
            x["fraction"].as_f64().unwrap_or(0.0),
            x["reduced"].as_str().unwrap_or("")
        );
    }
    let _ = writeln!(
        s,
        "\nInternal (split) cells: {}. Results received: {}.\n",
        cov["split_cells"], cov["results"]
    );
    let _ = writeln!(s, "A fraction counts a cell at depth d as 2^-d of the envelope: cells are halves of halves.");
    let _ = writeln!(s, "Proven safe is a lower bound on the safe volume; {COUNTEREXAMPLE_NOTE}.\n");
    let ch = &r["changes"];
    if ch.is_object() {
        let _ = writeln!(s, "## Changes since campaign `{}`\n", ch["against"].as_str().unwrap_or(""));
        if ch["final"] != true {
            let _ = writeln!(s, "Provisional: one of the two campaigns has not finished; open cells count as pending or leased.\n");
        }
        let _ = writeln!(s, "| Before | Now | Fraction | Exact |\n|---|---|---:|---|");
        for t in ch["transitions"].as_array().into_iter().flatten() {
            let _ = writeln!(
                s,
                "| {} | {} | {:.6} | {} |",
                t["from"].as_str().unwrap_or(""),
                t["to"].as_str().unwrap_or(""),
                t["fraction"].as_f64().unwrap_or(0.0),
                t["reduced"].as_str().unwrap_or("")
            );
        }
        let sm = &ch["summary"];
        let _ = writeln!(
            s,
            "\nPreviously safe, now in counterexample cells: {}. No longer proven safe: {}. Newly proven safe: {}.\n",
            sm["safe_to_counterexample"]["reduced"].as_str().unwrap_or("?"),
            sm["no_longer_safe"]["reduced"].as_str().unwrap_or("?"),
            sm["newly_safe"]["reduced"].as_str().unwrap_or("?")
        );
        let _ = writeln!(s, "{}\n", ch["note"].as_str().unwrap_or(""));
    }
    let cex = r["counterexamples"].as_array().cloned().unwrap_or_default();
    let _ = writeln!(s, "## Counterexamples ({} shown)\n", cex.len());
    if cex.is_empty() {
        let _ = writeln!(s, "None found.");
    }
    for (i, x) in cex.iter().enumerate() {
        let _ = writeln!(s, "{}. cell `{}` (depth {}), box `{}`", i + 1, x["cell_id"].as_str().unwrap_or(""), x["depth"], x["box"]);
        if !x["reason"].is_null() {
            let _ = writeln!(s, "   - reason: {}", x["reason"]);
        }
        if !x["counterexample"].is_null() {
            let _ = writeln!(s, "   - counterexample: `{}`", x["counterexample"]);
        }
    }
    s
}

/// Check that the leaves tile the envelope exactly once: one root equal to the
/// envelope, every split cell has exactly two children that are its two halves,
/// no other cell has children, leaf volumes sum to 2^max_depth, and the stored
/// counters equal a recount.
pub async fn tiling_check(store: &Store, id: &str) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let rows = sqlx::query("SELECT id, parent_id, depth, box, status FROM cells WHERE campaign_id = ?")
        .bind(id)
        .fetch_all(&store.pool)
        .await?;
    struct C {
        parent: Option<String>,
        depth: u32,
        cell: CellBox,
        status: CellStatus,
        children: Vec<String>,
    }
    let mut cells: HashMap<String, C> = HashMap::with_capacity(rows.len());
    let mut problems: Vec<String> = Vec::new();
    for r in &rows {
        let b: Vec<u8> = r.try_get(3)?;
        let cid: String = r.try_get(0)?;
        let Some(cell) = refine::decode_box(&b) else {
            problems.push(format!("cell {cid}: corrupt box"));
            continue;
        };
        cells.insert(
            cid,
            C {
                parent: r.try_get(1)?,
                depth: r.try_get::<i64, _>(2)? as u32,
                cell,
                status: store::cell_status(&r.try_get::<String, _>(4)?)?,
                children: Vec::new(),
            },
        );
    }
    let links: Vec<(String, String)> =
        cells.iter().filter_map(|(k, c)| c.parent.clone().map(|p| (p, k.clone()))).collect();
    let mut roots = 0;
    for (k, c) in &cells {
        if c.parent.is_none() {
            roots += 1;
            if c.depth != 0 || c.cell != info.split_envelope {
                problems.push(format!("root {k} is not the envelope at depth 0"));
            }
        }
        if c.depth > info.max_depth {
            problems.push(format!("cell {k} is deeper ({}) than max_depth", c.depth));
        }
    }
    if roots != 1 {
        problems.push(format!("{roots} root cells (expected 1)"));
    }
    for (p, k) in links {
        match cells.get_mut(&p) {
            Some(pc) => pc.children.push(k),
            None => problems.push(format!("cell {k}: parent {p} missing")),
        }
    }
    let mut counts: HashMap<CellStatus, (i64, i64)> = HashMap::new();
    let mut leaf_volume: i64 = 0;
    for (k, c) in &cells {
        let vol = refine::volume(info.max_depth, c.depth.min(info.max_depth));
        let e = counts.entry(c.status).or_insert((0, 0));
        e.0 += 1;
        if c.status.is_leaf() {
            e.1 += vol;
        }
        if c.status == CellStatus::Split {
            if c.children.len() != 2 {
                problems.push(format!("split cell {k} has {} children (expected 2)", c.children.len()));
                continue;
            }
            let (a, b) = (&cells[&c.children[0]], &cells[&c.children[1]]);
            if a.depth != c.depth + 1 || b.depth != c.depth + 1 {
                problems.push(format!("children of {k} are not one level deeper"));
            }
            if refine::halves_of(&c.cell, &a.cell, &b.cell).is_none() {
                problems.push(format!("children of {k} are not its two halves"));
            }
        } else {
            leaf_volume += vol;
            if !c.children.is_empty() {
                problems.push(format!("leaf {k} ({}) has children", c.status.api_name()));
            }
        }
    }
    let total = refine::volume(info.max_depth, 0);
    if leaf_volume != total {
        problems.push(format!("leaf volumes sum to {leaf_volume}, expected {total}"));
    }
    let stored = store.counters(id).await?;
    let mut counters_match = true;
    for s in CellStatus::ALL {
        let a = stored.get(&s).copied().unwrap_or((0, 0));
        let b = counts.get(&s).copied().unwrap_or((0, 0));
        if a != b {
            counters_match = false;
            problems.push(format!("counter '{}' is {a:?} but a recount gives {b:?}", s.as_str()));
        }
    }
    let n_problems = problems.len();
    problems.truncate(50);
    Ok(json!({
        "campaign_id": id,
        "ok": n_problems == 0,
        "cells": cells.len(),
        "leaves": cells.values().filter(|c| c.status.is_leaf()).count(),
        "leaf_volume": leaf_volume,
        "total_volume": total,
        "counters_match": counters_match,
        "problem_count": n_problems,
        "problems": problems,
    }))
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

#[cfg(test)]
mod tests {
    #[test]
    fn iso_times() {
        // Expected values from Python's datetime (fromisoformat(...).timestamp()).
        assert_eq!(super::iso8601(0), "1970-01-01T00:00:00.000Z");
        assert_eq!(super::iso8601(951_782_400_000), "2000-02-29T00:00:00.000Z");
        assert_eq!(super::iso8601(1_796_174_780_123), "2026-12-02T01:26:20.123Z");
        assert_eq!(super::iso8601(946_684_799_999), "1999-12-31T23:59:59.999Z");
    }
}
