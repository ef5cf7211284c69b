//! A campaign driven end to end by a scripted worker over HTTP: exact fractions,
//! lease expiry and re-issue, duplicates, failed attempts, restart on the same file.
//!
//! Reference for the expected fractions: a hand computation (below) of the bisection
//! of h ∈ [0, 1] to depth 4 under the scripted rule "safe if hi < 0.5, unsafe if
//! lo > 0.9, else inconclusive", with cells holding a counterexample kept as leaves
//! (`refine_unsafe` false):
//!   safe       = [0, 1/4] + [1/4, 3/8] + [3/8, 7/16]            = 7/16
//!   counterexample = [15/16, 1]                                 = 1/16
//!   unresolved = [7/16, 1/2] + six depth-4 cells of [1/2, 7/8]
//!                + [7/8, 15/16]                                 = 8/16 = 1/2
//! (the depth-4 cells are at max_depth, where inconclusive becomes unresolved).

use crate::common;
use common::*;
use serde_json::{json, Value};
use tessera_server::auth::Role;

fn assert_expected_fractions(cov: &Value) {
    let st = &cov["statuses"];
    assert_eq!(st["safe"]["volume"], 7, "{cov}");
    assert_eq!(st["counterexample"]["volume"], 1, "{cov}");
    assert_eq!(st["unresolved"]["volume"], 8, "{cov}");
    assert_eq!(st["pending"]["volume"], 0);
    assert_eq!(st["leased"]["volume"], 0);
    assert_eq!(st["failed"]["volume"], 0);
    assert_eq!(st["safe"]["exact"], "7/2^4");
    assert_eq!(st["safe"]["reduced"], "7/16");
    assert_eq!(st["counterexample"]["reduced"], "1/16");
    assert_eq!(st["unresolved"]["reduced"], "1/2");
    assert_eq!(st["safe"]["fraction"], 0.4375);
    // Leaves: safe 3, counterexample 1, unresolved 1 + 6 + 1 = 8; internal nodes: 11.
    assert_eq!(st["safe"]["cells"], 3);
    assert_eq!(st["counterexample"]["cells"], 1);
    // The stored name of the status does not leak.
    assert!(st.get("unsafe").is_none(), "{cov}");
    assert!(cov["counterexample_note"].as_str().unwrap().contains("upper bound"), "{cov}");
    assert_eq!(cov["caution"], tessera_engine::caution::CAUTION);
    assert_eq!(st["unresolved"]["cells"], 8);
    assert_eq!(cov["split_cells"], 11);
    assert_eq!(cov["leaf_volume_matches_total"], true);
    assert_eq!(cov["total_volume"], 16);
}

