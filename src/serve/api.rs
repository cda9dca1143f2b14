//! The analysts' HTTP API under `/api/v1`: listings (sources, snapshots, curve, nowcast,
//! delays, quality, alerts), read-only SQL, and its OpenAPI document. JSON (arrays of
//! objects with snake_case keys, as the CLI's `--format json`) or CSV. Every request but the
//! document needs a bearer token; every read runs on a read-only connection on a blocking
//! thread, never on the async executor. Nothing here writes to the store. At most
//! `serve.query_concurrency` analysts' queries run at once (one more waits briefly, then
//! gets 503), and every error answer, the body limit's and the timeout's included, is
//! `{"error": "..."}`; a query parameter given twice is refused.
//!
//! The listings themselves come through the `Listings` trait, which `app` implements with the
//! CLI's own functions, so the API and the CLI always give the same answer.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use axum::Router;
use axum::body::Bytes;
use axum::extract::rejection::QueryRejection;
use axum::extract::{Query, State};
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use tokio::sync::{OwnedSemaphorePermit, Semaphore};
use tower_http::limit::RequestBodyLimitLayer;
use tower_http::timeout::TimeoutLayer;

use super::auth::{self, Denied};
use super::pool::ReaderPool;
pub use super::routes::{API_BASE, Endpoint, Handler, Method, ROUTES, Route};
use crate::config::ServeLimits;
use crate::store::{Reader, TokenScope};
use crate::table::Table;

/// Largest request body: a SQL statement is a few KiB; nothing else takes a body.
pub const MAX_BODY_BYTES: usize = 64 * 1024;

/// The error message of a 405.
pub(crate) const WRONG_METHOD: &str = "this path does not take that method";

/// How long an analysts' query waits for a free slot (`serve.query_concurrency`) before it
/// is answered 503: long enough for a burst of short queries to pass in turn, short enough
/// that the client of a busy server hears so at once.
pub const QUERY_SLOT_WAIT: Duration = Duration::from_secs(1);

/// The `Retry-After` of a 503 for want of a query slot, in seconds.
const RETRY_AFTER_SECS: u64 = 1;

/// Answers the API's listings. `app` implements it with the CLI's functions.
pub trait Listings: Send + Sync + std::fmt::Debug + 'static {
    fn listing(&self, reader: &Reader, endpoint: Endpoint, params: &Params) -> Result<Table, ListingError>;
}

/// Why a listing could not be answered; the message goes to the client, so it names
/// parameters and sources only, never a cell value.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum ListingError {
    #[error("{0}")]
    BadRequest(String),
    #[error("{0}")]
    NotFound(String),
    #[error("{0}")]
    Unavailable(String),
    #[error("internal error; see the server log")]
    Internal,
}

/// A request's query parameters (without `format`).
#[derive(Debug, Clone, Default)]
pub struct Params(BTreeMap<String, String>);

impl Params {
    pub fn new(values: BTreeMap<String, String>) -> Params {
        Params(values)
    }

    pub fn get(&self, name: &str) -> Option<&str> {
        self.0.get(name).map(String::as_str).filter(|v| !v.is_empty())
    }

    pub fn required(&self, name: &str) -> Result<&str, ListingError> {
        self.get(name).ok_or_else(|| ListingError::BadRequest(format!("missing query parameter {name}")))
    }

    /// A parameter from one of the closed vocabularies (`model::vocabulary`): absent is
    /// `None`; an unknown value is a 400 listing the accepted ones.
    pub fn vocabulary<T>(&self, name: &str) -> Result<Option<T>, ListingError>
    where
        T: std::str::FromStr<Err = crate::model::UnknownName>,
    {
        self.get(name)
            .map(|text| text.parse::<T>().map_err(|e| ListingError::BadRequest(format!("{name}: {e}"))))
            .transpose()
    }

    /// A yes/no parameter: absent is false.
    pub fn flag(&self, name: &str) -> Result<bool, ListingError> {
        match self.get(name) {
            None | Some("false") | Some("0") => Ok(false),
            Some("true") | Some("1") => Ok(true),
            Some(_) => Err(ListingError::BadRequest(format!("{name}: use true or false"))),
        }
    }
}

/// What the API needs.
#[derive(Debug, Clone)]
pub struct ApiState {
    pub listings: Arc<dyn Listings>,
    pub pool: Arc<ReaderPool>,
    pub limits: ServeLimits,
    /// One permit per analysts' query that may run at once.
    pub query_slots: Arc<Semaphore>,
}

