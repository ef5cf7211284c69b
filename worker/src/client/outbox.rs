//! Results on their way to the server. A result stays here until the server has
//! answered it (accepted, duplicate, or refused with a reason for that one result);
//! it is never dropped because a request failed. Requests are kept under the server's
//! body limit, a request refused as too large (413) is split, and while the server is
//! away or refuses whole requests the outbox waits with exponential backoff.

use super::api::{ApiError, ItemAnswer, ResultItem};
use tessera_protocol::FailedAttempt;
use std::collections::VecDeque;
use std::time::{Duration, Instant};

/// The largest JSON body the server takes (`MAX_JSON_BYTES` in the server's
/// `config.rs`; a server test checks that the two agree).
pub const SERVER_BODY_LIMIT: usize = 1024 * 1024;
/// Bytes of results per request: half the server's limit, so that a full request
/// never comes near it. A smaller limit on the way (a proxy) is found by splitting.
pub const REQUEST_BYTES: usize = SERVER_BODY_LIMIT / 2;
/// Results per request (the server takes at most 10,000).
pub const REQUEST_ITEMS: usize = 1000;
/// Room for `{"worker": …, "engine_version": …, "results": [ ]}` around the results
/// (the server allows worker names up to 200 bytes and versions up to 100).
const ENVELOPE_BYTES: usize = 1024;
const FIRST_BACKOFF: Duration = Duration::from_millis(200);
const MAX_BACKOFF: Duration = Duration::from_secs(30);

struct Waiting {
    item: ResultItem,
    /// Length of the item's JSON plus a separating comma.
    bytes: usize,
}

/// The results not yet answered, oldest first.
pub struct Outbox {
    waiting: VecDeque<Waiting>,
    /// Bytes per request now: `REQUEST_BYTES`, halved after each 413, doubled back
    /// after each answered request.
    budget: usize,
    retry_at: Option<Instant>,
    backoff: Duration,
}

impl Default for Outbox {
    fn default() -> Self {
        Outbox { waiting: VecDeque::new(), budget: REQUEST_BYTES, retry_at: None, backoff: FIRST_BACKOFF }
    }
}

impl Outbox {
    pub fn push(&mut self, item: ResultItem) {
        let item = fit(item);
        let bytes = encoded_len(&item) + 1;
        self.waiting.push_back(Waiting { item, bytes });
    }

    pub fn len(&self) -> usize {
        self.waiting.len()
    }

    pub fn is_empty(&self) -> bool {
        self.waiting.is_empty()
    }

    /// Send the waiting results, one request (`send`) after another, until each is
    /// answered or a request fails; returns the answers received. After a failure
    /// other than 413 nothing is sent before the backoff has passed (200 ms, doubling
    /// up to 30 s, back to 200 ms after an answer).
    pub fn deliver(
        &mut self,
        now: Instant,
        mut send: impl FnMut(&[ResultItem]) -> Result<Vec<ItemAnswer>, ApiError>,
    ) -> Vec<ItemAnswer> {
        let mut answers = Vec::new();
        if self.retry_at.is_some_and(|t| now < t) {
            return answers;
        }
        self.retry_at = None;
        while !self.waiting.is_empty() {
            let (n, bytes) = self.next_batch();
            let batch: Vec<ResultItem> = self.waiting.iter().take(n).map(|w| w.item.clone()).collect();
            match send(&batch) {
                Ok(got) => {
                    let answered = self.remove_answered(n, &got);
                    answers.extend(got);
                    if answered == 0 {
                        tracing::warn!("the server's answer mentioned none of {n} results; retrying in {:?}", self.backoff);
                        self.retry_at = Some(now + self.backoff);
                        self.backoff = (self.backoff * 2).min(MAX_BACKOFF);
                        break;
                    }
                    self.backoff = FIRST_BACKOFF;
                    self.budget = (self.budget * 2).min(REQUEST_BYTES);
                }
                Err(ApiError::Status { status: 413, .. }) if n > 1 => {
                    // Too large for something on the way: try halves.
                    self.budget = (bytes / 2).max(1);
                    tracing::warn!("{n} results in {bytes} bytes were refused as too large; sending smaller requests");
                }
                Err(e @ ApiError::Status { status: 413, .. }) => {
                    // One result alone is too large: the server will never take it, so
                    // it is replaced by an error result that it does take (the cell's
                    // attempt is counted and its last_error says why).
                    let w = &mut self.waiting[0];
                    tracing::error!(lease = %w.item.lease_id, "a result of {bytes} bytes was refused as too large: {e}");
                    w.item.result =
                        FailedAttempt::value(format!("the verdict ({bytes} bytes of JSON) was refused by the server as too large"));
                    w.bytes = encoded_len(&w.item) + 1;
                }
                Err(e) => {
                    // The server is away (transient), or refuses every request (a
                    // token revoked, a proxy misrouting): keep everything and wait.
                    let (count, total) = (self.waiting.len(), self.waiting_bytes());
                    if e.is_transient() {
                        tracing::warn!("submitting {count} results ({total} bytes) failed, retrying in {:?}: {e}", self.backoff);
                    } else {
                        tracing::error!(
                            "the server refused a request of {n} results, retrying in {:?} ({count} results, {total} bytes wait): {e}",
                            self.backoff
                        );
                    }
                    self.retry_at = Some(now + self.backoff);
                    self.backoff = (self.backoff * 2).min(MAX_BACKOFF);
                    break;
                }
            }
        }
        answers
    }

