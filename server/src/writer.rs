//! Group commit of the work queue's writes.
//!
//! One task, the writer, takes every lease, extend, release and result request from a
//! queue and runs as many as are waiting (up to [`MAX_GROUP`]) in one transaction on
//! the store's write connection. It first runs the whole group together (all result
//! batches in one pass, all lease requests in one pass: a few statements for the
//! group instead of a few per request) inside one savepoint. If any request fails,
//! that savepoint is rolled back and the requests run again one by one, each inside a
//! savepoint of its own: the failing one is rolled back and answered with its error,
//! the others of the group go on. Answers are sent only after COMMIT returned, and the store
//! commits with `synchronous=FULL`, so whatever a client was told is on disk. One
//! COMMIT (one sync of the write-ahead log) then serves the whole group, instead of one
//! per request, and requests queue here instead of on the write lock.
//!
//! [`Writer`] is the interface the HTTP handlers see: one method per operation, the
//! answers as the protocol sends them. Where and how the work is stored is behind it
//! (`crate::leases` for SQLite).

use crate::error::{ApiError, ApiResult};
use crate::leases::{self, LeaseStats, QueueLimits, SubmitStats, Submission, Want};
use crate::store::{Deltas, Store};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Weak};
use std::time::Instant;
use tessera_protocol::{ItemAnswer, LeasedCell, ResultItem};
use tokio::sync::{mpsc, oneshot};

/// Requests per group transaction at most: bounds the time the first request of a
/// group waits for the COMMIT of the last.
pub const MAX_GROUP: usize = 128;

/// One queue operation.
#[derive(Debug)]
enum Op {
    Lease { max: u32, worker: String, only_campaign: Option<String> },
    Extend { lease_ids: Vec<String> },
    Release { lease_ids: Vec<String> },
    Submit(Submission),
}

/// What an operation answers.
#[derive(Debug)]
enum Done {
    Lease(Vec<LeasedCell>, LeaseStats),
    Items(Vec<ItemAnswer>),
    Submit(Vec<ItemAnswer>, SubmitStats),
}

struct Job {
    op: Op,
    reply: oneshot::Sender<ApiResult<Done>>,
}

/// The queue of the writer task (cheap to clone).
#[derive(Clone)]
pub struct Writer {
    queue: mpsc::UnboundedSender<Job>,
    limits: QueueLimits,
    counts: Arc<Counts>,
}

/// What the writer did since it started (for benchmarks and tests).
#[derive(Debug, Default)]
struct Counts {
    groups: AtomicU64,
    requests: AtomicU64,
    retried: AtomicU64,
    /// Time from BEGIN to the last request's end, and spent in COMMIT, nanoseconds.
    work_ns: AtomicU64,
    commit_ns: AtomicU64,
}

/// A reading of the writer's counters.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct WriterCounts {
    /// Group transactions committed (or failed).
    pub groups: u64,
    /// Requests run in them.
    pub requests: u64,
    /// Groups in which a request failed, run again one request per savepoint.
    pub retried: u64,
    /// Seconds from BEGIN until the last request of a group was done, summed.
    pub work_seconds: f64,
    /// Seconds spent in COMMIT (with `synchronous=FULL`: writing and syncing the log), summed.
    pub commit_seconds: f64,
}

impl Writer {
    /// Start the writer task on `store`'s write connection. The task ends when every
    /// `Writer` is dropped, or at its next group once the store is gone.
    pub fn start(store: &Arc<Store>, limits: QueueLimits) -> Writer {
        let (queue, rx) = mpsc::unbounded_channel();
        let counts = Arc::new(Counts::default());
        tokio::spawn(run(Arc::downgrade(store), limits, rx, counts.clone()));
        Writer { queue, limits, counts }
    }

    /// The writer's counters so far.
    pub fn counts(&self) -> WriterCounts {
        let c = &self.counts;
        WriterCounts {
            groups: c.groups.load(Ordering::Relaxed),
            requests: c.requests.load(Ordering::Relaxed),
            retried: c.retried.load(Ordering::Relaxed),
            work_seconds: c.work_ns.load(Ordering::Relaxed) as f64 * 1e-9,
            commit_seconds: c.commit_ns.load(Ordering::Relaxed) as f64 * 1e-9,
        }
    }

