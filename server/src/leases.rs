//! The work queue: leasing cells in batches, extending leases, accepting results and
//! refining cells. Each operation here runs inside a transaction its caller owns
//! (`*_in`): the group writer (`crate::writer`) runs many requests in one transaction.
//! Leasing and accepting results serve several requests in one call (a few statements
//! for all of them). The per-status counter changes of an operation are collected in a
//! [`Deltas`] that the caller applies in the same transaction.

use crate::error::{ApiError, ApiResult};
use crate::refine::{self, CellBox};
use crate::store::{now_ms, CampaignInfo, Deltas, Store};
use sqlx::{Row, Sqlite, Transaction};
use std::collections::{HashMap, HashSet};
use std::sync::Arc;
use tessera_protocol::{CampaignState, CellStatus, ItemAnswer, LeaseStatus, LeasedCell, Outcome, ResultItem};

/// Rows per multi-row statement at most (the widest, the results insert, binds 11
/// parameters per row: 2,816, well under SQLite's limit of 32,766).
const CHUNK: usize = 256;

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

/// `rows` cut into statements of fixed sizes: full [`CHUNK`]s, then the rest in one
/// statement of the next power of two at or above its length, whose free rows the
/// caller fills with NULLs that match or insert nothing. A multi-row statement then
/// has at most nine SQL texts (1, 2, 4, … 256 rows), each prepared once and kept in
/// the connection's statement cache, instead of one text per batch length.
fn fixed_chunks<T>(rows: &[T]) -> impl Iterator<Item = (&[T], usize)> {
    rows.chunks(CHUNK).map(|c| (c, c.len().next_power_of_two()))
}

/// `(?, ?, …), (?, ?, …), …`: `rows` tuples of `cols` parameters.
fn tuples(rows: usize, cols: usize) -> String {
    let one = format!("({})", vec!["?"; cols].join(", "));
    vec![one; rows].join(", ")
}

/// `?, ?, …`: `n` parameters (an `IN` list; free places are bound to NULL, which
/// never matches).
fn params(n: usize) -> String {
    vec!["?"; n].join(", ")
}

/// Bind `n` NULLs (the free rows of a fixed-size statement).
fn bind_nulls<'q>(
    mut q: sqlx::query::Query<'q, Sqlite, sqlx::sqlite::SqliteArguments<'q>>,
    n: usize,
) -> sqlx::query::Query<'q, Sqlite, sqlx::sqlite::SqliteArguments<'q>> {
    for _ in 0..n {
        q = q.bind(None::<i64>);
    }
    q
}

// ------------------------------------------------------------------ leasing

/// What [`lease_in`] did besides leasing.
#[derive(Debug, Default, Clone, Copy)]
pub struct LeaseStats {
    pub reclaimed: u64,
}

/// One lease request: up to `max` cells for `worker`.
#[derive(Debug, Clone, Copy)]
pub struct Want<'a> {
    pub max: u32,
    pub worker: &'a str,
}

