//! HTTP routes (axum), thin: each handler unpacks the request, calls [`Service`], and maps the
//! result. Every error is an RFC 9457 problem+json body; 4xx bodies name the field, 5xx bodies
//! hide internals (the cause is logged with the request id).

use crate::access::{Access, AuthError, Principal, Role};
use crate::claim::{Claim, ClaimError, FieldError};
use crate::feedback::{OutcomeRecord, OutcomeReport};
use crate::rules::Queue;
use crate::service::{Decision, Service, ServiceError};
use crate::store::IntakeStatus;
use crate::store::StoreError;
use axum::body::{Body, Bytes};
use axum::extract::{Extension, MatchedPath, Path, Query, Request, State};
use axum::http::{HeaderMap, HeaderValue, StatusCode, header};
use axum::middleware::{self, Next};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use futures_util::StreamExt;
use http_body_util::{BodyExt, Limited};
use serde::{Deserialize, Serialize};
use serde_json::json;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

/// Settings the HTTP layer needs besides the service.
#[derive(Debug, Clone)]
pub struct HttpSettings {
    pub body_limit_bytes: usize,
    /// Requests (a batch counts as one) served at once; beyond it, 503 with Retry-After.
    pub concurrency_limit: usize,
    /// Longest a single (non-batch) request may take before it is answered with 503.
    pub request_timeout: std::time::Duration,
    pub batch_limit_bytes: usize,
    pub batch_line_bytes: usize,
    pub capacities: [(Queue, f64); 3],
    pub access: Arc<Access>,
    /// `retention.days` (0: purges are off).
    pub retention_days: u32,
    pub retention_check_hours: u32,
    /// The claims stream to consume, when enabled.
    pub stream: Option<crate::config::StreamConfig>,
}

impl HttpSettings {
    /// Reviews a day the referral queues (investigate and desk check) can take.
    pub fn referral_capacity(&self) -> f64 {
        self.capacities
            .iter()
            .filter(|(q, _)| matches!(q, Queue::Investigate | Queue::DeskCheck))
            .map(|(_, c)| c)
            .sum()
    }
}

/// Which roles may call each route (method, path as routed). A route missing here is
/// administrator-only, so forgetting an entry fails closed; a test checks that every
/// documented operation has its entry. Operations routes (/healthz, /readyz, /metrics,
/// /v1/openapi.json) are open: they carry no claim data.
pub const ROUTE_ROLES: &[(&str, &str, &[Role])] = &[
    ("POST", "/v1/claims", &[Role::ClaimsSystem]),
    ("POST", "/v1/claims/batch", &[Role::ClaimsSystem]),
    (
        "GET",
        "/v1/claims/{claim_id}",
        &[Role::ClaimsSystem, Role::Investigator, Role::Analyst],
    ),
    (
        "POST",
        "/v1/claims/{claim_id}/outcome",
        &[Role::Investigator],
    ),
    ("POST", "/v1/claims/{claim_id}/hold", &[Role::Administrator]),
    (
        "GET",
        "/v1/claimants/{claimant_id}/records",
        &[Role::Administrator],
    ),
    ("GET", "/v1/queues", &[Role::Investigator]),
    ("GET", "/v1/queues/{queue}", &[Role::Investigator]),
    ("POST", "/v1/queues/{queue}/lease", &[Role::Investigator]),
    (
        "POST",
        "/v1/queues/{queue}/items/{claim_id}/release",
        &[Role::Investigator],
    ),
    ("GET", "/v1/rings", &[Role::Investigator, Role::Analyst]),
    (
        "GET",
        "/v1/rings/{ring_id}",
        &[Role::Investigator, Role::Analyst],
    ),
    (
        "GET",
        "/v1/rings/{ring_id}/graphml",
        &[Role::Investigator, Role::Analyst],
    ),
    (
        "GET",
        "/v1/claims/{claim_id}/ring",
        &[Role::Investigator, Role::Analyst],
    ),
    ("GET", "/v1/monitor/quality", &[Role::Analyst]),
    ("GET", "/v1/monitor/drift", &[Role::Analyst]),
    ("GET", "/v1/monitor/fairness", &[Role::Analyst]),
    ("GET", "/v1/monitor/compare", &[Role::Analyst]),
    ("GET", "/v1/export/training", &[Role::Analyst]),
    ("GET", "/v1/report", &[Role::Analyst]),
    ("POST", "/v1/admin/model", &[Role::Administrator]),
    ("POST", "/v1/admin/model/promote", &[Role::Administrator]),
    ("POST", "/v1/admin/rules", &[Role::Administrator]),
    ("POST", "/v1/admin/purge", &[Role::Administrator]),
];

/// The roles allowed on a route; administrator-only when the route is not in the table.
pub fn required_roles(method: &str, path: &str) -> &'static [Role] {
    let method = if method == "HEAD" { "GET" } else { method };
    ROUTE_ROLES
        .iter()
        .find(|(m, p, _)| *m == method && *p == path)
        .map_or(&[Role::Administrator], |(_, _, r)| *r)
}

#[derive(Clone)]
pub(crate) struct AppState {
    pub(crate) svc: Service,
    pub(crate) settings: Arc<HttpSettings>,
    pub(crate) sessions: Arc<crate::web::Sessions>,
}