    /// The queue limits the operations apply.
    pub fn limits(&self) -> QueueLimits {
        self.limits
    }

    async fn call(&self, op: Op) -> ApiResult<Done> {
        let (reply, answer) = oneshot::channel();
        self.queue.send(Job { op, reply }).map_err(|_| ApiError::internal("the queue writer has stopped"))?;
        answer.await.map_err(|_| ApiError::internal("the queue writer stopped before answering"))?
    }

    /// Lease up to `max` pending cells (see [`leases::lease_in`]).
    pub async fn lease(&self, max: u32, worker: &str, only_campaign: Option<&str>) -> ApiResult<(Vec<LeasedCell>, LeaseStats)> {
        let op = Op::Lease { max, worker: worker.to_string(), only_campaign: only_campaign.map(str::to_string) };
        match self.call(op).await? {
            Done::Lease(cells, stats) => Ok((cells, stats)),
            other => Err(mismatch(&other)),
        }
    }

    /// Extend leases (see [`leases::extend_in`]).
    pub async fn extend(&self, lease_ids: &[String]) -> ApiResult<Vec<ItemAnswer>> {
        match self.call(Op::Extend { lease_ids: lease_ids.to_vec() }).await? {
            Done::Items(items) => Ok(items),
            other => Err(mismatch(&other)),
        }
    }

    /// Give leases back (see [`leases::release_in`]).
    pub async fn release(&self, lease_ids: &[String]) -> ApiResult<Vec<ItemAnswer>> {
        match self.call(Op::Release { lease_ids: lease_ids.to_vec() }).await? {
            Done::Items(items) => Ok(items),
            other => Err(mismatch(&other)),
        }
    }

    /// Record a batch of results (see [`leases::submit_in`]); the batch is checked
    /// (duplicates, outer shape, JSON text) in the caller's task first.
    pub async fn submit(
        &self,
        worker: &str,
        engine_version: Option<&str>,
        items: &[ResultItem],
    ) -> ApiResult<(Vec<ItemAnswer>, SubmitStats)> {
        let sub = Submission::check(worker, engine_version, items);
        match self.call(Op::Submit(sub)).await? {
            Done::Submit(items, stats) => Ok((items, stats)),
            other => Err(mismatch(&other)),
        }
    }

    /// Run one operation alone in a transaction of its own, without the queue (what
    /// every request did before group commit; the benchmark's per-batch baseline).
    pub async fn lease_alone(
        store: &Store,
        limits: QueueLimits,
        max: u32,
        worker: &str,
    ) -> ApiResult<(Vec<LeasedCell>, LeaseStats)> {
        let op = Op::Lease { max, worker: worker.to_string(), only_campaign: None };
        match alone(store, limits, &op).await? {
            Done::Lease(cells, stats) => Ok((cells, stats)),
            other => Err(mismatch(&other)),
        }
    }

    /// [`Writer::submit`] alone in a transaction of its own, without the queue.
    pub async fn submit_alone(
        store: &Store,
        limits: QueueLimits,
        worker: &str,
        engine_version: Option<&str>,
        items: &[ResultItem],
    ) -> ApiResult<(Vec<ItemAnswer>, SubmitStats)> {
        let op = Op::Submit(Submission::check(worker, engine_version, items));
        match alone(store, limits, &op).await? {
            Done::Submit(items, stats) => Ok((items, stats)),
            other => Err(mismatch(&other)),
        }
    }
}

fn mismatch(done: &Done) -> ApiError {
    ApiError::internal(format!("the queue writer answered another kind of request: {done:?}"))
}

async fn alone(store: &Store, limits: QueueLimits, op: &Op) -> ApiResult<Done> {
    let mut w = store.write().await?;
    let mut deltas = Deltas::default();
    let done = execute(store, &mut w.tx, limits, op, &Deltas::default(), &mut deltas).await?;
    deltas.apply(&mut w.tx).await?;
    w.commit().await?;
    Ok(done)
}

