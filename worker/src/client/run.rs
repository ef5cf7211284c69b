//! The worker loop: lease cells, run the engine on N threads, extend leases of long
//! cells, submit results through the outbox (kept until the server answers each
//! one), back off while the server is away, and stop gracefully on SIGTERM / SIGINT
//! (no new leases; running cells finish; queued cells are released; every result is
//! delivered before exit).

use super::api::{Api, ApiError, LeasedCell, ResultItem};
use super::outbox::Outbox;
use tessera_protocol::{FailedAttempt, LeaseStatus};
use tessera_engine::check::check_cell;
use tessera_engine::closed_loop::ClosedLoop;
use tessera_engine::net::{self, Network};
use tessera_engine::spec::parse_spec;
use std::collections::{HashMap, VecDeque};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::mpsc;
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

pub struct RunOptions {
    pub server: String,
    pub token: String,
    pub threads: usize,
    /// Name reported to the server with leases and results.
    pub name: String,
    /// Stop after this many cells (for tests and scripts); `None` runs until stopped.
    pub max_cells: Option<u64>,
    /// Exit when the server has had no work for this long; `None` waits forever.
    pub idle_exit: Option<Duration>,
    /// Append the lease id of every result the server acknowledged (accepted, or
    /// already recorded) to this file, one per line, right after the answer arrives.
    /// For fault-injection tests that check no acknowledged result is ever lost.
    pub ack_log: Option<std::path::PathBuf>,
}

/// What a run did, printed at the end.
#[derive(Debug, Default)]
pub struct RunSummary {
    pub cells: u64,
    pub seconds: f64,
    pub released: u64,
}

struct Job {
    cell: LeasedCell,
    loop_: Arc<ClosedLoop>,
}

struct Done {
    lease_id: String,
    result: serde_json::Value,
    elapsed_ms: f64,
}

/// The queue between the coordinator and the engine threads.
struct Queue {
    jobs: Mutex<VecDeque<Job>>,
    ready: Condvar,
    closed: AtomicBool,
    running: AtomicUsize,
}

