//! The work queue: leasing cells in batches, extending leases, accepting results and
//! refining cells. Every batch is one transaction, and the per-status counters move
//! in the same transaction as the cells.

use crate::error::{ApiError, ApiResult};
use crate::refine::{self, CellBox};
use crate::store::{now_ms, CampaignInfo, Deltas, Store};
use serde::{Deserialize, Serialize};
use sqlx::{Row, Sqlite, Transaction};
use std::collections::{HashMap, HashSet};
use std::sync::Arc;

/// Rows per multi-row statement (keeps bound parameters well under SQLite's limit).
const CHUNK: usize = 500;

/// Queue settings the operations need.
#[derive(Clone, Copy, Debug)]
pub struct QueueLimits {
    pub lease_ms: i64,
    /// Results reporting an engine error after which a cell is `failed`.
    pub max_attempts: u32,
    /// Leases run out without a result after which a cell is `failed`.
    pub max_expiries: u32,
    pub max_cells_per_campaign: u64,
}

fn tuples(rows: usize, cols: usize) -> String {
    let one = format!("({})", vec!["?"; cols].join(", "));
    vec![one; rows].join(", ")
}

// ------------------------------------------------------------------ leasing

/// One leased cell, as handed to a worker.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct LeasedCell {
    pub cell_id: String,
    pub lease_id: String,
    pub campaign_id: String,
    pub spec_hash: String,
    pub depth: u32,
    /// `{"state": [lo, hi]}` for every state of the spec.
    #[serde(rename = "box")]
    pub cell_box: serde_json::Map<String, serde_json::Value>,
    /// Lease expiry, milliseconds since the Unix epoch.
    pub expires_at_ms: i64,
}

/// What [`lease`] did besides leasing.
#[derive(Debug, Default, Clone, Copy)]
pub struct LeaseStats {
    pub reclaimed: u64,
}

/// Lease up to `max` pending cells of running campaigns: higher campaign priority
/// first, then shallower (larger) cells, then older ones. Expired leases are returned
/// to the queue first, in the same transaction.
pub async fn lease(
    store: &Store,
    limits: QueueLimits,
    max: u32,
    worker: &str,
    only_campaign: Option<&str>,
) -> ApiResult<(Vec<LeasedCell>, LeaseStats)> {
    let mut w = store.write().await?;
    let now = now_ms();
    let mut deltas = Deltas::default();
    let reclaimed = reclaim_expired_in(store, &mut w.tx, limits, now, &mut deltas).await?;

    let campaigns: Vec<String> = match only_campaign {
        Some(c) => sqlx::query_scalar("SELECT id FROM campaigns WHERE id = ? AND state = 'running'")
            .bind(c)
            .fetch_all(&mut *w.tx)
            .await?,
        None => sqlx::query_scalar(
            "SELECT id FROM campaigns WHERE state = 'running' ORDER BY priority DESC, created_at ASC, id ASC",
        )
        .fetch_all(&mut *w.tx)
        .await?,
    };
    let expires = now + limits.lease_ms;
    let mut out = Vec::new();
    for cid in campaigns {
        let want = max as usize - out.len();
        if want == 0 {
            break;
        }
        let Some(info) = store.info(&cid).await? else { continue };
        let rows = sqlx::query(
            "SELECT rowid, id, depth, box FROM cells WHERE campaign_id = ? AND status = 'pending'
             ORDER BY depth ASC, rowid ASC LIMIT ?",
        )
        .bind(&cid)
        .bind(want as i64)
        .fetch_all(&mut *w.tx)
        .await?;
        if rows.is_empty() {
            continue;
        }
        let mut picked = Vec::with_capacity(rows.len());
        for r in &rows {
            let rowid: i64 = r.try_get(0)?;
            let id: String = r.try_get(1)?;
            let depth: i64 = r.try_get(2)?;
            let b: Vec<u8> = r.try_get(3)?;
            let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal(format!("cell {id}: corrupt box")))?;
            let lease_id = uuid::Uuid::new_v4().to_string();
            deltas.moved(&cid, "pending", "leased", refine::volume(info.max_depth, depth as u32));
            out.push(LeasedCell {
                cell_id: id,
                lease_id: lease_id.clone(),
                campaign_id: cid.clone(),
                spec_hash: info.spec_hash.clone(),
                depth: depth as u32,
                cell_box: info.full_box(&cell),
                expires_at_ms: expires,
            });
            picked.push((rowid, lease_id));
        }
        for chunk in picked.chunks(CHUNK) {
            let sql = format!(
                "UPDATE cells SET status = 'leased', lease_id = v.column2, lease_expires_at = ?, leased_by = ?,
                 leased_at = ?, updated_at = ? FROM (VALUES {}) AS v WHERE cells.rowid = v.column1",
                tuples(chunk.len(), 2)
            );
            let mut q = sqlx::query(&sql).bind(expires).bind(worker).bind(now).bind(now);
            for (rowid, lid) in chunk {
                q = q.bind(*rowid).bind(lid.as_str());
            }
            q.execute(&mut *w.tx).await?;
        }
    }
    deltas.apply(&mut w.tx).await?;
    w.commit().await?;
    Ok((out, LeaseStats { reclaimed }))
}

