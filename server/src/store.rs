//! The SQLite store: connection pool, migrations, models, tokens, campaign metadata
//! and the exact per-status counters. Cell transitions live in [`crate::leases`].
//!
//! Writes are serialised by one async mutex (SQLite has one writer anyway; queueing
//! in the server avoids busy-waiting), and each write is one `BEGIN IMMEDIATE`
//! transaction on a connection kept for writes. The work queue's requests (lease,
//! extend, release, results) reach it through `crate::writer`, which runs all the
//! requests waiting at one moment in one such transaction. Reads go to a pool of their own and,
//! in WAL mode, never wait for the writer.

use crate::auth::{self, Role};
use crate::error::{ApiError, ApiResult};
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqlitePoolOptions, SqliteSynchronous};
use sqlx::{Row, Sqlite, SqlitePool, Transaction};
use std::collections::{BTreeMap, HashMap};
use std::path::Path;
use std::sync::{Arc, RwLock};
use std::time::Duration;
use tessera_protocol::{CampaignState, CellStatus};

// Cell statuses, stored and shown: `tessera_protocol::CellStatus` (`as_str`/`parse`
// for the stored text, serde and `api_name` outside the server).

/// The cell status of a stored status text; an unknown text is an internal error
/// (the CHECK constraint of `cells.status` admits none).
pub fn cell_status(stored: &str) -> ApiResult<CellStatus> {
    CellStatus::parse(stored).ok_or_else(|| ApiError::internal(format!("unknown stored cell status '{stored}'")))
}

/// A new id for a campaign, cell, lease or result: a UUIDv7, whose leading 48 bits are
/// the time in milliseconds (and whose next bits keep ids minted by this process in
/// order within a millisecond). Rows inserted together therefore land side by side at
/// the right-hand end of every index on an id, instead of on random pages as random
/// (v4) ids did. Secrets (token values, `auth::new_token`) stay random.
pub fn new_id() -> String {
    uuid::Uuid::now_v7().to_string()
}

/// Milliseconds since the Unix epoch.
pub fn now_ms() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_millis() as i64)
        .unwrap_or(0)
}

/// What the server needs to know of a campaign's spec to cut and hand out cells.
#[derive(Debug, Clone)]
pub struct CampaignInfo {
    pub id: String,
    pub spec_hash: String,
    pub states: Vec<String>,
    /// Envelope interval of every state, in state order.
    pub envelope: Vec<[f64; 2]>,
    /// State index of each split dimension.
    pub split: Vec<usize>,
    /// Envelope restricted to the split dimensions.
    pub split_envelope: Vec<[f64; 2]>,
    pub max_depth: u32,
    pub refine_unsafe: bool,
}

impl CampaignInfo {
    /// Build from a validated spec.
    pub fn from_spec(id: &str, spec_hash: &str, spec: &tessera_engine::spec::Spec) -> CampaignInfo {
        let envelope: Vec<[f64; 2]> =
            spec.states.iter().map(|s| spec.doc.envelope.get(s).copied().unwrap_or([0.0, 0.0])).collect();
        let split_envelope = spec.split.iter().map(|&k| envelope[k]).collect();
        CampaignInfo {
            id: id.to_string(),
            spec_hash: spec_hash.to_string(),
            states: spec.states.clone(),
            envelope,
            split: spec.split.clone(),
            split_envelope,
            max_depth: spec.max_depth,
            refine_unsafe: spec.refine_unsafe,
        }
    }

    /// The full box over all states (`{"name": [lo, hi]}`) of a cell given over the
    /// split dimensions; non-split states keep their envelope interval.
    pub fn full_box(&self, cell: &[[f64; 2]]) -> BTreeMap<String, [f64; 2]> {
        let mut full = self.envelope.clone();
        for (j, &k) in self.split.iter().enumerate() {
            if let Some(iv) = cell.get(j) {
                full[k] = *iv;
            }
        }
        self.states.iter().cloned().zip(full).collect()
    }
}

