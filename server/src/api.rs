//! The HTTP API: one route table from which both the router and the OpenAPI
//! document are built, the handlers, and the bearer-token check.

use crate::auth::{Access, Role};
use crate::campaigns::{self, CreateOptions};
use crate::{report, tiling, views};
use crate::config::{Config, MAX_JSON_BYTES, MAX_MODEL_BYTES};
use crate::dashboard;
use crate::error::{ApiError, ApiResult};
use crate::leases::QueueLimits;
use crate::writer::Writer;
use crate::metrics::Metrics;
use crate::openapi::{self, BodyKind, RouteDoc};
use crate::store::Store;
use axum::body::Bytes;
use axum::extract::{DefaultBodyLimit, FromRequest, FromRequestParts, MatchedPath, Request, State};
use axum::http::{header, request::Parts, HeaderValue, Method, StatusCode};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post, MethodRouter};
use axum::{Json, Router};
use serde::de::DeserializeOwned;
use serde::Deserialize;
use serde_json::{json, Value};
use std::collections::HashMap;
use std::sync::Arc;
use std::time::Instant;
use tessera_protocol::{CampaignState, Coverage, ExtendAnswer, LeaseAnswer, ExtendRequest, LeaseRequest, ReleaseAnswer, SubmitAnswer, SubmitRequest};

/// Shared state of all handlers.
#[derive(Clone)]
pub struct AppState {
    pub store: Arc<Store>,
    pub config: Arc<Config>,
    pub metrics: Arc<Metrics>,
    /// The group writer every lease, extend, release and result request goes through.
    pub writer: Writer,
    access: Arc<HashMap<(Method, String), Access>>,
}

impl AppState {
    pub fn new(store: Arc<Store>, config: Config) -> AppState {
        let access = routes().into_iter().map(|r| ((r.doc.method, r.doc.path.to_string()), r.doc.access)).collect();
        let writer = Writer::start(&store, queue_limits(&config));
        AppState { store, config: Arc::new(config), metrics: Arc::new(Metrics::default()), writer, access: Arc::new(access) }
    }
    pub fn limits(&self) -> QueueLimits {
        queue_limits(&self.config)
    }
}

fn queue_limits(config: &Config) -> QueueLimits {
    QueueLimits {
        lease_ms: config.lease_seconds as i64 * 1000,
        max_attempts: config.max_attempts,
        max_expiries: config.max_expiries,
        max_cells_per_campaign: config.max_cells_per_campaign,
    }
}

/// One route: what the OpenAPI document says of it, and its handler.
#[derive(Clone)]
pub struct Route {
    pub doc: RouteDoc,
    make: fn() -> MethodRouter<AppState>,
}

const JSON: &str = "application/json";
const HTML: &str = "text/html; charset=utf-8";