/// A lease that ended without a result, to return to the queue.
struct Ending {
    rowid: i64,
    cell_id: String,
    campaign_id: String,
    depth: u32,
    expiries: i64,
    lease_id: String,
}

/// The columns [`Ending::from_row`] reads.
const ENDING_COLS: &str = "rowid, id, campaign_id, depth, expiries, lease_id";

impl Ending {
    /// From a row of `SELECT {ENDING_COLS} FROM cells`.
    fn from_row(r: &sqlx::sqlite::SqliteRow) -> ApiResult<Ending> {
        Ok(Ending {
            rowid: r.try_get(0)?,
            cell_id: r.try_get(1)?,
            campaign_id: r.try_get(2)?,
            depth: r.try_get::<i64, _>(3)? as u32,
            expiries: r.try_get(4)?,
            lease_id: r.try_get::<Option<String>, _>(5)?.unwrap_or_default(),
        })
    }
}

/// Return leases that expired before `now` to the queue (or mark their cells
/// `failed` once they have outlived `max_expiries` leases). Returns how many.
pub async fn reclaim_expired(store: &Store, limits: QueueLimits) -> ApiResult<u64> {
    let mut w = store.write().await?;
    let mut deltas = Deltas::default();
    let n = reclaim_expired_in(store, &mut w.tx, limits, now_ms(), &mut deltas).await?;
    deltas.apply(&mut w.tx).await?;
    w.commit().await?;
    Ok(n)
}

async fn reclaim_expired_in(
    store: &Store,
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    now: i64,
    deltas: &mut Deltas,
) -> ApiResult<u64> {
    let rows = sqlx::query(&format!("SELECT {ENDING_COLS} FROM cells WHERE status = 'leased' AND lease_expires_at < ?"))
    .bind(now)
    .fetch_all(&mut **tx)
    .await?;
    let mut ends = Vec::with_capacity(rows.len());
    for r in rows {
        ends.push(Ending::from_row(&r)?);
    }
    let n = ends.len() as u64;
    end_leases(store, tx, limits, now, ends, "expired", deltas).await?;
    Ok(n)
}

