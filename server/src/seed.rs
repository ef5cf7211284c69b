//! The initial tree of a new campaign: its seed cells, cut uniformly from the
//! envelope (a follow-up's are copied from the earlier campaign by
//! [`crate::followup::seed`]). Pure: the caller stores them.

use crate::refine::{self, CellBox};
use crate::store::CampaignInfo;
use tessera_protocol::CellStatus;

/// A cell of a new campaign's initial tree.
pub struct SeedCell {
    pub id: String,
    pub parent: Option<String>,
    pub depth: u32,
    pub cell: CellBox,
    pub status: CellStatus,
    pub split_dim: Option<i64>,
    /// For a re-joined cell of a follow-up: where to cut it if it is not proven safe.
    pub coarse_dim: Option<i64>,
}

/// The root, then uniform cuts down to `initial` (widest relative dimension first).
pub fn uniform_tree(info: &CampaignInfo, initial: u32) -> Vec<SeedCell> {
    let mut nodes = vec![SeedCell {
        id: crate::store::new_id(),
        parent: None,
        depth: 0,
        cell: info.split_envelope.clone(),
        status: CellStatus::Pending,
        split_dim: None,
        coarse_dim: None,
    }];
    let mut frontier = vec![0usize];
    for _ in 0..initial {
        let mut next = Vec::new();
        for k in frontier {
            let Some(d) = refine::choose_dim(&nodes[k].cell, &info.split_envelope, None) else { continue };
            let Some((a, b)) = refine::bisect(&nodes[k].cell, d) else { continue };
            nodes[k].status = CellStatus::Split;
            nodes[k].split_dim = Some(d as i64);
            let (pid, depth) = (nodes[k].id.clone(), nodes[k].depth + 1);
            for c in [a, b] {
                next.push(nodes.len());
                nodes.push(SeedCell {
                    id: crate::store::new_id(),
                    parent: Some(pid.clone()),
                    depth,
                    cell: c,
                    status: CellStatus::Pending,
                    split_dim: None,
                    coarse_dim: None,
                });
            }
        }
        frontier = next;
    }
    nodes
}