#[tokio::test]
async fn scripted_campaign_ends_with_exact_fractions() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "a").await;
    let id = create_campaign(&ts, &spec(&model, 4), "?priority=3").await;

    // The first lease is the whole envelope, with the non-split state at its envelope.
    let first = lease(&ts, 5).await;
    assert_eq!(first.len(), 1);
    let c = &first[0];
    assert_eq!(c["campaign_id"], id.as_str());
    assert_eq!(c["depth"], 0);
    assert_eq!(c["box"], json!({"h": [0.0, 1.0], "v": [-1.0, 1.0]}));
    let spec_resp = ts.client.get(&format!("/api/v1/campaigns/{id}/spec"), ts.token(Role::Worker)).await;
    assert_eq!(spec_resp.status, 200);
    assert_eq!(
        spec_resp.headers.get("x-tessera-spec-hash").unwrap().to_str().unwrap(),
        c["spec_hash"].as_str().unwrap()
    );
    // The served spec validates, and its hash is the SHA-256 of the served bytes.
    tessera_engine::spec::parse_spec(&spec_resp.text()).expect("served spec validates");
    {
        use sha2::Digest;
        assert_eq!(hex::encode(sha2::Sha256::digest(&spec_resp.body)), c["spec_hash"].as_str().unwrap());
    }
    let a = submit(&ts, &[(c["lease_id"].as_str().unwrap().into(), scripted(c))]).await;
    assert_eq!(a[0]["status"], "accepted");
    assert_eq!(a[0]["cell_status"], "split");

    // Halves come next, shallowest first, and meet exactly at the midpoint.
    let halves = lease(&ts, 2).await;
    assert_eq!(halves.len(), 2);
    let mut hs: Vec<[f64; 2]> = halves
        .iter()
        .map(|c| [c["box"]["h"][0].as_f64().unwrap(), c["box"]["h"][1].as_f64().unwrap()])
        .collect();
    hs.sort_by(|a, b| a[0].total_cmp(&b[0]));
    assert_eq!(hs, vec![[0.0, 0.5], [0.5, 1.0]]);
    let items: Vec<(String, Value)> =
        halves.iter().map(|c| (c["lease_id"].as_str().unwrap().to_string(), scripted(c))).collect();
    submit(&ts, &items).await;

    drive(&ts, 3, None).await;
    let cov = coverage(&ts, &id).await;
    assert_expected_fractions(&cov);
    assert_eq!(cov["state"], "done");
    assert_eq!(cov["estimated_seconds_remaining"], 0.0);

    let t = tiling(&ts, &id).await;
    assert_eq!(t["ok"], true, "{t}");
    assert_eq!(t["leaves"], 12);
    assert_eq!(t["cells"], 23);

    // Cells by status and depth, paginated.
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=unresolved&depth=4&limit=5"), ts.token(Role::Viewer)).await;
    let page = r.json();
    assert_eq!(page["cells"].as_array().unwrap().len(), 5);
    let after = page["next_after"].as_i64().unwrap();
    let r = ts
        .client
        .get(&format!("/api/v1/campaigns/{id}/cells?status=unresolved&depth=4&limit=5&after={after}"), ts.token(Role::Viewer))
        .await;
    let page2 = r.json();
    assert_eq!(page2["cells"].as_array().unwrap().len(), 3);
    assert!(page2["next_after"].is_null());
    for c in page["cells"].as_array().unwrap().iter().chain(page2["cells"].as_array().unwrap()) {
        assert_eq!(c["status"], "unresolved");
        assert_eq!(c["depth"], 4);
        assert_eq!(c["result"]["verdict"], "inconclusive");
    }

    // Counterexamples and the report.
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/counterexamples"), ts.token(Role::Viewer)).await;
    let cex = r.json()["counterexamples"].as_array().unwrap().clone();
    assert_eq!(cex.len(), 1);
    assert_eq!(cex[0]["box"]["h"], json!([0.9375, 1.0]));
    assert_eq!(cex[0]["cell_status"], "counterexample");
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=counterexample"), ts.token(Role::Viewer)).await;
    let cells = r.json()["cells"].as_array().unwrap().clone();
    assert_eq!(cells.len(), 1, "{}", r.text());
    assert_eq!(cells[0]["status"], "counterexample");
    assert_eq!(cells[0]["result"]["verdict"], "unsafe");
    // The name kept in the database is not one of the API's.
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=unsafe"), ts.token(Role::Viewer)).await;
    assert_eq!((r.status, r.json()["field"].clone()), (400, json!("status")), "{}", r.text());
    assert!(r.json()["detail"].as_str().unwrap().contains("counterexample"), "{}", r.text());
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}"), ts.token(Role::Viewer)).await;
    assert_eq!(r.json()["cells"]["counterexample"], 1, "{}", r.text());
    assert_eq!(cex[0]["counterexample"]["initial_state"]["h"], 0.9375);

    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/report"), ts.token(Role::Viewer)).await;
    let rep = r.json();
    assert_eq!(rep["spec_hash"], c["spec_hash"]);
    assert_eq!(rep["model_sha256"], json!([model]));
    assert_eq!(rep["engine_versions"], json!(["scripted-1"]));
    // The caution in full, float32 point included, from the one place it is written.
    assert_eq!(rep["caution"], tessera_engine::caution::CAUTION);
    assert!(rep["caution"].as_str().unwrap().contains("float32"));
    assert_eq!(rep["coverage"]["statuses"]["safe"]["reduced"], "7/16");
    assert_eq!(rep["coverage"]["statuses"]["counterexample"]["reduced"], "1/16");
    // Safe cells resting on a solver, recounted from the cells' own results.
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=safe&limit=1000"), ts.token(Role::Viewer)).await;
    let safe_cells = r.json()["cells"].as_array().unwrap().clone();
    let on_solver: Vec<&Value> = safe_cells.iter().filter(|c| c["result"]["stats"]["method"] == "exact").collect();
    let recount: f64 = on_solver.iter().map(|c| 0.5f64.powi(c["depth"].as_i64().unwrap() as i32)).sum();
    assert!(!on_solver.is_empty() && on_solver.len() < safe_cells.len(), "{}", r.text());
    assert_eq!(rep["safe_on_solver"]["cells"], on_solver.len());
    assert_eq!(rep["safe_on_solver"]["fraction"].as_f64().unwrap(), recount, "{}", rep["safe_on_solver"]);
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/report.md"), ts.token(Role::Viewer)).await;
    assert!(r.content_type.starts_with("text/markdown"));
    let md = r.text();
    let caution = tessera_engine::caution::CAUTION;
    for needle in [caution, c["spec_hash"].as_str().unwrap(), &model, "7/16", "scripted-1", "| counterexample | 1 |", "upper bound", "rests on a MILP solver"] {
        assert!(md.contains(needle), "report.md lacks {needle}:\n{md}");
    }
    assert!(!md.contains("| unsafe |"), "{md}");

    // Metrics reflect the run.
    let r = ts.client.get("/metrics", ts.token(Role::Viewer)).await;
    let m = r.text();
    assert!(m.contains("tessera_results_accepted_total 23"), "{m}");
    assert!(m.contains(&format!("tessera_volume_fraction{{campaign=\"{id}\",status=\"safe\"}} 0.4375")), "{m}");
    assert!(m.contains(&format!("tessera_volume_fraction{{campaign=\"{id}\",status=\"counterexample\"}} 0.0625")), "{m}");
    assert!(!m.contains("status=\"unsafe\""), "{m}");
    // Every lease and result request went through the group writer.
    let value = |name: &str| -> f64 {
        m.lines().find_map(|l| l.strip_prefix(&format!("{name} "))).and_then(|v| v.parse().ok()).unwrap_or(f64::NAN)
    };
    let (groups, requests) = (value("tessera_write_groups_total"), value("tessera_write_group_requests_total"));
    assert!(groups >= 1.0 && requests >= groups, "groups {groups}, requests {requests}:\n{m}");
    assert_eq!(value("tessera_write_groups_retried_total"), 0.0, "{m}");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn hint_picks_the_cut_and_fallback_is_widest_normalized() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "b").await;
    let mut s = spec(&model, 3);
    s["envelope"] = json!({"h": [0.0, 1.0], "v": [0.0, 4.0]});
    s["refinement"]["split"] = json!(["h", "v"]);
    let id = create_campaign(&ts, &s, "").await;
    let inconclusive = |hint: Value| json!({"verdict": "inconclusive", "split_hint": hint});

    // Hint "v": the root is cut in v although h and v are equally wide (normalized).
    let root = lease(&ts, 1).await;
    submit(&ts, &[(root[0]["lease_id"].as_str().unwrap().into(), inconclusive(json!({"dim": "v", "score": 2.0})))]).await;
    let kids = lease(&ts, 2).await;
    let vs: Vec<&Value> = kids.iter().map(|c| &c["box"]["v"]).collect();
    assert!(vs.contains(&&json!([0.0, 2.0])) && vs.contains(&&json!([2.0, 4.0])), "{vs:?}");
    for k in &kids {
        assert_eq!(k["box"]["h"], json!([0.0, 1.0]));
    }
    // No hint (and a hint naming a state that is not split): the widest normalized
    // dimension, h (width 1 of 1) against v (2 of 4), is cut.
    let items = vec![
        (kids[0]["lease_id"].as_str().unwrap().to_string(), inconclusive(Value::Null)),
        (kids[1]["lease_id"].as_str().unwrap().to_string(), inconclusive(json!({"dim": "nope"}))),
    ];
    submit(&ts, &items).await;
    let grand = lease(&ts, 10).await;
    assert_eq!(grand.len(), 4);
    for g in &grand {
        let h = &g["box"]["h"];
        assert!(h == &json!([0.0, 0.5]) || h == &json!([0.5, 1.0]), "{g}");
        assert_eq!(g["depth"], 2);
    }
    let t = tiling(&ts, &id).await;
    assert_eq!(t["ok"], true, "{t}");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn cells_with_counterexamples_are_cut_to_max_depth_by_default() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "c").await;
    // Every answer is unsafe. Without `refine_unsafe` in the spec the tree still grows
    // to max_depth; with it set to false the root stays the only leaf.
    for (refine, leaves, splits) in [(None, 4, 3), (Some(false), 1, 0)] {
        let mut s = spec(&model, 2);
        match refine {
            None => drop(s["refinement"].as_object_mut().unwrap().remove("refine_unsafe")),
            Some(r) => s["refinement"]["refine_unsafe"] = json!(r),
        }
        let id = create_campaign(&ts, &s, "").await;
        loop {
            let cells = lease(&ts, 10).await;
            if cells.is_empty() {
                break;
            }
            let items: Vec<(String, Value)> = cells
                .iter()
                .map(|c| (c["lease_id"].as_str().unwrap().to_string(), json!({"verdict": "unsafe", "counterexample": {"t": 0}})))
                .collect();
            submit(&ts, &items).await;
        }
        let cov = coverage(&ts, &id).await;
        assert_eq!(cov["statuses"]["counterexample"]["cells"], leaves, "{refine:?}: {cov}");
        assert_eq!(cov["statuses"]["counterexample"]["reduced"], "1/1");
        assert_eq!(cov["split_cells"], splits, "{refine:?}: {cov}");
        assert_eq!(cov["state"], "done");
    }
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn submission_runs_the_engine_model_checks_naming_the_network() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let sub = ts.token(Role::Submitter).to_string();
    // Three outputs for the spec's two commands (`Spec::check_network`, as the engine).
    let m = tessera_server::model_check::testing::tiny_model(1, 3, "three outputs");
    let r = ts.client.post_raw("/api/v1/models", &sub, m).await;
    assert_eq!(r.status, 201, "{}", r.text());
    let sha = r.json()["sha256"].as_str().unwrap().to_string();
    let r = ts.client.post("/api/v1/campaigns", &sub, &spec(&sha, 3)).await;
    assert_eq!(r.status, 422, "{}", r.text());
    let v = r.json();
    assert_eq!(v["error"], "invalid_spec");
    assert_eq!(v["field"], "controller.networks[0]");
    assert_eq!(v["errors"][0]["message"], "network has 3 outputs but the spec has 2 commands", "{v}");
    // A model stored without its widths (the columns allow it) is read again with the
    // engine's reader rather than let through.
    let wide = tessera_server::model_check::testing::tiny_model(2, 3, "no widths");
    let sha = ts.server.state.store.put_model(&wide, None, None).await.unwrap();
    let r = ts.client.post("/api/v1/campaigns", &sub, &spec(&sha, 3)).await;
    assert_eq!(r.status, 422, "{}", r.text());
    let v = r.json();
    assert_eq!(v["field"], "controller.networks[0]");
    let messages: Vec<&str> = v["errors"].as_array().unwrap().iter().map(|e| e["message"].as_str().unwrap()).collect();
    assert_eq!(messages, ["network takes 2 inputs but the spec has 1 observations", "network has 3 outputs but the spec has 2 commands"]);
    let n: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM campaigns").fetch_one(&ts.server.state.store.pool).await.unwrap();
    assert_eq!(n, 0, "no campaign was created");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn leases_expire_are_reissued_and_duplicates_are_ignored() {
    let dir = tempfile::tempdir().unwrap();
    let mut cfg = config(dir.path());
    cfg.lease_seconds = 1;
    cfg.sweep_seconds = 1;
    let ts = start(cfg).await;
    let model = upload_model(&ts, "d").await;
    let id = create_campaign(&ts, &spec(&model, 4), "").await;

    let root = lease(&ts, 1).await;
    let l0 = root[0]["lease_id"].as_str().unwrap().to_string();
    let a = submit(&ts, &[(l0.clone(), scripted(&root[0]))]).await;
    assert_eq!(a[0]["status"], "accepted");
    // The same result again, and twice within one batch: ignored, with reasons.
    let a = submit(&ts, &[(l0.clone(), scripted(&root[0])), (l0.clone(), scripted(&root[0]))]).await;
    assert_eq!(a[0]["status"], "duplicate", "{a:?}");
    assert_eq!(a[1]["status"], "duplicate", "{a:?}");
    let a = submit(&ts, &[("no-such-lease".into(), scripted(&root[0]))]).await;
    assert_eq!(a[0]["status"], "unknown_lease");

    // Lease both halves; extend one, let the other run out.
    let halves = lease(&ts, 2).await;
    assert_eq!(halves.len(), 2);
    assert!(lease(&ts, 2).await.is_empty(), "leased cells are not handed out twice");
    let kept = halves[0]["lease_id"].as_str().unwrap().to_string();
    let lost = halves[1]["lease_id"].as_str().unwrap().to_string();
    tokio::time::sleep(std::time::Duration::from_millis(600)).await;
    let r = ts.client.post("/api/v1/leases/extend", ts.token(Role::Worker), &json!({"lease_ids": [kept, "nope"]})).await;
    let ext = r.json()["items"].as_array().unwrap().clone();
    assert_eq!(ext[0]["status"], "extended");
    assert_eq!(ext[1]["status"], "unknown_lease");
    tokio::time::sleep(std::time::Duration::from_millis(700)).await;

    // The expired one is re-issued with a new lease id; the extended one is not.
    let again = lease(&ts, 5).await;
    assert_eq!(again.len(), 1, "{again:?}");
    assert_eq!(again[0]["cell_id"], halves[1]["cell_id"]);
    assert_ne!(again[0]["lease_id"].as_str().unwrap(), lost);
    // The late answer is ignored; the extended and the new lease are accepted.
    let a = submit(
        &ts,
        &[
            (lost.clone(), scripted(&halves[1])),
            (kept.clone(), scripted(&halves[0])),
            (again[0]["lease_id"].as_str().unwrap().into(), scripted(&again[0])),
        ],
    )
    .await;
    assert_eq!(a[0]["status"], "expired", "{a:?}");
    assert_eq!(a[1]["status"], "accepted", "{a:?}");
    assert_eq!(a[2]["status"], "accepted", "{a:?}");
    let r = ts.client.post("/api/v1/leases/extend", ts.token(Role::Worker), &json!({"lease_ids": [lost, kept]})).await;
    let ext = r.json()["items"].as_array().unwrap().clone();
    assert_eq!(ext[0]["status"], "expired");
    assert_eq!(ext[1]["status"], "completed");

    // The expiry is counted as an expiry, not as a failed attempt of the engine.
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=split&depth=1"), ts.token(Role::Viewer)).await;
    let cells = r.json()["cells"].as_array().unwrap().clone();
    let c = cells.iter().find(|c| c["id"] == halves[1]["cell_id"]).unwrap();
    assert_eq!((c["attempts"].as_i64(), c["expiries"].as_i64()), (Some(0), Some(1)), "{c}");

    // The periodic sweep returns a lease nobody asks about.
    let stray = lease(&ts, 1).await;
    assert_eq!(stray.len(), 1);
    tokio::time::sleep(std::time::Duration::from_millis(2600)).await;
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/coverage"), ts.token(Role::Viewer)).await;
    assert_eq!(r.json()["statuses"]["leased"]["cells"], 0, "{}", r.text());

    // The campaign still finishes with the exact fractions.
    drive(&ts, 4, None).await;
    assert_expected_fractions(&coverage(&ts, &id).await);
    assert_eq!(tiling(&ts, &id).await["ok"], true);
    ts.server.stop().await.unwrap();
}