/// Lease pending cells of running campaigns (of `only_campaign` alone, if given) for
/// several requests at once: higher campaign priority first, then shallower (larger)
/// cells, then older ones; the first request takes its share of that order first.
/// Expired leases are returned to the queue first, in the same transaction. Returns
/// the cells of each request, in the order of `wants`.
pub async fn lease_in(
    store: &Store,
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    wants: &[Want<'_>],
    only_campaign: Option<&str>,
    deltas: &mut Deltas,
) -> ApiResult<(Vec<Vec<LeasedCell>>, LeaseStats)> {
    let now = now_ms();
    let reclaimed = reclaim_expired_in(store, tx, limits, now, deltas).await?;

    let campaigns: Vec<String> = match only_campaign {
        Some(c) => sqlx::query_scalar("SELECT id FROM campaigns WHERE id = ? AND state = ?")
            .bind(c)
            .bind(CampaignState::Running.as_str())
            .fetch_all(&mut **tx)
            .await?,
        None => sqlx::query_scalar("SELECT id FROM campaigns WHERE state = ? ORDER BY priority DESC, created_at ASC, id ASC")
            .bind(CampaignState::Running.as_str())
            .fetch_all(&mut **tx)
            .await?,
    };
    let expires = now + limits.lease_ms;
    let mut out: Vec<Vec<LeasedCell>> = vec![Vec::new(); wants.len()];
    // The request being served, and what it still wants.
    let mut k = 0;
    let total: usize = wants.iter().map(|w| w.max as usize).sum();
    let mut given = 0;
    for cid in campaigns {
        let want = total - given;
        if want == 0 {
            break;
        }
        let Some(info) = store.info(&cid).await? else { continue };
        let rows = sqlx::query(
            "SELECT rowid, id, depth, box FROM cells WHERE campaign_id = ? AND status = ?
             ORDER BY depth ASC, rowid ASC LIMIT ?",
        )
        .bind(&cid)
        .bind(CellStatus::Pending.as_str())
        .bind(want as i64)
        .fetch_all(&mut **tx)
        .await?;
        if rows.is_empty() {
            continue;
        }
        let mut picked = Vec::with_capacity(rows.len());
        for r in &rows {
            while out[k].len() >= wants[k].max as usize {
                k += 1;
            }
            let rowid: i64 = r.try_get(0)?;
            let id: String = r.try_get(1)?;
            let depth: i64 = r.try_get(2)?;
            let b: Vec<u8> = r.try_get(3)?;
            let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal(format!("cell {id}: corrupt box")))?;
            let lease_id = crate::store::new_id();
            deltas.moved(&cid, CellStatus::Pending, CellStatus::Leased, refine::volume(info.max_depth, depth as u32));
            out[k].push(LeasedCell {
                cell_id: id,
                lease_id: lease_id.clone(),
                campaign_id: cid.clone(),
                spec_hash: info.spec_hash.clone(),
                depth: depth as u32,
                cell_box: info.full_box(&cell),
                expires_at_ms: expires,
            });
            picked.push((rowid, lease_id, wants[k].worker));
            given += 1;
        }
        for (chunk, size) in fixed_chunks(&picked) {
            let sql = format!(
                "UPDATE cells SET status = ?, lease_id = v.column2, lease_expires_at = ?, leased_by = v.column3,
                 leased_at = ?, updated_at = ? FROM (VALUES {}) AS v WHERE cells.rowid = v.column1",
                tuples(size, 3)
            );
            let mut q = sqlx::query(&sql).bind(CellStatus::Leased.as_str()).bind(expires).bind(now).bind(now);
            for (rowid, lid, worker) in chunk {
                q = q.bind(*rowid).bind(lid.as_str()).bind(*worker);
            }
            bind_nulls(q, 3 * (size - chunk.len())).execute(&mut **tx).await?;
        }
    }
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

/// Return leases that expired before now to the queue (or mark their cells
/// `failed` once they have outlived `max_expiries` leases), in a transaction of its
/// own. Returns how many.
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
    // The status is spelled into the text, not bound: the expiry index is partial on it.
    let rows = sqlx::query(&format!(
        "SELECT {ENDING_COLS} FROM cells WHERE status = '{}' AND lease_expires_at < ?",
        CellStatus::Leased.as_str()
    ))
    .bind(now)
    .fetch_all(&mut **tx)
    .await?;
    let mut ends = Vec::with_capacity(rows.len());
    for r in rows {
        ends.push(Ending::from_row(&r)?);
    }
    let n = ends.len() as u64;
    end_leases(store, tx, limits, now, ends, LeaseStatus::Expired, deltas).await?;
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
    reason: LeaseStatus,
    deltas: &mut Deltas,
) -> ApiResult<()> {
    for (chunk, size) in fixed_chunks(&ends) {
        let mut rows = Vec::new();
        for e in chunk {
            let info = store
                .info(&e.campaign_id)
                .await?
                .ok_or_else(|| ApiError::internal(format!("cell {} has no campaign", e.cell_id)))?;
            let vol = refine::volume(info.max_depth, e.depth);
            let (expiries, status, error) = if reason == LeaseStatus::Expired {
                let n = e.expiries + 1;
                if n >= limits.max_expiries as i64 {
                    (n, CellStatus::Failed, Some(format!("{n} leases of this cell expired without a result")))
                } else {
                    (n, CellStatus::Pending, None)
                }
            } else {
                (e.expiries, CellStatus::Pending, None)
            };
            deltas.moved(&e.campaign_id, CellStatus::Leased, status, vol);
            rows.push((e.rowid, status, expiries, error));
        }
        let sql = format!(
            "UPDATE cells SET status = v.column2, expiries = v.column3, last_error = COALESCE(v.column4, last_error),
             lease_id = NULL, lease_expires_at = NULL, leased_by = NULL, updated_at = ?
             FROM (VALUES {}) AS v WHERE cells.rowid = v.column1",
            tuples(size, 4)
        );
        let mut q = sqlx::query(&sql).bind(now);
        for (rowid, status, expiries, error) in &rows {
            q = q.bind(*rowid).bind(status.as_str()).bind(*expiries).bind(error.clone());
        }
        bind_nulls(q, 4 * (size - chunk.len())).execute(&mut **tx).await?;
        let sql = format!(
            "INSERT OR IGNORE INTO ended_leases (lease_id, cell_id, reason, ended_at)
             SELECT * FROM (VALUES {}) WHERE column1 IS NOT NULL",
            tuples(size, 4)
        );
        let mut q = sqlx::query(&sql);
        for e in chunk {
            q = q.bind(e.lease_id.as_str()).bind(e.cell_id.as_str()).bind(reason.as_str()).bind(now);
        }
        bind_nulls(q, 4 * (size - chunk.len())).execute(&mut **tx).await?;
    }
    Ok(())
}