/// End leases without a result. `expired` counts one expiry (not a failed attempt:
/// the worker may have been killed, or the server or the network away, through no
/// fault of the cell); `withdrawn` (campaign cancelled) and `released` (worker
/// stopping) count nothing.
async fn end_leases(
    store: &Store,
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    now: i64,
    ends: Vec<Ending>,
    reason: &'static str,
    deltas: &mut Deltas,
) -> ApiResult<()> {
    for chunk in ends.chunks(CHUNK) {
        let mut rows = Vec::new();
        for e in chunk {
            let info = store
                .info(&e.campaign_id)
                .await?
                .ok_or_else(|| ApiError::internal(format!("cell {} has no campaign", e.cell_id)))?;
            let vol = refine::volume(info.max_depth, e.depth);
            let (expiries, status, error) = if reason == "expired" {
                let n = e.expiries + 1;
                if n >= limits.max_expiries as i64 {
                    (n, "failed", Some(format!("{n} leases of this cell expired without a result")))
                } else {
                    (n, "pending", None)
                }
            } else {
                (e.expiries, "pending", None)
            };
            deltas.moved(&e.campaign_id, "leased", status, vol);
            rows.push((e.rowid, status, expiries, error));
        }
        let sql = format!(
            "UPDATE cells SET status = v.column2, expiries = v.column3, last_error = COALESCE(v.column4, last_error),
             lease_id = NULL, lease_expires_at = NULL, leased_by = NULL, updated_at = ?
             FROM (VALUES {}) AS v WHERE cells.rowid = v.column1",
            tuples(rows.len(), 4)
        );
        let mut q = sqlx::query(&sql).bind(now);
        for (rowid, status, expiries, error) in &rows {
            q = q.bind(*rowid).bind(*status).bind(*expiries).bind(error.clone());
        }
        q.execute(&mut **tx).await?;
        let sql = format!(
            "INSERT OR IGNORE INTO ended_leases (lease_id, cell_id, reason, ended_at) VALUES {}",
            tuples(chunk.len(), 4)
        );
        let mut q = sqlx::query(&sql);
        for e in chunk {
            q = q.bind(e.lease_id.as_str()).bind(e.cell_id.as_str()).bind(reason).bind(now);
        }
        q.execute(&mut **tx).await?;
    }
    Ok(())
}

/// Give leases back unfinished (a worker stopping): the cells return to `pending`
/// without counting a failed attempt. Per lease: `released`, or why it is not held
/// (`completed`, `expired`, `withdrawn`, `released`, `unknown_lease`).
pub async fn release(store: &Store, limits: QueueLimits, lease_ids: &[String]) -> ApiResult<Vec<ExtendItem>> {
    let mut w = store.write().await?;
    let mut deltas = Deltas::default();
    let mut ends = Vec::new();
    for chunk in lease_ids.chunks(CHUNK) {
        let sql = format!(
            "SELECT {ENDING_COLS} FROM cells WHERE status = 'leased' AND lease_id IN ({})",
            vec!["?"; chunk.len()].join(", ")
        );
        let mut q = sqlx::query(&sql);
        for l in chunk {
            q = q.bind(l.as_str());
        }
        for r in q.fetch_all(&mut *w.tx).await? {
            ends.push(Ending::from_row(&r)?);
        }
    }
    let released: HashSet<String> = ends.iter().map(|e| e.lease_id.clone()).collect();
    end_leases(store, &mut w.tx, limits, now_ms(), ends, "released", &mut deltas).await?;
    deltas.apply(&mut w.tx).await?;
    let mut out = Vec::with_capacity(lease_ids.len());
    for l in lease_ids {
        let status = if released.contains(l) { "released" } else { ended_status(&mut w.tx, l).await? };
        out.push(ExtendItem { lease_id: l.clone(), status: status.into(), expires_at_ms: None });
    }
    w.commit().await?;
    Ok(out)
}

/// Withdraw every lease of a campaign (at cancel): the cells go back to `pending`,
/// late results for those leases are answered `withdrawn`.
pub async fn withdraw_leases(
    store: &Store,
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    campaign: &str,
    deltas: &mut Deltas,
) -> ApiResult<()> {
    let rows = sqlx::query(&format!("SELECT {ENDING_COLS} FROM cells WHERE campaign_id = ? AND status = 'leased'"))
    .bind(campaign)
    .fetch_all(&mut **tx)
    .await?;
    let mut ends = Vec::new();
    for r in rows {
        ends.push(Ending::from_row(&r)?);
    }
    end_leases(store, tx, limits, now_ms(), ends, "withdrawn", deltas).await
}

