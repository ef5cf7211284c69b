//! The one error type of the API: every failure becomes JSON `{error, detail, field?}`
//! with a 4xx status for bad input, and 500 only for faults of the server itself.

use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use serde::Serialize;
use tessera_engine::spec::SpecError;

/// An error answer. `error` is a stable machine-readable code, `detail` a sentence
/// for people, `field` the JSON path or parameter at fault when there is one.
#[derive(Debug, Clone, Serialize)]
pub struct ApiError {
    #[serde(skip)]
    pub status: StatusCode,
    pub error: &'static str,
    pub detail: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub field: Option<String>,
    /// Every problem found, for spec validation.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<SpecError>,
}

impl ApiError {
    pub fn new(status: StatusCode, error: &'static str, detail: impl Into<String>) -> Self {
        ApiError { status, error, detail: detail.into(), field: None, errors: Vec::new() }
    }
    pub fn field(mut self, field: impl Into<String>) -> Self {
        self.field = Some(field.into());
        self
    }
    pub fn bad_request(detail: impl Into<String>) -> Self {
        Self::new(StatusCode::BAD_REQUEST, "bad_request", detail)
    }
    pub fn not_found(what: &str, id: &str) -> Self {
        Self::new(StatusCode::NOT_FOUND, "not_found", format!("no {what} '{id}'"))
    }
    pub fn conflict(detail: impl Into<String>) -> Self {
        Self::new(StatusCode::CONFLICT, "conflict", detail)
    }
    pub fn unprocessable(error: &'static str, detail: impl Into<String>) -> Self {
        Self::new(StatusCode::UNPROCESSABLE_ENTITY, error, detail)
    }
    /// A spec that failed validation: 422 naming the first path, with the full list.
    pub fn invalid_spec(errors: Vec<SpecError>) -> Self {
        let first = errors.first().cloned();
        let detail = match &first {
            Some(e) => format!("{} problem(s) in the spec; first: {}: {}", errors.len(), e.path, e.message),
            None => "invalid spec".into(),
        };
        ApiError {
            status: StatusCode::UNPROCESSABLE_ENTITY,
            error: "invalid_spec",
            detail,
            field: first.map(|e| e.path),
            errors,
        }
    }
    pub fn internal(detail: impl std::fmt::Display) -> Self {
        tracing::error!("internal error: {detail}");
        Self::new(StatusCode::INTERNAL_SERVER_ERROR, "internal", "internal server error (logged)")
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        (self.status, axum::Json(&self)).into_response()
    }
}

impl From<sqlx::Error> for ApiError {
    fn from(e: sqlx::Error) -> Self {
        ApiError::internal(format!("database: {e}"))
    }
}

impl From<axum::extract::rejection::BytesRejection> for ApiError {
    fn from(r: axum::extract::rejection::BytesRejection) -> Self {
        let status = r.status();
        let code = if status == StatusCode::PAYLOAD_TOO_LARGE { "body_too_large" } else { "bad_body" };
        ApiError::new(status, code, r.body_text())
    }
}

impl From<axum::extract::rejection::JsonRejection> for ApiError {
    fn from(r: axum::extract::rejection::JsonRejection) -> Self {
        use axum::extract::rejection::JsonRejection as J;
        let status = r.status();
        let code = match &r {
            J::JsonDataError(_) => "invalid_json_data",
            J::JsonSyntaxError(_) => "malformed_json",
            J::MissingJsonContentType(_) => "unsupported_media_type",
            _ if status == StatusCode::PAYLOAD_TOO_LARGE => "body_too_large",
            _ => "bad_body",
        };
        ApiError::new(status, code, r.body_text())
    }
}

impl From<axum::extract::rejection::PathRejection> for ApiError {
    fn from(r: axum::extract::rejection::PathRejection) -> Self {
        ApiError::new(StatusCode::BAD_REQUEST, "bad_path", r.body_text())
    }
}

impl From<axum::extract::rejection::QueryRejection> for ApiError {
    fn from(r: axum::extract::rejection::QueryRejection) -> Self {
        ApiError::new(StatusCode::BAD_REQUEST, "bad_query", r.body_text())
    }
}

pub type ApiResult<T> = Result<T, ApiError>;