/// The route table. The router serves exactly these routes.
pub fn routes() -> Vec<Route> {
    use Access::*;
    use BodyKind as B;
    let r = |method: Method,
             path: &'static str,
             access: Access,
             summary: &'static str,
             query: &'static [(&'static str, &'static str)],
             body: BodyKind,
             produces: &'static str,
             make: fn() -> MethodRouter<AppState>| Route {
        doc: RouteDoc { method, path, access, summary, query, body, produces },
        make,
    };
    vec![
        r(Method::GET, "/", Public, "Dashboard: the campaign list (HTML; the page asks for a token)", &[], B::None, HTML, || get(dashboard::index)),
        r(Method::GET, "/dashboard", Public, "Dashboard: the campaign list (HTML)", &[], B::None, HTML, || get(dashboard::index)),
        r(Method::GET, "/dashboard/campaigns/{id}", Public, "Dashboard: one campaign's coverage map, results and counterexamples (HTML)", &[], B::None, HTML, || get(dashboard::index)),
        r(Method::GET, "/dashboard/app.js", Public, "Dashboard script", &[], B::None, "text/javascript; charset=utf-8", || get(dashboard::app_js)),
        r(Method::GET, "/dashboard/style.css", Public, "Dashboard style sheet", &[], B::None, "text/css; charset=utf-8", || get(dashboard::style_css)),
        r(Method::GET, "/api/v1/whoami", ReadOrWork, "The role of the caller's token: {\"role\": ...}", &[], B::None, JSON, || get(whoami)),
        r(Method::GET, "/healthz", Public, "Liveness and database check", &[], B::None, JSON, || get(healthz)),
        r(Method::GET, "/metrics", Public, "Prometheus text metrics (no token, so a scraper can read it)", &[], B::None, "text/plain; version=0.0.4", || get(metrics)),
        r(Method::GET, "/api/v1/openapi.json", Public, "This API's OpenAPI 3 document", &[], B::None, JSON, || get(openapi_doc)),
        r(Method::POST, "/api/v1/models", Submit, "Upload an ONNX model (raw body, at most 16 MiB); returns its sha256", &[], B::Binary, JSON,
            || post(upload_model).layer(DefaultBodyLimit::max(MAX_MODEL_BYTES))),
        r(Method::GET, "/api/v1/models/{sha256}", ReadOrWork, "Download a model by its sha256", &[], B::None, "application/octet-stream", || get(get_model)),
        r(Method::GET, "/api/v1/campaigns", Read, "List campaigns", &[("state", "only campaigns in this state")], B::None, JSON, || get(list_campaigns)),
        r(Method::POST, "/api/v1/campaigns", Submit, "Create a campaign; the body is the spec JSON",
            &[("priority", "integer, higher leases first (default 0)"), ("initial_depth", "cut the envelope uniformly to this depth first (default 0, at most 16)"),
              ("follow_up", "id of a finished campaign over the same envelope and split states: start from its cells instead of the root")],
            B::Json("Spec"), JSON, || post(create_campaign)),
        r(Method::GET, "/api/v1/campaigns/{id}", Read, "One campaign", &[], B::None, JSON, || get(get_campaign)),
        r(Method::GET, "/api/v1/campaigns/{id}/spec", ReadOrWork, "The campaign's canonical spec (hash in the X-Tessera-Spec-Hash header)", &[], B::None, JSON, || get(get_spec)),
        r(Method::POST, "/api/v1/campaigns/{id}/pause", Submit, "Pause: lease no more cells", &[], B::None, JSON, || post(pause)),
        r(Method::POST, "/api/v1/campaigns/{id}/resume", Submit, "Resume a paused campaign", &[], B::None, JSON, || post(resume)),
        r(Method::POST, "/api/v1/campaigns/{id}/cancel", Submit, "Cancel; outstanding leases are withdrawn", &[], B::None, JSON, || post(cancel)),
        r(Method::GET, "/api/v1/campaigns/{id}/coverage", Read, "Exact coverage fractions per status (counterexample: leaf cells holding a checked counterexample, an upper bound on the unsafe volume in them), rate, time estimate and the caution", &[], B::None, JSON, || get(coverage)),
        r(Method::GET, "/api/v1/campaigns/{id}/cells", Read, "Cells by status and depth, paginated",
            &[("status", "cell status: pending, leased, safe, counterexample, unresolved, failed or split"), ("depth", "cell depth"), ("limit", "page size, 1..1000 (default 100)"), ("after", "next_after of the previous page")],
            B::None, JSON, || get(list_cells)),
        r(Method::GET, "/api/v1/campaigns/{id}/counterexamples", Read, "Results with verdict unsafe (a checked counterexample), with their cells, paginated",
            &[("limit", "page size, 1..1000 (default 100)"), ("after", "next_after of the previous page")], B::None, JSON, || get(counterexamples)),
        r(Method::GET, "/api/v1/campaigns/{id}/leaves", Read, "Cells for a coverage map, compact rows [rowid, status index, depth, lo, hi, ...] over the split states, paginated",
            &[("since_ms", "only cells changed at or after this time, split ones included (default: all leaves)"),
              ("limit", "page size, 1..50000 (default 10000)"), ("after", "next_after of the previous page")],
            B::None, JSON, || get(leaves)),
        r(Method::GET, "/api/v1/campaigns/{id}/results", Read, "The latest results, newest first",
            &[("limit", "how many, 1..1000 (default 20)")], B::None, JSON, || get(recent_results)),
        r(Method::GET, "/api/v1/campaigns/{id}/history", Read, "Proven-safe, counterexample and unresolved fractions of the envelope over time",
            &[("points", "number of equal time steps, 1..1000 (default 100)")], B::None, JSON, || get(history)),
        r(Method::GET, "/api/v1/campaigns/{id}/changes", Read, "Exact coverage diff against the campaign this one follows up (or another): volume per (status before, status now)",
            &[("against", "campaign to compare with (default: the one this campaign follows up)"),
              ("rows", "also return up to this many pieces for a map, 0..100000 (default 0)")],
            B::None, JSON, || get(changes)),
        r(Method::GET, "/api/v1/campaigns/{id}/report", Read, "Campaign report (JSON)", &[], B::None, JSON, || get(report_json)),
        r(Method::GET, "/api/v1/campaigns/{id}/report.md", Read, "Campaign report (Markdown)", &[], B::None, "text/markdown; charset=utf-8", || get(report_md)),
        r(Method::POST, "/api/v1/leases", Work, "Lease a batch of cells", &[], B::Json("LeaseRequest"), JSON, || post(lease)),
        r(Method::POST, "/api/v1/leases/extend", Work, "Extend leases", &[], B::Json("ExtendRequest"), JSON, || post(extend)),
        r(Method::POST, "/api/v1/leases/release", Work, "Give leases back unfinished (no attempt counted)", &[], B::Json("ExtendRequest"), JSON, || post(release)),
        r(Method::POST, "/api/v1/results", Work, "Submit a batch of results", &[], B::Json("SubmitRequest"), JSON, || post(submit)),
        r(Method::POST, "/api/v1/admin/tokens", Admin, "Create an access token (shown once)", &[], B::Json("TokenRequest"), JSON, || post(create_token)),
        r(Method::GET, "/api/v1/admin/campaigns/{id}/tiling", Admin, "Check that the leaves tile the envelope exactly once", &[], B::None, JSON, || get(tiling)),
    ]
}