/// Every error the API can answer with. One mapping to HTTP, no catch-all: a new variant must
/// be given its status here.
#[derive(Debug, thiserror::Error)]
pub enum AppError {
    #[error("request body is not valid JSON")]
    NotJson(ClaimError),
    #[error("the claim has {} problem(s)", .0.len())]
    InvalidClaim(Vec<FieldError>),
    #[error("invalid request")]
    BadRequest(Vec<FieldError>),
    #[error("{what} {id:?} not found")]
    NotFound { what: &'static str, id: String },
    #[error("request body larger than {limit} bytes")]
    TooLarge { limit: usize },
    #[error("content type must be {expected}")]
    MediaType { expected: &'static str },
    #[error("method not allowed on this route")]
    Method,
    #[error("{0}")]
    Unauthenticated(AuthError),
    #[error("this route needs one of the roles {needed}; the key {name:?} has {has}")]
    Forbidden {
        name: String,
        needed: String,
        has: String,
    },
    #[error("{0}")]
    Conflict(String),
    #[error("the service is at its concurrency limit; retry shortly")]
    Overloaded,
    #[error("the request took longer than the service allows; retry shortly")]
    TimedOut,
    #[error("the store is unavailable right now; retry shortly")]
    StoreUnavailable(String),
    #[error("internal error")]
    Internal(String),
}

impl From<ServiceError> for AppError {
    fn from(e: ServiceError) -> Self {
        match e {
            // A shared store that is down or failing over, or a writer that lost a race
            // (the retry finds its decision): the caller should retry, nothing was stored.
            ServiceError::Store(StoreError::Postgres(m) | StoreError::Conflict(m)) => {
                AppError::StoreUnavailable(m)
            }
            other => AppError::Internal(other.to_string()),
        }
    }
}

#[derive(Serialize, Deserialize)]
pub struct Problem {
    #[serde(rename = "type")]
    pub kind: String,
    pub title: String,
    pub status: u16,
    pub detail: String,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<FieldError>,
}

fn problem_response(
    status: StatusCode,
    kind: &str,
    detail: String,
    errors: Vec<FieldError>,
) -> Response {
    let body = Problem {
        kind: format!("urn:weir:problem:{kind}"),
        title: status.canonical_reason().unwrap_or("error").to_string(),
        status: status.as_u16(),
        detail,
        errors,
    };
    let mut r = (status, Json(body)).into_response();
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/problem+json"),
    );
    r
}

impl AppError {
    fn status_and_kind(&self) -> (StatusCode, &'static str) {
        match self {
            AppError::NotJson(_) => (StatusCode::BAD_REQUEST, "invalid-json"),
            AppError::InvalidClaim(_) => (StatusCode::UNPROCESSABLE_ENTITY, "invalid-claim"),
            AppError::BadRequest(_) => (StatusCode::BAD_REQUEST, "invalid-request"),
            AppError::NotFound { .. } => (StatusCode::NOT_FOUND, "not-found"),
            AppError::TooLarge { .. } => (StatusCode::PAYLOAD_TOO_LARGE, "too-large"),
            AppError::MediaType { .. } => (StatusCode::UNSUPPORTED_MEDIA_TYPE, "media-type"),
            AppError::Method => (StatusCode::METHOD_NOT_ALLOWED, "method"),
            AppError::Unauthenticated(_) => (StatusCode::UNAUTHORIZED, "unauthenticated"),
            AppError::Forbidden { .. } => (StatusCode::FORBIDDEN, "forbidden"),
            AppError::Conflict(_) => (StatusCode::CONFLICT, "conflict"),
            AppError::Overloaded => (StatusCode::SERVICE_UNAVAILABLE, "overloaded"),
            AppError::TimedOut => (StatusCode::SERVICE_UNAVAILABLE, "timed-out"),
            AppError::StoreUnavailable(_) => (StatusCode::SERVICE_UNAVAILABLE, "store-unavailable"),
            AppError::Internal(_) => (StatusCode::INTERNAL_SERVER_ERROR, "internal"),
        }
    }
}

impl IntoResponse for AppError {
    fn into_response(self) -> Response {
        let (status, kind) = self.status_and_kind();
        let retry = matches!(
            self,
            AppError::Overloaded | AppError::TimedOut | AppError::StoreUnavailable(_)
        );
        let challenge = matches!(self, AppError::Unauthenticated(_));
        let (detail, errors) = match self {
            AppError::NotJson(e) => (e.to_string(), e.field_errors()),
            AppError::InvalidClaim(errs) => (
                format!("the claim has {} problem(s); see errors", errs.len()),
                errs,
            ),
            AppError::BadRequest(errs) => ("invalid request; see errors".into(), errs),
            AppError::StoreUnavailable(cause) => {
                tracing::error!(%cause, "store unavailable");
                (
                    "the store is unavailable right now; nothing was stored; retry shortly".into(),
                    vec![],
                )
            }
            AppError::Internal(cause) => {
                tracing::error!(%cause, "internal error");
                (
                    "the service could not complete the request; it has been logged".into(),
                    vec![],
                )
            }
            other => (other.to_string(), vec![]),
        };
        let mut r = problem_response(status, kind, detail, errors);
        if retry {
            r.headers_mut()
                .insert(header::RETRY_AFTER, HeaderValue::from_static("1"));
        }
        if challenge {
            r.headers_mut().insert(
                header::WWW_AUTHENTICATE,
                HeaderValue::from_static("Bearer realm=\"weir\""),
            );
        }
        r
    }
}

/// Load shedding and timeouts answer with problems too.
async fn overload(err: tower::BoxError) -> AppError {
    if err.is::<tower::timeout::error::Elapsed>() {
        AppError::TimedOut
    } else if err.is::<tower::load_shed::error::Overloaded>() {
        AppError::Overloaded
    } else {
        AppError::Internal(err.to_string())
    }
}

fn reject_reason(e: &AppError) -> Option<&'static str> {
    match e {
        AppError::NotJson(_) => Some("invalid_json"),
        AppError::InvalidClaim(_) => Some("invalid_claim"),
        AppError::TooLarge { .. } => Some("too_large"),
        AppError::MediaType { .. } => Some("wrong_media_type"),
        _ => None,
    }
}

fn require_type(headers: &HeaderMap, expected: &'static str) -> Result<(), AppError> {
    let ct = headers
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("");
    let essence = ct.split(';').next().unwrap_or("").trim();
    if essence.eq_ignore_ascii_case(expected) {
        Ok(())
    } else {
        Err(AppError::MediaType { expected })
    }
}

async fn read_body(body: Body, limit: usize) -> Result<Bytes, AppError> {
    match Limited::new(body, limit).collect().await {
        Ok(c) => Ok(c.to_bytes()),
        Err(e) if e.is::<http_body_util::LengthLimitError>() => Err(AppError::TooLarge { limit }),
        Err(e) => Err(AppError::BadRequest(vec![FieldError {
            field: String::new(),
            problem: format!("could not read the request body: {e}"),
        }])),
    }
}