// ------------------------------------------------------------------ extending

/// Per-lease answer of an extend request.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ExtendItem {
    pub lease_id: String,
    /// `extended`, `expired`, `withdrawn`, `completed` or `unknown_lease`.
    pub status: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub expires_at_ms: Option<i64>,
}

/// Push the expiry of each lease still held to now + lease time. A lease that ran
/// out but was not swept yet is held still (nobody else has the cell) and is
/// extended too: after an outage longer than the lease, the worker keeps its cells.
pub async fn extend(store: &Store, limits: QueueLimits, lease_ids: &[String]) -> ApiResult<Vec<ExtendItem>> {
    let mut w = store.write().await?;
    let now = now_ms();
    let expires = now + limits.lease_ms;
    let mut extended = HashSet::new();
    for chunk in lease_ids.chunks(CHUNK) {
        let sql = format!(
            "UPDATE cells SET lease_expires_at = ?, updated_at = ? WHERE status = 'leased'
             AND lease_id IN ({}) RETURNING lease_id",
            vec!["?"; chunk.len()].join(", ")
        );
        let mut q = sqlx::query_scalar::<_, String>(&sql).bind(expires).bind(now);
        for l in chunk {
            q = q.bind(l.as_str());
        }
        extended.extend(q.fetch_all(&mut *w.tx).await?);
    }
    let mut out = Vec::with_capacity(lease_ids.len());
    for l in lease_ids {
        if extended.contains(l) {
            out.push(ExtendItem { lease_id: l.clone(), status: "extended".into(), expires_at_ms: Some(expires) });
        } else {
            let status = ended_status(&mut w.tx, l).await?;
            out.push(ExtendItem { lease_id: l.clone(), status: status.into(), expires_at_ms: None });
        }
    }
    w.commit().await?;
    Ok(out)
}

/// Why a lease id is not held by any cell: `completed`, `expired`, `withdrawn`,
/// `released` or `unknown_lease`.
async fn ended_status(tx: &mut Transaction<'static, Sqlite>, lease_id: &str) -> ApiResult<&'static str> {
    let done: Option<i64> =
        sqlx::query_scalar("SELECT 1 FROM results WHERE lease_id = ?").bind(lease_id).fetch_optional(&mut **tx).await?;
    if done.is_some() {
        return Ok("completed");
    }
    let ended: Option<String> = sqlx::query_scalar("SELECT reason FROM ended_leases WHERE lease_id = ?")
        .bind(lease_id)
        .fetch_optional(&mut **tx)
        .await?;
    if let Some(r) = ended {
        return Ok(match r.as_str() {
            "withdrawn" => "withdrawn",
            "released" => "released",
            _ => "expired",
        });
    }
    let held: Option<i64> = sqlx::query_scalar("SELECT 1 FROM cells WHERE lease_id = ? AND status = 'leased'")
        .bind(lease_id)
        .fetch_optional(&mut **tx)
        .await?;
    Ok(if held.is_some() { "expired" } else { "unknown_lease" })
}

// ------------------------------------------------------------------ results

/// One result in a submission.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SubmitItem {
    pub lease_id: String,
    /// Optional; when given it must be the leased cell's id (a cross-check).
    #[serde(default)]
    pub cell_id: Option<String>,
    /// The engine's verdict JSON (`{"verdict": …, "split_hint": …, …}`), or
    /// `{"error": "text"}` for a failed attempt. Stored as given.
    pub result: serde_json::Value,
    /// Time the worker spent on the cell, milliseconds.
    #[serde(default)]
    pub elapsed_ms: Option<f64>,
}

/// Per-result answer of a submission.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct SubmitAnswer {
    pub lease_id: String,
    /// `accepted`; or, with nothing recorded: `duplicate` (already answered),
    /// `expired` (the lease ran out and the cell was leased again or decided since; a
    /// result for an expired lease whose cell nobody else took is accepted), `withdrawn`
    /// (campaign cancelled), `unknown_lease`, `invalid` (bad result JSON).
    pub status: String,
    /// Status of the cell after an accepted result.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub cell_status: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub detail: Option<String>,
}