pub struct Store {
    /// Reads (in WAL mode they never wait for the writer).
    pub pool: SqlitePool,
    /// The one connection every write goes through, behind `write`.
    write_pool: SqlitePool,
    write: tokio::sync::Mutex<()>,
    infos: RwLock<HashMap<String, Arc<CampaignInfo>>>,
    tokens: RwLock<HashMap<String, Role>>,
}

/// A write transaction; holding it holds the store's write lock.
pub struct WriteTx<'a> {
    pub tx: Transaction<'static, Sqlite>,
    _guard: tokio::sync::MutexGuard<'a, ()>,
}

impl WriteTx<'_> {
    pub async fn commit(self) -> ApiResult<()> {
        self.tx.commit().await?;
        Ok(())
    }
}

impl Store {
    /// Open (creating when missing) the database at `path` in WAL mode with foreign
    /// keys on and a busy timeout, and apply the migrations.
    pub async fn open(path: &Path) -> anyhow::Result<Arc<Store>> {
        let opts = SqliteConnectOptions::new()
            .filename(path)
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            // FULL: every COMMIT syncs the write-ahead log before it returns, so a
            // lease or result acknowledged to a client survives a power loss or a
            // kernel crash too (NORMAL kept it only across a crash of this process).
            .synchronous(SqliteSynchronous::Full)
            .foreign_keys(true)
            .busy_timeout(Duration::from_secs(10))
            .statement_cache_capacity(400)
            // A large page cache: the queue and lease indexes are read and written by
            // every batch.
            .pragma("cache_size", "-65536")
            .pragma("temp_store", "memory");
        let pool = SqlitePoolOptions::new().max_connections(8).connect_with(opts.clone()).await?;
        sqlx::migrate!("../migrations").run(&pool).await?;
        // Writes have a connection of their own: taking one from the readers' pool
        // made every lease and result batch queue behind the waiting readers (the
        // load test accepted 5x fewer results that way: 3,235 against 15,945 in 60 s).
        let write_pool = SqlitePoolOptions::new()
            .max_connections(1)
            .min_connections(1)
            .idle_timeout(None)
            .max_lifetime(None)
            .connect_with(opts)
            .await?;
        Ok(Arc::new(Store {
            pool,
            write_pool,
            write: tokio::sync::Mutex::new(()),
            infos: RwLock::new(HashMap::new()),
            tokens: RwLock::new(HashMap::new()),
        }))
    }

    /// Close both pools (waits for connections to be returned).
    pub async fn close(&self) {
        self.write_pool.close().await;
        self.pool.close().await;
    }

