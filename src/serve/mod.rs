//! HTTP edges. `api` is the analysts' API under `/api/v1` (token-protected; `routes` lists
//! its routes and writes its OpenAPI document, `auth` checks tokens, `pool` keeps read-only
//! connections); `dashboard` draws the
//! read-only pages with SVG charts; `ops` answers `/healthz` and `/metrics` for operators; `feed` is a tiny
//! extract server that the demo (and tests) use to stand in for a lab's export endpoint.
//! Everything here only reads the store; nothing writes.

pub mod api;
pub mod auth;
pub mod dashboard;
pub mod feed;
pub mod ops;
pub mod pool;
pub mod routes;

use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

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
}

/// Serves `router` on `listener` until `shutdown` fires, then lets requests in flight end.
pub async fn serve(
    listener: TcpListener,
    router: axum::Router,
    shutdown: CancellationToken,
) -> std::io::Result<()> {
    axum::serve(listener, router).with_graceful_shutdown(async move { shutdown.cancelled().await }).await
}