/// Give leases back unfinished (a worker stopping): the cells return to `pending`
/// without counting a failed attempt. Per lease: `released`, or why it is not held
/// (`completed`, `expired`, `withdrawn`, `released`, `unknown_lease`).
pub async fn release_in(
    store: &Store,
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    lease_ids: &[String],
    deltas: &mut Deltas,
) -> ApiResult<Vec<ItemAnswer>> {
    let mut ends = Vec::new();
    for (chunk, size) in fixed_chunks(lease_ids) {
        let sql = format!("SELECT {ENDING_COLS} FROM cells WHERE status = ? AND lease_id IN ({})", params(size));
        let mut q = sqlx::query(&sql).bind(CellStatus::Leased.as_str());
        for l in chunk {
            q = q.bind(l.as_str());
        }
        for r in bind_nulls(q, size - chunk.len()).fetch_all(&mut **tx).await? {
            ends.push(Ending::from_row(&r)?);
        }
    }
    let released: HashSet<String> = ends.iter().map(|e| e.lease_id.clone()).collect();
    end_leases(store, tx, limits, now_ms(), ends, LeaseStatus::Released, deltas).await?;
    let mut out = Vec::with_capacity(lease_ids.len());
    for l in lease_ids {
        let status = if released.contains(l) { LeaseStatus::Released } else { ended_status(tx, l).await? };
        out.push(ItemAnswer::new(l, status));
    }
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
    let rows = sqlx::query(&format!("SELECT {ENDING_COLS} FROM cells WHERE campaign_id = ? AND status = ?"))
        .bind(campaign)
        .bind(CellStatus::Leased.as_str())
        .fetch_all(&mut **tx)
        .await?;
    let mut ends = Vec::new();
    for r in rows {
        ends.push(Ending::from_row(&r)?);
    }
    end_leases(store, tx, limits, now_ms(), ends, LeaseStatus::Withdrawn, deltas).await
}

// ------------------------------------------------------------------ extending

/// Push the expiry of each lease still held to now + lease time. A lease that ran
/// out but was not swept yet is held still (nobody else has the cell) and is
/// extended too: after an outage longer than the lease, the worker keeps its cells.
pub async fn extend_in(
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    lease_ids: &[String],
) -> ApiResult<Vec<ItemAnswer>> {
    let now = now_ms();
    let expires = now + limits.lease_ms;
    let mut extended = HashSet::new();
    for (chunk, size) in fixed_chunks(lease_ids) {
        let sql = format!(
            "UPDATE cells SET lease_expires_at = ?, updated_at = ? WHERE status = ?
             AND lease_id IN ({}) RETURNING lease_id",
            params(size)
        );
        let mut q = sqlx::query(&sql).bind(expires).bind(now).bind(CellStatus::Leased.as_str());
        for l in chunk {
            q = q.bind(l.as_str());
        }
        for r in bind_nulls(q, size - chunk.len()).fetch_all(&mut **tx).await? {
            extended.insert(r.try_get::<String, _>(0)?);
        }
    }
    let mut out = Vec::with_capacity(lease_ids.len());
    for l in lease_ids {
        if extended.contains(l) {
            out.push(ItemAnswer { expires_at_ms: Some(expires), ..ItemAnswer::new(l, LeaseStatus::Extended) });
        } else {
            out.push(ItemAnswer::new(l, ended_status(tx, l).await?));
        }
    }
    Ok(out)
}

