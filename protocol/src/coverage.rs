//! Coverage accounting: the coverage answer and its per-status entries.

use crate::status::{CampaignState, CellStatus};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// What the coverage answer (`counterexample_note`), the reports and the follow-up
/// diff say of the `counterexample` status.
pub const COUNTEREXAMPLE_NOTE: &str = "counterexample: the volume of leaf cells that each hold a re-checked \
counterexample, an upper bound on the unsafe initial states in those cells and not a measure of them (more \
may lie in unresolved, failed or open cells)";

/// One status's share of a campaign's envelope (`statuses.<api name>` in
/// `GET /api/v1/campaigns/{id}/coverage`). Volumes are integers: a cell at depth `d`
/// of a campaign with `max_depth` D has volume 2^(D − d), the envelope 2^D.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct StatusCoverage {
    pub cells: i64,
    /// Integer volume: the fraction is volume / 2^max_depth.
    pub volume: i64,
    pub fraction: f64,
    /// `volume/2^max_depth`, exact.
    pub exact: String,
    /// The same fraction in lowest terms.
    pub reduced: String,
}

/// Answer of `GET /api/v1/campaigns/{id}/coverage`: exact fractions of the envelope
/// per leaf status, rates and an estimate of the time left. Rates and the estimate are
/// `null` until they can be computed.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Coverage {
    pub campaign_id: String,
    pub state: CampaignState,
    pub max_depth: u32,
    /// The envelope's volume count, 2^max_depth.
    pub total_volume: i64,
    /// `2^max_depth`.
    pub total_exact: String,
    /// One entry per leaf status, keyed by its API name.
    pub statuses: BTreeMap<String, StatusCoverage>,
    /// Leaf cells.
    pub leaves: i64,
    /// Internal (split) cells.
    pub split_cells: i64,
    /// The leaves' volumes add up to the envelope (the tiling invariant, from the counters).
    pub leaf_volume_matches_total: bool,
    /// Results received.
    pub results: i64,
    pub cells_per_second: Option<f64>,
    /// Fraction of the envelope decided per second.
    pub fraction_per_second: Option<f64>,
    pub estimated_seconds_remaining: Option<f64>,
    pub estimate_note: String,
    /// [`COUNTEREXAMPLE_NOTE`].
    pub counterexample_note: String,
    /// The safety caution.
    pub caution: String,
}

impl Coverage {
    /// The entry of a status (`None` for `split`, which has none).
    pub fn status(&self, s: CellStatus) -> Option<&StatusCoverage> {
        self.statuses.get(s.api_name())
    }

    /// The fraction of the envelope in status `s` (0 when it has no entry).
    pub fn fraction(&self, s: CellStatus) -> f64 {
        self.status(s).map(|c| c.fraction).unwrap_or(0.0)
    }

    /// Volume count in status `s` (0 when it has no entry).
    pub fn volume(&self, s: CellStatus) -> i64 {
        self.status(s).map(|c| c.volume).unwrap_or(0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn coverage_answer_round_trips() {
        // The coverage answer's fields as server/API.md and server/tests/campaign.rs
        // read them (a depth-4 campaign with 7/16 safe and 9/16 pending).
        let literal = r#"{"campaign_id": "k", "state": "running", "max_depth": 4, "total_volume": 16, "total_exact": "2^4",
            "statuses": {"safe": {"cells": 3, "volume": 7, "fraction": 0.4375, "exact": "7/2^4", "reduced": "7/16"},
                         "pending": {"cells": 5, "volume": 9, "fraction": 0.5625, "exact": "9/2^4", "reduced": "9/16"}},
            "leaves": 8, "split_cells": 7, "leaf_volume_matches_total": true, "results": 10,
            "cells_per_second": null, "fraction_per_second": null, "estimated_seconds_remaining": null,
            "estimate_note": "rough", "counterexample_note": "note", "caution": "caution"}"#;
        let c: Coverage = serde_json::from_str(literal).unwrap();
        assert_eq!((c.state, c.fraction(CellStatus::Safe), c.volume(CellStatus::Pending)), (CampaignState::Running, 0.4375, 9));
        assert_eq!(c.fraction(CellStatus::Counterexample), 0.0);
        assert_eq!(serde_json::to_value(&c).unwrap(), serde_json::from_str::<serde_json::Value>(literal).unwrap());
    }

    #[test]
    fn status_coverage_round_trips() {
        // server/API.md, "Refinement and accounting": the example entry of `statuses`.
        let literal = r#"{"cells": 3, "volume": 7, "fraction": 0.4375, "exact": "7/2^4", "reduced": "7/16"}"#;
        let c: StatusCoverage = serde_json::from_str(literal).unwrap();
        assert_eq!(c.fraction, 7.0 / 16.0);
        assert_eq!(serde_json::to_value(&c).unwrap(), serde_json::from_str::<serde_json::Value>(literal).unwrap());
    }
}