/// What an accepted result says, as far as refinement cares.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    Safe,
    Unsafe,
    /// With the hinted state name, if any.
    Inconclusive(Option<String>),
    Error(String),
}

impl Outcome {
    fn kind(&self) -> &'static str {
        match self {
            Outcome::Safe => "safe",
            Outcome::Unsafe => "unsafe",
            Outcome::Inconclusive(_) => "inconclusive",
            Outcome::Error(_) => "error",
        }
    }
}

/// Read `verdict` and `split_hint.dim` (or `error`) from a result; the rest is not
/// interpreted.
pub fn classify(v: &serde_json::Value) -> Result<Outcome, String> {
    let obj = v.as_object().ok_or("result must be a JSON object")?;
    match (obj.get("verdict"), obj.get("error")) {
        (None, Some(e)) => {
            let text = e.as_str().ok_or("result.error must be a string")?;
            Ok(Outcome::Error(text.chars().take(4000).collect()))
        }
        (Some(verdict), None) => match verdict.as_str() {
            Some("safe") => Ok(Outcome::Safe),
            Some("unsafe") => Ok(Outcome::Unsafe),
            Some("inconclusive") => {
                let hint = match obj.get("split_hint") {
                    None | Some(serde_json::Value::Null) => None,
                    Some(h) => match h.get("dim") {
                        Some(serde_json::Value::String(s)) => Some(s.clone()),
                        _ => return Err("result.split_hint must be null or an object with a string 'dim'".into()),
                    },
                };
                Ok(Outcome::Inconclusive(hint))
            }
            _ => Err("result.verdict must be \"safe\", \"unsafe\" or \"inconclusive\"".into()),
        },
        (Some(_), Some(_)) => Err("result has both 'verdict' and 'error'".into()),
        (None, None) => Err("result needs 'verdict' (or 'error' for a failed attempt)".into()),
    }
}

/// Counts of what a submission did.
#[derive(Debug, Default, Clone, Copy)]
pub struct SubmitStats {
    pub accepted: u64,
    pub rejected: u64,
    pub cells_created: u64,
}

/// A cell a submitted result may decide: held by the result's lease (`leased`, even
/// if the lease ran out and was not swept yet), or returned to the queue when that
/// lease expired and not leased again since (`pending`).
struct HeldCell {
    rowid: i64,
    id: String,
    campaign_id: String,
    depth: u32,
    cell: CellBox,
    /// `leased` or `pending`: the counter the cell leaves.
    from: &'static str,
    attempts: i64,
    leased_at: Option<i64>,
    /// A follow-up's re-joined cell: cut here, into the earlier halves, unless safe.
    coarse_dim: Option<usize>,
}