pub fn parse_claim(bytes: &[u8]) -> Result<Claim, AppError> {
    Claim::from_json(bytes).map_err(|e| match e {
        ClaimError::Invalid(errs) => AppError::InvalidClaim(errs),
        e @ ClaimError::NotJson { .. } => AppError::NotJson(e),
    })
}

async fn post_claim(
    State(st): State<AppState>,
    Extension(who): Extension<Principal>,
    headers: HeaderMap,
    body: Body,
) -> Response {
    let result = async {
        require_type(&headers, "application/json")?;
        let bytes = read_body(body, st.settings.body_limit_bytes).await?;
        let claim = parse_claim(&bytes)?;
        Ok::<Decision, AppError>(
            st.svc
                .intake_as(claim, chrono::Utc::now(), Some(&who.name))
                .await?,
        )
    }
    .await;
    match result {
        Ok(d) => {
            let status = if d.status == IntakeStatus::Duplicate {
                StatusCode::OK
            } else {
                StatusCode::CREATED
            };
            (status, Json(d)).into_response()
        }
        Err(e) => {
            if let Some(r) = reject_reason(&e) {
                st.svc.metrics.claims_rejected.with_label_values(&[r]).inc();
            }
            e.into_response()
        }
    }
}

/// Claims decided in a batch before one shared wait for the disk.
const BATCH_CHUNK: usize = 256;

/// Newline-delimited claims in, one line out per line in (a decision, or a problem with the
/// line number). Lines are decided in order; output for a chunk of lines is sent only once
/// those decisions are on disk. A line over the line limit, or a body over the batch limit,
/// is reported and ends the batch.
async fn post_batch(
    State(st): State<AppState>,
    Extension(who): Extension<Principal>,
    headers: HeaderMap,
    body: Body,
) -> Response {
    if let Err(e) = require_type(&headers, "application/x-ndjson") {
        st.svc
            .metrics
            .claims_rejected
            .with_label_values(&["wrong_media_type"])
            .inc();
        return e.into_response();
    }
    let (tx, rx) = tokio::sync::mpsc::channel::<Result<Bytes, std::io::Error>>(4);
    tokio::spawn(async move {
        let mut stream = body.into_data_stream();
        let mut buf: Vec<u8> = Vec::new();
        let mut line_no = 0usize;
        let mut total = 0usize;
        let mut pending: Vec<serde_json::Value> = Vec::new();
        let s = &st.settings;
        let emit = |v: serde_json::Value, out: &mut Vec<serde_json::Value>| out.push(v);
        let mut stop = false;
        loop {
            let chunk = if stop { None } else { stream.next().await };
            let at_end = chunk.is_none();
            match chunk {
                Some(Ok(bytes)) => {
                    total += bytes.len();
                    buf.extend_from_slice(&bytes);
                }
                Some(Err(e)) => {
                    emit(
                        json!({"line": line_no + 1, "problem": {"status": 400, "detail": format!("could not read the body: {e}")}}),
                        &mut pending,
                    );
                    stop = true;
                }
                None => {}
            }
            if total > s.batch_limit_bytes && !stop {
                let e = AppError::TooLarge {
                    limit: s.batch_limit_bytes,
                };
                emit(problem_line(line_no + 1, &e), &mut pending);
                stop = true;
                buf.clear();
            }
            // Complete lines (and the last, unterminated one at the end of the body).
            let mut start = 0;
            while let Some(pos) = buf[start..].iter().position(|&b| b == b'\n') {
                let line = buf[start..start + pos].to_vec();
                start += pos + 1;
                line_no += 1;
                handle_line(&st, &who.name, &line, line_no, &mut pending);
            }
            buf.drain(..start);
            if buf.len() > s.batch_line_bytes && !stop {
                line_no += 1;
                let e = AppError::TooLarge {
                    limit: s.batch_line_bytes,
                };
                emit(problem_line(line_no, &e), &mut pending);
                stop = true;
                buf.clear();
            }
            if (at_end || stop) && !buf.is_empty() {
                let line = std::mem::take(&mut buf);
                line_no += 1;
                handle_line(&st, &who.name, &line, line_no, &mut pending);
            }
            if pending.len() >= BATCH_CHUNK || at_end || stop {
                st.svc.store.durable().await;
                let mut out = Vec::new();
                for v in pending.drain(..) {
                    out.extend_from_slice(v.to_string().as_bytes());
                    out.push(b'\n');
                }
                if !out.is_empty() && tx.send(Ok(Bytes::from(out))).await.is_err() {
                    return; // client went away; what was decided is stored
                }
            }
            if at_end || stop {
                return;
            }
        }
    });
    let stream = tokio_stream_from(rx);
    let mut r = Response::new(Body::from_stream(stream));
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/x-ndjson"),
    );
    r
}

fn problem_line(line: usize, e: &AppError) -> serde_json::Value {
    let (status, kind) = e.status_and_kind();
    let errors = match e {
        AppError::NotJson(c) => c.field_errors(),
        AppError::InvalidClaim(v) => v.clone(),
        _ => vec![],
    };
    json!({"line": line, "problem": {"type": format!("urn:weir:problem:{kind}"),
        "status": status.as_u16(), "detail": e.to_string(), "errors": errors}})
}

fn tokio_stream_from(
    mut rx: tokio::sync::mpsc::Receiver<Result<Bytes, std::io::Error>>,
) -> impl futures_util::Stream<Item = Result<Bytes, std::io::Error>> {
    futures_util::stream::poll_fn(move |cx| rx.poll_recv(cx))
}

fn handle_line(
    st: &AppState,
    who: &str,
    line: &[u8],
    line_no: usize,
    pending: &mut Vec<serde_json::Value>,
) {
    if line.iter().all(u8::is_ascii_whitespace) {
        return;
    }
    match parse_claim(line) {
        Ok(claim) => match st.svc.decide_as(claim, chrono::Utc::now(), Some(who)) {
            Ok((rec, status)) => {
                let mut v =
                    serde_json::to_value(Decision::from_record(&rec, status)).unwrap_or_default();
                v["line"] = json!(line_no);
                pending.push(v);
            }
            Err(e) => pending.push(problem_line(line_no, &AppError::from(e))),
        },
        Err(e) => {
            if let Some(r) = reject_reason(&e) {
                st.svc.metrics.claims_rejected.with_label_values(&[r]).inc();
            }
            pending.push(problem_line(line_no, &e));
        }
    }
}

