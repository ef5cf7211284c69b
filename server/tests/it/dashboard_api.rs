//! The routes the dashboard relies on: its public pages, `whoami`, the compact
//! `leaves` rows (full and incremental) and the latest results. Counts are checked
//! against the server's own exact counters and against the cell listing, two views
//! computed by other code paths.

use crate::common;
use common::*;
use serde_json::Value;
use std::collections::HashMap;
use tessera_server::auth::Role;

/// Every leaf by rowid → (status, depth, split-state bounds), read page by page.
async fn all_leaves(ts: &TestServer, id: &str, since: Option<i64>, limit: usize) -> (HashMap<i64, (String, i64, Vec<f64>)>, i64, usize) {
    let mut out = HashMap::new();
    let mut after = 0;
    let mut pages = 0;
    let mut as_of = None;
    loop {
        let mut url = format!("/api/v1/campaigns/{id}/leaves?limit={limit}&after={after}");
        if let Some(s) = since {
            url.push_str(&format!("&since_ms={s}"));
        }
        let r = ts.client.get(&url, ts.token(Role::Viewer)).await;
        assert_eq!(r.status, 200, "{}", r.text());
        let v = r.json();
        pages += 1;
        as_of.get_or_insert(v["as_of_ms"].as_i64().unwrap());
        assert_eq!(v["split_states"], serde_json::json!(["h"]));
        assert_eq!(v["states"], serde_json::json!(["h", "v"]));
        let statuses: Vec<String> = v["statuses"].as_array().unwrap().iter().map(|s| s.as_str().unwrap().to_string()).collect();
        for row in v["rows"].as_array().unwrap() {
            let row = row.as_array().unwrap();
            assert_eq!(row.len(), 5, "rowid, status, depth, lo, hi of h");
            let status = statuses[row[1].as_u64().unwrap() as usize].clone();
            let bounds = row[3..].iter().map(|x| x.as_f64().unwrap()).collect();
            assert!(out.insert(row[0].as_i64().unwrap(), (status, row[2].as_i64().unwrap(), bounds)).is_none(), "a row twice");
        }
        match v["next_after"].as_i64() {
            Some(n) => after = n,
            None => break,
        }
    }
    (out, as_of.unwrap(), pages)
}