impl ApiState {
    pub fn new(store: PathBuf, listings: Arc<dyn Listings>, limits: ServeLimits) -> ApiState {
        let query_slots = Arc::new(Semaphore::new(limits.query_concurrency.max(1)));
        ApiState { listings, pool: Arc::new(ReaderPool::new(store)), limits, query_slots }
    }
}

/// The API's routes (paths relative to `/api/v1`), with the request timeout and body limit.
pub fn router(state: ApiState) -> Router {
    let mut router = Router::new();
    for route in ROUTES {
        let handler = route.handler;
        let needed = route.scope;
        router = match (route.method, handler) {
            (Method::Get, Handler::Listing(endpoint)) => router.route(
                route.path,
                get(move |State(s): State<ApiState>, q: QueryPairs, h: HeaderMap| {
                    listing(s, endpoint, needed, q, h)
                }),
            ),
            (Method::Get, Handler::OpenApi) => router.route(route.path, get(openapi)),
            (Method::Post, Handler::Query) => router.route(
                route.path,
                post(move |State(s): State<ApiState>, q: QueryPairs, h: HeaderMap, body: Bytes| {
                    query(s, needed, q, h, body)
                }),
            ),
            _ => router,
        };
    }
    // SQLite's process-wide memory cap holds from the start, not from the first query.
    crate::store::sql::limit_sqlite_heap(state.limits.query.sqlite_heap_bytes);
    let timeout = state.limits.request_timeout;
    router
        .layer(RequestBodyLimitLayer::new(MAX_BODY_BYTES))
        .layer(TimeoutLayer::with_status_code(StatusCode::REQUEST_TIMEOUT, timeout))
        .layer(axum::middleware::map_response(move |response| json_errors(response, timeout)))
        .with_state(state)
}

/// A request's query string as name-value pairs, repeated names kept.
type QueryPairs = Result<Query<Vec<(String, String)>>, QueryRejection>;

/// The query parameters by name; a name given twice is refused rather than one value
/// silently winning.
fn unique_params(pairs: QueryPairs) -> Result<BTreeMap<String, String>, ApiError> {
    let Query(pairs) = pairs.map_err(|err| ApiError::new(StatusCode::BAD_REQUEST, err.body_text()))?;
    let mut params = BTreeMap::new();
    for (name, value) in pairs {
        if params.contains_key(&name) {
            return Err(ApiError::new(
                StatusCode::BAD_REQUEST,
                format!("query parameter {name:?} is given more than once; give it once"),
            ));
        }
        params.insert(name, value);
    }
    Ok(params)
}

/// Error answers made outside the handlers (the body limit's 413, the timeout's 408, a
/// method the route does not take) in the same JSON shape as the handlers' own.
async fn json_errors(response: Response, timeout: Duration) -> Response {
    let status = response.status();
    let is_json = response
        .headers()
        .get(header::CONTENT_TYPE)
        .is_some_and(|v| v.as_bytes().starts_with(b"application/json"));
    if is_json || !(status.is_client_error() || status.is_server_error()) {
        return response;
    }
    let message = match status {
        StatusCode::PAYLOAD_TOO_LARGE => {
            format!("the request body is larger than the limit of {MAX_BODY_BYTES} bytes")
        }
        StatusCode::REQUEST_TIMEOUT => format!(
            "the request took longer than the limit of {} s (serve.request_timeout)",
            timeout.as_secs_f64()
        ),
        StatusCode::METHOD_NOT_ALLOWED => WRONG_METHOD.to_string(),
        other => other.canonical_reason().unwrap_or("error").to_ascii_lowercase(),
    };
    // Keep the headers that say more (`Allow` on a 405); the body and its type are new.
    let (mut parts, _body) = response.into_parts();
    parts.headers.remove(header::CONTENT_TYPE);
    parts.headers.remove(header::CONTENT_LENGTH);
    let json = ApiError::new(status, message).into_response();
    parts.headers.extend(json.headers().clone());
    Response::from_parts(parts, json.into_body())
}

/// An error answer: a status and a short message, as `{"error": "..."}`.
#[derive(Debug)]
pub struct ApiError {
    status: StatusCode,
    message: String,
    /// Seconds for a `Retry-After` header (503 for want of a query slot).
    retry_after: Option<u64>,
}