/// A result for a lease that ran out still counts while nobody else holds its cell:
/// before the sweep (the cell still names the lease), and after it as long as the
/// cell waits in the queue. Once another lease holds the cell, the late result is
/// refused. Expiries never use up the engine's attempts (the default limit of 3
/// stays untouched); `--max-expiries` ends a cell that keeps outliving its leases.
#[tokio::test]
async fn late_results_count_while_nobody_else_holds_the_cell() {
    let dir = tempfile::tempdir().unwrap();
    let mut cfg = config(dir.path());
    cfg.lease_seconds = 1;
    // No periodic sweep: the test sweeps when it wants to (lease requests sweep too).
    cfg.sweep_seconds = 3600;
    cfg.max_expiries = 3;
    let ts = start(cfg).await;
    let limits = ts.server.state.limits();
    let store = ts.server.state.store.clone();
    let model = upload_model(&ts, "late").await;
    let id = create_campaign(&ts, &spec(&model, 4), "").await;
    let sleep = || tokio::time::sleep(std::time::Duration::from_millis(1300));
    let cell_of = |cell_id: Value| {
        let ts = &ts;
        let id = id.clone();
        async move {
            let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?limit=1000"), ts.token(Role::Viewer)).await;
            r.json()["cells"].as_array().unwrap().iter().find(|c| c["id"] == cell_id).unwrap().clone()
        }
    };

    // Expired, not swept: an extend revives the lease (nobody else has the cell) ...
    let root = lease(&ts, 1).await;
    let l0 = root[0]["lease_id"].as_str().unwrap().to_string();
    sleep().await;
    let r = ts.client.post("/api/v1/leases/extend", ts.token(Role::Worker), &json!({"lease_ids": [l0]})).await;
    assert_eq!(r.json()["items"][0]["status"], "extended", "{}", r.text());
    // ... and after it ran out again, the result is accepted.
    sleep().await;
    let a = submit(&ts, &[(l0.clone(), scripted(&root[0]))]).await;
    assert_eq!((a[0]["status"].as_str(), a[0]["cell_status"].as_str()), (Some("accepted"), Some("split")), "{a:?}");

    // Expired and swept back to the queue.
    let halves = lease(&ts, 2).await;
    assert_eq!(halves.len(), 2);
    sleep().await;
    assert_eq!(tessera_server::leases::reclaim_expired(&store, limits).await.unwrap(), 2);
    let c = cell_of(halves[0]["cell_id"].clone()).await;
    assert_eq!((c["status"].as_str(), c["attempts"].as_i64(), c["expiries"].as_i64()), (Some("pending"), Some(0), Some(1)), "{c}");
    // The first half waits in the queue: its late result counts (safe, so that no
    // new cells join the queue).
    let safe = json!({"verdict": "safe", "reason": "scripted", "split_hint": null, "counterexample": null, "stats": {}});
    let l_a = halves[0]["lease_id"].as_str().unwrap().to_string();
    let a = submit(&ts, &[(l_a.clone(), safe.clone())]).await;
    assert_eq!((a[0]["status"].as_str(), a[0]["cell_status"].as_str()), (Some("accepted"), Some("safe")), "{a:?}");
    // Sent again (an answer lost on the way): a duplicate, not a second result.
    let a = submit(&ts, &[(l_a.clone(), safe.clone())]).await;
    assert_eq!(a[0]["status"], "duplicate", "{a:?}");
    // The second half is leased again before its late result arrives: refused.
    let again = lease(&ts, 5).await;
    assert_eq!(again.len(), 1, "{again:?}");
    assert_eq!(again[0]["cell_id"], halves[1]["cell_id"]);
    let a = submit(&ts, &[(halves[1]["lease_id"].as_str().unwrap().into(), scripted(&halves[1]))]).await;
    assert_eq!(a[0]["status"], "expired", "{a:?}");

    // A cell whose leases keep running out: failed after the third expiry, with
    // its attempts untouched; a late result for it no longer counts.
    let stuck = again[0].clone();
    let mut last = stuck["lease_id"].as_str().unwrap().to_string();
    for k in 2..=3 {
        sleep().await;
        assert_eq!(tessera_server::leases::reclaim_expired(&store, limits).await.unwrap(), 1);
        let c = cell_of(stuck["cell_id"].clone()).await;
        assert_eq!(c["expiries"], k, "{c}");
        if k < 3 {
            let l = lease(&ts, 5).await;
            assert_eq!(l.len(), 1, "{l:?}");
            last = l[0]["lease_id"].as_str().unwrap().to_string();
        }
    }
    let c = cell_of(stuck["cell_id"].clone()).await;
    assert_eq!((c["status"].as_str(), c["attempts"].as_i64()), (Some("failed"), Some(0)), "{c}");
    assert_eq!(c["last_error"], "3 leases of this cell expired without a result");
    let a = submit(&ts, &[(last, scripted(&stuck))]).await;
    assert_eq!(a[0]["status"], "expired", "{a:?}");

    // Counted once each, and the counters equal the recount.
    let cov = coverage(&ts, &id).await;
    assert_eq!(cov["results"], 2, "{cov}");
    let t = tiling(&ts, &id).await;
    assert_eq!(t["ok"], true, "{t}");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn repeated_errors_fail_the_cell_with_its_text() {
    let dir = tempfile::tempdir().unwrap();
    let mut cfg = config(dir.path());
    cfg.max_attempts = 2;
    let ts = start(cfg).await;
    let model = upload_model(&ts, "e").await;
    let id = create_campaign(&ts, &spec(&model, 4), "").await;
    let c = lease(&ts, 1).await;
    let a = submit(&ts, &[(c[0]["lease_id"].as_str().unwrap().into(), json!({"error": "integrator blew up"}))]).await;
    assert_eq!(a[0]["status"], "accepted");
    assert_eq!(a[0]["cell_status"], "pending");
    let c2 = lease(&ts, 1).await;
    assert_eq!(c2[0]["cell_id"], c[0]["cell_id"]);
    let a = submit(&ts, &[(c2[0]["lease_id"].as_str().unwrap().into(), json!({"error": "integrator blew up again"}))]).await;
    assert_eq!(a[0]["cell_status"], "failed");
    let cov = coverage(&ts, &id).await;
    assert_eq!(cov["statuses"]["failed"]["reduced"], "1/1");
    assert_eq!(cov["state"], "done");
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=failed"), ts.token(Role::Viewer)).await;
    assert_eq!(r.json()["cells"][0]["last_error"], "integrator blew up again");
    // An invalid result is refused without using up the lease.
    let id2 = create_campaign(&ts, &spec(&model, 4), "").await;
    let c = lease(&ts, 1).await;
    assert_eq!(c[0]["campaign_id"], id2.as_str());
    let l = c[0]["lease_id"].as_str().unwrap().to_string();
    let a = submit(&ts, &[(l.clone(), json!({"verdict": "maybe"}))]).await;
    assert_eq!(a[0]["status"], "invalid");
    assert!(a[0]["detail"].as_str().unwrap().contains("verdict"));
    // A cell_id that does not match the lease is refused, and the lease stays valid.
    let a = submit_raw(&ts, vec![json!({"lease_id": l, "cell_id": "other", "result": {"verdict": "safe"}})]).await;
    assert_eq!(a[0]["status"], "invalid");
    let a = submit_raw(&ts, vec![json!({"lease_id": l, "cell_id": c[0]["cell_id"], "result": {"verdict": "safe"}})]).await;
    assert_eq!(a[0]["status"], "accepted");
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn priority_pause_resume_cancel() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "f").await;
    let low = create_campaign(&ts, &spec(&model, 4), "?priority=1&initial_depth=2").await;
    let high = create_campaign(&ts, &spec(&model, 4), "?priority=5").await;
    // Higher priority first, then shallow cells first.
    let got = lease(&ts, 3).await;
    assert_eq!(got[0]["campaign_id"], high.as_str());
    assert_eq!(got[1]["campaign_id"], low.as_str());
    assert_eq!(got[1]["depth"], 2);
    assert_eq!(tiling(&ts, &low).await["ok"], true);

    let sub = ts.token(Role::Submitter).to_string();
    let r = ts.client.post(&format!("/api/v1/campaigns/{low}/pause"), &sub, &json!({})).await;
    assert_eq!(r.json()["state"], "paused");
    let r = ts.client.post(&format!("/api/v1/campaigns/{high}/pause"), &sub, &json!({})).await;
    assert_eq!(r.status, 200);
    assert!(lease(&ts, 10).await.is_empty(), "paused campaigns lease nothing");
    // Results for cells leased before the pause are still accepted.
    let a = submit(&ts, &[(got[1]["lease_id"].as_str().unwrap().into(), json!({"verdict": "safe"}))]).await;
    assert_eq!(a[0]["status"], "accepted");
    let r = ts.client.post(&format!("/api/v1/campaigns/{low}/resume"), &sub, &json!({})).await;
    assert_eq!(r.json()["state"], "running");
    assert_eq!(lease(&ts, 1).await[0]["campaign_id"], low.as_str());

    let r = ts.client.post(&format!("/api/v1/campaigns/{low}/cancel"), &sub, &json!({})).await;
    assert_eq!(r.json()["state"], "cancelled");
    assert_eq!(r.json()["cells"]["leased"], 0, "cancel withdraws leases");
    let a = submit(&ts, &[(got[2]["lease_id"].as_str().unwrap().into(), json!({"verdict": "safe"}))]).await;
    assert_eq!(a[0]["status"], "withdrawn");
    let r = ts.client.post(&format!("/api/v1/campaigns/{low}/resume"), &sub, &json!({})).await;
    assert_eq!(r.status, 409);
    assert_eq!(r.json()["error"], "conflict");
    assert!(lease(&ts, 10).await.is_empty());
    let r = ts.client.get("/api/v1/campaigns?state=paused", ts.token(Role::Viewer)).await;
    let list = r.json()["campaigns"].as_array().unwrap().clone();
    assert_eq!(list.len(), 1);
    assert_eq!(list[0]["id"], high.as_str());
    assert_eq!(list[0]["priority"], 5);
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn restart_in_the_middle_loses_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "g").await;
    let id = create_campaign(&ts, &spec(&model, 4), "").await;
    drive(&ts, 2, Some(3)).await;
    let held = lease(&ts, 2).await;
    assert!(!held.is_empty());
    let before = coverage(&ts, &id).await;
    ts.server.stop().await.unwrap();

    // Reopen the same file: counters, leases and cells are as they were.
    let ts = start(config(dir.path())).await;
    let after = coverage(&ts, &id).await;
    assert_eq!(before["statuses"], after["statuses"]);
    assert_eq!(before["split_cells"], after["split_cells"]);
    let items: Vec<(String, Value)> =
        held.iter().map(|c| (c["lease_id"].as_str().unwrap().to_string(), scripted(c))).collect();
    for a in submit(&ts, &items).await {
        assert_eq!(a["status"], "accepted", "leases survive a restart: {a}");
    }
    drive(&ts, 2, None).await;
    assert_expected_fractions(&coverage(&ts, &id).await);
    assert_eq!(tiling(&ts, &id).await["ok"], true);
    let r = ts.client.get(&format!("/api/v1/models/{model}"), ts.token(Role::Worker)).await;
    assert_eq!(r.body, tessera_server::model_check::testing::tiny_model(1, 2, "g"));
    ts.server.stop().await.unwrap();
}