/// Why a lease id is not held by any cell: `completed`, `expired`, `withdrawn`,
/// `released` or `unknown_lease`.
async fn ended_status(tx: &mut Transaction<'static, Sqlite>, lease_id: &str) -> ApiResult<LeaseStatus> {
    let done: Option<i64> =
        sqlx::query_scalar("SELECT 1 FROM results WHERE lease_id = ?").bind(lease_id).fetch_optional(&mut **tx).await?;
    if done.is_some() {
        return Ok(LeaseStatus::Completed);
    }
    let ended: Option<String> = sqlx::query_scalar("SELECT reason FROM ended_leases WHERE lease_id = ?")
        .bind(lease_id)
        .fetch_optional(&mut **tx)
        .await?;
    if let Some(r) = ended {
        return Ok(match LeaseStatus::parse(&r) {
            Some(s @ (LeaseStatus::Withdrawn | LeaseStatus::Released)) => s,
            _ => LeaseStatus::Expired,
        });
    }
    let held: Option<i64> = sqlx::query_scalar("SELECT 1 FROM cells WHERE lease_id = ? AND status = ?")
        .bind(lease_id)
        .bind(CellStatus::Leased.as_str())
        .fetch_optional(&mut **tx)
        .await?;
    Ok(if held.is_some() { LeaseStatus::Expired } else { LeaseStatus::UnknownLease })
}

// ------------------------------------------------------------------ results

/// Longest error text kept from a failed attempt, in characters.
const MAX_ERROR_CHARS: usize = 4000;

/// What a submitted result says (its outer shape, read by the protocol crate); the
/// error text of a failed attempt is cut to [`MAX_ERROR_CHARS`].
pub fn classify(result: &serde_json::Value) -> Result<Outcome, String> {
    Ok(match Outcome::of_result(result)? {
        Outcome::Error(text) => Outcome::Error(text.chars().take(MAX_ERROR_CHARS).collect()),
        o => o,
    })
}

/// Counts of what a submission did.
#[derive(Debug, Default, Clone, Copy)]
pub struct SubmitStats {
    pub accepted: u64,
    pub rejected: u64,
    pub cells_created: u64,
}

/// A result batch read and checked before it reaches the writer: what needs no
/// database (duplicates within the batch, the verdict's outer shape, the JSON text
/// to store) is done by the request's own task, so that the one writer spends its
/// time on SQL only.
#[derive(Debug)]
pub struct Submission {
    worker: String,
    engine_version: Option<String>,
    /// Per result, in order: its answer when refused without a look at the store.
    answers: Vec<Option<ItemAnswer>>,
    /// The results to record, with their place in `answers`.
    items: Vec<Checked>,
}

#[derive(Debug)]
struct Checked {
    index: usize,
    lease_id: String,
    cell_id: Option<String>,
    outcome: Outcome,
    /// The result JSON as it will be stored.
    json: String,
    elapsed_ms: Option<f64>,
}