pub(crate) fn check_id(field: &str, id: &str) -> Result<(), AppError> {
    let ok = !id.is_empty()
        && id.len() <= crate::claim::MAX_STRING_BYTES
        && !id.chars().any(char::is_control);
    if ok {
        Ok(())
    } else {
        Err(AppError::BadRequest(vec![FieldError {
            field: field.into(),
            problem: "not a valid id".into(),
        }]))
    }
}

#[derive(Serialize)]
struct ClaimView {
    claim_id: String,
    decision: Decision,
    claim: Claim,
    revisions: Vec<RevisionSummary>,
    features: std::collections::BTreeMap<String, f64>,
    rules_fired: Vec<String>,
    linked_claims: Vec<Linked>,
    /// The latest adjudicated outcome, if any, and every outcome revision.
    outcome: Option<OutcomeRecord>,
    outcome_history: Vec<OutcomeRecord>,
}

#[derive(Serialize)]
struct RevisionSummary {
    revision: u32,
    decided_at: String,
    queue: Queue,
    model_probability: f64,
    content_hash: String,
}

#[derive(Serialize)]
struct Linked {
    via: String,
    claim_id: String,
}

async fn get_claim(
    State(st): State<AppState>,
    Extension(who): Extension<Principal>,
    Path(id): Path<String>,
) -> Result<Response, AppError> {
    check_id("claim_id", &id)?;
    let revs = st.svc.store.revisions(&id).map_err(ServiceError::from)?;
    let Some(last) = revs.last() else {
        return Err(AppError::NotFound { what: "claim", id });
    };
    // A claims system sees only the decision on a claim it filed itself; anyone else's claim
    // is "not found" to it, so that ids of other systems' claims cannot be probed.
    if !who.has_any(&[Role::Investigator, Role::Analyst]) {
        if last.submitted_by.as_deref() != Some(who.name.as_str()) {
            return Err(AppError::NotFound { what: "claim", id });
        }
        return Ok(Json(json!({
            "claim_id": id,
            "decision": Decision::from_record(last, IntakeStatus::New),
        }))
        .into_response());
    }
    let linked = st
        .svc
        .store
        .linked_claims(&last.claim, 365 * 86_400)
        .map_err(ServiceError::from)?;
    let view = ClaimView {
        claim_id: id.clone(),
        decision: Decision::from_record(last, IntakeStatus::New),
        claim: last.claim.clone(),
        revisions: revs
            .iter()
            .map(|r| RevisionSummary {
                revision: r.revision,
                decided_at: r.decided_at.clone(),
                queue: r.queue,
                model_probability: r.model_probability,
                content_hash: r.content_hash.clone(),
            })
            .collect(),
        features: last.features.clone(),
        rules_fired: last.rules_fired.clone(),
        linked_claims: linked
            .into_iter()
            .map(|(via, claim_id)| Linked { via, claim_id })
            .collect(),
        outcome: st.svc.store.outcome(&id).map_err(ServiceError::from)?,
        outcome_history: st
            .svc
            .store
            .outcome_history(&id)
            .map_err(ServiceError::from)?,
    };
    Ok(Json(view).into_response())
}

pub(crate) fn queue_param(name: &str) -> Result<Queue, AppError> {
    match Queue::parse(name) {
        Some(q) if q != Queue::NoReview => Ok(q),
        _ => Err(AppError::NotFound {
            what: "queue",
            id: name.chars().take(64).collect(),
        }),
    }
}

async fn list_queues(State(st): State<AppState>) -> Json<serde_json::Value> {
    let queues: Vec<_> = st
        .settings
        .capacities
        .iter()
        .map(|(q, cap)| json!({"queue": q, "depth": st.svc.store.queue_depth(*q), "daily_capacity": cap}))
        .collect();
    Json(json!({ "queues": queues }))
}

#[derive(Deserialize)]
struct PageQuery {
    offset: Option<String>,
    limit: Option<String>,
}

fn number(field: &str, v: Option<&String>, default: usize, max: usize) -> Result<usize, AppError> {
    match v {
        None => Ok(default),
        Some(s) => match s.parse::<usize>() {
            Ok(n) if n <= max => Ok(n),
            _ => Err(AppError::BadRequest(vec![FieldError {
                field: field.into(),
                problem: format!("expected a whole number from 0 to {max}"),
            }])),
        },
    }
}

async fn list_queue(
    State(st): State<AppState>,
    Path(name): Path<String>,
    Query(q): Query<PageQuery>,
) -> Result<Json<serde_json::Value>, AppError> {
    let queue = queue_param(&name)?;
    let offset = number("offset", q.offset.as_ref(), 0, 10_000_000)?;
    let limit = number("limit", q.limit.as_ref(), 50, 500)?;
    let items = st
        .svc
        .store
        .queue_page(queue, offset, limit)
        .map_err(ServiceError::from)?;
    Ok(Json(json!({
        "queue": queue,
        "depth": st.svc.store.queue_depth(queue),
        "offset": offset,
        "limit": limit,
        "items": items,
    })))
}

#[derive(Deserialize)]
struct LimitQuery {
    limit: Option<String>,
}

/// Run store work that may wait on the network off the async threads.
async fn blocking<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, ServiceError> + Send + 'static,
) -> Result<T, AppError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(|e| AppError::Internal(e.to_string()))?
        .map_err(AppError::from)
}

/// What the rings read-outs say about how rings are found and ranked.
fn ring_method(svc: &Service) -> serde_json::Value {
    let g = svc.model().artifact.graph.clone();
    json!({
        "links": "claims sharing a personal identifier (claimant, policy, address, payee account, witness, third party), or two firms (repairer, medical provider, attorney) named together",
        "window_days": g.window_days,
        "hub_caps": g.caps,
        "hub_rule": format!("a party naming more claims in the window than {} times its kind's median (at least {}) links nothing", g.hub_factor, g.hub_floor),
        "max_claims": g.max_claims,
        "score": "(distinct claimants - 1) x (1 + share reported in the last 30 days) x (1 + share referred or confirmed as fraud) x (1 + log10(1 + total amount / 10,000))",
        "caution": crate::web::CAUTION,
    })
}

