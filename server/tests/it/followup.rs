//! Follow-up campaigns driven by scripted workers over HTTP: seeding from the earlier
//! partition, re-joining safe halves, falling back to them, and the exact diff.
//!
//! Reference: a hand computation of the bisection of h ∈ [0, 1] to depth 3.
//! Campaign A, rule "safe if hi ≤ 1/2 and the width ≤ 1/4; unsafe if lo ≥ 7/8":
//!   safe [0, 1/4] + [1/4, 1/2] = 1/2 (two depth-2 cells); unsafe [7/8, 1] = 1/8;
//!   unresolved [1/2, 5/8] + [5/8, 3/4] + [3/4, 7/8] = 3/8 (depth 3 = max_depth).
//! A follow-up starts from A's tree: [0, 1/2] is re-joined (both halves were safe), the
//! other leaves are pending again at depth 3: 5 pending cells, 4 internal ones.
//! Follow-up B1 ("[0, 1/2] is safe as a whole", otherwise A's rule): 5 results, and
//! the diff is safe→safe 1/2, unresolved→unresolved 3/8, unsafe→unsafe 1/8.
//! (Cells with a counterexample stay leaves here, `refine_unsafe` false; the API names
//! their status `counterexample`.)
//! Follow-up B2 (a degraded controller, rule in `degraded` below; max_depth 4):
//!   [0, 1/2] unsafe → cut into A's halves: [0, 1/4] unsafe, [1/4, 1/2] safe;
//!   [1/2, 5/8] and [5/8, 3/4] safe; [3/4, 7/8] inconclusive → two unresolved halves;
//!   [7/8, 1] inconclusive → [7/8, 15/16] safe, [15/16, 1] unsafe. So the diff is
//!   safe→unsafe 1/4, safe→safe 1/4, unresolved→safe 1/4, unresolved→unresolved 1/8,
//!   unsafe→safe 1/16, unsafe→unsafe 1/16 (sum 1), after 11 results.

use crate::common;
use common::*;
use serde_json::{json, Value};
use std::collections::BTreeMap;
use tessera_server::auth::Role;

fn h_of(cell: &Value) -> (f64, f64) {
    let h = &cell["box"]["h"];
    (h[0].as_f64().unwrap(), h[1].as_f64().unwrap())
}

fn verdict(v: &str) -> Value {
    match v {
        "unsafe" => json!({"verdict": "unsafe", "reason": "scripted", "counterexample": {"scripted": true}}),
        "safe" => json!({"verdict": "safe", "reason": "scripted"}),
        _ => json!({"verdict": "inconclusive", "reason": "scripted", "split_hint": {"dim": "h", "score": 1.0}}),
    }
}

fn rule_a(lo: f64, hi: f64) -> &'static str {
    if hi <= 0.5 && hi - lo <= 0.25 {
        "safe"
    } else if lo >= 0.875 {
        "unsafe"
    } else {
        "inconclusive"
    }
}

fn rule_b1(lo: f64, hi: f64) -> &'static str {
    if hi <= 0.5 {
        "safe"
    } else {
        rule_a(lo, hi)
    }
}

fn degraded(lo: f64, hi: f64) -> &'static str {
    if hi <= 0.5 {
        if lo < 0.25 {
            "unsafe"
        } else {
            "safe"
        }
    } else if hi <= 0.75 && hi - lo <= 0.125 {
        "safe"
    } else if lo >= 0.9375 {
        "unsafe"
    } else if lo >= 0.875 && hi - lo <= 0.0625 {
        "safe"
    } else {
        "inconclusive"
    }
}

/// Lease and answer with `rule` until nothing is left; returns the leased boxes in order.
async fn run(ts: &TestServer, rule: fn(f64, f64) -> &'static str) -> Vec<(u64, f64, f64)> {
    let mut seen = Vec::new();
    loop {
        let cells = lease(ts, 4).await;
        if cells.is_empty() {
            return seen;
        }
        let items: Vec<(String, Value)> = cells
            .iter()
            .map(|c| {
                let (lo, hi) = h_of(c);
                seen.push((c["depth"].as_u64().unwrap(), lo, hi));
                (c["lease_id"].as_str().unwrap().to_string(), verdict(rule(lo, hi)))
            })
            .collect();
        for a in submit(ts, &items).await {
            assert_eq!(a["status"], "accepted", "{a}");
        }
    }
}