impl Submission {
    /// Check a batch: a lease given twice is answered `duplicate` from its second
    /// time on, a result whose outer shape is unreadable `invalid`.
    pub fn check(worker: &str, engine_version: Option<&str>, items: &[ResultItem]) -> Submission {
        let mut answers: Vec<Option<ItemAnswer>> = vec![None; items.len()];
        let mut checked = Vec::with_capacity(items.len());
        let mut seen = HashSet::new();
        for (i, it) in items.iter().enumerate() {
            if !seen.insert(it.lease_id.as_str()) {
                answers[i] = Some(reject(&it.lease_id, LeaseStatus::Duplicate, "this lease appears earlier in the same batch"));
                continue;
            }
            match classify(&it.result) {
                Ok(outcome) => checked.push(Checked {
                    index: i,
                    lease_id: it.lease_id.clone(),
                    cell_id: it.cell_id.clone(),
                    outcome,
                    json: it.result.to_string(),
                    elapsed_ms: it.elapsed_ms.filter(|v| v.is_finite()),
                }),
                Err(m) => answers[i] = Some(reject(&it.lease_id, LeaseStatus::Invalid, &m)),
            }
        }
        Submission {
            worker: worker.to_string(),
            engine_version: engine_version.map(str::to_string),
            answers,
            items: checked,
        }
    }
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
    from: CellStatus,
    attempts: i64,
    leased_at: Option<i64>,
    /// A follow-up's re-joined cell: cut here, into the earlier halves, unless safe.
    coarse_dim: Option<usize>,
}

