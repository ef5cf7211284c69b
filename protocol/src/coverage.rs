//! Coverage accounting as the coverage answer gives it per cell status.

use serde::{Deserialize, Serialize};

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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn status_coverage_round_trips() {
        // server/API.md, "Refinement and accounting": the example entry of `statuses`.
        let literal = r#"{"cells": 3, "volume": 7, "fraction": 0.4375, "exact": "7/2^4", "reduced": "7/16"}"#;
        let c: StatusCoverage = serde_json::from_str(literal).unwrap();
        assert_eq!(c.fraction, 7.0 / 16.0);
        assert_eq!(serde_json::to_value(&c).unwrap(), serde_json::from_str::<serde_json::Value>(literal).unwrap());
    }
}