/// Run until stopped by a signal (or by the options' limits).
pub fn run(opts: RunOptions, stop: Arc<AtomicBool>) -> anyhow::Result<RunSummary> {
    let api = Api::new(&opts.server, &opts.token);
    let threads = opts.threads.max(1);
    let queue = Arc::new(Queue {
        jobs: Mutex::new(VecDeque::new()),
        ready: Condvar::new(),
        closed: AtomicBool::new(false),
        running: AtomicUsize::new(0),
    });
    let (done_tx, done_rx) = mpsc::channel::<Done>();
    let mut handles = Vec::new();
    for i in 0..threads {
        let q = queue.clone();
        let tx = done_tx.clone();
        handles.push(std::thread::Builder::new().name(format!("engine-{i}")).spawn(move || engine_thread(q, tx))?);
    }
    drop(done_tx);

    let started = Instant::now();
    let mut loops: HashMap<String, Arc<ClosedLoop>> = HashMap::new();
    let mut models: HashMap<String, Network> = HashMap::new();
    // Leases we hold (queued or running), for extension.
    let mut held: HashMap<String, LeasedCell> = HashMap::new();
    // Leased cells whose spec or model could not be fetched yet (the server away).
    let mut unready: Vec<LeasedCell> = Vec::new();
    let mut outbox = Outbox::default();
    let mut summary = RunSummary::default();
    let mut lease_seconds = 60.0f64;
    let mut last_extend = Instant::now();
    let mut last_report = Instant::now();
    let mut backoff = Duration::from_millis(200);
    let mut next_lease_at = Instant::now();
    let mut idle_since: Option<Instant> = None;
    let mut leased_total: u64 = 0;
    let mut ack_log = match &opts.ack_log {
        Some(p) => Some(std::fs::OpenOptions::new().create(true).append(true).open(p)?),
        None => None,
    };

    loop {
        let stopping = stop.load(Ordering::SeqCst) || opts.max_cells.is_some_and(|m| leased_total >= m);

        // Collect finished cells.
        while let Ok(d) = done_rx.try_recv() {
            finished(d, &mut held, &mut outbox, &mut summary);
        }

        // Deliver results; the outbox keeps each one until the server has answered it.
        if !outbox.is_empty() {
            let answers = outbox.deliver(Instant::now(), |items| api.submit(&opts.name, items));
            for a in answers.iter().filter(|a| a.status != LeaseStatus::Accepted) {
                tracing::warn!(lease = %a.lease_id, status = a.status.as_str(), "result not accepted");
            }
            if let Some(f) = ack_log.as_mut() {
                log_acknowledged(f, &answers);
            }
        }

        // Cells that wait for their spec or model: try again.
        if !stopping && !unready.is_empty() && Instant::now() >= next_lease_at {
            for cell in std::mem::take(&mut unready) {
                start_cell(cell, &api, &queue, &mut held, &mut unready, &mut outbox, &mut loops, &mut models);
            }
        }

        // On stop: release what has not started, wait for the running cells.
        if stopping {
            let queued: Vec<Job> = queue.jobs.lock().unwrap().drain(..).collect();
            let mut ids: Vec<String> = queued.iter().map(|j| j.cell.lease_id.clone()).collect();
            ids.extend(unready.drain(..).map(|c| c.lease_id));
            if !ids.is_empty() {
                match api.release(&ids) {
                    Ok(_) => summary.released += ids.len() as u64,
                    Err(e) => tracing::warn!("releasing {} leases failed (they will expire): {e}", ids.len()),
                }
                for id in &ids {
                    held.remove(id);
                }
            }
            if queue.running.load(Ordering::SeqCst) == 0 && held.is_empty() && outbox.is_empty() {
                break;
            }
        }

        // Extend leases before they run out.
        if !held.is_empty() && last_extend.elapsed().as_secs_f64() > lease_seconds / 3.0 {
            let ids: Vec<String> = held.keys().cloned().collect();
            match api.extend(&ids) {
                Ok(items) => {
                    for it in items.iter().filter(|i| i.status != LeaseStatus::Extended) {
                        tracing::warn!(lease = %it.lease_id, status = it.status.as_str(), "lease not extended");
                    }
                }
                Err(e) => tracing::warn!("extending {} leases failed: {e}", ids.len()),
            }
            last_extend = Instant::now();
        }

        // Keep about two cells per thread queued or running.
        let outstanding = queue.jobs.lock().unwrap().len() + queue.running.load(Ordering::SeqCst) + unready.len();
        let want = (2 * threads).saturating_sub(outstanding);
        // No new leases while results wait for the server: after an outage they go
        // first, before a lease request sweeps their expired leases and hands their
        // cells out again.
        if !stopping && want > 0 && outbox.is_empty() && Instant::now() >= next_lease_at {
            let want = match opts.max_cells {
                Some(m) => want.min((m - leased_total) as usize),
                None => want,
            };
            match api.lease(want.max(1) as u32, &opts.name) {
                Ok(answer) => {
                    lease_seconds = (answer.lease_seconds as f64).max(1.0);
                    backoff = Duration::from_millis(200);
                    if answer.leases.is_empty() {
                        let since = *idle_since.get_or_insert_with(Instant::now);
                        if opts.idle_exit.is_some_and(|d| since.elapsed() >= d) && outstanding == 0 {
                            stop.store(true, Ordering::SeqCst);
                        }
                        next_lease_at = Instant::now() + Duration::from_millis(500);
                    } else {
                        idle_since = None;
                    }
                    for cell in answer.leases {
                        leased_total += 1;
                        start_cell(cell, &api, &queue, &mut held, &mut unready, &mut outbox, &mut loops, &mut models);
                    }
                }
                Err(e) => {
                    if e.is_transient() {
                        tracing::warn!("leasing failed, retrying in {:?}: {e}", backoff);
                    } else {
                        tracing::error!("the server refused to lease: {e}");
                    }
                    next_lease_at = Instant::now() + backoff;
                    backoff = (backoff * 2).min(Duration::from_secs(30));
                }
            }
        }

        if last_report.elapsed() > Duration::from_secs(30) {
            let s = started.elapsed().as_secs_f64();
            tracing::info!("{} cells in {:.0} s ({:.2} cells/s)", summary.cells, s, summary.cells as f64 / s);
            last_report = Instant::now();
        }

        // Wait a little for the next finished cell.
        match done_rx.recv_timeout(Duration::from_millis(100)) {
            Ok(d) => finished(d, &mut held, &mut outbox, &mut summary),
            Err(mpsc::RecvTimeoutError::Timeout) => {}
            Err(mpsc::RecvTimeoutError::Disconnected) => break,
        }
    }

    queue.closed.store(true, Ordering::SeqCst);
    queue.ready.notify_all();
    for h in handles {
        let _ = h.join();
    }
    summary.seconds = started.elapsed().as_secs_f64();
    Ok(summary)
}