#[tokio::test]
async fn leased_boxes_tile_the_envelope_exactly_on_the_wire() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "w").await;
    let mut s = spec(&model, 8);
    // Ends that are not dyadic, so the cut points have long decimal forms.
    s["envelope"]["h"] = json!([0.1, 0.7]);
    create_campaign(&ts, &s, "?initial_depth=7").await;
    let cells = lease(&ts, 200).await;
    assert_eq!(cells.len(), 128);
    let mut hs: Vec<[f64; 2]> = cells
        .iter()
        .map(|c| [c["box"]["h"][0].as_f64().unwrap(), c["box"]["h"][1].as_f64().unwrap()])
        .collect();
    hs.sort_by(|a, b| a[0].total_cmp(&b[0]));
    assert_eq!(hs[0][0], 0.1);
    assert_eq!(hs[127][1], 0.7);
    for w in hs.windows(2) {
        // Neighbours meet at the same f64, bit for bit, after the JSON round trip.
        assert_eq!(w[0][1].to_bits(), w[1][0].to_bits(), "{w:?}");
        assert!(w[0][0] < w[0][1]);
    }
    ts.server.stop().await.unwrap();
}

/// Drive with a custom rule until nothing is left.
async fn drive_with(ts: &TestServer, rule: impl Fn(f64, f64) -> Value) {
    loop {
        let cells = lease(ts, 50).await;
        if cells.is_empty() {
            return;
        }
        let items: Vec<(String, Value)> = cells
            .iter()
            .map(|c| {
                let h = &c["box"]["h"];
                (c["lease_id"].as_str().unwrap().to_string(), rule(h[0].as_f64().unwrap(), h[1].as_f64().unwrap()))
            })
            .collect();
        submit(ts, &items).await;
    }
}

