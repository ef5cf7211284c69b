//! Leasing: the request for cells, the leased cell, and the per-lease answers of
//! extend and release.

use crate::status::{CellStatus, LeaseStatus};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;

/// Body of `POST /api/v1/leases`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LeaseRequest {
    /// Most cells wanted (at least 1; the server caps it at its batch limit).
    pub max: u32,
    /// Free-form worker name, for the record.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub worker: Option<String>,
    /// Lease only from this campaign.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub campaign_id: Option<String>,
}

/// One leased cell, as handed to a worker.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LeasedCell {
    pub cell_id: String,
    pub lease_id: String,
    pub campaign_id: String,
    /// Fetch the spec once per hash.
    pub spec_hash: String,
    pub depth: u32,
    /// `{"state": [lo, hi]}` for every state of the spec; states that are not split
    /// keep their envelope interval. Bounds travel in shortest round-trip form and
    /// must be parsed exactly (serde_json's `float_roundtrip`).
    #[serde(rename = "box")]
    pub cell_box: BTreeMap<String, [f64; 2]>,
    /// Lease expiry, milliseconds since the Unix epoch.
    pub expires_at_ms: i64,
}

/// Answer of `POST /api/v1/leases`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LeaseAnswer {
    pub leases: Vec<LeasedCell>,
    /// Lease lifetime, seconds.
    pub lease_seconds: u64,
    /// The `max` the server applied (the request's, capped).
    pub max_granted: u32,
}

/// Body of `POST /api/v1/leases/extend`, and of `POST /api/v1/leases/release` (the
/// OpenAPI document names both `ExtendRequest`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ExtendRequest {
    pub lease_ids: Vec<String>,
}

/// What became of one lease (or one submitted result): the items of the extend,
/// release and submit answers.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ItemAnswer {
    pub lease_id: String,
    pub status: LeaseStatus,
    /// Submit, accepted: the status of the cell after the result.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cell_status: Option<CellStatus>,
    /// Extend, extended: the new expiry, milliseconds since the Unix epoch.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub expires_at_ms: Option<i64>,
    /// Submit, not accepted: why.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub detail: Option<String>,
}

impl ItemAnswer {
    /// An answer with a status and nothing else.
    pub fn new(lease_id: &str, status: LeaseStatus) -> ItemAnswer {
        ItemAnswer { lease_id: lease_id.to_string(), status, cell_status: None, expires_at_ms: None, detail: None }
    }
}

/// Answer of `POST /api/v1/leases/extend`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ExtendAnswer {
    pub items: Vec<ItemAnswer>,
    pub lease_seconds: u64,
}

/// Answer of `POST /api/v1/leases/release`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ReleaseAnswer {
    pub items: Vec<ItemAnswer>,
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::Value;

    /// Serialises `v` and checks it equals `literal`, then parses `literal` back.
    fn round_trip<T: Serialize + serde::de::DeserializeOwned + PartialEq + std::fmt::Debug>(v: &T, literal: &str) {
        let want: Value = serde_json::from_str(literal).unwrap();
        assert_eq!(serde_json::to_value(v).unwrap(), want);
        assert_eq!(&serde_json::from_str::<T>(literal).unwrap(), v);
    }

    #[test]
    fn lease_request_as_in_the_api_doc() {
        // server/API.md, "Worker protocol": the curl example.
        let r = LeaseRequest { max: 16, worker: Some("w1".into()), campaign_id: None };
        round_trip(&r, r#"{"max": 16, "worker": "w1"}"#);
        let r = LeaseRequest { max: 1, worker: None, campaign_id: Some("c".into()) };
        round_trip(&r, r#"{"max": 1, "campaign_id": "c"}"#);
        // Unknown fields are refused (a typo must not pass silently).
        assert!(serde_json::from_str::<LeaseRequest>(r#"{"max": 1, "wroker": "x"}"#).is_err());
    }

    #[test]
    fn lease_answer_as_in_the_api_doc() {
        // server/API.md, "Worker protocol": the lease answer.
        let literal = r#"{"leases": [{"cell_id": "c1", "lease_id": "l1", "campaign_id": "k1", "spec_hash": "h1", "depth": 3,
             "box": {"h": [0.5, 0.625], "v": [-1.0, 1.0]}, "expires_at_ms": 1764640000000}],
             "lease_seconds": 120, "max_granted": 16}"#;
        let cell = LeasedCell {
            cell_id: "c1".into(),
            lease_id: "l1".into(),
            campaign_id: "k1".into(),
            spec_hash: "h1".into(),
            depth: 3,
            cell_box: [("h".to_string(), [0.5, 0.625]), ("v".to_string(), [-1.0, 1.0])].into_iter().collect(),
            expires_at_ms: 1_764_640_000_000,
        };
        round_trip(&LeaseAnswer { leases: vec![cell], lease_seconds: 120, max_granted: 16 }, literal);
    }

    #[test]
    fn box_bounds_parse_to_the_exact_f64() {
        // 0.1 + 0.2 is the f64 0.30000000000000004 (IEEE 754 binary64, common practice):
        // a bound printed in shortest round-trip form must come back bit for bit.
        let lo: f64 = 0.1 + 0.2;
        let text = format!(r#"{{"cell_id":"c","lease_id":"l","campaign_id":"k","spec_hash":"h","depth":0,"box":{{"x":[{lo},1.0]}},"expires_at_ms":0}}"#);
        let c: LeasedCell = serde_json::from_str(&text).unwrap();
        assert_eq!(c.cell_box["x"][0].to_bits(), lo.to_bits());
    }

    #[test]
    fn extend_and_release_answers_as_in_the_api_doc() {
        // server/API.md: `{"items": [{"lease_id", "status", "expires_at_ms"?}]}`.
        let mut held = ItemAnswer::new("a", LeaseStatus::Extended);
        held.expires_at_ms = Some(1_764_640_000_000);
        let gone = ItemAnswer::new("b", LeaseStatus::UnknownLease);
        round_trip(
            &ExtendAnswer { items: vec![held, gone.clone()], lease_seconds: 120 },
            r#"{"items": [{"lease_id": "a", "status": "extended", "expires_at_ms": 1764640000000},
                          {"lease_id": "b", "status": "unknown_lease"}], "lease_seconds": 120}"#,
        );
        round_trip(
            &ReleaseAnswer { items: vec![ItemAnswer::new("a", LeaseStatus::Released), gone] },
            r#"{"items": [{"lease_id": "a", "status": "released"}, {"lease_id": "b", "status": "unknown_lease"}]}"#,
        );
        round_trip(&ExtendRequest { lease_ids: vec!["a".into()] }, r#"{"lease_ids": ["a"]}"#);
    }
}