/// Accept a batch of results (each at most once, by lease id) and refine the cells.
pub async fn submit(
    store: &Store,
    limits: QueueLimits,
    worker: &str,
    engine_version: Option<&str>,
    items: &[SubmitItem],
) -> ApiResult<(Vec<SubmitAnswer>, SubmitStats)> {
    let mut answers: Vec<Option<SubmitAnswer>> = vec![None; items.len()];
    let mut outcomes: Vec<Option<Outcome>> = vec![None; items.len()];
    let mut seen = HashSet::new();
    for (i, it) in items.iter().enumerate() {
        if !seen.insert(it.lease_id.as_str()) {
            answers[i] = Some(reject(it, "duplicate", "this lease appears earlier in the same batch"));
            continue;
        }
        match classify(&it.result) {
            Ok(o) => outcomes[i] = Some(o),
            Err(m) => answers[i] = Some(reject(it, "invalid", &m)),
        }
    }

    let mut w = store.write().await?;
    let now = now_ms();
    let mut deltas = Deltas::default();

    // The cells holding these leases.
    let wanted: Vec<&str> =
        items.iter().zip(&outcomes).filter(|(_, o)| o.is_some()).map(|(it, _)| it.lease_id.as_str()).collect();
    let mut held: HashMap<String, HeldCell> = HashMap::new();
    // Held by the lease itself; then, for leases not found so, cells whose lease
    // expired, were swept back to the queue and were not leased again (nobody else
    // holds them), in campaigns still open, for leases without a result yet.
    const HELD: &str = "SELECT rowid, id, campaign_id, depth, box, status, attempts, leased_at, lease_id, coarse_dim
         FROM cells WHERE status = 'leased' AND lease_id IN";
    const SWEPT: &str =
        "SELECT c.rowid, c.id, c.campaign_id, c.depth, c.box, c.status, c.attempts, c.leased_at, e.lease_id, c.coarse_dim
         FROM ended_leases e JOIN cells c ON c.id = e.cell_id JOIN campaigns k ON k.id = c.campaign_id
         WHERE e.reason = 'expired' AND c.status = 'pending' AND k.state IN ('running', 'paused')
         AND NOT EXISTS (SELECT 1 FROM results r WHERE r.lease_id = e.lease_id) AND e.lease_id IN";
    for pass in [HELD, SWEPT] {
        let ids: Vec<&str> = wanted.iter().copied().filter(|l| !held.contains_key(*l)).collect();
        for chunk in ids.chunks(CHUNK) {
            let sql = format!("{pass} ({})", vec!["?"; chunk.len()].join(", "));
            let mut q = sqlx::query(&sql);
            for l in chunk {
                q = q.bind(*l);
            }
            for r in q.fetch_all(&mut *w.tx).await? {
                let id: String = r.try_get(1)?;
                let b: Vec<u8> = r.try_get(4)?;
                let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal(format!("cell {id}: corrupt box")))?;
                let from = if r.try_get::<String, _>(5)? == "leased" { "leased" } else { "pending" };
                held.entry(r.try_get(8)?).or_insert(HeldCell {
                    rowid: r.try_get(0)?,
                    id,
                    campaign_id: r.try_get(2)?,
                    depth: r.try_get::<i64, _>(3)? as u32,
                    cell,
                    from,
                    attempts: r.try_get(6)?,
                    leased_at: r.try_get(7)?,
                    coarse_dim: r.try_get::<Option<i64>, _>(9)?.and_then(|d| usize::try_from(d).ok()),
                });
            }
        }
    }

    // Room left under the cell limit, per campaign.
    let mut room: HashMap<String, i64> = HashMap::new();
    let mut infos: HashMap<String, Arc<CampaignInfo>> = HashMap::new();
    for h in held.values() {
        if !infos.contains_key(&h.campaign_id) {
            let info = store
                .info(&h.campaign_id)
                .await?
                .ok_or_else(|| ApiError::internal(format!("cell {} has no campaign", h.id)))?;
            let total: i64 =
                sqlx::query_scalar("SELECT COALESCE(SUM(cells), 0) FROM campaign_counters WHERE campaign_id = ?")
                    .bind(&h.campaign_id)
                    .fetch_one(&mut *w.tx)
                    .await?;
            room.insert(h.campaign_id.clone(), limits.max_cells_per_campaign as i64 - total);
            infos.insert(h.campaign_id.clone(), info);
        }
    }

    let mut result_rows = Vec::new();
    let mut cell_rows = Vec::new();
    let mut children = Vec::new();
    // A cell takes one result per batch (two expired leases of one cell may both answer).
    let mut decided: HashSet<String> = HashSet::new();
    let mut per_campaign: HashMap<String, i64> = HashMap::new();
    let mut stats = SubmitStats::default();
    for (i, it) in items.iter().enumerate() {
        let Some(outcome) = outcomes[i].take() else { continue };
        let Some(h) = held.remove(&it.lease_id) else {
            let status = ended_status(&mut w.tx, &it.lease_id).await?;
            let status = if status == "completed" { "duplicate" } else { status };
            let detail = match status {
                "duplicate" => "a result for this lease was already accepted; this one is ignored",
                "expired" => "the lease expired and its cell was leased again, or decided, before the result arrived",
                "withdrawn" => "the campaign was cancelled; the result is ignored",
                "released" => "the worker released this lease; the cell went back to the queue",
                _ => "no such lease",
            };
            answers[i] = Some(reject(it, status, detail));
            continue;
        };
        if it.cell_id.as_ref().is_some_and(|c| *c != h.id) {
            answers[i] = Some(reject(it, "invalid", &format!("this lease is for cell {}, not the cell_id given", h.id)));
            continue;
        }
        if !decided.insert(h.id.clone()) {
            answers[i] = Some(reject(it, "expired", "the lease expired and another result for its cell came first"));
            continue;
        }
        let info = &infos[&h.campaign_id];
        let vol = refine::volume(info.max_depth, h.depth);
        let result_id = uuid::Uuid::new_v4().to_string();
        let mut attempts = h.attempts;
        let mut error = None;
        let mut split_dim = None;
        let can_split = |room: &mut HashMap<String, i64>| -> bool {
            let r = room.entry(h.campaign_id.clone()).or_insert(0);
            if *r >= 2 {
                *r -= 2;
                true
            } else {
                false
            }
        };
        let status: &'static str = match &outcome {
            Outcome::Safe => "safe",
            Outcome::Error(text) => {
                attempts += 1;
                error = Some(text.clone());
                if attempts >= limits.max_attempts as i64 {
                    "failed"
                } else {
                    "pending"
                }
            }
            Outcome::Unsafe | Outcome::Inconclusive(_) => {
                // A re-joined cell of a follow-up that is not proven safe falls back to
                // the earlier campaign's two halves, whatever the verdict.
                let coarse = h.coarse_dim.filter(|&d| d < h.cell.len());
                let wants_split = matches!(outcome, Outcome::Inconclusive(_)) || info.refine_unsafe || coarse.is_some();
                let final_status = if matches!(outcome, Outcome::Unsafe) { "unsafe" } else { "unresolved" };
                let hint = match &outcome {
                    Outcome::Inconclusive(Some(name)) => {
                        info.split.iter().position(|&k| info.states.get(k) == Some(name))
                    }
                    _ => None,
                };
                match coarse.or_else(|| refine::choose_dim(&h.cell, &info.split_envelope, hint)) {
                    Some(d) if wants_split && h.depth < info.max_depth && can_split(&mut room) => {
                        match refine::bisect(&h.cell, d) {
                            Some((a, b)) => {
                                split_dim = Some(d as i64);
                                children.push((h.campaign_id.clone(), h.id.clone(), h.depth + 1, a));
                                children.push((h.campaign_id.clone(), h.id.clone(), h.depth + 1, b));
                                deltas.add(&h.campaign_id, "pending", 2, vol);
                                "split"
                            }
                            None => final_status,
                        }
                    }
                    _ => final_status,
                }
            }
        };
        // A split node leaves the leaf volume (its halves were added above). Internal
        // nodes are counted but carry no volume: their volumes would sum to more
        // than the envelope (and overflow i64 for deep trees).
        if status == "split" {
            deltas.add(&h.campaign_id, h.from, -1, -vol);
            deltas.add(&h.campaign_id, "split", 1, 0);
        } else {
            deltas.moved(&h.campaign_id, h.from, status, vol);
        }
        if !matches!(outcome, Outcome::Error(_)) {
            *per_campaign.entry(h.campaign_id.clone()).or_insert(0) += 1;
        }
        result_rows.push((
            result_id.clone(),
            h.campaign_id.clone(),
            h.id.clone(),
            it.lease_id.clone(),
            outcome.kind(),
            it.result.to_string(),
            it.elapsed_ms.filter(|v| v.is_finite()),
            h.leased_at,
        ));
        cell_rows.push((h.rowid, status, split_dim, attempts, error, result_id));
        stats.accepted += 1;
        answers[i] = Some(SubmitAnswer {
            lease_id: it.lease_id.clone(),
            status: "accepted".into(),
            cell_status: Some(status.into()),
            detail: None,
        });
    }

    for chunk in result_rows.chunks(CHUNK) {
        let sql = format!(
            "INSERT INTO results (id, campaign_id, cell_id, lease_id, worker, kind, verdict_json, engine_version,
             elapsed_ms, leased_at, received_at) VALUES {}",
            tuples(chunk.len(), 11)
        );
        let mut q = sqlx::query(&sql);
        for (id, cid, cell, lease, kind, json, elapsed, leased_at) in chunk {
            q = q
                .bind(id.as_str())
                .bind(cid.as_str())
                .bind(cell.as_str())
                .bind(lease.as_str())
                .bind(worker)
                .bind(*kind)
                .bind(json.as_str())
                .bind(engine_version)
                .bind(*elapsed)
                .bind(*leased_at)
                .bind(now);
        }
        q.execute(&mut *w.tx).await?;
    }
    for chunk in cell_rows.chunks(CHUNK) {
        let sql = format!(
            "UPDATE cells SET status = v.column2, split_dim = v.column3, attempts = v.column4,
             last_error = COALESCE(v.column5, last_error), result_id = v.column6,
             lease_id = NULL, lease_expires_at = NULL, leased_by = NULL, updated_at = ?
             FROM (VALUES {}) AS v WHERE cells.rowid = v.column1",
            tuples(chunk.len(), 6)
        );
        let mut q = sqlx::query(&sql).bind(now);
        for (rowid, status, dim, attempts, error, rid) in chunk {
            q = q.bind(*rowid).bind(*status).bind(*dim).bind(*attempts).bind(error.clone()).bind(rid.as_str());
        }
        q.execute(&mut *w.tx).await?;
    }
    stats.cells_created = children.len() as u64;
    insert_cells(&mut w.tx, &children, now).await?;
    for (cid, n) in &per_campaign {
        sqlx::query(
            "UPDATE campaigns SET results_count = results_count + ?, first_result_at = COALESCE(first_result_at, ?),
             last_result_at = ?, updated_at = ? WHERE id = ?",
        )
        .bind(n)
        .bind(now)
        .bind(now)
        .bind(now)
        .bind(cid)
        .execute(&mut *w.tx)
        .await?;
    }
    deltas.apply(&mut w.tx).await?;
    w.commit().await?;

    let answers: Vec<SubmitAnswer> = answers.into_iter().flatten().collect();
    stats.rejected = answers.len() as u64 - stats.accepted;
    Ok((answers, stats))
}