impl ApiError {
    pub(crate) fn new(status: StatusCode, message: impl Into<String>) -> ApiError {
        ApiError { status, message: message.into(), retry_after: None }
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body = serde_json::json!({ "error": self.message }).to_string();
        let mut response = (self.status, [(header::CONTENT_TYPE, "application/json")], body).into_response();
        if self.status == StatusCode::UNAUTHORIZED {
            response
                .headers_mut()
                .insert(header::WWW_AUTHENTICATE, header::HeaderValue::from_static("Bearer"));
        }
        if let Some(secs) = self.retry_after {
            response.headers_mut().insert(header::RETRY_AFTER, header::HeaderValue::from(secs));
        }
        response
    }
}

impl From<ListingError> for ApiError {
    fn from(err: ListingError) -> ApiError {
        let status = match &err {
            ListingError::BadRequest(_) => StatusCode::BAD_REQUEST,
            ListingError::NotFound(_) => StatusCode::NOT_FOUND,
            ListingError::Unavailable(_) => StatusCode::SERVICE_UNAVAILABLE,
            ListingError::Internal => StatusCode::INTERNAL_SERVER_ERROR,
        };
        ApiError::new(status, err.to_string())
    }
}

/// JSON or CSV, from `?format=` or the Accept header; `CsvRaw` with `?raw=true`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Format {
    Json,
    /// Text cells that start like a spreadsheet formula get an apostrophe.
    Csv,
    /// Every cell exactly as stored.
    CsvRaw,
}

fn format_of(params: &mut BTreeMap<String, String>, headers: &HeaderMap) -> Result<Format, ApiError> {
    let raw = raw_of(params)?;
    let format = named_format(params, headers)?;
    Ok(if raw && format == Format::Csv { Format::CsvRaw } else { format })
}

/// `?raw=true`: CSV cells exactly as stored (JSON is always exact). Absent is false.
fn raw_of(params: &mut BTreeMap<String, String>) -> Result<bool, ApiError> {
    match params.remove("raw").as_deref() {
        None | Some("") | Some("false") | Some("0") => Ok(false),
        Some("true") | Some("1") => Ok(true),
        Some(_) => Err(ApiError::new(StatusCode::BAD_REQUEST, "raw: use true or false")),
    }
}

fn named_format(params: &mut BTreeMap<String, String>, headers: &HeaderMap) -> Result<Format, ApiError> {
    match params.remove("format").as_deref() {
        Some("json") => Ok(Format::Json),
        Some("csv") => Ok(Format::Csv),
        Some(other) => {
            Err(ApiError::new(StatusCode::BAD_REQUEST, format!("format={other}: use json or csv")))
        }
        None => {
            let accept = headers.get(header::ACCEPT).and_then(|v| v.to_str().ok()).unwrap_or("");
            Ok(if accept.contains("text/csv") { Format::Csv } else { Format::Json })
        }
    }
}

fn rows_response(table: &Table, format: Format) -> Response {
    match format {
        Format::Json => ([(header::CONTENT_TYPE, "application/json")], table.to_json()).into_response(),
        Format::Csv => ([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], table.to_csv()).into_response(),
        Format::CsvRaw => {
            ([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], table.to_csv_raw()).into_response()
        }
    }
}

/// Refuses parameters the route does not take, so a typo is an error rather than ignored.
fn check_params(route_params: &[&str], params: &BTreeMap<String, String>) -> Result<(), ApiError> {
    match params.keys().find(|k| !route_params.contains(&k.as_str())) {
        None => Ok(()),
        Some(unknown) => Err(ApiError::new(
            StatusCode::BAD_REQUEST,
            format!("unknown query parameter {unknown:?}; this endpoint takes {}", route_params.join(", ")),
        )),
    }
}

fn params_of(endpoint: Endpoint) -> Vec<&'static str> {
    ROUTES
        .iter()
        .find(|r| r.handler == Handler::Listing(endpoint))
        .map(|r| r.params.iter().map(|p| p.name).collect())
        .unwrap_or_default()
}

/// Runs `f` with a pooled read-only connection on a blocking thread, after checking the
/// request's token for `needed`.
async fn with_reader<T: Send + 'static>(
    state: &ApiState,
    headers: &HeaderMap,
    needed: Option<TokenScope>,
    f: impl FnOnce(&Reader) -> Result<T, ApiError> + Send + 'static,
) -> Result<T, ApiError> {
    let token = match needed {
        Some(scope) => {
            let value = headers.get(header::AUTHORIZATION).and_then(|v| v.to_str().ok());
            Some((auth::bearer(value).map_err(denied)?.to_string(), scope))
        }
        None => None,
    };
    let pool = state.pool.clone();
    let answer = tokio::task::spawn_blocking(move || {
        pool.with(|reader| {
            if let Some((token, scope)) = &token {
                match auth::check(reader, token, *scope) {
                    Ok(Ok(_name)) => {}
                    Ok(Err(why)) => return Err(denied(why)),
                    Err(err) => return Err(store_failed(&err)),
                }
            }
            f(reader)
        })
    })
    .await;
    match answer {
        Ok(Ok(result)) => result,
        Ok(Err(err)) => Err(store_failed(&err)),
        Err(_) => Err(ApiError::new(StatusCode::INTERNAL_SERVER_ERROR, "internal error; see the server log")),
    }
}