async fn list_rings(
    State(st): State<AppState>,
    Query(q): Query<LimitQuery>,
) -> Result<Json<serde_json::Value>, AppError> {
    let limit = number("limit", q.limit.as_ref(), 20, 100)?;
    let svc = st.svc.clone();
    let now = chrono::Utc::now().timestamp();
    let (as_of, rings) = blocking(move || svc.rings(now, limit)).await?;
    Ok(Json(json!({
        "as_of": chrono::DateTime::from_timestamp(as_of, 0).map(|d| d.to_rfc3339()),
        "method": ring_method(&st.svc),
        "rings": rings,
    })))
}

async fn ring_by_id(st: &AppState, id: String) -> Result<crate::rings::Ring, AppError> {
    check_id("ring_id", &id)?;
    let svc = st.svc.clone();
    let now = chrono::Utc::now().timestamp();
    let key = id.clone();
    blocking(move || svc.ring(&key, now))
        .await?
        .ok_or(AppError::NotFound { what: "ring", id })
}

async fn get_ring(
    State(st): State<AppState>,
    Path(id): Path<String>,
) -> Result<Json<serde_json::Value>, AppError> {
    let ring = ring_by_id(&st, id).await?;
    Ok(Json(
        json!({ "method": ring_method(&st.svc), "ring": ring }),
    ))
}

async fn get_claim_ring(
    State(st): State<AppState>,
    Path(id): Path<String>,
) -> Result<Json<serde_json::Value>, AppError> {
    check_id("claim_id", &id)?;
    let svc = st.svc.clone();
    let now = chrono::Utc::now().timestamp();
    let key = id.clone();
    let ring = blocking(move || {
        let as_of = svc.rings_as_of(now)?;
        match svc.component_of(&key, as_of)? {
            Some(c) => Ok(Some(svc.ring_view(&c, as_of)?)),
            None => Ok(None),
        }
    })
    .await?
    .ok_or(AppError::NotFound { what: "claim", id })?;
    Ok(Json(
        json!({ "method": ring_method(&st.svc), "ring": ring }),
    ))
}

/// A ring as GraphML (an open standard read by graph tools).
async fn get_ring_graphml(
    State(st): State<AppState>,
    Path(id): Path<String>,
) -> Result<Response, AppError> {
    check_id("ring_id", &id)?;
    let svc = st.svc.clone();
    let now = chrono::Utc::now().timestamp();
    let key = id.clone();
    let body = blocking(move || {
        let Some(r) = svc.store.ring(&key)? else {
            return Ok(None);
        };
        let as_of = svc.rings_as_of(now)?;
        let Some(c) = svc.component_of(&r.seed, as_of)? else {
            return Ok(None);
        };
        let view = svc.ring_view(&c, as_of)?;
        let facts: std::collections::HashMap<&str, &crate::rings::Member> = view
            .members
            .iter()
            .map(|m| (m.claim_id.as_str(), m))
            .collect();
        Ok(Some(crate::graph::graphml(&c, &|n| {
            let m = facts.get(n.claim_id.as_str());
            crate::graph::MemberFacts {
                queue: m
                    .and_then(|m| m.queue)
                    .map(|q| q.as_str().to_string())
                    .unwrap_or_default(),
                outcome: m
                    .and_then(|m| m.outcome)
                    .map(|o| o.as_str().to_string())
                    .unwrap_or_default(),
            }
        })))
    })
    .await?
    .ok_or(AppError::NotFound { what: "ring", id })?;
    let mut r = Response::new(Body::from(body));
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/graphml+xml"),
    );
    Ok(r)
}

/// Read a JSON request body: content type, size limit, strict parse (duplicate keys refused).
async fn json_body(
    headers: &HeaderMap,
    body: Body,
    limit: usize,
) -> Result<serde_json::Value, AppError> {
    require_type(headers, "application/json")?;
    let bytes = read_body(body, limit).await?;
    crate::claim::strict_json(&bytes).map_err(|e| {
        AppError::NotJson(ClaimError::NotJson {
            line: e.line(),
            column: e.column(),
            message: e.to_string(),
        })
    })
}

fn field_error(field: &str, problem: impl Into<String>) -> AppError {
    AppError::BadRequest(vec![FieldError {
        field: field.into(),
        problem: problem.into(),
    }])
}

/// Lease the next item. With API keys the holder is the caller's key name (a body naming
/// someone else is refused); in open mode the body must name the investigator.
async fn lease(
    State(st): State<AppState>,
    Extension(who): Extension<Principal>,
    Path(name): Path<String>,
    headers: HeaderMap,
    body: Body,
) -> Result<Response, AppError> {
    let queue = queue_param(&name)?;
    let v = json_body(&headers, body, st.settings.body_limit_bytes).await?;
    let named = v.get("investigator");
    let holder = match (named, st.settings.access.is_open()) {
        (Some(serde_json::Value::String(h)), _) if check_id("investigator", h).is_ok() => {
            if !st.settings.access.is_open() && *h != who.name {
                return Err(field_error(
                    "investigator",
                    "a key leases for itself: leave this out or give the key's own name",
                ));
            }
            h.clone()
        }
        (None, false) => who.name.clone(),
        _ => {
            return Err(field_error(
                "investigator",
                "required: the id of the investigator taking the item",
            ));
        }
    };
    match st.svc.lease(queue, &holder, chrono::Utc::now()).await? {
        Some(item) => Ok(Json(item).into_response()),
        None => Ok(StatusCode::NO_CONTENT.into_response()),
    }
}

async fn release(
    State(st): State<AppState>,
    Path((name, claim_id)): Path<(String, String)>,
) -> Result<Response, AppError> {
    let queue = queue_param(&name)?;
    check_id("claim_id", &claim_id)?;
    if st.svc.release(queue, &claim_id).await? {
        Ok(Json(json!({"queue": queue, "claim_id": claim_id, "released": true})).into_response())
    } else {
        Err(AppError::NotFound {
            what: "queue item",
            id: claim_id,
        })
    }
}