#[tokio::test]
async fn leaves_match_the_counters_and_the_cell_listing() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "dash").await;
    let id = create_campaign(&ts, &spec(&model, 5), "?initial_depth=2").await;
    // Part of the way: some cells decided, some still pending.
    drive(&ts, 3, Some(3)).await;
    let (leaves, as_of, pages) = all_leaves(&ts, &id, None, 4).await;
    assert!(pages > 1, "small pages must paginate");
    let summary = ts.client.get(&format!("/api/v1/campaigns/{id}"), ts.token(Role::Viewer)).await.json();
    let mut by_status: HashMap<String, i64> = HashMap::new();
    for (s, _, _) in leaves.values() {
        *by_status.entry(s.clone()).or_default() += 1;
    }
    assert!(!by_status.contains_key("split"), "a full read lists leaves only");
    for s in ["pending", "leased", "safe", "counterexample", "unresolved", "failed"] {
        assert_eq!(by_status.get(s).copied().unwrap_or(0), summary["cells"][s].as_i64().unwrap(), "{s}");
    }
    assert!(by_status.get("safe").copied().unwrap_or(0) > 0 && by_status.get("pending").copied().unwrap_or(0) > 0, "{by_status:?}");
    // The leaves tile h ∈ [0, 1]: widths 2^-depth that sum to 1 (exact in binary).
    let width: f64 = leaves.values().map(|(_, _, b)| b[1] - b[0]).sum();
    assert_eq!(width, 1.0);
    for (_, d, b) in leaves.values() {
        assert_eq!(b[1] - b[0], 0.5f64.powi(*d as i32));
    }
    // Same boxes as the paginated cell listing, which decodes them separately.
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=safe&limit=1000"), ts.token(Role::Viewer)).await;
    let mut listed: Vec<(f64, f64)> =
        r.json()["cells"].as_array().unwrap().iter().map(|c| (c["box"]["h"][0].as_f64().unwrap(), c["box"]["h"][1].as_f64().unwrap())).collect();
    let mut mine: Vec<(f64, f64)> = leaves.values().filter(|(s, _, _)| s == "safe").map(|(_, _, b)| (b[0], b[1])).collect();
    listed.sort_by(|a, b| a.partial_cmp(b).unwrap());
    mine.sort_by(|a, b| a.partial_cmp(b).unwrap());
    assert_eq!(listed, mine);

    // Incremental: applying the changes since `as_of` (split cells drop out) gives
    // the same picture as a fresh full read.
    tokio::time::sleep(std::time::Duration::from_millis(5)).await;
    drive(&ts, 3, Some(2)).await;
    let (changes, _, _) = all_leaves(&ts, &id, Some(as_of), 1000).await;
    assert!(changes.values().any(|(s, _, _)| s == "split"), "bisected cells are reported as split");
    let mut updated = leaves.clone();
    // A split row drops the cell if the first read had it as a leaf. It may also name a
    // cell that never was one there: born after `as_of` and split again since, or split
    // in the same millisecond as `as_of` (the incremental read includes its bound, so a
    // change is never missed). The picture after applying must equal a fresh read.
    for (k, v) in changes {
        if v.0 == "split" {
            updated.remove(&k);
        } else {
            updated.insert(k, v);
        }
    }
    let (fresh, _, _) = all_leaves(&ts, &id, None, 1000).await;
    assert_eq!(updated, fresh);

    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/leaves?limit=0"), ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 400);
    assert_eq!(r.json()["field"], "limit");
    let r = ts.client.get("/api/v1/campaigns/nope/leaves", ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 404);
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn recent_results_newest_first_and_whoami() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "recent").await;
    let id = create_campaign(&ts, &spec(&model, 3), "").await;
    let n = drive(&ts, 2, None).await;
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/results?limit=1000"), ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 200, "{}", r.text());
    let results = r.json()["results"].as_array().unwrap().clone();
    assert_eq!(results.len(), n);
    let times: Vec<i64> = results.iter().map(|x| x["received_at_ms"].as_i64().unwrap()).collect();
    assert!(times.windows(2).all(|w| w[0] >= w[1]), "newest first: {times:?}");
    let kinds: Vec<&str> = results.iter().map(|x| x["kind"].as_str().unwrap()).collect();
    let cov = coverage(&ts, &id).await;
    assert_eq!(kinds.iter().filter(|k| **k == "safe").count() as i64, cov["statuses"]["safe"]["cells"].as_i64().unwrap());
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/results?limit=2"), ts.token(Role::Viewer)).await;
    assert_eq!(r.json()["results"].as_array().unwrap().len(), 2);
    assert_eq!(ts.client.get(&format!("/api/v1/campaigns/{id}/results?limit=5000"), ts.token(Role::Viewer)).await.status, 400);

    for role in Role::ALL {
        let r = ts.client.get("/api/v1/whoami", ts.token(role)).await;
        assert_eq!(r.status, 200);
        assert_eq!(r.json()["role"], role.as_str());
    }
    assert_eq!(ts.client.req("GET", "/api/v1/whoami", None, None).await.status, 401);
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn dashboard_pages_are_public_and_self_contained() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    for (path, ctype) in [
        ("/", "text/html"),
        ("/dashboard", "text/html"),
        ("/dashboard/campaigns/some-id", "text/html"),
        ("/dashboard/app.js", "text/javascript"),
        ("/dashboard/style.css", "text/css"),
    ] {
        let r = ts.client.req("GET", path, None, None).await;
        assert_eq!(r.status, 200, "{path}");
        assert!(r.content_type.starts_with(ctype), "{path}: {}", r.content_type);
        let csp = r.headers.get("content-security-policy").unwrap().to_str().unwrap();
        assert!(csp.contains("default-src 'none'") && csp.contains("connect-src 'self'"), "{csp}");
    }
    let page = ts.client.req("GET", "/dashboard", None, None).await.text();
    assert!(page.contains(tessera_engine::caution::CAUTION), "the dashboard shows the caution in full");
    assert!(page.contains("/dashboard/app.js"));
    // A page never carries data: without a token the API still answers 401.
    let r = ts.client.req("GET", "/api/v1/campaigns", None, None).await;
    assert_eq!(r.status, 401);
    let _: Value = r.json();
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn history_grows_to_the_current_coverage() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "history").await;
    let id = create_campaign(&ts, &spec(&model, 5), "").await;
    let url = format!("/api/v1/campaigns/{id}/history?points=7");
    let r = ts.client.get(&url, ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 200, "{}", r.text());
    assert_eq!(r.json()["points"], serde_json::json!([]), "no results, no history");
    for _ in 0..4 {
        drive(&ts, 2, Some(1)).await;
        tokio::time::sleep(std::time::Duration::from_millis(3)).await;
    }
    drive(&ts, 4, None).await;
    let points = ts.client.get(&url, ts.token(Role::Viewer)).await.json()["points"].as_array().unwrap().clone();
    assert!(!points.is_empty() && points.len() <= 7, "{points:?}");
    for w in points.windows(2) {
        assert!(w[0]["t_ms"].as_i64() <= w[1]["t_ms"].as_i64());
        for s in ["safe", "counterexample", "unresolved"] {
            assert!(w[0][s].as_f64() <= w[1][s].as_f64(), "{s} decreased: {w:?}");
        }
    }
    // The last point is the coverage, read from the exact counters.
    let cov = coverage(&ts, &id).await;
    let last = points.last().unwrap();
    for s in ["safe", "counterexample", "unresolved"] {
        assert_eq!(last[s].as_f64().unwrap(), cov["statuses"][s]["fraction"].as_f64().unwrap(), "{s}");
    }
    assert!(last["counterexample"].as_f64().unwrap() > 0.0, "{last}");
    assert!(last["safe"].as_f64().unwrap() > 0.0);
    assert_eq!(ts.client.get(&format!("/api/v1/campaigns/{id}/history?points=0"), ts.token(Role::Viewer)).await.status, 400);
    ts.server.stop().await.unwrap();
}