/// Append the acknowledged lease ids with one unbuffered write, so that a process
/// killed afterwards has already handed them to the operating system.
fn log_acknowledged(f: &mut std::fs::File, answers: &[super::api::ItemAnswer]) {
    use std::io::Write;
    let mut text = String::new();
    for a in answers.iter().filter(|a| matches!(a.status, LeaseStatus::Accepted | LeaseStatus::Duplicate)) {
        text.push_str(&a.lease_id);
        text.push('\n');
    }
    if let Err(e) = f.write_all(text.as_bytes()) {
        tracing::warn!("cannot append to the acknowledgement log: {e}");
    }
}

/// A cell is done: its lease no longer needs extending and its result waits to be sent.
fn finished(d: Done, held: &mut HashMap<String, LeasedCell>, outbox: &mut Outbox, summary: &mut RunSummary) {
    held.remove(&d.lease_id);
    summary.cells += 1;
    outbox.push(ResultItem { lease_id: d.lease_id, cell_id: None, result: d.result, elapsed_ms: Some(d.elapsed_ms) });
}

/// Queue a leased cell for the engine threads once its closed loop is at hand. If
/// the spec or a model cannot be fetched because the server is away, the cell waits
/// in `unready` (its lease is still extended) and is tried again; a spec or model
/// that can never work is reported as the cell's error result.
#[allow(clippy::too_many_arguments)]
fn start_cell(
    cell: LeasedCell,
    api: &Api,
    queue: &Queue,
    held: &mut HashMap<String, LeasedCell>,
    unready: &mut Vec<LeasedCell>,
    outbox: &mut Outbox,
    loops: &mut HashMap<String, Arc<ClosedLoop>>,
    models: &mut HashMap<String, Network>,
) {
    match closed_loop_for(api, &cell, loops, models) {
        Ok(l) => {
            held.insert(cell.lease_id.clone(), cell.clone());
            queue.jobs.lock().unwrap().push_back(Job { cell, loop_: l });
            queue.ready.notify_one();
        }
        Err(SetupError::Transient(msg)) => {
            tracing::warn!(cell = %cell.cell_id, "cannot set up the cell yet, will retry: {msg}");
            held.insert(cell.lease_id.clone(), cell.clone());
            unready.push(cell);
        }
        Err(SetupError::Fatal(msg)) => {
            tracing::error!(cell = %cell.cell_id, "cannot set up the cell: {msg}");
            held.remove(&cell.lease_id);
            outbox.push(ResultItem {
                lease_id: cell.lease_id.clone(),
                cell_id: None,
                result: FailedAttempt::value(msg),
                elapsed_ms: None,
            });
        }
    }
}

/// Why a cell's closed loop could not be built.
enum SetupError {
    /// The server did not answer (away, overloaded): try again later.
    Transient(String),
    /// The stored spec or a model cannot be used: the cell's attempt failed.
    Fatal(String),
}