async fn changes(ts: &TestServer, id: &str, query: &str) -> Value {
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/changes{query}"), ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 200, "{}", r.text());
    r.json()
}

/// (from, to) → reduced fraction, from a changes answer.
fn transitions(c: &Value) -> BTreeMap<(String, String), String> {
    c["transitions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| ((t["from"].as_str().unwrap().into(), t["to"].as_str().unwrap().into()), t["reduced"].as_str().unwrap().into()))
        .collect()
}

fn expect(pairs: &[(&str, &str, &str)]) -> BTreeMap<(String, String), String> {
    pairs.iter().map(|(f, t, v)| ((f.to_string(), t.to_string()), v.to_string())).collect()
}

/// The status of the leaf containing `x`, from the leaves endpoint.
async fn leaf_status_at(ts: &TestServer, id: &str, xs: &[f64]) -> Vec<String> {
    let r = ts.client.get(&format!("/api/v1/campaigns/{id}/leaves"), ts.token(Role::Viewer)).await;
    let l = r.json();
    let statuses: Vec<String> = l["statuses"].as_array().unwrap().iter().map(|s| s.as_str().unwrap().to_string()).collect();
    xs.iter()
        .map(|&x| {
            let row = l["rows"]
                .as_array()
                .unwrap()
                .iter()
                .find(|r| r[3].as_f64().unwrap() < x && x < r[4].as_f64().unwrap())
                .expect("a leaf contains every point");
            statuses[row[1].as_u64().unwrap() as usize].clone()
        })
        .collect()
}

#[tokio::test]
async fn follow_ups_start_from_the_earlier_leaves_and_diff_exactly() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "fa").await;
    let s = spec(&model, 3);
    let a = create_campaign(&ts, &s, "").await;

    // A follow-up needs a finished campaign.
    let r = ts.client.post(&format!("/api/v1/campaigns?follow_up={a}"), ts.token(Role::Submitter), &s).await;
    assert_eq!(r.status, 409, "{}", r.text());
    assert_eq!(r.json()["field"], "follow_up");

    run(&ts, rule_a).await;
    let cov = coverage(&ts, &a).await;
    assert_eq!(cov["state"], "done");
    assert_eq!(cov["statuses"]["safe"]["reduced"], "1/2");
    assert_eq!(cov["statuses"]["counterexample"]["reduced"], "1/8");
    assert_eq!(cov["statuses"]["unresolved"]["reduced"], "3/8");

    // Follow-up B1, with a new model: seeded from A, [0, 1/2] re-joined and leased first.
    let model2 = upload_model(&ts, "fb").await;
    let mut s2 = spec(&model2, 3);
    s2["horizon_periods"] = json!(25);
    let b1 = create_campaign(&ts, &s2, &format!("?follow_up={a}")).await;
    let c = ts.client.get(&format!("/api/v1/campaigns/{b1}"), ts.token(Role::Viewer)).await.json();
    assert_eq!(c["follow_up_of"], a.as_str());
    assert_eq!(c["cells"]["pending"], 5);
    assert_eq!(c["cells"]["split"], 4);
    let cov = coverage(&ts, &b1).await;
    assert_eq!(cov["statuses"]["pending"]["volume"], 8);
    let t = tiling(&ts, &b1).await;
    assert_eq!(t["ok"], true, "{t}");
    // Provisional diff while nothing is decided: everything is pending now.
    let ch = changes(&ts, &b1, "").await;
    assert_eq!(ch["final"], false);
    assert_eq!(
        transitions(&ch),
        expect(&[("safe", "pending", "1/2"), ("counterexample", "pending", "1/8"), ("unresolved", "pending", "3/8")])
    );

    let leased = run(&ts, rule_b1).await;
    assert_eq!(leased.len(), 5, "{leased:?}");
    assert_eq!(leased[0], (1, 0.0, 0.5), "the re-joined cell (largest) goes first: {leased:?}");
    assert_eq!(leased[1], (3, 0.5, 0.625));
    let ch = changes(&ts, &b1, "?rows=100").await;
    assert_eq!(ch["final"], true);
    assert_eq!(ch["against"], a.as_str());
    assert_eq!(
        transitions(&ch),
        expect(&[("safe", "safe", "1/2"), ("counterexample", "counterexample", "1/8"), ("unresolved", "unresolved", "3/8")])
    );
    assert_eq!(ch["summary"]["safe_to_counterexample"]["reduced"], "0/1");
    assert_eq!(ch["summary"]["safe_to_counterexample"]["volume"], 0);
    assert!(ch["summary"].get("safe_to_unsafe").is_none(), "{ch}");
    assert!(ch["note"].as_str().unwrap().contains("upper bound"), "{ch}");
    assert_eq!(ch["summary"]["still_safe"]["exact"], "4/2^3");
    // A's two safe leaves both lie in B1's one safe cell: two pieces of 2^-2.
    assert_eq!(ch["rows_total"], 6);
    let rows = ch["rows"].as_array().unwrap();
    let safe_pieces: Vec<&Value> = rows.iter().filter(|r| r[0] == 2 && r[1] == 2).collect();
    assert_eq!(safe_pieces.len(), 2);
    assert!(safe_pieces.iter().all(|r| r[2] == 2));
    let cov = coverage(&ts, &b1).await;
    assert_eq!(cov["statuses"]["safe"]["cells"], 1);
    assert_eq!(cov["statuses"]["safe"]["reduced"], "1/2");

    // Follow-up B2 of A with a degraded controller.
    let model3 = upload_model(&ts, "fc").await;
    let b2 = create_campaign(&ts, &spec(&model3, 4), &format!("?follow_up={a}")).await;
    let leased = run(&ts, degraded).await;
    assert_eq!(leased.len(), 11, "{leased:?}");
    // The re-joined cell was unsafe: it fell back to exactly A's halves.
    assert!(leased.contains(&(2, 0.0, 0.25)) && leased.contains(&(2, 0.25, 0.5)), "{leased:?}");
    let t = tiling(&ts, &b2).await;
    assert_eq!(t["ok"], true, "{t}");
    let ch = changes(&ts, &b2, "?rows=100").await;
    let want = expect(&[
        ("safe", "counterexample", "1/4"),
        ("safe", "safe", "1/4"),
        ("unresolved", "safe", "1/4"),
        ("unresolved", "unresolved", "1/8"),
        ("counterexample", "safe", "1/16"),
        ("counterexample", "counterexample", "1/16"),
    ]);
    assert_eq!(transitions(&ch), want);
    let sm = &ch["summary"];
    assert_eq!(sm["safe_to_counterexample"]["reduced"], "1/4");
    assert_eq!(sm["safe_to_counterexample"]["fraction"], 0.25);
    assert_eq!(sm["no_longer_safe"]["reduced"], "1/4");
    assert_eq!(sm["newly_safe"]["reduced"], "5/16");
    assert_eq!(sm["unresolved_to_safe"]["reduced"], "1/4");
    // The diff is a volume the pieces add up to: exactly the whole envelope.
    let total: f64 = ch["transitions"].as_array().unwrap().iter().map(|t| t["fraction"].as_f64().unwrap()).sum();
    assert_eq!(total, 1.0);

    // Independent check: the status of each campaign's leaf at 32 points (centres of
    // the 1/32 grid; every leaf is a union of grid cells), tallied per pair.
    let xs: Vec<f64> = (0..32).map(|k| (k as f64 + 0.5) / 32.0).collect();
    let (sa, sb) = (leaf_status_at(&ts, &a, &xs).await, leaf_status_at(&ts, &b2, &xs).await);
    let mut tally: BTreeMap<(String, String), u32> = BTreeMap::new();
    for (x, y) in sa.into_iter().zip(sb) {
        *tally.entry((x, y)).or_insert(0) += 1;
    }
    let from_grid: BTreeMap<(String, String), String> = tally
        .into_iter()
        .map(|(k, n)| {
            let g = gcd(n, 32);
            (k, format!("{}/{}", n / g, 32 / g))
        })
        .collect();
    assert_eq!(from_grid, want);

    // The report and the reverse diff (against=).
    let rep = ts.client.get(&format!("/api/v1/campaigns/{b2}/report"), ts.token(Role::Viewer)).await.json();
    assert_eq!(rep["changes"]["summary"]["safe_to_counterexample"]["reduced"], "1/4");
    let md = ts.client.get(&format!("/api/v1/campaigns/{b2}/report.md"), ts.token(Role::Viewer)).await.text();
    assert!(md.contains("## Changes since campaign") && md.contains("Previously safe, now in counterexample cells: 1/4"), "{md}");
    let back = changes(&ts, &a, &format!("?against={b2}")).await;
    assert_eq!(back["summary"]["counterexample_to_safe"]["reduced"], "1/4");
    assert_eq!(back["follow_up_of"], Value::Null);
    // Campaign A follows up nothing: the diff needs 'against'.
    let r = ts.client.get(&format!("/api/v1/campaigns/{a}/changes"), ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 422);
    assert_eq!(r.json()["field"], "against");
    let r = ts.client.get(&format!("/api/v1/campaigns/{b2}/changes?rows=100001"), ts.token(Role::Viewer)).await;
    assert_eq!(r.status, 400);
    assert_eq!(r.json()["field"], "rows");
    ts.server.stop().await.unwrap();
}

