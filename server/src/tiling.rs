//! The tiling check: the leaves cover the envelope exactly once and the stored
//! counters equal a recount.

use crate::error::{ApiError, ApiResult};
use crate::refine::{self, CellBox};
use crate::store::{self, Store};
use serde_json::{json, Value};
use sqlx::Row;
use std::collections::HashMap;
use tessera_protocol::CellStatus;

/// Check that the leaves tile the envelope exactly once: one root equal to the
/// envelope, every split cell has exactly two children that are its two halves,
/// no other cell has children, leaf volumes sum to 2^max_depth, and the stored
/// counters equal a recount.
pub async fn tiling_check(store: &Store, id: &str) -> ApiResult<Value> {
    let info = store.info(id).await?.ok_or_else(|| ApiError::not_found("campaign", id))?;
    let rows = sqlx::query("SELECT id, parent_id, depth, box, status FROM cells WHERE campaign_id = ?")
        .bind(id)
        .fetch_all(&store.pool)
        .await?;
    struct C {
        parent: Option<String>,
        depth: u32,
        cell: CellBox,
        status: CellStatus,
        children: Vec<String>,
    }
    let mut cells: HashMap<String, C> = HashMap::with_capacity(rows.len());
    let mut problems: Vec<String> = Vec::new();
    for r in &rows {
        let b: Vec<u8> = r.try_get(3)?;
        let cid: String = r.try_get(0)?;
        let Some(cell) = refine::decode_box(&b) else {
            problems.push(format!("cell {cid}: corrupt box"));
            continue;
        };
        cells.insert(
            cid,
            C {
                parent: r.try_get(1)?,
                depth: r.try_get::<i64, _>(2)? as u32,
                cell,
                status: store::cell_status(&r.try_get::<String, _>(4)?)?,
                children: Vec::new(),
            },
        );
    }
    let links: Vec<(String, String)> =
        cells.iter().filter_map(|(k, c)| c.parent.clone().map(|p| (p, k.clone()))).collect();
    let mut roots = 0;
    for (k, c) in &cells {
        if c.parent.is_none() {
            roots += 1;
            if c.depth != 0 || c.cell != info.split_envelope {
                problems.push(format!("root {k} is not the envelope at depth 0"));
            }
        }
        if c.depth > info.max_depth {
            problems.push(format!("cell {k} is deeper ({}) than max_depth", c.depth));
        }
    }
    if roots != 1 {
        problems.push(format!("{roots} root cells (expected 1)"));
    }
    for (p, k) in links {
        match cells.get_mut(&p) {
            Some(pc) => pc.children.push(k),
            None => problems.push(format!("cell {k}: parent {p} missing")),
        }
    }
    let mut counts: HashMap<CellStatus, (i64, i64)> = HashMap::new();
    let mut leaf_volume: i64 = 0;
    for (k, c) in &cells {
        let vol = refine::volume(info.max_depth, c.depth.min(info.max_depth));
        let e = counts.entry(c.status).or_insert((0, 0));
        e.0 += 1;
        if c.status.is_leaf() {
            e.1 += vol;
        }
        if c.status == CellStatus::Split {
            if c.children.len() != 2 {
                problems.push(format!("split cell {k} has {} children (expected 2)", c.children.len()));
                continue;
            }
            let (a, b) = (&cells[&c.children[0]], &cells[&c.children[1]]);
            if a.depth != c.depth + 1 || b.depth != c.depth + 1 {
                problems.push(format!("children of {k} are not one level deeper"));
            }
            if refine::halves_of(&c.cell, &a.cell, &b.cell).is_none() {
                problems.push(format!("children of {k} are not its two halves"));
            }
        } else {
            leaf_volume += vol;
            if !c.children.is_empty() {
                problems.push(format!("leaf {k} ({}) has children", c.status.api_name()));
            }
        }
    }
    let total = refine::volume(info.max_depth, 0);
    if leaf_volume != total {
        problems.push(format!("leaf volumes sum to {leaf_volume}, expected {total}"));
    }
    let stored = store.counters(id).await?;
    let mut counters_match = true;
    for s in CellStatus::ALL {
        let a = stored.get(&s).copied().unwrap_or((0, 0));
        let b = counts.get(&s).copied().unwrap_or((0, 0));
        if a != b {
            counters_match = false;
            problems.push(format!("counter '{}' is {a:?} but a recount gives {b:?}", s.as_str()));
        }
    }
    let n_problems = problems.len();
    problems.truncate(50);
    Ok(json!({
        "campaign_id": id,
        "ok": n_problems == 0,
        "cells": cells.len(),
        "leaves": cells.values().filter(|c| c.status.is_leaf()).count(),
        "leaf_volume": leaf_volume,
        "total_volume": total,
        "counters_match": counters_match,
        "problem_count": n_problems,
        "problems": problems,
    }))
}
