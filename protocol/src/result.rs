//! Results: the verdict's outer shape as the server reads it, the submission and its
//! answer.
//!
//! A result travels as a JSON object and is stored as given (the engine's whole
//! verdict: reason, counterexample, statistics). The server reads only its outer
//! shape: `verdict` and, for an inconclusive verdict, `split_hint.dim`; or `error`
//! for a failed attempt. A submission whose `result` cannot be read is answered
//! `invalid` per item (the rest of the batch still counts), so the result stays a
//! `serde_json::Value` in [`ResultItem`] and [`Outcome::of_result`] reads it field by
//! field, naming the field at fault.

use crate::lease::ItemAnswer;
use serde::de::DeserializeOwned;
use serde::{Deserialize, Serialize};
use serde_json::{Map, Value};

/// The engine's verdict on a cell.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum VerdictKind {
    /// Proof: no trajectory from the cell reaches the unsafe set within the horizon.
    Safe,
    /// A re-checked counterexample starts in the cell.
    Unsafe,
    /// Neither; see `reason` and `split_hint`.
    Inconclusive,
}

/// Where to cut an inconclusive cell: the state whose halving most reduces the
/// uncertainty that blocked the proof, with a score in [0, 1] (the share of that
/// uncertainty carried by the state; 0 when the fallback rule chose). The server reads
/// `dim` only; a hint without `score` is read with score 0.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct SplitHint {
    pub dim: String,
    #[serde(default)]
    pub score: f64,
}

/// A failed attempt as a worker reports it: `{"error": "text"}`. The server counts
/// the attempt and keeps the text as the cell's `last_error`.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct FailedAttempt {
    pub error: String,
}

impl FailedAttempt {
    /// The result JSON of a failed attempt.
    pub fn value(text: impl Into<String>) -> Value {
        serde_json::to_value(FailedAttempt { error: text.into() }).unwrap_or(Value::Null)
    }
}

/// What a result says, as far as refinement cares.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    Safe,
    Unsafe,
    /// With the hinted state name, if any.
    Inconclusive(Option<String>),
    /// A failed attempt, with its text.
    Error(String),
}

impl Outcome {
    /// The kind stored with the result (`results.kind`).
    pub fn kind(&self) -> &'static str {
        match self {
            Outcome::Safe => "safe",
            Outcome::Unsafe => "unsafe",
            Outcome::Inconclusive(_) => "inconclusive",
            Outcome::Error(_) => "error",
        }
    }

    /// Read the outer shape of a submitted result. The error names the field at fault.
    pub fn of_result(result: &Value) -> Result<Outcome, String> {
        let obj = result.as_object().ok_or("result must be a JSON object")?;
        let verdict: Option<VerdictKind> =
            field(obj, "verdict", "must be \"safe\", \"unsafe\" or \"inconclusive\"")?;
        let error: Option<String> = field(obj, "error", "must be a string")?;
        match (verdict, error) {
            (None, Some(text)) => Ok(Outcome::Error(text)),
            (Some(VerdictKind::Safe), None) => Ok(Outcome::Safe),
            (Some(VerdictKind::Unsafe), None) => Ok(Outcome::Unsafe),
            (Some(VerdictKind::Inconclusive), None) => {
                let hint: Option<SplitHint> =
                    field(obj, "split_hint", "must be null or an object with a string 'dim'")?;
                Ok(Outcome::Inconclusive(hint.map(|h| h.dim)))
            }
            (Some(_), Some(_)) => Err("result has both 'verdict' and 'error'".into()),
            (None, None) => Err("result needs 'verdict' (or 'error' for a failed attempt)".into()),
        }
    }
}

/// A field of the result object, typed; absent and `null` are `None`.
fn field<T: DeserializeOwned>(obj: &Map<String, Value>, name: &str, rule: &str) -> Result<Option<T>, String> {
    match obj.get(name) {
        None | Some(Value::Null) => Ok(None),
        Some(v) => T::deserialize(v).map(Some).map_err(|e| format!("result.{name} {rule} ({e})")),
    }
}

/// One result in a submission.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ResultItem {
    pub lease_id: String,
    /// Optional; when given it must be the leased cell's id (a cross-check).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub cell_id: Option<String>,
    /// The engine's verdict JSON, or `{"error": "text"}` ([`FailedAttempt`]).
    pub result: Value,
    /// Time the worker spent on the cell, milliseconds.
    #[serde(default)]
    pub elapsed_ms: Option<f64>,
}

/// Body of `POST /api/v1/results`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SubmitRequest {
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub worker: Option<String>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub engine_version: Option<String>,
    pub results: Vec<ResultItem>,
}