/// The application router (routes, auth, body limits, JSON 404/405).
pub fn router(state: AppState) -> Router {
    let mut router = Router::new();
    for r in routes() {
        router = router.route(r.doc.path, (r.make)());
    }
    router
        .route_layer(middleware::from_fn_with_state(state.clone(), authorize))
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .layer(DefaultBodyLimit::max(MAX_JSON_BYTES))
        .layer(middleware::from_fn(log_request))
        .with_state(state)
}

/// One log line per request: debug for success, info for 4xx, warn for 5xx.
async fn log_request(req: Request, next: Next) -> Response {
    let (method, path) = (req.method().clone(), req.uri().path().to_string());
    let t0 = Instant::now();
    let resp = next.run(req).await;
    let (status, ms) = (resp.status().as_u16(), t0.elapsed().as_secs_f64() * 1e3);
    match status {
        500.. => tracing::warn!(%method, %path, status, ms, "request"),
        400.. => tracing::info!(%method, %path, status, ms, "request"),
        _ => tracing::debug!(%method, %path, status, ms, "request"),
    }
    resp
}

async fn not_found() -> ApiError {
    ApiError::new(StatusCode::NOT_FOUND, "not_found", "no such route (see /api/v1/openapi.json)")
}

async fn method_not_allowed() -> ApiError {
    ApiError::new(StatusCode::METHOD_NOT_ALLOWED, "method_not_allowed", "this route does not take that method")
}

/// The role of the caller, set by [`authorize`].
#[derive(Clone, Copy, Debug)]
pub struct Caller(pub Option<Role>);

