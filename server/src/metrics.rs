//! Process counters and their Prometheus text rendering (with gauges read from the
//! store at scrape time).

use tessera_protocol::CampaignState;
use crate::error::ApiResult;
use crate::store::Store;
use crate::writer::WriterCounts;
use sqlx::Row;
use std::fmt::Write;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;

/// Upper bounds (seconds) of the latency histogram buckets.
const BUCKETS: [f64; 10] = [0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 1.0, 5.0];

#[derive(Default)]
pub struct Histogram {
    inner: Mutex<(Vec<u64>, u64, f64)>,
}

impl Histogram {
    pub fn observe(&self, seconds: f64) {
        if let Ok(mut g) = self.inner.lock() {
            if g.0.is_empty() {
                g.0 = vec![0; BUCKETS.len()];
            }
            for (i, b) in BUCKETS.iter().enumerate() {
                if seconds <= *b {
                    g.0[i] += 1;
                }
            }
            g.1 += 1;
            g.2 += seconds;
        }
    }
    fn render(&self, name: &str, help: &str, out: &mut String) {
        let (buckets, count, sum) = self.inner.lock().map(|g| g.clone()).unwrap_or_default();
        let _ = writeln!(out, "# HELP {name} {help}\n# TYPE {name} histogram");
        for (i, b) in BUCKETS.iter().enumerate() {
            let _ = writeln!(out, "{name}_bucket{{le=\"{b}\"}} {}", buckets.get(i).copied().unwrap_or(0));
        }
        let _ = writeln!(out, "{name}_bucket{{le=\"+Inf\"}} {count}\n{name}_sum {sum}\n{name}_count {count}");
    }
}

#[derive(Default)]
pub struct Metrics {
    pub leases_issued: AtomicU64,
    pub leases_reclaimed: AtomicU64,
    pub results_accepted: AtomicU64,
    pub results_rejected: AtomicU64,
    pub cells_created: AtomicU64,
    pub lease_seconds: Histogram,
    pub submit_seconds: Histogram,
}

impl Metrics {
    pub fn add(c: &AtomicU64, n: u64) {
        c.fetch_add(n, Ordering::Relaxed);
    }

    /// Prometheus text exposition format, version 0.0.4.
    pub async fn render(&self, store: &Store, writer: WriterCounts) -> ApiResult<String> {
        let mut s = String::new();
        let counter = |s: &mut String, name: &str, help: &str, v: &AtomicU64| {
            let _ = writeln!(s, "# HELP {name} {help}\n# TYPE {name} counter\n{name} {}", v.load(Ordering::Relaxed));
        };
        counter(&mut s, "tessera_leases_issued_total", "Cells leased since start.", &self.leases_issued);
        counter(&mut s, "tessera_leases_reclaimed_total", "Expired leases returned to the queue since start.", &self.leases_reclaimed);
        counter(&mut s, "tessera_results_accepted_total", "Results accepted since start.", &self.results_accepted);
        counter(&mut s, "tessera_results_rejected_total", "Results ignored (duplicate, late, invalid) since start.", &self.results_rejected);
        counter(&mut s, "tessera_cells_created_total", "Cells created by bisection since start.", &self.cells_created);
        let plain = |s: &mut String, name: &str, help: &str, v: String| {
            let _ = writeln!(s, "# HELP {name} {help}\n# TYPE {name} counter\n{name} {v}");
        };
        plain(&mut s, "tessera_write_groups_total", "Group transactions of lease, extend, release and result requests.", writer.groups.to_string());
        plain(&mut s, "tessera_write_group_requests_total", "Requests run in group transactions.", writer.requests.to_string());
        plain(&mut s, "tessera_write_groups_retried_total", "Groups run again one request per savepoint after a request failed.", writer.retried.to_string());
        plain(&mut s, "tessera_write_work_seconds_total", "Time group transactions spent on their requests.", writer.work_seconds.to_string());
        plain(&mut s, "tessera_write_commit_seconds_total", "Time group transactions spent in COMMIT.", writer.commit_seconds.to_string());
        self.lease_seconds.render("tessera_lease_request_seconds", "Time to serve a lease request.", &mut s);
        self.submit_seconds.render("tessera_submit_request_seconds", "Time to serve a result submission.", &mut s);

        let rows = sqlx::query("SELECT state, COUNT(*) FROM campaigns GROUP BY state").fetch_all(&store.pool).await?;
        let _ = writeln!(s, "# HELP tessera_campaigns Campaigns by state.\n# TYPE tessera_campaigns gauge");
        for r in rows {
            let _ = writeln!(s, "tessera_campaigns{{state=\"{}\"}} {}", r.try_get::<String, _>(0)?, r.try_get::<i64, _>(1)?);
        }
        let rows = sqlx::query(
            "SELECT k.campaign_id, k.status, k.cells, k.volume, c.max_depth FROM campaign_counters k
             JOIN campaigns c ON c.id = k.campaign_id WHERE c.state IN (?, ?, ?)
             ORDER BY k.campaign_id, k.status LIMIT 7000",
        )
        .bind(CampaignState::Running.as_str())
        .bind(CampaignState::Paused.as_str())
        .bind(CampaignState::Done.as_str())
        .fetch_all(&store.pool)
        .await?;
        let _ = writeln!(s, "# HELP tessera_cells Cells by campaign and status.\n# TYPE tessera_cells gauge");
        let mut fr = String::new();
        let _ = writeln!(fr, "# HELP tessera_volume_fraction Fraction of the envelope by campaign and leaf status.\n# TYPE tessera_volume_fraction gauge");
        for r in rows {
            let (c, stored): (String, String) = (r.try_get(0)?, r.try_get(1)?);
            let status = crate::store::cell_status(&stored)?;
            let st = status.api_name();
            let (n, v, d): (i64, i64, i64) = (r.try_get(2)?, r.try_get(3)?, r.try_get(4)?);
            let _ = writeln!(s, "tessera_cells{{campaign=\"{c}\",status=\"{st}\"}} {n}");
            if status.is_leaf() {
                let total = (1i64 << d.clamp(0, 62)) as f64;
                let _ = writeln!(fr, "tessera_volume_fraction{{campaign=\"{c}\",status=\"{st}\"}} {}", v as f64 / total);
            }
        }
        s.push_str(&fr);
        Ok(s)
    }
}