    /// Bytes of JSON of all waiting results.
    pub fn waiting_bytes(&self) -> usize {
        self.waiting.iter().map(|w| w.bytes).sum()
    }

    /// How many results from the front go into the next request, and their bytes:
    /// at least one, within the byte budget and `REQUEST_ITEMS`.
    fn next_batch(&self) -> (usize, usize) {
        let (mut n, mut bytes) = (0, 0);
        for w in &self.waiting {
            if n > 0 && (bytes + w.bytes > self.budget || n == REQUEST_ITEMS) {
                break;
            }
            n += 1;
            bytes += w.bytes;
        }
        (n, bytes)
    }

    /// Drop those of the first `n` results that the server answered and return how
    /// many; keep any it did not mention (it answers every item, but a missing answer
    /// must lose nothing).
    fn remove_answered(&mut self, n: usize, answers: &[ItemAnswer]) -> usize {
        let answered: std::collections::HashSet<&str> = answers.iter().map(|a| a.lease_id.as_str()).collect();
        let sent: Vec<Waiting> = self.waiting.drain(..n).collect();
        let mut removed = 0;
        for w in sent.into_iter().rev() {
            if answered.contains(w.item.lease_id.as_str()) {
                removed += 1;
            } else {
                tracing::warn!(lease = %w.item.lease_id, "the server's answer did not mention this result; sending it again");
                self.waiting.push_front(w);
            }
        }
        removed
    }
}

fn encoded_len(item: &ResultItem) -> usize {
    serde_json::to_vec(item).map(|v| v.len()).unwrap_or(usize::MAX / 2)
}

/// A result that cannot fit in any request the server takes becomes an error result
/// saying so (the server counts the attempt and keeps the text in `last_error`).
fn fit(mut item: ResultItem) -> ResultItem {
    let bytes = encoded_len(&item);
    if bytes + ENVELOPE_BYTES > SERVER_BODY_LIMIT {
        tracing::error!(lease = %item.lease_id, "a result of {bytes} bytes exceeds the server's request limit");
        item.result = FailedAttempt::value(format!(
            "the verdict ({bytes} bytes of JSON) exceeds the server's request limit of {SERVER_BODY_LIMIT} bytes"
        ));
    }
    item
}

#[cfg(test)]
mod tests {
    use super::*;

    fn item(i: usize, payload: usize) -> ResultItem {
        ResultItem {
            lease_id: format!("lease-{i}"),
            cell_id: None,
            result: serde_json::json!({"verdict": "unsafe", "pad": "x".repeat(payload)}),
            elapsed_ms: Some(1.0),
        }
    }

    fn accept_all(items: &[ResultItem]) -> Vec<ItemAnswer> {
        items.iter().map(|r| ItemAnswer::new(&r.lease_id, tessera_protocol::LeaseStatus::Accepted)).collect()
    }

    fn body_len(items: &[ResultItem]) -> usize {
        let body = tessera_protocol::SubmitRequest {
            worker: Some("w".into()),
            engine_version: Some("0".into()),
            results: items.to_vec(),
        };
        serde_json::to_vec(&body).unwrap().len()
    }