async fn authorize(State(st): State<AppState>, mut req: Request, next: Next) -> Response {
    let path = req.extensions().get::<MatchedPath>().map(|p| p.as_str().to_string()).unwrap_or_default();
    // HEAD is served by GET routes; a route missing from the table (none should be) is admin-only.
    let method = if req.method() == Method::HEAD { Method::GET } else { req.method().clone() };
    let access = st.access.get(&(method, path)).copied().unwrap_or(Access::Admin);
    if access == Access::Public {
        req.extensions_mut().insert(Caller(None));
        return next.run(req).await;
    }
    let token = req
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer ").or_else(|| v.strip_prefix("bearer ")))
        .map(|t| t.trim().to_string());
    let Some(token) = token.filter(|t| !t.is_empty()) else {
        return unauthorized("missing bearer token (Authorization: Bearer TOKEN)");
    };
    let role = match st.store.role_of(&token).await {
        Ok(Some(r)) => r,
        Ok(None) => return unauthorized("unknown token"),
        Err(e) => return e.into_response(),
    };
    if !access.allows(role) {
        return ApiError::new(
            StatusCode::FORBIDDEN,
            "forbidden",
            format!("role '{}' may not call this route (allowed: {})", role.as_str(), access.roles().join(", ")),
        )
        .into_response();
    }
    req.extensions_mut().insert(Caller(Some(role)));
    next.run(req).await
}

fn unauthorized(detail: &str) -> Response {
    let mut r = ApiError::new(StatusCode::UNAUTHORIZED, "unauthorized", detail).into_response();
    r.headers_mut().insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
    r
}

// ---------------------------------------------------------------- extractors

/// A JSON body parsed with the path of any problem (`results[3].lease_id`): syntax
/// errors are 400 `malformed_json`, shape errors 422 `invalid_request` with `field`.
pub struct JsonBody<T>(pub T);

impl<S: Send + Sync, T: DeserializeOwned> FromRequest<S> for JsonBody<T> {
    type Rejection = ApiError;
    async fn from_request(req: Request, state: &S) -> Result<Self, ApiError> {
        let bytes = Bytes::from_request(req, state).await?;
        parse_json(&bytes).map(JsonBody)
    }
}

pub fn parse_json<T: DeserializeOwned>(bytes: &[u8]) -> ApiResult<T> {
    let de = &mut serde_json::Deserializer::from_slice(bytes);
    serde_path_to_error::deserialize(de).map_err(|e| {
        let path = e.path().to_string();
        let inner = e.into_inner();
        if inner.is_data() {
            let field = if path == "." { "$".to_string() } else { path };
            ApiError::unprocessable("invalid_request", inner.to_string()).field(field)
        } else {
            ApiError::bad_request(format!("malformed JSON: {inner}")).with_code("malformed_json")
        }
    })
}

impl ApiError {
    fn with_code(mut self, code: &'static str) -> Self {
        self.error = code;
        self
    }
}

/// Query parameters with JSON errors.
pub struct Q<T>(pub T);

impl<S: Send + Sync, T: DeserializeOwned + Send> FromRequestParts<S> for Q<T> {
    type Rejection = ApiError;
    async fn from_request_parts(parts: &mut Parts, state: &S) -> Result<Self, ApiError> {
        let axum::extract::Query(v) = axum::extract::Query::<T>::from_request_parts(parts, state).await?;
        Ok(Q(v))
    }
}

/// The single path parameter, with JSON errors.
pub struct P(pub String);

impl<S: Send + Sync> FromRequestParts<S> for P {
    type Rejection = ApiError;
    async fn from_request_parts(parts: &mut Parts, state: &S) -> Result<Self, ApiError> {
        let axum::extract::Path(v) = axum::extract::Path::<String>::from_request_parts(parts, state).await?;
        Ok(P(v))
    }
}

/// Raw body with JSON errors (413 when over the route's limit).
pub struct RawBody(pub Bytes);

impl<S: Send + Sync> FromRequest<S> for RawBody {
    type Rejection = ApiError;
    async fn from_request(req: Request, state: &S) -> Result<Self, ApiError> {
        Ok(RawBody(Bytes::from_request(req, state).await?))
    }
}

// ---------------------------------------------------------------- handlers

async fn healthz(State(st): State<AppState>) -> Response {
    match sqlx::query_scalar::<_, i64>("SELECT 1").fetch_one(&st.store.pool).await {
        Ok(_) => Json(json!({"status": "ok", "version": env!("CARGO_PKG_VERSION")})).into_response(),
        Err(e) => ApiError::new(StatusCode::SERVICE_UNAVAILABLE, "unavailable", format!("database: {e}")).into_response(),
    }
}