#[tokio::test]
async fn depth_sixty_is_exact_and_uncuttable_cells_are_unresolved() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "deep").await;
    let inconclusive = json!({"verdict": "inconclusive", "split_hint": {"dim": "h"}});
    let safe = json!({"verdict": "safe"});

    // Keep cutting the cell at h = 0 down to depth 60: everything else is safe.
    let id = create_campaign(&ts, &spec(&model, 60), "").await;
    drive_with(&ts, |lo, _| if lo == 0.0 { inconclusive.clone() } else { safe.clone() }).await;
    let cov = coverage(&ts, &id).await;
    let total: i64 = 1 << 60;
    assert_eq!(cov["total_volume"], total);
    assert_eq!(cov["statuses"]["safe"]["volume"], total - 1);
    assert_eq!(cov["statuses"]["safe"]["exact"], format!("{}/2^60", total - 1));
    assert_eq!(cov["statuses"]["unresolved"]["reduced"], format!("1/{total}"));
    assert_eq!(cov["statuses"]["safe"]["cells"], 60);
    assert_eq!(cov["split_cells"], 60);
    let t = tiling(&ts, &id).await;
    assert_eq!(t["ok"], true, "{t}");
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=unresolved"), ts.token(Role::Viewer)).await;
    let c = r.json()["cells"][0].clone();
    assert_eq!(c["depth"], 60);
    assert_eq!(c["box"]["h"], json!([0.0, 2f64.powi(-60)]));

    // Around h = 0.3 the f64 grid runs out before depth 60 (spacing 2^-54 there): the
    // last cell that cannot be cut becomes unresolved above max_depth.
    let id = create_campaign(&ts, &spec(&model, 60), "").await;
    drive_with(&ts, |lo, hi| if lo <= 0.3 && 0.3 <= hi { inconclusive.clone() } else { safe.clone() }).await;
    let cov = coverage(&ts, &id).await;
    let unresolved = &cov["statuses"]["unresolved"];
    assert!(unresolved["cells"].as_i64().unwrap() >= 1);
    assert_eq!(cov["leaf_volume_matches_total"], true);
    assert_eq!(
        cov["statuses"]["safe"]["volume"].as_i64().unwrap() + unresolved["volume"].as_i64().unwrap(),
        total
    );
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/cells?status=unresolved"), ts.token(Role::Viewer)).await;
    for c in r.json()["cells"].as_array().unwrap() {
        let d = c["depth"].as_i64().unwrap();
        assert!(d < 60 && d > 40, "{c}");
        let (lo, hi) = (c["box"]["h"][0].as_f64().unwrap(), c["box"]["h"][1].as_f64().unwrap());
        assert_eq!(f64::from_bits(lo.to_bits() + 1), hi, "an uncut cell is one ulp wide: {c}");
    }
    assert_eq!(tiling(&ts, &id).await["ok"], true);
    ts.server.stop().await.unwrap();
}