/// Accept checked batches of results (each at most once, by lease id) and refine the
/// cells, for several requests at once (in the order of `subs`). `pending` holds
/// counter changes of this transaction not yet applied (other requests of the same
/// group): the cell limit counts them. Returns the answers of each request.
pub async fn submit_in(
    store: &Store,
    tx: &mut Transaction<'static, Sqlite>,
    limits: QueueLimits,
    subs: &[&Submission],
    pending: &Deltas,
    deltas: &mut Deltas,
) -> ApiResult<Vec<(Vec<ItemAnswer>, SubmitStats)>> {
    let mut answers: Vec<Vec<Option<ItemAnswer>>> = subs.iter().map(|s| s.answers.clone()).collect();
    let now = now_ms();
    // Every result to record, with the request it came in.
    let items: Vec<(usize, &Checked)> =
        subs.iter().enumerate().flat_map(|(k, s)| s.items.iter().map(move |c| (k, c))).collect();

    // The cells holding these leases.
    let mut held: HashMap<String, HeldCell> = HashMap::new();
    // Held by the lease itself; then, for leases not found so, cells whose lease
    // expired, were swept back to the queue and were not leased again (nobody else
    // holds them), in campaigns still open, for leases without a result yet.
    // Each pass: its query, and the values of its leading parameters.
    const HELD: &str = "SELECT rowid, id, campaign_id, depth, box, status, attempts, leased_at, lease_id, coarse_dim
         FROM cells WHERE status = ? AND lease_id IN";
    const SWEPT: &str =
        "SELECT c.rowid, c.id, c.campaign_id, c.depth, c.box, c.status, c.attempts, c.leased_at, e.lease_id, c.coarse_dim
         FROM ended_leases e JOIN cells c ON c.id = e.cell_id JOIN campaigns k ON k.id = c.campaign_id
         WHERE e.reason = ? AND c.status = ? AND k.state IN (?, ?)
         AND NOT EXISTS (SELECT 1 FROM results r WHERE r.lease_id = e.lease_id) AND e.lease_id IN";
    let passes: [(&str, &[&str]); 2] = [
        (HELD, &[CellStatus::Leased.as_str()]),
        (
            SWEPT,
            &[
                LeaseStatus::Expired.as_str(),
                CellStatus::Pending.as_str(),
                CampaignState::Running.as_str(),
                CampaignState::Paused.as_str(),
            ],
        ),
    ];
    for (pass, leading) in passes {
        let ids: Vec<&str> =
            items.iter().map(|(_, c)| c.lease_id.as_str()).filter(|l| !held.contains_key(*l)).collect();
        for (chunk, size) in fixed_chunks(&ids) {
            let sql = format!("{pass} ({})", params(size));
            let mut q = sqlx::query(&sql);
            for v in leading {
                q = q.bind(*v);
            }
            for l in chunk {
                q = q.bind(*l);
            }
            for r in bind_nulls(q, size - chunk.len()).fetch_all(&mut **tx).await? {
                let id: String = r.try_get(1)?;
                let b: Vec<u8> = r.try_get(4)?;
                let cell = refine::decode_box(&b).ok_or_else(|| ApiError::internal(format!("cell {id}: corrupt box")))?;
                let from = match CellStatus::parse(&r.try_get::<String, _>(5)?) {
                    Some(CellStatus::Leased) => CellStatus::Leased,
                    _ => CellStatus::Pending,
                };
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

    // Room left under the cell limit, per campaign: the stored counters, plus the
    // cells earlier requests of this transaction created.
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
                    .fetch_one(&mut **tx)
                    .await?;
            let total = total + pending.cells_of(&h.campaign_id);
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
    let mut stats = vec![SubmitStats::default(); subs.len()];
    // Leases given a result here (one request may repeat another's).
    let mut taken: HashSet<&str> = HashSet::new();
    for &(k, it) in &items {
        let i = it.index;
        let answers = &mut answers[k];
        let outcome = &it.outcome;
        if taken.contains(it.lease_id.as_str()) {
            answers[i] = Some(reject(
                &it.lease_id,
                LeaseStatus::Duplicate,
                "a result for this lease was already accepted; this one is ignored",
            ));
            continue;
        }
        let Some(h) = held.remove(&it.lease_id) else {
            let status = match ended_status(tx, &it.lease_id).await? {
                LeaseStatus::Completed => LeaseStatus::Duplicate,
                s => s,
            };
            let detail = match status {
                LeaseStatus::Duplicate => "a result for this lease was already accepted; this one is ignored",
                LeaseStatus::Expired => {
                    "the lease expired and its cell was leased again, or decided, before the result arrived"
                }
                LeaseStatus::Withdrawn => "the campaign was cancelled; the result is ignored",
                LeaseStatus::Released => "the worker released this lease; the cell went back to the queue",
                _ => "no such lease",
            };
            answers[i] = Some(reject(&it.lease_id, status, detail));
            continue;
        };
        if it.cell_id.as_ref().is_some_and(|c| *c != h.id) {
            answers[i] = Some(reject(
                &it.lease_id,
                LeaseStatus::Invalid,
                &format!("this lease is for cell {}, not the cell_id given", h.id),
            ));
            continue;
        }
        if !decided.insert(h.id.clone()) {
            answers[i] =
                Some(reject(&it.lease_id, LeaseStatus::Expired, "the lease expired and another result for its cell came first"));
            continue;
        }
        let info = &infos[&h.campaign_id];
        let vol = refine::volume(info.max_depth, h.depth);
        let result_id = crate::store::new_id();
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
        let hint = match outcome {
            Outcome::Inconclusive(Some(name)) => info.split.iter().position(|&k| info.states.get(k) == Some(name)),
            _ => None,
        };
        let cell_now = refine::CellNow { cell: &h.cell, depth: h.depth, attempts: h.attempts, coarse_dim: h.coarse_dim };
        let rules = refine::Rules {
            max_depth: info.max_depth,
            refine_unsafe: info.refine_unsafe,
            split_envelope: &info.split_envelope,
            max_attempts: limits.max_attempts,
        };
        if let Outcome::Error(text) = outcome {
            attempts += 1;
            error = Some(text.clone());
        }
        let status = match refine::next_state(outcome, hint, &cell_now, &rules, || can_split(&mut room)) {
            refine::NextState::Takes(status) => status,
            refine::NextState::Split { dim, halves: (a, b) } => {
                split_dim = Some(dim as i64);
                children.push((h.campaign_id.clone(), h.id.clone(), h.depth + 1, a));
                children.push((h.campaign_id.clone(), h.id.clone(), h.depth + 1, b));
                stats[k].cells_created += 2;
                deltas.add(&h.campaign_id, CellStatus::Pending, 2, vol);
                CellStatus::Split
            }
        };
        // A split node leaves the leaf volume (its halves were added above). Internal
        // nodes are counted but carry no volume: their volumes would sum to more
        // than the envelope (and overflow i64 for deep trees).
        if status == CellStatus::Split {
            deltas.add(&h.campaign_id, h.from, -1, -vol);
            deltas.add(&h.campaign_id, CellStatus::Split, 1, 0);
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
            it.lease_id.as_str(),
            subs[k].worker.as_str(),
            outcome.kind(),
            it.json.as_str(),
            subs[k].engine_version.as_deref(),
            it.elapsed_ms,
            h.leased_at,
        ));
        cell_rows.push((h.rowid, status, split_dim, attempts, error, result_id));
        taken.insert(it.lease_id.as_str());
        stats[k].accepted += 1;
        answers[i] = Some(ItemAnswer { cell_status: Some(status), ..ItemAnswer::new(&it.lease_id, LeaseStatus::Accepted) });
    }

    for (chunk, size) in fixed_chunks(&result_rows) {
        let sql = format!(
            "INSERT INTO results (id, campaign_id, cell_id, lease_id, worker, kind, verdict_json, engine_version,
             elapsed_ms, leased_at, received_at) SELECT * FROM (VALUES {}) WHERE column1 IS NOT NULL",
            tuples(size, 11)
        );
        let mut q = sqlx::query(&sql);
        for (id, cid, cell, lease, worker, kind, json, engine_version, elapsed, leased_at) in chunk {
            q = q
                .bind(id.as_str())
                .bind(cid.as_str())
                .bind(cell.as_str())
                .bind(*lease)
                .bind(*worker)
                .bind(*kind)
                .bind(*json)
                .bind(*engine_version)
                .bind(*elapsed)
                .bind(*leased_at)
                .bind(now);
        }
        bind_nulls(q, 11 * (size - chunk.len())).execute(&mut **tx).await?;
    }
    for (chunk, size) in fixed_chunks(&cell_rows) {
        let sql = format!(
            "UPDATE cells SET status = v.column2, split_dim = v.column3, attempts = v.column4,
             last_error = COALESCE(v.column5, last_error), result_id = v.column6,
             lease_id = NULL, lease_expires_at = NULL, leased_by = NULL, updated_at = ?
             FROM (VALUES {}) AS v WHERE cells.rowid = v.column1",
            tuples(size, 6)
        );
        let mut q = sqlx::query(&sql).bind(now);
        for (rowid, status, dim, attempts, error, rid) in chunk {
            q = q.bind(*rowid).bind(status.as_str()).bind(*dim).bind(*attempts).bind(error.clone()).bind(rid.as_str());
        }
        bind_nulls(q, 6 * (size - chunk.len())).execute(&mut **tx).await?;
    }
    insert_cells(tx, &children, now).await?;
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
        .execute(&mut **tx)
        .await?;
    }

    Ok(answers
        .into_iter()
        .zip(stats)
        .map(|(answers, mut stats)| {
            let answers: Vec<ItemAnswer> = answers.into_iter().flatten().collect();
            stats.rejected = answers.len() as u64 - stats.accepted;
            (answers, stats)
        })
        .collect())
}