fn gcd(a: u32, b: u32) -> u32 {
    if b == 0 {
        a
    } else {
        gcd(b, a % b)
    }
}

#[tokio::test]
async fn follow_up_requests_are_validated_field_by_field() {
    let dir = tempfile::tempdir().unwrap();
    let ts = start(config(dir.path())).await;
    let model = upload_model(&ts, "v").await;
    let s = spec(&model, 2);
    let a = create_campaign(&ts, &s, "").await;
    run(&ts, rule_a).await;
    let post = |q: String, body: Value| {
        let ts = &ts;
        async move { ts.client.post(&format!("/api/v1/campaigns{q}"), ts.token(Role::Submitter), &body).await }
    };

    let r = post("?follow_up=no-such-campaign".into(), s.clone()).await;
    assert_eq!((r.status, r.json()["field"].clone()), (422, json!("follow_up")), "{}", r.text());

    let mut e = s.clone();
    e["envelope"]["h"] = json!([0.0, 1.0000000000000002]);
    let r = post(format!("?follow_up={a}"), e).await;
    assert_eq!((r.status, r.json()["field"].clone()), (422, json!("envelope.h")), "{}", r.text());

    let mut e = s.clone();
    e["envelope"]["v"] = json!([-1.0, 0.5]);
    let r = post(format!("?follow_up={a}"), e).await;
    assert_eq!(r.json()["field"], "envelope.v", "{}", r.text());

    let mut e = s.clone();
    e["refinement"]["split"] = json!(["h", "v"]);
    let r = post(format!("?follow_up={a}"), e).await;
    assert_eq!((r.status, r.json()["field"].clone()), (422, json!("refinement.split")), "{}", r.text());

    let r = post(format!("?follow_up={a}"), spec(&model, 1)).await;
    assert_eq!((r.status, r.json()["field"].clone()), (422, json!("refinement.max_depth")), "{}", r.text());

    let r = post(format!("?follow_up={a}&initial_depth=1"), s.clone()).await;
    assert_eq!((r.status, r.json()["field"].clone()), (400, json!("initial_depth")), "{}", r.text());

    // A deeper max_depth is fine: the earlier cells fit.
    let b = create_campaign(&ts, &spec(&model, 4), &format!("?follow_up={a}")).await;
    assert_eq!(tiling(&ts, &b).await["ok"], true);
    ts.server.stop().await.unwrap();
}