/// One operation inside the open transaction; its counter changes go to `deltas`.
async fn execute(
    store: &Store,
    tx: &mut sqlx::Transaction<'static, sqlx::Sqlite>,
    limits: QueueLimits,
    op: &Op,
    pending: &Deltas,
    deltas: &mut Deltas,
) -> ApiResult<Done> {
    Ok(match op {
        Op::Lease { max, worker, only_campaign } => {
            let want = [Want { max: *max, worker }];
            let (mut cells, stats) = leases::lease_in(store, tx, limits, &want, only_campaign.as_deref(), deltas).await?;
            Done::Lease(cells.pop().unwrap_or_default(), stats)
        }
        Op::Extend { lease_ids } => Done::Items(leases::extend_in(tx, limits, lease_ids).await?),
        Op::Release { lease_ids } => Done::Items(leases::release_in(store, tx, limits, lease_ids, deltas).await?),
        Op::Submit(sub) => {
            let mut answers = leases::submit_in(store, tx, limits, &[sub], pending, deltas).await?;
            let (items, stats) = answers.pop().unwrap_or_default();
            Done::Submit(items, stats)
        }
    })
}

/// The whole group at once: every result request in one pass (one read of the
/// cells, one insert of the results, one update of the cells), then every lease
/// request from any campaign in one pass, then the rest one by one in their order.
/// Many requests then cost a few statements instead of a few each. Fails as a whole
/// if any request fails.
async fn together(
    store: &Store,
    tx: &mut sqlx::Transaction<'static, sqlx::Sqlite>,
    limits: QueueLimits,
    jobs: &[Job],
    deltas: &mut Deltas,
) -> ApiResult<Vec<Done>> {
    let mut done: Vec<Option<Done>> = jobs.iter().map(|_| None).collect();
    let subs: Vec<(usize, &Submission)> = jobs
        .iter()
        .enumerate()
        .filter_map(|(i, j)| match &j.op {
            Op::Submit(s) => Some((i, s)),
            _ => None,
        })
        .collect();
    if !subs.is_empty() {
        let refs: Vec<&Submission> = subs.iter().map(|(_, s)| *s).collect();
        let answers = leases::submit_in(store, tx, limits, &refs, &Deltas::default(), deltas).await?;
        for (&(i, _), (items, stats)) in subs.iter().zip(answers) {
            done[i] = Some(Done::Submit(items, stats));
        }
    }
    let wants: Vec<(usize, Want)> = jobs
        .iter()
        .enumerate()
        .filter_map(|(i, j)| match &j.op {
            Op::Lease { max, worker, only_campaign: None } => Some((i, Want { max: *max, worker })),
            _ => None,
        })
        .collect();
    if !wants.is_empty() {
        let list: Vec<Want> = wants.iter().map(|(_, w)| *w).collect();
        let (cells, stats) = leases::lease_in(store, tx, limits, &list, None, deltas).await?;
        for (n, (&(i, _), cells)) in wants.iter().zip(cells).enumerate() {
            // Expired leases were reclaimed once, for the first request.
            done[i] = Some(Done::Lease(cells, if n == 0 { stats } else { LeaseStats::default() }));
        }
    }
    let mut out = Vec::with_capacity(jobs.len());
    for (job, d) in jobs.iter().zip(done) {
        out.push(match d {
            Some(d) => d,
            // No result request is left here: nothing pending matters to these.
            None => execute(store, tx, limits, &job.op, &Deltas::default(), deltas).await?,
        });
    }
    Ok(out)
}