fn reject(lease_id: &str, status: LeaseStatus, detail: &str) -> ItemAnswer {
    ItemAnswer { detail: Some(detail.into()), ..ItemAnswer::new(lease_id, status) }
}

/// Insert new `pending` cells `(campaign, parent, depth, box)` (counters are the
/// caller's job). Returns their ids.
pub async fn insert_cells(
    tx: &mut Transaction<'static, Sqlite>,
    cells: &[(String, String, u32, CellBox)],
    now: i64,
) -> ApiResult<Vec<String>> {
    let mut ids = Vec::with_capacity(cells.len());
    for (chunk, size) in fixed_chunks(cells) {
        let sql = format!(
            "INSERT INTO cells (id, campaign_id, parent_id, depth, box, status, created_at, updated_at)
             SELECT * FROM (VALUES {}) WHERE column1 IS NOT NULL",
            tuples(size, 8)
        );
        let mut q = sqlx::query(&sql);
        for (cid, parent, depth, b) in chunk {
            let id = crate::store::new_id();
            let parent = if parent.is_empty() { None } else { Some(parent.clone()) };
            q = q
                .bind(id.clone())
                .bind(cid.as_str())
                .bind(parent)
                .bind(*depth as i64)
                .bind(refine::encode_box(b))
                .bind(CellStatus::Pending.as_str())
                .bind(now)
                .bind(now);
            ids.push(id);
        }
        bind_nulls(q, 8 * (size - chunk.len())).execute(&mut **tx).await?;
    }
    Ok(ids)
}
