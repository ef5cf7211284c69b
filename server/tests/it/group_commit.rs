//! Group commit (`tessera_server::writer`): requests that wait together are run in
//! one transaction, one savepoint each. A request that fails inside the database must
//! be answered with its error and leave nothing behind, while the other requests of
//! the same group are recorded and the counters still equal the recount.

use crate::common::*;
use serde_json::{json, Value};
use std::time::Duration;
use tessera_server::auth::Role;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_failing_request_spoils_no_other_request_of_its_group() {
    let dir = tempfile::tempdir().unwrap();
    let ts = std::sync::Arc::new(start(config(dir.path())).await);
    let model = upload_model(&ts, "group").await;
    let id = create_campaign(&ts, &spec(&model, 8), "?initial_depth=4").await;
    let r = ts.client.post("/api/v1/leases", ts.token(Role::Worker), &json!({"max": 4, "worker": "poisoner"})).await;
    let poisoned = r.json()["leases"].as_array().unwrap().clone();
    let good = lease(&ts, 4).await;
    assert_eq!((poisoned.len(), good.len()), (4, 4));
    let results = |cells: &[Value]| -> Vec<Value> {
        cells.iter().map(|c| json!({"lease_id": c["lease_id"], "result": scripted(c)})).collect()
    };

    // A database failure that only one request meets, after its first writes (its
    // result rows): a trigger refuses to record a result in the cells leased by the
    // worker "poisoner", as a disk or constraint error would.
    let store = ts.server.state.store.clone();
    sqlx::query(
        "CREATE TRIGGER poison BEFORE UPDATE OF result_id ON cells
         WHEN OLD.leased_by = 'poisoner' AND NEW.result_id IS NOT NULL
         BEGIN SELECT RAISE(ABORT, 'poisoned cell'); END",
    )
    .execute(&store.pool)
    .await
    .unwrap();

    // Hold the write lock so that the requests queue up: the writer takes the first
    // (a lease) alone and waits; the three sent after it then form one group.
    let before = ts.server.state.writer.counts();
    let held = store.write().await.unwrap();
    let post = |worker: &'static str, path: &'static str, body: Value| {
        let ts = ts.clone();
        tokio::spawn(async move {
            let mut body = body;
            body["worker"] = json!(worker);
            ts.client.post(path, ts.token(Role::Worker), &body).await
        })
    };
    let first = post("first", "/api/v1/leases", json!({"max": 1}));
    tokio::time::sleep(Duration::from_millis(200)).await;
    let bad = post("poisoner", "/api/v1/results", json!({"results": results(&poisoned)}));
    let ok = post("good", "/api/v1/results", json!({"results": results(&good)}));
    let more = post("more", "/api/v1/leases", json!({"max": 2}));
    tokio::time::sleep(Duration::from_millis(300)).await;
    held.commit().await.unwrap();
    let (first, bad, ok, more) = (first.await.unwrap(), bad.await.unwrap(), ok.await.unwrap(), more.await.unwrap());
    let after = ts.server.state.writer.counts();
    assert_eq!(
        (after.groups - before.groups, after.requests - before.requests),
        (2, 4),
        "the lease alone, then the three waiting requests in one group"
    );
    assert_eq!(after.retried - before.retried, 1, "the group ran again one request per savepoint");

    assert_eq!(first.status, 200, "{}", first.text());
    assert_eq!(first.json()["leases"].as_array().unwrap().len(), 1);
    assert_eq!(more.status, 200, "{}", more.text());
    assert_eq!(more.json()["leases"].as_array().unwrap().len(), 2);
    assert_eq!(ok.status, 200, "{}", ok.text());
    assert_eq!(ok.json()["accepted"], 4, "{}", ok.text());
    assert_eq!(bad.status, 500, "{}", bad.text());
    assert_eq!(bad.json()["error"], "internal", "the database's refusal, logged and not shown: {}", bad.text());

    // Nothing of the failed request stayed (its result rows were rolled back with its
    // savepoint): its leases are still held, and its results count once sent again.
    sqlx::query("DROP TRIGGER poison").execute(&store.pool).await.unwrap();
    let again = submit_raw(&ts, results(&poisoned)).await;
    assert!(again.iter().all(|a| a["status"] == "accepted"), "{again:?}");
    let stored: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM results WHERE campaign_id = ?")
        .bind(&id)
        .fetch_one(&store.pool)
        .await
        .unwrap();
    assert_eq!(stored, 8);
    assert_eq!(tiling(&ts, &id).await["ok"], true, "counters equal the recount, leaves tile the envelope");
}

/// Two requests of one group carrying a result for the same lease (a worker that sent
/// again while its first request was still waiting): the first counts, the second is
/// a duplicate, and the cell is decided once.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_same_result_twice_in_one_group_counts_once() {
    let dir = tempfile::tempdir().unwrap();
    let ts = std::sync::Arc::new(start(config(dir.path())).await);
    let model = upload_model(&ts, "twice").await;
    let id = create_campaign(&ts, &spec(&model, 8), "?initial_depth=2").await;
    let cells = lease(&ts, 4).await;
    let results: Vec<Value> = cells.iter().map(|c| json!({"lease_id": c["lease_id"], "result": scripted(c)})).collect();
    let store = ts.server.state.store.clone();
    let before = ts.server.state.writer.counts();
    let held = store.write().await.unwrap();
    let post = |body: Value| {
        let ts = ts.clone();
        tokio::spawn(async move { ts.client.post("/api/v1/results", ts.token(Role::Worker), &body).await })
    };
    let filler = {
        let ts = ts.clone();
        tokio::spawn(async move { ts.client.post("/api/v1/leases", ts.token(Role::Worker), &json!({"max": 1})).await })
    };
    tokio::time::sleep(Duration::from_millis(200)).await;
    let a = post(json!({"worker": "w", "results": results}));
    let b = post(json!({"worker": "w", "results": [results[1].clone(), results[3].clone()]}));
    tokio::time::sleep(Duration::from_millis(300)).await;
    held.commit().await.unwrap();
    let (filler, a, b) = (filler.await.unwrap(), a.await.unwrap(), b.await.unwrap());
    let after = ts.server.state.writer.counts();
    assert_eq!((after.groups - before.groups, after.requests - before.requests, after.retried - before.retried), (2, 3, 0));
    assert_eq!(filler.status, 200, "{}", filler.text());
    // Which of the two requests the writer met first is not fixed: between them,
    // four results counted and the two repeated ones are duplicates.
    assert_eq!((a.status, b.status), (200, 200), "{} {}", a.text(), b.text());
    let items: Vec<Value> =
        [a.json(), b.json()].iter().flat_map(|r| r["items"].as_array().unwrap().clone()).collect();
    let count = |status: &str| items.iter().filter(|i| i["status"] == status).count();
    assert_eq!((count("accepted"), count("duplicate"), items.len()), (4, 2, 6), "{items:?}");
    let stored: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM results WHERE campaign_id = ?")
        .bind(&id)
        .fetch_one(&store.pool)
        .await
        .unwrap();
    assert_eq!(stored, 4);
    assert_eq!(tiling(&ts, &id).await["ok"], true);
}