/// The writer task: take what is waiting, commit it as one group, answer, repeat.
async fn run(store: Weak<Store>, limits: QueueLimits, mut rx: mpsc::UnboundedReceiver<Job>, counts: Arc<Counts>) {
    let mut jobs = Vec::with_capacity(MAX_GROUP);
    while let Some(first) = rx.recv().await {
        jobs.push(first);
        while jobs.len() < MAX_GROUP {
            match rx.try_recv() {
                Ok(job) => jobs.push(job),
                Err(_) => break,
            }
        }
        // A caller that went away (its client disconnected) gets nothing done: it was
        // told nothing, so its worker sends the results again or leases anew.
        jobs.retain(|j| !j.reply.is_closed());
        let Some(store) = store.upgrade() else { break };
        // In a task of its own, so that a panic there (a bug) ends one group, not the
        // writer: its transaction is rolled back when dropped, and its callers are
        // answered with an error when their reply senders are dropped.
        let (group, counts) = (std::mem::take(&mut jobs), counts.clone());
        if let Err(e) = tokio::spawn(async move { commit_group(&store, limits, group, &counts).await }).await {
            tracing::error!("a group transaction panicked: {e}");
        }
    }
}

/// Run `jobs` in one transaction, one savepoint each, commit, then answer every job.
/// If the transaction itself fails (BEGIN, a savepoint, the counters or COMMIT),
/// nothing of the group is recorded and every job is answered with that error.
async fn commit_group(store: &Store, limits: QueueLimits, jobs: Vec<Job>, counts: &Counts) {
    if jobs.is_empty() {
        return;
    }
    counts.groups.fetch_add(1, Ordering::Relaxed);
    counts.requests.fetch_add(jobs.len() as u64, Ordering::Relaxed);
    let mut answers: Vec<ApiResult<Done>> = Vec::with_capacity(jobs.len());
    let group = async {
        let mut w = store.write().await?;
        let t0 = Instant::now();
        let mut group = Deltas::default();
        // The whole group in one savepoint first; if a request fails, that is rolled
        // back and the requests run again one by one, each in a savepoint of its own,
        // so that only the failing one is refused.
        sqlx::query("SAVEPOINT together").execute(&mut *w.tx).await?;
        let mut deltas = Deltas::default();
        match together(store, &mut w.tx, limits, &jobs, &mut deltas).await {
            Ok(done) => {
                sqlx::query("RELEASE together").execute(&mut *w.tx).await?;
                group.merge(deltas);
                answers.extend(done.into_iter().map(Ok));
            }
            Err(e) => {
                tracing::info!(requests = jobs.len(), "a request of a group failed ({}); running them one by one", e.detail);
                sqlx::query("ROLLBACK TO together").execute(&mut *w.tx).await?;
                sqlx::query("RELEASE together").execute(&mut *w.tx).await?;
                counts.retried.fetch_add(1, Ordering::Relaxed);
                for job in &jobs {
                    sqlx::query("SAVEPOINT request").execute(&mut *w.tx).await?;
                    let mut deltas = Deltas::default();
                    match execute(store, &mut w.tx, limits, &job.op, &group, &mut deltas).await {
                        Ok(done) => {
                            sqlx::query("RELEASE request").execute(&mut *w.tx).await?;
                            group.merge(deltas);
                            answers.push(Ok(done));
                        }
                        Err(e) => {
                            sqlx::query("ROLLBACK TO request").execute(&mut *w.tx).await?;
                            sqlx::query("RELEASE request").execute(&mut *w.tx).await?;
                            answers.push(Err(e));
                        }
                    }
                }
            }
        }
        group.apply(&mut w.tx).await?;
        let t1 = Instant::now();
        counts.work_ns.fetch_add((t1 - t0).as_nanos() as u64, Ordering::Relaxed);
        w.commit().await?;
        counts.commit_ns.fetch_add(t1.elapsed().as_nanos() as u64, Ordering::Relaxed);
        Ok::<(), ApiError>(())
    }
    .await;
    match group {
        Ok(()) => {
            for (job, answer) in jobs.into_iter().zip(answers) {
                let _ = job.reply.send(answer);
            }
        }
        Err(e) => {
            tracing::warn!(requests = jobs.len(), "a group transaction failed: {}", e.detail);
            for job in jobs {
                let _ = job.reply.send(Err(e.clone()));
            }
        }
    }
}
