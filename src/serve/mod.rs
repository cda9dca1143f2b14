//! HTTP edges. `api` is the analysts' API under `/api/v1` (token-protected; `routes` lists
//! its routes and writes its OpenAPI document, `auth` checks tokens, `pool` keeps read-only
//! connections); `dashboard` draws the
//! read-only pages with SVG charts; `ops` answers `/healthz` and `/metrics` for operators; `feed` is a tiny
//! extract server that the demo (and tests) use to stand in for a lab's export endpoint;
//! `listen` is the HTTP listener under all of them (header-read timeout, connection limit).
//! Everything here only reads the store; nothing writes. Every error answer is JSON
//! (`{"error": "..."}`), unknown paths and methods included.

pub mod api;
pub mod auth;
pub mod dashboard;
pub mod feed;
pub mod listen;
pub mod ops;
pub mod pool;
pub mod routes;

use axum::http::StatusCode;
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

pub use self::listen::HttpLimits;

/// Everything served on `serve.bind`: the API under `/api/v1`, the dashboard pages at `/`
/// and `/sources/{name}`, and the ops endpoints.
pub fn app_router(
    api: api::ApiState,
    ops: ops::OpsState,
    dashboard: dashboard::DashboardState,
) -> axum::Router {
    axum::Router::new()
        .nest(api::API_BASE, api::router(api))
        .merge(dashboard::router(dashboard))
        .merge(ops::router(ops))
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
}

/// Any path nothing answers, as the API's JSON error.
async fn not_found() -> api::ApiError {
    let message = format!("no such path; the API is under {} (see {0}/openapi.json)", api::API_BASE);
    api::ApiError::new(StatusCode::NOT_FOUND, message)
}

/// A path that is answered, but not for this method, as the API's JSON error.
async fn method_not_allowed() -> api::ApiError {
    api::ApiError::new(StatusCode::METHOD_NOT_ALLOWED, api::WRONG_METHOD)
}

/// Serves `router` on `listener` within the default `HttpLimits` until `shutdown` fires,
/// then lets requests in flight end.
pub async fn serve(
    listener: TcpListener,
    router: axum::Router,
    shutdown: CancellationToken,
) -> std::io::Result<()> {
    serve_with(listener, router, shutdown, HttpLimits::default()).await
}

/// `serve` within the given limits.
pub async fn serve_with(
    listener: TcpListener,
    router: axum::Router,
    shutdown: CancellationToken,
    limits: HttpLimits,
) -> std::io::Result<()> {
    listen::run(listener, router, shutdown, limits).await
}