fn denied(why: Denied) -> ApiError {
    match why {
        Denied::Unauthenticated(message) => ApiError::new(StatusCode::UNAUTHORIZED, message),
        Denied::Forbidden { token, needed } => {
            tracing::info!(token = %token, needed = needed.name(), "API request without the scope");
            ApiError::new(StatusCode::FORBIDDEN, format!("this token lacks the {} scope", needed.name()))
        }
    }
}

fn store_failed(err: &crate::store::StoreError) -> ApiError {
    tracing::warn!(error = %err, "API: store unavailable");
    ApiError::new(StatusCode::SERVICE_UNAVAILABLE, "store unavailable")
}

async fn listing(
    state: ApiState,
    endpoint: Endpoint,
    needed: Option<TokenScope>,
    pairs: QueryPairs,
    headers: HeaderMap,
) -> Result<Response, ApiError> {
    let mut query = unique_params(pairs)?;
    let format = format_of(&mut query, &headers)?;
    check_params(&params_of(endpoint), &query)?;
    let params = Params::new(query);
    let listings = state.listings.clone();
    let table = with_reader(&state, &headers, needed, move |reader| {
        listings.listing(reader, endpoint, &params).map_err(ApiError::from)
    })
    .await?;
    Ok(rows_response(&table, format))
}

/// The body of `POST /api/v1/query`.
#[derive(Debug, serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct QueryBody {
    sql: String,
}

async fn query(
    state: ApiState,
    needed: Option<TokenScope>,
    pairs: QueryPairs,
    headers: HeaderMap,
    body: Bytes,
) -> Result<Response, ApiError> {
    let mut params = unique_params(pairs)?;
    let format = format_of(&mut params, &headers)?;
    check_params(&["format"], &params)?;
    // The token is checked before the body is even parsed.
    with_reader(&state, &headers, needed, |_| Ok(())).await?;
    let body: QueryBody = serde_json::from_slice(&body).map_err(|err| {
        ApiError::new(StatusCode::BAD_REQUEST, format!("the body must be JSON {{\"sql\": \"...\"}}: {err}"))
    })?;
    let slot = query_slot(&state).await?;
    let (path, limits) = (state.pool.path().to_path_buf(), state.limits.query);
    let answer = tokio::task::spawn_blocking(move || {
        // Held until the query ends, even if the request has timed out meanwhile.
        let _slot = slot;
        crate::store::run_sql(&path, &body.sql, &limits)
    })
    .await;
    match answer {
        Ok(Ok(table)) => Ok(rows_response(&table, format)),
        Ok(Err(crate::store::StoreError::Refused(message))) => {
            Err(ApiError::new(StatusCode::BAD_REQUEST, message))
        }
        Ok(Err(err)) => Err(store_failed(&err)),
        Err(_) => Err(ApiError::new(StatusCode::INTERNAL_SERVER_ERROR, "internal error; see the server log")),
    }
}

/// A permit to run one analysts' query, waiting at most `QUERY_SLOT_WAIT` for one.
async fn query_slot(state: &ApiState) -> Result<OwnedSemaphorePermit, ApiError> {
    let slots = state.query_slots.clone();
    match tokio::time::timeout(QUERY_SLOT_WAIT, slots.acquire_owned()).await {
        Ok(Ok(permit)) => Ok(permit),
        // The semaphore is never closed; treat it like a full one all the same.
        Ok(Err(_)) | Err(_) => {
            let message = format!(
                "too many SQL queries are running (the limit is {} at once); try again shortly",
                state.limits.query_concurrency
            );
            let mut err = ApiError::new(StatusCode::SERVICE_UNAVAILABLE, message);
            err.retry_after = Some(RETRY_AFTER_SECS);
            Err(err)
        }
    }
}

async fn openapi() -> Response {
    ([(header::CONTENT_TYPE, "application/json")], super::routes::openapi().to_string()).into_response()
}