fn reject(it: &SubmitItem, status: &str, detail: &str) -> SubmitAnswer {
    SubmitAnswer {
        lease_id: it.lease_id.clone(),
        status: status.into(),
        cell_status: None,
        detail: Some(detail.into()),
    }
}

/// Insert new `pending` cells `(campaign, parent, depth, box)` (counters are the
/// caller's job). Returns their ids.
pub async fn insert_cells(
    tx: &mut Transaction<'static, Sqlite>,
    cells: &[(String, String, u32, CellBox)],
    now: i64,
) -> ApiResult<Vec<String>> {
    let mut ids = Vec::with_capacity(cells.len());
    for chunk in cells.chunks(CHUNK) {
        let sql = format!(
            "INSERT INTO cells (id, campaign_id, parent_id, depth, box, status, created_at, updated_at) VALUES {}",
            tuples(chunk.len(), 8)
        );
        let mut q = sqlx::query(&sql);
        for (cid, parent, depth, b) in chunk {
            let id = uuid::Uuid::new_v4().to_string();
            let parent = if parent.is_empty() { None } else { Some(parent.clone()) };
            q = q
                .bind(id.clone())
                .bind(cid.as_str())
                .bind(parent)
                .bind(*depth as i64)
                .bind(refine::encode_box(b))
                .bind("pending")
                .bind(now)
                .bind(now);
            ids.push(id);
        }
        q.execute(&mut **tx).await?;
    }
    Ok(ids)
}
