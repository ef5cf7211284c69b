//! The campaign report, as JSON and as Markdown (with the safety caution).

use crate::error::{ApiError, ApiResult};
use crate::refine::{self};
use crate::store::{now_ms, Store};
use serde_json::{json, Value};
use tessera_protocol::{CellStatus, COUNTEREXAMPLE_NOTE};
use tessera_engine::caution::CAUTION;
use crate::campaigns::{get, spec_of};
use crate::views::{coverage, counterexamples};

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
    // Safe cells whose verdict rests on a MILP solver (the worker's exact method,
    // `stats.method = "exact"`) rather than on outward-rounded set arithmetic.
    let max_depth = cov.max_depth;
    let on_solver: Vec<(i64, i64)> = sqlx::query_as(
        "SELECT c.depth, COUNT(*) FROM cells c JOIN results r ON r.id = c.result_id
         WHERE c.campaign_id = ? AND c.status = 'safe'
           AND json_extract(r.verdict_json, '$.stats.method') = 'exact'
         GROUP BY c.depth",
    )
    .bind(id)
    .fetch_all(&store.pool)
    .await?;
    let (solver_cells, solver_volume) = on_solver
        .iter()
        .fold((0i64, 0i64), |(c, v), &(depth, n)| (c + n, v + n * refine::volume(max_depth, depth as u32)));
    let safe_on_solver = json!({
        "cells": solver_cells,
        "fraction": solver_volume as f64 / refine::volume(max_depth, 0) as f64,
        "reduced": refine::reduced_fraction(solver_volume, max_depth),
    });
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
        "safe_on_solver": safe_on_solver,
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
    let sol = &r["safe_on_solver"];
    if sol["cells"].as_i64().unwrap_or(0) > 0 {
        let _ = writeln!(
            s,
            "Of the proven safe volume, {} ({} cells) rests on a MILP solver's floating-point infeasibility claim (the exact method), not on outward-rounded set arithmetic.\n",
            sol["reduced"].as_str().unwrap_or("?"),
            sol["cells"]
        );
    }
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
