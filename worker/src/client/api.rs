//! A small blocking client of the server's REST API (`/api/v1`), shared by the worker
//! loop and the `tessera` command. Plain HTTP: TLS, where needed, belongs to a proxy.

use serde::de::DeserializeOwned;
use serde::Serialize;
use tessera_protocol::{ExtendAnswer, ExtendRequest, LeaseRequest, ReleaseAnswer, SubmitAnswer, SubmitRequest};
use std::time::Duration;

/// What went wrong talking to the server.
#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    /// The server answered with an error status and its JSON `{error, detail, field?}`.
    #[error("{status} {error}: {detail}{}", field.as_ref().map(|f| format!(" (field {f})")).unwrap_or_default())]
    Status { status: u16, error: String, detail: String, field: Option<String> },
    /// No answer (connection refused, timeout, broken body).
    #[error("server unreachable: {0}")]
    Transport(String),
}

impl ApiError {
    /// Worth retrying later (the server is away or overloaded), as opposed to a
    /// request the server will never accept.
    pub fn is_transient(&self) -> bool {
        match self {
            ApiError::Transport(_) => true,
            ApiError::Status { status, .. } => *status >= 500 || *status == 429 || *status == 408,
        }
    }
}

#[derive(Clone)]
pub struct Api {
    base: String,
    token: String,
    agent: ureq::Agent,
}

/// The wire types of the worker protocol live in the protocol crate, shared with the
/// server; re-exported here for the client's callers.
pub use tessera_protocol::{ItemAnswer, LeaseAnswer, LeasedCell, ResultItem};

impl Api {
    /// `base` is the server's address, e.g. `http://127.0.0.1:8470`.
    pub fn new(base: &str, token: &str) -> Api {
        let agent = ureq::AgentBuilder::new()
            .timeout_connect(Duration::from_secs(5))
            .timeout(Duration::from_secs(60))
            .build();
        Api { base: base.trim_end_matches('/').to_string(), token: token.to_string(), agent }
    }

    fn url(&self, path: &str) -> String {
        format!("{}{}", self.base, path)
    }

    fn answer(r: Result<ureq::Response, ureq::Error>) -> Result<ureq::Response, ApiError> {
        match r {
            Ok(resp) => Ok(resp),
            Err(ureq::Error::Status(status, resp)) => {
                let body: serde_json::Value = resp.into_json().unwrap_or(serde_json::Value::Null);
                Err(ApiError::Status {
                    status,
                    error: body["error"].as_str().unwrap_or("error").to_string(),
                    detail: body["detail"].as_str().unwrap_or("").to_string(),
                    field: body["field"].as_str().map(String::from),
                })
            }
            Err(e) => Err(ApiError::Transport(e.to_string())),
        }
    }

    pub fn get_json<T: DeserializeOwned>(&self, path: &str) -> Result<T, ApiError> {
        let r = self.agent.get(&self.url(path)).set("Authorization", &format!("Bearer {}", self.token)).call();
        Self::answer(r)?.into_json().map_err(|e| ApiError::Transport(e.to_string()))
    }

    pub fn get_text(&self, path: &str) -> Result<String, ApiError> {
        let r = self.agent.get(&self.url(path)).set("Authorization", &format!("Bearer {}", self.token)).call();
        Self::answer(r)?.into_string().map_err(|e| ApiError::Transport(e.to_string()))
    }

    pub fn get_bytes(&self, path: &str) -> Result<Vec<u8>, ApiError> {
        let r = self.agent.get(&self.url(path)).set("Authorization", &format!("Bearer {}", self.token)).call();
        let mut buf = Vec::new();
        std::io::Read::read_to_end(&mut Self::answer(r)?.into_reader(), &mut buf)
            .map_err(|e| ApiError::Transport(e.to_string()))?;
        Ok(buf)
    }

    pub fn post_json<T: DeserializeOwned>(&self, path: &str, body: &impl Serialize) -> Result<T, ApiError> {
        let r = self
            .agent
            .post(&self.url(path))
            .set("Authorization", &format!("Bearer {}", self.token))
            .send_json(body);
        Self::answer(r)?.into_json().map_err(|e| ApiError::Transport(e.to_string()))
    }

    pub fn post_bytes<T: DeserializeOwned>(&self, path: &str, body: &[u8]) -> Result<T, ApiError> {
        let r = self
            .agent
            .post(&self.url(path))
            .set("Authorization", &format!("Bearer {}", self.token))
            .set("Content-Type", "application/octet-stream")
            .send_bytes(body);
        Self::answer(r)?.into_json().map_err(|e| ApiError::Transport(e.to_string()))
    }

    pub fn lease(&self, max: u32, worker: &str) -> Result<LeaseAnswer, ApiError> {
        self.post_json("/api/v1/leases", &LeaseRequest { max, worker: Some(worker.to_string()), campaign_id: None })
    }

    pub fn extend(&self, lease_ids: &[String]) -> Result<Vec<ItemAnswer>, ApiError> {
        let a: ExtendAnswer = self.post_json("/api/v1/leases/extend", &ExtendRequest { lease_ids: lease_ids.to_vec() })?;
        Ok(a.items)
    }

    pub fn release(&self, lease_ids: &[String]) -> Result<Vec<ItemAnswer>, ApiError> {
        let a: ReleaseAnswer = self.post_json("/api/v1/leases/release", &ExtendRequest { lease_ids: lease_ids.to_vec() })?;
        Ok(a.items)
    }

    pub fn submit(&self, worker: &str, results: &[ResultItem]) -> Result<Vec<ItemAnswer>, ApiError> {
        let body = SubmitRequest {
            worker: Some(worker.to_string()),
            engine_version: Some(tessera_engine::verdict::ENGINE_VERSION.to_string()),
            results: results.to_vec(),
        };
        let a: SubmitAnswer = self.post_json("/api/v1/results", &body)?;
        Ok(a.items)
    }
}