async fn metrics(State(st): State<AppState>) -> ApiResult<Response> {
    let text = st.metrics.render(&st.store, st.writer.counts()).await?;
    Ok(([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], text).into_response())
}

async fn openapi_doc() -> Json<Value> {
    Json(openapi::document(routes().iter().map(|r| &r.doc)))
}

async fn upload_model(State(st): State<AppState>, RawBody(body): RawBody) -> ApiResult<Response> {
    let shape = campaigns::inspect_upload(&body)?;
    let sha = st.store.put_model(&body, Some(shape.inputs), Some(shape.outputs)).await?;
    Ok((
        StatusCode::CREATED,
        Json(json!({"sha256": sha, "ref": format!("sha256:{sha}"), "size": body.len(), "inputs": shape.inputs, "outputs": shape.outputs})),
    )
        .into_response())
}

fn check_sha(s: &str) -> ApiResult<()> {
    if s.len() == 64 && s.bytes().all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b)) {
        Ok(())
    } else {
        Err(ApiError::bad_request("a model is named by 64 lowercase hex digits of its SHA-256").field("sha256"))
    }
}

async fn get_model(State(st): State<AppState>, P(sha): P) -> ApiResult<Response> {
    check_sha(&sha)?;
    let data = st.store.get_model(&sha).await?.ok_or_else(|| ApiError::not_found("model", &sha))?;
    Ok(([(header::CONTENT_TYPE, "application/octet-stream")], data).into_response())
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ListQuery {
    state: Option<String>,
}

async fn list_campaigns(State(st): State<AppState>, Q(q): Q<ListQuery>) -> ApiResult<Json<Value>> {
    if let Some(s) = &q.state {
        if CampaignState::parse(s).is_none() {
            return Err(ApiError::bad_request(format!("unknown state '{s}'")).field("state"));
        }
    }
    Ok(Json(campaigns::list(&st.store, q.state.as_deref()).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct CreateQuery {
    priority: Option<i64>,
    initial_depth: Option<u32>,
    follow_up: Option<String>,
}

async fn create_campaign(State(st): State<AppState>, Q(q): Q<CreateQuery>, RawBody(body): RawBody) -> ApiResult<Response> {
    let opts = CreateOptions {
        priority: q.priority.unwrap_or(0),
        initial_depth: q.initial_depth.unwrap_or(0),
        follow_up: q.follow_up.as_deref(),
    };
    let c = campaigns::create(&st.store, st.config.max_depth, st.config.max_cells_per_campaign, &body, opts).await?;
    Ok((StatusCode::CREATED, Json(c)).into_response())
}

async fn get_campaign(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Value>> {
    Ok(Json(campaigns::get(&st.store, &id).await?))
}

async fn get_spec(State(st): State<AppState>, P(id): P) -> ApiResult<Response> {
    let (json, hash) = campaigns::spec_of(&st.store, &id).await?;
    let hv = HeaderValue::from_str(&hash).map_err(ApiError::internal)?;
    let etag = HeaderValue::from_str(&format!("\"{hash}\"")).map_err(ApiError::internal)?;
    let mut r = ([(header::CONTENT_TYPE, HeaderValue::from_static(JSON))], json).into_response();
    r.headers_mut().insert("x-tessera-spec-hash", hv);
    r.headers_mut().insert(header::ETAG, etag);
    Ok(r)
}

async fn pause(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Value>> {
    Ok(Json(campaigns::transition(&st.store, st.limits(), &id, "pause").await?))
}
async fn resume(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Value>> {
    Ok(Json(campaigns::transition(&st.store, st.limits(), &id, "resume").await?))
}
async fn cancel(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Value>> {
    Ok(Json(campaigns::transition(&st.store, st.limits(), &id, "cancel").await?))
}

async fn coverage(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Coverage>> {
    Ok(Json(views::coverage(&st.store, &id).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct CellsQuery {
    status: Option<String>,
    depth: Option<i64>,
    limit: Option<i64>,
    after: Option<i64>,
}

fn page_limit(l: Option<i64>) -> ApiResult<i64> {
    match l.unwrap_or(100) {
        v @ 1..=1000 => Ok(v),
        _ => Err(ApiError::bad_request("limit must be between 1 and 1000").field("limit")),
    }
}

async fn list_cells(State(st): State<AppState>, P(id): P, Q(q): Q<CellsQuery>) -> ApiResult<Json<Value>> {
    let limit = page_limit(q.limit)?;
    Ok(Json(views::cells(&st.store, &id, q.status.as_deref(), q.depth, limit, q.after.unwrap_or(0)).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct PageQuery {
    limit: Option<i64>,
    after: Option<i64>,
}

async fn counterexamples(State(st): State<AppState>, P(id): P, Q(q): Q<PageQuery>) -> ApiResult<Json<Value>> {
    let limit = page_limit(q.limit)?;
    Ok(Json(views::counterexamples(&st.store, &id, limit, q.after.unwrap_or(0)).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct LeavesQuery {
    since_ms: Option<i64>,
    limit: Option<i64>,
    after: Option<i64>,
}

async fn leaves(State(st): State<AppState>, P(id): P, Q(q): Q<LeavesQuery>) -> ApiResult<Json<Value>> {
    let limit = match q.limit.unwrap_or(10_000) {
        v @ 1..=views::MAX_LEAVES_PAGE => v,
        _ => return Err(ApiError::bad_request(format!("limit must be between 1 and {}", views::MAX_LEAVES_PAGE)).field("limit")),
    };
    Ok(Json(views::leaves(&st.store, &id, q.since_ms, q.after.unwrap_or(0), limit).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RecentQuery {
    limit: Option<i64>,
}

async fn recent_results(State(st): State<AppState>, P(id): P, Q(q): Q<RecentQuery>) -> ApiResult<Json<Value>> {
    let limit = match q.limit.unwrap_or(20) {
        v @ 1..=1000 => v,
        _ => return Err(ApiError::bad_request("limit must be between 1 and 1000").field("limit")),
    };
    Ok(Json(views::recent_results(&st.store, &id, limit).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct HistoryQuery {
    points: Option<usize>,
}

async fn history(State(st): State<AppState>, P(id): P, Q(q): Q<HistoryQuery>) -> ApiResult<Json<Value>> {
    let points = match q.points.unwrap_or(100) {
        v @ 1..=views::MAX_HISTORY_POINTS => v,
        _ => return Err(ApiError::bad_request(format!("points must be between 1 and {}", views::MAX_HISTORY_POINTS)).field("points")),
    };
    Ok(Json(views::history(&st.store, &id, points).await?))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ChangesQuery {
    against: Option<String>,
    rows: Option<usize>,
}

async fn changes(State(st): State<AppState>, P(id): P, Q(q): Q<ChangesQuery>) -> ApiResult<Json<Value>> {
    let rows = match q.rows.unwrap_or(0) {
        v @ 0..=crate::followup::MAX_CHANGE_ROWS => v,
        _ => return Err(ApiError::bad_request(format!("rows must be between 0 and {}", crate::followup::MAX_CHANGE_ROWS)).field("rows")),
    };
    Ok(Json(crate::followup::changes(&st.store, &id, q.against.as_deref(), rows).await?))
}

/// The caller's role, so that the dashboard shows action buttons only to those who may act.
async fn whoami(axum::Extension(caller): axum::Extension<Caller>) -> ApiResult<Json<Value>> {
    let role = caller.0.ok_or_else(|| ApiError::internal("whoami reached without a caller"))?;
    Ok(Json(json!({"role": role.as_str()})))
}

async fn report_json(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Value>> {
    Ok(Json(report::report(&st.store, &id).await?))
}

async fn report_md(State(st): State<AppState>, P(id): P) -> ApiResult<Response> {
    let r = report::report(&st.store, &id).await?;
    Ok(([(header::CONTENT_TYPE, "text/markdown; charset=utf-8")], report::report_markdown(&r)).into_response())
}

fn worker_name(w: &Option<String>, field: &str) -> ApiResult<String> {
    let w = w.clone().unwrap_or_else(|| "anonymous".into());
    if w.len() > 200 {
        return Err(ApiError::unprocessable("invalid_request", "worker name longer than 200 bytes").field(field));
    }
    Ok(w)
}

async fn lease(State(st): State<AppState>, JsonBody(req): JsonBody<LeaseRequest>) -> ApiResult<Json<LeaseAnswer>> {
    if req.max == 0 {
        return Err(ApiError::unprocessable("invalid_request", "max must be at least 1").field("max"));
    }
    let worker = worker_name(&req.worker, "worker")?;
    let t0 = Instant::now();
    let max = req.max.min(st.config.max_lease_batch);
    let (cells, stats) = st.writer.lease(max, &worker, req.campaign_id.as_deref()).await?;
    st.metrics.lease_seconds.observe(t0.elapsed().as_secs_f64());
    Metrics::add(&st.metrics.leases_issued, cells.len() as u64);
    Metrics::add(&st.metrics.leases_reclaimed, stats.reclaimed);
    Ok(Json(LeaseAnswer { leases: cells, lease_seconds: st.config.lease_seconds, max_granted: max }))
}

async fn extend(State(st): State<AppState>, JsonBody(req): JsonBody<ExtendRequest>) -> ApiResult<Json<ExtendAnswer>> {
    if req.lease_ids.len() > 10_000 {
        return Err(ApiError::unprocessable("limit", "at most 10000 lease ids per request").field("lease_ids"));
    }
    let items = st.writer.extend(&req.lease_ids).await?;
    Ok(Json(ExtendAnswer { items, lease_seconds: st.config.lease_seconds }))
}

async fn release(State(st): State<AppState>, JsonBody(req): JsonBody<ExtendRequest>) -> ApiResult<Json<ReleaseAnswer>> {
    if req.lease_ids.len() > 10_000 {
        return Err(ApiError::unprocessable("limit", "at most 10000 lease ids per request").field("lease_ids"));
    }
    let items = st.writer.release(&req.lease_ids).await?;
    Ok(Json(ReleaseAnswer { items }))
}

async fn submit(State(st): State<AppState>, JsonBody(req): JsonBody<SubmitRequest>) -> ApiResult<Json<SubmitAnswer>> {
    if req.results.len() > 10_000 {
        return Err(ApiError::unprocessable("limit", "at most 10000 results per request").field("results"));
    }
    let worker = worker_name(&req.worker, "worker")?;
    if req.engine_version.as_ref().is_some_and(|v| v.len() > 100) {
        return Err(ApiError::unprocessable("invalid_request", "engine_version longer than 100 bytes").field("engine_version"));
    }
    let t0 = Instant::now();
    let (items, stats) = st.writer.submit(&worker, req.engine_version.as_deref(), &req.results).await?;
    st.metrics.submit_seconds.observe(t0.elapsed().as_secs_f64());
    Metrics::add(&st.metrics.results_accepted, stats.accepted);
    Metrics::add(&st.metrics.results_rejected, stats.rejected);
    Metrics::add(&st.metrics.cells_created, stats.cells_created);
    Ok(Json(SubmitAnswer { items, accepted: stats.accepted, rejected: stats.rejected }))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct TokenRequest {
    role: Role,
    #[serde(default)]
    label: String,
}

async fn create_token(State(st): State<AppState>, JsonBody(req): JsonBody<TokenRequest>) -> ApiResult<Response> {
    if req.label.len() > 200 {
        return Err(ApiError::unprocessable("invalid_request", "label longer than 200 bytes").field("label"));
    }
    let token = st.store.create_token(req.role, &req.label).await?;
    Ok((StatusCode::CREATED, Json(json!({"token": token, "role": req.role.as_str(), "label": req.label}))).into_response())
}

async fn tiling(State(st): State<AppState>, P(id): P) -> ApiResult<Json<Value>> {
    Ok(Json(tiling::tiling_check(&st.store, &id).await?))
}