impl SetupError {
    fn fetching(what: &str, e: ApiError) -> SetupError {
        let msg = format!("fetching {what}: {e}");
        if e.is_transient() {
            SetupError::Transient(msg)
        } else {
            SetupError::Fatal(msg)
        }
    }
}

fn engine_thread(q: Arc<Queue>, tx: mpsc::Sender<Done>) {
    loop {
        let job = {
            let mut jobs = q.jobs.lock().unwrap();
            loop {
                if let Some(j) = jobs.pop_front() {
                    q.running.fetch_add(1, Ordering::SeqCst);
                    break Some(j);
                }
                if q.closed.load(Ordering::SeqCst) {
                    break None;
                }
                jobs = q.ready.wait_timeout(jobs, Duration::from_millis(200)).unwrap().0;
            }
        };
        let Some(job) = job else { return };
        let t = Instant::now();
        let result = run_cell(&job);
        let _ = tx.send(Done { lease_id: job.cell.lease_id.clone(), result, elapsed_ms: t.elapsed().as_secs_f64() * 1e3 });
        q.running.fetch_sub(1, Ordering::SeqCst);
    }
}

/// The verdict JSON of one cell, or `{"error": …}`; an engine panic is caught and
/// reported as an error so the server can count the attempt.
fn run_cell(job: &Job) -> serde_json::Value {
    let cell = match job.loop_.cell_from_map(&job.cell.cell_box) {
        Ok(c) => c,
        Err(e) => return FailedAttempt::value(e.to_string()),
    };
    let l = job.loop_.clone();
    match std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| check_cell(&l, &cell))) {
        Ok(v) => serde_json::to_value(&v).unwrap_or_else(|e| FailedAttempt::value(e.to_string())),
        Err(p) => {
            let msg = p
                .downcast_ref::<String>()
                .cloned()
                .or_else(|| p.downcast_ref::<&str>().map(|s| s.to_string()))
                .unwrap_or_else(|| "engine panic".into());
            FailedAttempt::value(format!("engine failure: {msg}"))
        }
    }
}

/// The campaign's closed loop, fetched once per spec hash; models once per hash.
fn closed_loop_for(
    api: &Api,
    cell: &LeasedCell,
    loops: &mut HashMap<String, Arc<ClosedLoop>>,
    models: &mut HashMap<String, Network>,
) -> Result<Arc<ClosedLoop>, SetupError> {
    if let Some(l) = loops.get(&cell.spec_hash) {
        return Ok(l.clone());
    }
    let text = api
        .get_text(&format!("/api/v1/campaigns/{}/spec", cell.campaign_id))
        .map_err(|e| SetupError::fetching("the spec", e))?;
    let spec =
        parse_spec(&text).map_err(|errs| SetupError::Fatal(format!("the stored spec is invalid: {}", errs[0])))?;
    let mut nets = Vec::new();
    for r in &spec.networks {
        let hex = r.strip_prefix("sha256:").ok_or(SetupError::Fatal(format!("network '{r}' is not a stored model")))?;
        if !models.contains_key(hex) {
            let bytes = api
                .get_bytes(&format!("/api/v1/models/{hex}"))
                .map_err(|e| SetupError::fetching(&format!("model {hex}"), e))?;
            if net::sha256_hex(&bytes) != hex {
                return Err(SetupError::Fatal(format!("model {hex}: downloaded bytes do not match the hash")));
            }
            let n = net::load_onnx(&bytes).map_err(|e| SetupError::Fatal(format!("model {hex}: {e}")))?;
            models.insert(hex.to_string(), n);
        }
        nets.push(models[hex].clone());
    }
    let l = Arc::new(ClosedLoop::new(spec, nets).map_err(|e| SetupError::Fatal(e.to_string()))?);
    tracing::info!(campaign = %cell.campaign_id, spec = %cell.spec_hash, "spec and models loaded");
    loops.insert(cell.spec_hash.clone(), l.clone());
    Ok(l)
}