/// Answer of `POST /api/v1/results`: one item per result, in order.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SubmitAnswer {
    pub items: Vec<ItemAnswer>,
    pub accepted: u64,
    pub rejected: u64,
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::status::{CellStatus, LeaseStatus};
    use serde_json::json;

    #[test]
    fn submission_as_in_the_api_doc() {
        // server/API.md, "Worker protocol": the submit example.
        let literal = r#"{"worker": "w1", "engine_version": "0.1.0",
 "results": [{"lease_id": "l1", "elapsed_ms": 812.5,
              "result": {"verdict": "inconclusive", "reason": "node_budget", "split_hint": {"dim": "h", "score": 0.7},
                         "counterexample": null, "stats": {}}},
             {"lease_id": "l2", "elapsed_ms": null, "result": {"error": "integrator step underflow"}}]}"#;
        let r: SubmitRequest = serde_json::from_str(literal).unwrap();
        assert_eq!(r.worker.as_deref(), Some("w1"));
        assert_eq!(r.results[0].elapsed_ms, Some(812.5));
        assert_eq!(r.results[1].result, FailedAttempt::value("integrator step underflow"));
        assert_eq!(serde_json::to_value(&r).unwrap(), serde_json::from_str::<Value>(literal).unwrap());
        assert_eq!(Outcome::of_result(&r.results[0].result), Ok(Outcome::Inconclusive(Some("h".into()))));
        assert_eq!(Outcome::of_result(&r.results[1].result), Ok(Outcome::Error("integrator step underflow".into())));
        // The optional cross-check field, and no other.
        let one = r#"{"lease_id": "l", "cell_id": "c", "result": {"verdict": "safe"}}"#;
        let it: ResultItem = serde_json::from_str(one).unwrap();
        assert_eq!((it.cell_id.as_deref(), it.elapsed_ms), (Some("c"), None));
        assert!(serde_json::from_str::<ResultItem>(r#"{"lease_id": "l", "result": {}, "extra": 1}"#).is_err());
    }

    #[test]
    fn submit_answer_as_in_the_api_doc() {
        // server/API.md: `{"items": [{"lease_id", "status", "cell_status"?, "detail"?}], "accepted", "rejected"}`.
        let mut ok = ItemAnswer::new("a", LeaseStatus::Accepted);
        ok.cell_status = Some(CellStatus::Counterexample);
        let mut bad = ItemAnswer::new("b", LeaseStatus::Invalid);
        bad.detail = Some("result needs 'verdict' (or 'error' for a failed attempt)".into());
        let literal = r#"{"items": [{"lease_id": "a", "status": "accepted", "cell_status": "counterexample"},
            {"lease_id": "b", "status": "invalid", "detail": "result needs 'verdict' (or 'error' for a failed attempt)"}],
            "accepted": 1, "rejected": 1}"#;
        let a = SubmitAnswer { items: vec![ok, bad], accepted: 1, rejected: 1 };
        assert_eq!(serde_json::to_value(&a).unwrap(), serde_json::from_str::<Value>(literal).unwrap());
        assert_eq!(serde_json::from_str::<SubmitAnswer>(literal).unwrap(), a);
    }

    #[test]
    fn outcomes_of_readable_results() {
        assert_eq!(Outcome::of_result(&json!({"verdict": "safe", "stats": {}})), Ok(Outcome::Safe));
        assert_eq!(Outcome::of_result(&json!({"verdict": "unsafe"})), Ok(Outcome::Unsafe));
        assert_eq!(Outcome::of_result(&json!({"verdict": "inconclusive", "split_hint": null})), Ok(Outcome::Inconclusive(None)));
        assert_eq!(Outcome::of_result(&json!({"verdict": "inconclusive", "split_hint": {"dim": "v"}})), Ok(Outcome::Inconclusive(Some("v".into()))));
        // A hint is read only where it is used.
        assert_eq!(Outcome::of_result(&json!({"verdict": "safe", "split_hint": 3})), Ok(Outcome::Safe));
        assert_eq!(Outcome::of_result(&json!({"verdict": "safe"})).unwrap().kind(), "safe");
        assert_eq!(Outcome::of_result(&json!({"error": "x"})).unwrap().kind(), "error");
    }

    #[test]
    fn unreadable_results_name_the_field() {
        // The cases of tests/tests/bad_input.rs ("Unreadable verdicts"), and more.
        let cases = [
            (json!({"verdict": "maybe"}), "result.verdict"),
            (json!({"verdict": 1}), "result.verdict"),
            (json!({"verdict": "safe", "error": "both"}), "both 'verdict' and 'error'"),
            (json!("safe"), "result must be a JSON object"),
            (json!({}), "needs 'verdict'"),
            (json!({"error": 5}), "result.error"),
            (json!({"verdict": "inconclusive", "split_hint": {"score": 1.0}}), "result.split_hint"),
            (json!({"verdict": "inconclusive", "split_hint": {"dim": 2}}), "result.split_hint"),
        ];
        for (bad, names) in cases {
            let e = Outcome::of_result(&bad).expect_err(&bad.to_string());
            assert!(e.contains(names), "{bad}: {e}");
        }
    }
}