    /// Start a write transaction (waits for the write lock).
    ///
    /// `BEGIN` runs in a task of its own so that it always finishes: sqlx's custom
    /// `BEGIN` has an await between the statement's success and the creation of the
    /// `Transaction` that would roll it back on drop. A caller dropped in that window
    /// (an HTTP client killed mid-request cancels its handler) would return the
    /// connection to the pool inside an open transaction holding the write lock for
    /// good. A spawned task is not cancelled with its caller: if the caller is gone,
    /// the task's `Transaction` is dropped there and rolled back.
    pub async fn write(&self) -> ApiResult<WriteTx<'_>> {
        let guard = self.write.lock().await;
        let pool = self.write_pool.clone();
        let tx = tokio::spawn(async move { pool.begin_with("BEGIN IMMEDIATE").await })
            .await
            .map_err(|e| ApiError::internal(format!("starting a write transaction: {e}")))??;
        Ok(WriteTx { tx, _guard: guard })
    }

    // ---------------------------------------------------------------- tokens

    /// Create a token with `role`; returns the secret (stored only as its hash).
    pub async fn create_token(&self, role: Role, label: &str) -> ApiResult<String> {
        let secret = auth::new_token();
        self.register_token(&secret, role, label).await?;
        Ok(secret)
    }

    /// Register a given secret with `role` (idempotent for the same secret).
    pub async fn register_token(&self, secret: &str, role: Role, label: &str) -> ApiResult<()> {
        let mut w = self.write().await?;
        sqlx::query(
            "INSERT INTO tokens (id, token_hash, role, label, created_at) VALUES (?, ?, ?, ?, ?)
             ON CONFLICT (token_hash) DO UPDATE SET role = excluded.role",
        )
        .bind(uuid::Uuid::new_v4().to_string())
        .bind(auth::hash_token(secret))
        .bind(role.as_str())
        .bind(label)
        .bind(now_ms())
        .execute(&mut *w.tx)
        .await?;
        w.commit().await?;
        if let Ok(mut m) = self.tokens.write() {
            m.clear();
        }
        Ok(())
    }

    /// The role of a presented token, if it is known. The stored hash is compared
    /// with the presented one in constant time.
    pub async fn role_of(&self, secret: &str) -> ApiResult<Option<Role>> {
        let h = auth::hash_token(secret);
        if let Some(r) = self.tokens.read().ok().and_then(|m| m.get(&h).copied()) {
            return Ok(Some(r));
        }
        let row = sqlx::query("SELECT token_hash, role FROM tokens WHERE token_hash = ?")
            .bind(&h)
            .fetch_optional(&self.pool)
            .await?;
        let Some(row) = row else { return Ok(None) };
        let stored: String = row.try_get(0)?;
        let role: String = row.try_get(1)?;
        if !auth::constant_time_eq(stored.as_bytes(), h.as_bytes()) {
            return Ok(None);
        }
        let role = Role::parse(&role);
        if let (Some(r), Ok(mut m)) = (role, self.tokens.write()) {
            m.insert(h, r);
        }
        Ok(role)
    }

    // ---------------------------------------------------------------- models

    /// Store a model blob under its SHA-256 (idempotent). Returns the hash.
    pub async fn put_model(&self, data: &[u8], inputs: Option<usize>, outputs: Option<usize>) -> ApiResult<String> {
        use sha2::Digest;
        let sha = hex::encode(sha2::Sha256::digest(data));
        let mut w = self.write().await?;
        sqlx::query(
            "INSERT INTO models (sha256, size, inputs, outputs, data, created_at) VALUES (?, ?, ?, ?, ?, ?)
             ON CONFLICT (sha256) DO NOTHING",
        )
        .bind(&sha)
        .bind(data.len() as i64)
        .bind(inputs.map(|v| v as i64))
        .bind(outputs.map(|v| v as i64))
        .bind(data)
        .bind(now_ms())
        .execute(&mut *w.tx)
        .await?;
        w.commit().await?;
        Ok(sha)
    }

    pub async fn get_model(&self, sha: &str) -> ApiResult<Option<Vec<u8>>> {
        let row = sqlx::query("SELECT data FROM models WHERE sha256 = ?").bind(sha).fetch_optional(&self.pool).await?;
        Ok(match row {
            Some(r) => Some(r.try_get(0)?),
            None => None,
        })
    }

    /// `(inputs, outputs)` of a stored model, `None` when no such model.
    pub async fn model_shape(&self, sha: &str) -> ApiResult<Option<(Option<i64>, Option<i64>)>> {
        let row = sqlx::query("SELECT inputs, outputs FROM models WHERE sha256 = ?")
            .bind(sha)
            .fetch_optional(&self.pool)
            .await?;
        Ok(match row {
            Some(r) => Some((r.try_get(0)?, r.try_get(1)?)),
            None => None,
        })
    }

    // ---------------------------------------------------------------- campaigns

    /// The cut-and-lease view of a campaign's spec (cached).
    pub async fn info(&self, id: &str) -> ApiResult<Option<Arc<CampaignInfo>>> {
        if let Some(i) = self.infos.read().ok().and_then(|m| m.get(id).cloned()) {
            return Ok(Some(i));
        }
        let row = sqlx::query("SELECT spec_json, spec_hash FROM campaigns WHERE id = ?")
            .bind(id)
            .fetch_optional(&self.pool)
            .await?;
        let Some(row) = row else { return Ok(None) };
        let json: String = row.try_get(0)?;
        let hash: String = row.try_get(1)?;
        let spec = tessera_engine::spec::parse_spec(&json)
            .map_err(|e| ApiError::internal(format!("stored spec of campaign {id} no longer validates: {e:?}")))?;
        let info = Arc::new(CampaignInfo::from_spec(id, &hash, &spec));
        if let Ok(mut m) = self.infos.write() {
            m.insert(id.to_string(), info.clone());
        }
        Ok(Some(info))
    }

    /// Counters of a campaign: status → (cells, volume). A stored status this server
    /// does not know is an error, not skipped: the counts must add up.
    pub async fn counters(&self, id: &str) -> ApiResult<HashMap<CellStatus, (i64, i64)>> {
        let rows = sqlx::query("SELECT status, cells, volume FROM campaign_counters WHERE campaign_id = ?")
            .bind(id)
            .fetch_all(&self.pool)
            .await?;
        let mut m = HashMap::new();
        for r in rows {
            m.insert(cell_status(&r.try_get::<String, _>(0)?)?, (r.try_get(1)?, r.try_get(2)?));
        }
        Ok(m)
    }
}