async fn post_outcome(
    State(st): State<AppState>,
    Extension(who): Extension<Principal>,
    Path(claim_id): Path<String>,
    headers: HeaderMap,
    body: Body,
) -> Result<Response, AppError> {
    check_id("claim_id", &claim_id)?;
    let v = json_body(&headers, body, st.settings.body_limit_bytes).await?;
    let report = OutcomeReport::from_value(&v).map_err(AppError::BadRequest)?;
    match st
        .svc
        .record_outcome_as(&claim_id, report, chrono::Utc::now(), Some(&who.name))
        .await?
    {
        None => Err(AppError::NotFound {
            what: "claim",
            id: claim_id,
        }),
        Some((rec, created)) => {
            let status = if created {
                StatusCode::CREATED
            } else {
                StatusCode::OK
            };
            Ok((status, Json(rec)).into_response())
        }
    }
}

#[derive(Deserialize)]
struct WindowQuery {
    from: Option<String>,
    to: Option<String>,
}

fn day_param(
    field: &str,
    v: Option<&String>,
) -> Result<Option<chrono::DateTime<chrono::Utc>>, AppError> {
    v.map(|s| {
        chrono::NaiveDate::parse_from_str(s, "%Y-%m-%d")
            .ok()
            .and_then(|d| d.and_hms_opt(0, 0, 0))
            .map(|t| t.and_utc())
            .ok_or_else(|| {
                AppError::BadRequest(vec![FieldError {
                    field: field.into(),
                    problem: "expected a date as YYYY-MM-DD".into(),
                }])
            })
    })
    .transpose()
}

async fn monitor_quality(
    State(st): State<AppState>,
    Query(q): Query<WindowQuery>,
) -> Result<Response, AppError> {
    let from = day_param("from", q.from.as_ref())?;
    let to = day_param("to", q.to.as_ref())?;
    Ok(Json(st.svc.quality(from, to)?).into_response())
}

async fn monitor_drift(State(st): State<AppState>) -> Result<Response, AppError> {
    Ok(Json(st.svc.drift(chrono::Utc::now())?).into_response())
}

async fn monitor_fairness(State(st): State<AppState>) -> Result<Response, AppError> {
    let rows = st.svc.fairness()?;
    Ok(Json(json!({
        "bound": st.svc.monitor.fairness_bound,
        "convention": "a value is flagged when its referral rate is below the bound times the highest rate in its segment; 0.8 is the four-fifths rule of the US Uniform Guidelines on Employee Selection Procedures (29 CFR 1607.4(D)), imported as a convention, not a legal test for insurance",
        "segments": rows,
    }))
    .into_response())
}

/// Every claim as a training-file line (latest revision, latest outcome or `unadjudicated`).
async fn export_training(State(st): State<AppState>) -> Result<Response, AppError> {
    let store = st.svc.store.clone();
    let body = tokio::task::spawn_blocking(move || {
        let mut buf = Vec::new();
        store.export_training(&mut buf).map(|_| buf)
    })
    .await
    .map_err(|e| AppError::Internal(e.to_string()))?
    .map_err(ServiceError::from)?;
    let mut r = Response::new(Body::from(body));
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/x-ndjson"),
    );
    Ok(r)
}

#[derive(Deserialize)]
struct RoleQuery {
    role: Option<String>,
}

/// Largest model artifact accepted by the admin upload.
const MODEL_LIMIT_BYTES: usize = 64 * 1024 * 1024;

/// Load a model artifact (the request body) as champion or challenger, without a restart.
async fn admin_model(
    State(st): State<AppState>,
    Query(q): Query<RoleQuery>,
    headers: HeaderMap,
    body: Body,
) -> Result<Response, AppError> {
    let role = match q.role.as_deref() {
        Some("champion") => crate::service::ModelRole::Champion,
        Some("challenger") | None => crate::service::ModelRole::Challenger,
        Some(_) => {
            return Err(AppError::BadRequest(vec![FieldError {
                field: "role".into(),
                problem: "expected champion or challenger".into(),
            }]));
        }
    };
    require_type(&headers, "application/json")?;
    let bytes = read_body(body, MODEL_LIMIT_BYTES).await?;
    let text = std::str::from_utf8(&bytes).map_err(|_| {
        AppError::BadRequest(vec![FieldError {
            field: String::new(),
            problem: "the model artifact is not UTF-8".into(),
        }])
    })?;
    let model = crate::model::ModelArtifact::from_json(text)
        .and_then(crate::model::Model::new)
        .map_err(|e| {
            AppError::BadRequest(vec![FieldError {
                field: String::new(),
                problem: e.to_string(),
            }])
        })?;
    let version = model.version().to_string();
    st.svc.load_model(model, role, chrono::Utc::now());
    tracing::info!(%version, ?role, "model loaded");
    Ok(Json(json!({"loaded": version, "role": role})).into_response())
}

async fn admin_promote(State(st): State<AppState>) -> Result<Response, AppError> {
    if st.svc.promote() {
        let v = st.svc.model().version().to_string();
        tracing::info!(version = %v, "challenger promoted to champion");
        Ok(Json(json!({"champion": v})).into_response())
    } else {
        Err(AppError::NotFound {
            what: "challenger",
            id: String::new(),
        })
    }
}