/// Eight workers at once on one campaign (max_depth 8). Hand computation as above on
/// the grid of 1/256: safe = cells below 0.5 except [127/256, 1/2] → 127/256;
/// unsafe = cells with lower end above 0.9, i.e. from 231/256 on → 25/256.
#[tokio::test]
async fn concurrent_workers_keep_the_accounting_exact() {
    let dir = tempfile::tempdir().unwrap();
    let ts = std::sync::Arc::new(start(config(dir.path())).await);
    let model = upload_model(&ts, "conc").await;
    let id = create_campaign(&ts, &spec(&model, 8), "").await;
    let mut tasks = Vec::new();
    for _ in 0..8 {
        let ts = ts.clone();
        tasks.push(tokio::spawn(async move {
            // Stop only after several empty leases in a row: others may still be
            // splitting cells.
            let mut idle = 0;
            while idle < 20 {
                if drive(&ts, 3, Some(1)).await == 0 {
                    idle += 1;
                    tokio::time::sleep(std::time::Duration::from_millis(10)).await;
                } else {
                    idle = 0;
                }
            }
        }));
    }
    for t in tasks {
        t.await.unwrap();
    }
    let cov = coverage(&ts, &id).await;
    assert_eq!(cov["state"], "done", "{cov}");
    assert_eq!(cov["statuses"]["safe"]["exact"], "127/2^8");
    assert_eq!(cov["statuses"]["counterexample"]["exact"], "25/2^8");
    assert_eq!(cov["statuses"]["unresolved"]["exact"], "104/2^8");
    assert_eq!(tiling(&ts, &id).await["ok"], true);
}