/// Accumulated counter changes of one transaction: (campaign, status) → (cells, volume).
#[derive(Default, Debug)]
pub struct Deltas(pub HashMap<(String, CellStatus), (i64, i64)>);

impl Deltas {
    pub fn add(&mut self, campaign: &str, status: CellStatus, cells: i64, volume: i64) {
        let e = self.0.entry((campaign.to_string(), status)).or_insert((0, 0));
        e.0 += cells;
        e.1 += volume;
    }
    /// Move one cell of `volume` from status `from` to `to`.
    pub fn moved(&mut self, campaign: &str, from: CellStatus, to: CellStatus, volume: i64) {
        if from != to {
            self.add(campaign, from, -1, -volume);
            self.add(campaign, to, 1, volume);
        }
    }

    /// Add the changes of `other` (a request of a group that succeeded).
    pub fn merge(&mut self, other: Deltas) {
        for ((c, s), (n, v)) in other.0 {
            let e = self.0.entry((c, s)).or_insert((0, 0));
            e.0 += n;
            e.1 += v;
        }
    }

    /// The net number of cells these changes add to `campaign` (all statuses).
    pub fn cells_of(&self, campaign: &str) -> i64 {
        self.0.iter().filter(|((c, _), _)| c == campaign).map(|(_, (n, _))| n).sum()
    }

    /// Apply the changes, then mark campaigns with no pending or leased cell left as
    /// `done`. Returns the campaigns that became done.
    pub async fn apply(self, tx: &mut Transaction<'static, Sqlite>) -> ApiResult<Vec<String>> {
        let mut touched: Vec<String> = Vec::new();
        for ((c, s), (n, v)) in &self.0 {
            if *n == 0 && *v == 0 {
                continue;
            }
            sqlx::query("UPDATE campaign_counters SET cells = cells + ?, volume = volume + ? WHERE campaign_id = ? AND status = ?")
                .bind(n)
                .bind(v)
                .bind(c)
                .bind(s.as_str())
                .execute(&mut **tx)
                .await?;
            if !touched.contains(c) {
                touched.push(c.clone());
            }
        }
        let mut done = Vec::new();
        let now = now_ms();
        let open_statuses: Vec<&str> = CellStatus::ALL.into_iter().filter(|s| s.is_open()).map(CellStatus::as_str).collect();
        let open_sql = format!(
            "SELECT COALESCE(SUM(cells), 0) FROM campaign_counters WHERE campaign_id = ? AND status IN ({})",
            vec!["?"; open_statuses.len()].join(", ")
        );
        for c in touched {
            let mut q = sqlx::query_scalar(&open_sql).bind(&c);
            for s in &open_statuses {
                q = q.bind(*s);
            }
            let open: i64 = q.fetch_one(&mut **tx).await?;
            if open == 0 {
                let r = sqlx::query(
                    "UPDATE campaigns SET state = ?, finished_at = ?, updated_at = ? WHERE id = ? AND state IN (?, ?)",
                )
                .bind(CampaignState::Done.as_str())
                .bind(now)
                .bind(now)
                .bind(&c)
                .bind(CampaignState::Running.as_str())
                .bind(CampaignState::Paused.as_str())
                .execute(&mut **tx)
                .await?;
                if r.rows_affected() > 0 {
                    done.push(c);
                }
            }
        }
        Ok(done)
    }
}