/// Set or lift a legal hold: `{"hold": true, "reason": "..."}` or `{"hold": false}`.
async fn set_hold(
    State(st): State<AppState>,
    Extension(who): Extension<Principal>,
    Path(claim_id): Path<String>,
    headers: HeaderMap,
    body: Body,
) -> Result<Response, AppError> {
    check_id("claim_id", &claim_id)?;
    let v = json_body(&headers, body, st.settings.body_limit_bytes).await?;
    let mut errors = Vec::new();
    if let Some(obj) = v.as_object() {
        for k in obj
            .keys()
            .filter(|k| !["hold", "reason"].contains(&k.as_str()))
        {
            errors.push(FieldError {
                field: k.clone(),
                problem: "unknown field".into(),
            });
        }
    } else {
        errors.push(FieldError {
            field: String::new(),
            problem: "expected a JSON object".into(),
        });
    }
    let hold = v.get("hold").and_then(|h| h.as_bool());
    if hold.is_none() {
        errors.push(FieldError {
            field: "hold".into(),
            problem: "required: true to set a legal hold, false to lift it".into(),
        });
    }
    let reason = v
        .get("reason")
        .and_then(|r| r.as_str())
        .unwrap_or("")
        .trim();
    if hold == Some(true) && (reason.is_empty() || reason.len() > 1000) {
        errors.push(FieldError {
            field: "reason".into(),
            problem:
                "required when setting a hold: 1 to 1000 characters (a matter or case reference)"
                    .into(),
        });
    }
    if !errors.is_empty() {
        return Err(AppError::BadRequest(errors));
    }
    let record = (hold == Some(true)).then(|| crate::store::Hold {
        claim_id: claim_id.clone(),
        reason: reason.to_string(),
        set_at: chrono::Utc::now().to_rfc3339(),
        set_by: who.name.clone(),
    });
    if !st.svc.set_hold(&claim_id, record.clone()).await? {
        return Err(AppError::NotFound {
            what: "claim",
            id: claim_id,
        });
    }
    tracing::info!(claim_id = %claim_id, hold = record.is_some(), "legal hold changed");
    Ok(Json(json!({"claim_id": claim_id, "hold": record})).into_response())
}

/// Everything held about one person: claims naming the id as claimant or as any party, with
/// every revision, outcome and hold (for a subject access request).
async fn claimant_records(
    State(st): State<AppState>,
    Path(person): Path<String>,
) -> Result<Response, AppError> {
    check_id("claimant_id", &person)?;
    let store = st.svc.store.clone();
    let records = tokio::task::spawn_blocking(move || store.person_records(&person))
        .await
        .map_err(|e| AppError::Internal(e.to_string()))?
        .map_err(ServiceError::from)?;
    Ok(Json(records).into_response())
}

/// Replace the rule set (the request body is a rule file) without a restart.
async fn admin_rules(
    State(st): State<AppState>,
    headers: HeaderMap,
    body: Body,
) -> Result<Response, AppError> {
    require_type(&headers, "application/toml")?;
    let bytes = read_body(body, st.settings.body_limit_bytes).await?;
    let text =
        std::str::from_utf8(&bytes).map_err(|_| field_error("", "the rule file is not UTF-8"))?;
    let rules = crate::rules::RuleSet::from_toml(text, "request body")
        .map_err(|e| field_error("", e.to_string()))?;
    let version = rules.version.clone();
    let n = rules.rules.len();
    st.svc.load_rules(rules);
    tracing::info!(%version, rules = n, "rules loaded");
    Ok(Json(json!({"loaded": version, "rules": n})).into_response())
}

/// Run a retention purge now (the service also runs one every `retention.check_hours`).
async fn admin_purge(State(st): State<AppState>) -> Result<Response, AppError> {
    let days = st.settings.retention_days;
    if days == 0 {
        return Err(AppError::Conflict(
            "retention.days is 0 (keep everything): there is nothing to purge".into(),
        ));
    }
    let report = st.svc.purge(days, chrono::Utc::now()).await?;
    tracing::info!(
        purged = report.purged_claims,
        kept_on_hold = report.kept_on_hold,
        "retention purge"
    );
    Ok(Json(json!({"retention_days": days, "report": report})).into_response())
}

async fn monitor_compare(State(st): State<AppState>) -> Result<Response, AppError> {
    Ok(Json(st.svc.compare()?).into_response())
}

/// The self-contained HTML monitoring report.
async fn report(State(st): State<AppState>) -> Result<Response, AppError> {
    let svc = st.svc.clone();
    let capacity = st.settings.referral_capacity();
    let html = tokio::task::spawn_blocking(move || {
        svc.report_data(chrono::Utc::now(), capacity)
            .map(|d| crate::report::render(&d))
    })
    .await
    .map_err(|e| AppError::Internal(e.to_string()))??;
    let mut r = html.into_response();
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("text/html; charset=utf-8"),
    );
    Ok(r)
}

async fn healthz() -> Json<serde_json::Value> {
    Json(json!({"status": "ok"}))
}

/// Ready when every dependency answers: the store (sled or PostgreSQL) and, when this
/// instance consumes the claims stream, NATS. 503 names the one that does not.
async fn readyz(State(st): State<AppState>) -> Response {
    let store = st.svc.store.clone();
    let store_ready =
        tokio::task::spawn_blocking(move || store.ready().map(|()| store.claim_count()))
            .await
            .map_err(|e| e.to_string())
            .and_then(|r| r.map_err(|e| e.to_string()));
    let stream = st.svc.stream_health.get();
    let stream_ready = stream.is_none_or(|h| h.ready());
    let ready = store_ready.is_ok() && stream_ready;
    let body = json!({
        "status": if ready { "ready" } else { "not_ready" },
        "store": {
            "backend": st.svc.store.kind(),
            "ready": store_ready.is_ok(),
            "claims": store_ready.as_ref().ok(),
            "error": store_ready.as_ref().err(),
        },
        "stream": stream.map(|h| json!({"ready": h.ready(), "connection": h.state()})),
        "model": st.svc.model().version(),
        "challenger": st.svc.challenger().map(|(m, _)| m.version().to_string()),
        "rules": st.svc.rules().version,
    });
    let code = if ready {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (code, Json(body)).into_response()
}

async fn metrics(State(st): State<AppState>) -> Response {
    // Queue depths are read at scrape time: a shared store answers them with a query each,
    // which has no place on every decision's path.
    if st.svc.store.remote() {
        let svc = st.svc.clone();
        let _ = tokio::task::spawn_blocking(move || svc.refresh_depths()).await;
    } else {
        st.svc.refresh_depths();
    }
    let mut r = st.svc.metrics.render().into_response();
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("text/plain; version=0.0.4"),
    );
    r
}

pub const OPENAPI: &str = include_str!("openapi.json");

async fn openapi() -> Response {
    let mut r = OPENAPI.into_response();
    r.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/json"),
    );
    r
}

async fn not_found() -> AppError {
    AppError::NotFound {
        what: "route",
        id: String::new(),
    }
}

async fn method_not_allowed() -> AppError {
    AppError::Method
}