    /// A stand-in for the server's body limit: 413 above `limit` bytes, else accepted.
    fn limited(limit: usize, log: &mut Vec<usize>) -> impl FnMut(&[ResultItem]) -> Result<Vec<ItemAnswer>, ApiError> + '_ {
        move |items| {
            let n = body_len(items);
            log.push(n);
            if n > limit {
                Err(ApiError::Status { status: 413, error: "body_too_large".into(), detail: String::new(), field: None })
            } else {
                Ok(accept_all(items))
            }
        }
    }

    #[test]
    fn requests_stay_under_the_limit_and_every_result_is_answered() {
        let mut o = Outbox::default();
        // 120 results of ~20 KB: 2.4 MB in all, more than twice the server's limit.
        for i in 0..120 {
            o.push(item(i, 20_000));
        }
        let mut sizes = Vec::new();
        let answers = o.deliver(Instant::now(), limited(SERVER_BODY_LIMIT, &mut sizes));
        assert_eq!(answers.len(), 120);
        assert!(o.is_empty());
        assert!(sizes.len() >= 5, "{sizes:?}");
        assert!(sizes.iter().all(|&n| n <= REQUEST_BYTES + ENVELOPE_BYTES), "{sizes:?}");
    }

    #[test]
    fn a_smaller_limit_on_the_way_is_found_by_splitting() {
        let mut o = Outbox::default();
        for i in 0..40 {
            o.push(item(i, 20_000));
        }
        let mut sizes = Vec::new();
        let answers = o.deliver(Instant::now(), limited(100_000, &mut sizes));
        let mut ids: Vec<String> = answers.iter().map(|a| a.lease_id.clone()).collect();
        ids.sort();
        ids.dedup();
        assert_eq!(ids.len(), 40, "every result answered once");
        assert!(o.is_empty());
        assert!(sizes.iter().any(|&n| n > 100_000), "the test must meet a 413: {sizes:?}");
    }

    #[test]
    fn one_result_too_large_for_any_request_becomes_an_error_result() {
        let mut o = Outbox::default();
        o.push(item(0, 2 * SERVER_BODY_LIMIT));
        o.push(item(1, 10));
        let mut sent = Vec::new();
        let answers = o.deliver(Instant::now(), |items| {
            sent.extend(items.iter().cloned());
            Ok(accept_all(items))
        });
        assert_eq!(answers.len(), 2);
        assert!(sent[0].result["error"].as_str().unwrap().contains("exceeds the server's request limit"));
        assert_eq!(sent[1].result["verdict"], "unsafe");
        // And one that only a smaller limit on the way refuses.
        o.push(item(2, 150_000));
        let answers = o.deliver(Instant::now(), |items| {
            if body_len(items) > 100_000 {
                Err(ApiError::Status { status: 413, error: "body_too_large".into(), detail: String::new(), field: None })
            } else {
                assert!(items[0].result["error"].as_str().unwrap().contains("refused by the server as too large"));
                Ok(accept_all(items))
            }
        });
        assert_eq!(answers.len(), 1);
        assert!(o.is_empty());
    }

    #[test]
    fn failed_requests_keep_every_result_and_back_off() {
        let mut o = Outbox::default();
        for i in 0..10 {
            o.push(item(i, 100));
        }
        let t0 = Instant::now();
        let transport = |_: &[ResultItem]| -> Result<Vec<ItemAnswer>, ApiError> { Err(ApiError::Transport("refused".into())) };
        assert!(o.deliver(t0, transport).is_empty());
        assert_eq!(o.len(), 10);
        // Within the backoff nothing is sent.
        let mut calls = 0;
        o.deliver(t0 + Duration::from_millis(100), |_| {
            calls += 1;
            Err(ApiError::Transport("refused".into()))
        });
        assert_eq!(calls, 0);
        // A refusal of the whole request (here: the token was revoked) keeps them too.
        let forbidden = |_: &[ResultItem]| -> Result<Vec<ItemAnswer>, ApiError> {
            Err(ApiError::Status { status: 401, error: "unauthorized".into(), detail: String::new(), field: None })
        };
        assert!(o.deliver(t0 + Duration::from_millis(250), forbidden).is_empty());
        assert_eq!(o.len(), 10);
        // The backoff doubled (200 ms, then 400 ms).
        assert!(o.deliver(t0 + Duration::from_millis(500), accept_all_ok).is_empty());
        assert_eq!(o.deliver(t0 + Duration::from_millis(700), accept_all_ok).len(), 10);
        assert!(o.is_empty());
    }

    fn accept_all_ok(items: &[ResultItem]) -> Result<Vec<ItemAnswer>, ApiError> {
        Ok(accept_all(items))
    }

    #[test]
    fn results_the_answer_does_not_mention_are_kept() {
        let mut o = Outbox::default();
        for i in 0..3 {
            o.push(item(i, 10));
        }
        let answers = o.deliver(Instant::now(), |items| Ok(accept_all(&items[..1])));
        // The first request answers one; the next ones answer one each in turn.
        assert_eq!(answers.len(), 3);
        assert!(o.is_empty());
    }
}