/// Access control for every API route: authenticate the key, check the route's roles, and
/// hand the [`Principal`] to the handler. Runs after routing, so it knows the route pattern.
async fn authorise(
    State(st): State<AppState>,
    matched: Option<MatchedPath>,
    mut req: Request,
    next: Next,
) -> Response {
    let path = matched.as_ref().map_or("", |m| m.as_str());
    let needed = required_roles(req.method().as_str(), path);
    let header_value = req
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok());
    let refused = |reason: &str| {
        st.svc
            .metrics
            .auth_refused
            .with_label_values(&[reason])
            .inc();
    };
    let principal = match st.settings.access.authenticate(header_value) {
        Ok(p) => p,
        Err(e) => {
            refused(match e {
                AuthError::Missing => "missing_key",
                AuthError::Unknown => "unknown_key",
            });
            return AppError::Unauthenticated(e).into_response();
        }
    };
    tracing::Span::current().record("caller", principal.name.as_str());
    if !principal.has_any(needed) {
        refused("role");
        let list = |rs: &[Role]| rs.iter().map(|r| r.as_str()).collect::<Vec<_>>().join(", ");
        return AppError::Forbidden {
            name: principal.name.clone(),
            needed: list(needed),
            has: list(&principal.roles),
        }
        .into_response();
    }
    req.extensions_mut().insert(principal);
    next.run(req).await
}

static REQUEST_SEQ: AtomicU64 = AtomicU64::new(0);

/// Request id: the caller's `x-request-id` when it is a sane token, else a new one; put on the
/// response and on every log line of the request.
async fn request_id(State(st): State<AppState>, mut req: Request, next: Next) -> Response {
    let given = req
        .headers()
        .get("x-request-id")
        .and_then(|v| v.to_str().ok())
        .filter(|s| !s.is_empty() && s.len() <= 64 && s.bytes().all(|b| b.is_ascii_graphic()))
        .map(String::from);
    let id = given.unwrap_or_else(|| {
        format!(
            "{:x}-{:x}",
            std::process::id(),
            REQUEST_SEQ.fetch_add(1, Ordering::Relaxed)
        )
    });
    if let Ok(v) = HeaderValue::from_str(&id) {
        req.headers_mut().insert("x-request-id", v);
    }
    let method = req.method().clone();
    // Paths carry ids (claim, queue) but never claim content.
    let path: String = req.uri().path().chars().take(200).collect();
    let span = tracing::info_span!(
        "request",
        request_id = %id,
        %method,
        %path,
        caller = tracing::field::Empty
    );
    let t0 = std::time::Instant::now();
    let mut resp = {
        use tracing::Instrument;
        next.run(req).instrument(span.clone()).await
    };
    let status = resp.status();
    st.svc
        .metrics
        .http_requests
        .with_label_values(&[match status.as_u16() {
            200..=299 => "2xx",
            400..=499 => "4xx",
            500..=599 => "5xx",
            _ => "other",
        }])
        .inc();
    span.in_scope(|| {
        tracing::info!(
            status = status.as_u16(),
            millis = t0.elapsed().as_secs_f64() * 1000.0,
            "response"
        )
    });
    if let Ok(v) = HeaderValue::from_str(&id) {
        resp.headers_mut().insert("x-request-id", v);
    }
    resp
}

/// The application: every route, its error mapping and its middleware.
pub fn app(svc: Service, settings: HttpSettings) -> Router {
    use axum::error_handling::HandleErrorLayer;
    use tower::ServiceBuilder;
    use tower::limit::GlobalConcurrencyLimitLayer;
    let limit = GlobalConcurrencyLimitLayer::new(settings.concurrency_limit);
    let timeout = settings.request_timeout;
    let state = AppState {
        svc,
        settings: Arc::new(settings),
        sessions: Arc::default(),
    };
    // Operations routes stay answerable under any load.
    let ops = Router::new()
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/metrics", get(metrics))
        .route("/v1/openapi.json", get(openapi));
    let api = Router::new()
        .route("/v1/claims", post(post_claim))
        .route("/v1/claims/{claim_id}", get(get_claim))
        .route("/v1/claims/{claim_id}/outcome", post(post_outcome))
        .route("/v1/queues", get(list_queues))
        .route("/v1/rings", get(list_rings))
        .route("/v1/rings/{ring_id}", get(get_ring))
        .route("/v1/rings/{ring_id}/graphml", get(get_ring_graphml))
        .route("/v1/claims/{claim_id}/ring", get(get_claim_ring))
        .route("/v1/monitor/quality", get(monitor_quality))
        .route("/v1/monitor/drift", get(monitor_drift))
        .route("/v1/monitor/fairness", get(monitor_fairness))
        .route("/v1/export/training", get(export_training))
        .route("/v1/monitor/compare", get(monitor_compare))
        .route("/v1/report", get(report))
        .route("/v1/admin/model", post(admin_model))
        .route("/v1/admin/model/promote", post(admin_promote))
        .route("/v1/queues/{queue}", get(list_queue))
        .route("/v1/queues/{queue}/lease", post(lease))
        .route("/v1/queues/{queue}/items/{claim_id}/release", post(release))
        .route("/v1/claims/{claim_id}/hold", post(set_hold))
        .route("/v1/claimants/{claimant_id}/records", get(claimant_records))
        .route("/v1/admin/rules", post(admin_rules))
        .route("/v1/admin/purge", post(admin_purge))
        .route_layer(middleware::from_fn_with_state(state.clone(), authorise))
        .layer(
            ServiceBuilder::new()
                .layer(HandleErrorLayer::new(overload))
                .load_shed()
                .layer(limit.clone())
                .timeout(timeout),
        );
    // A batch is long by design (bounded by its size limits), so it has no timeout, but it
    // takes a place under the same concurrency limit.
    let batch = Router::new()
        .route("/v1/claims/batch", post(post_batch))
        .route_layer(middleware::from_fn_with_state(state.clone(), authorise))
        .layer(
            ServiceBuilder::new()
                .layer(HandleErrorLayer::new(overload))
                .load_shed()
                .layer(limit),
        );
    Router::new()
        .merge(ops)
        .merge(api)
        .merge(batch)
        .merge(crate::web::routes())
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .layer(middleware::from_fn_with_state(state.clone(), request_id))
        .with_state(state)
}
