//! HTTP edges. `ops` answers `/healthz` and `/metrics` for operators; `feed` is a tiny
//! extract server that the demo (and tests) use to stand in for a lab's export endpoint.
//! Everything here only reads the store; nothing writes.

pub mod dashboard;
pub mod feed;
pub mod ops;

use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

/// Serves `router` on `listener` until `shutdown` fires, then lets requests in flight end.
pub async fn serve(
    listener: TcpListener,
    router: axum::Router,
    shutdown: CancellationToken,
) -> std::io::Result<()> {
    axum::serve(listener, router).with_graceful_shutdown(async move { shutdown.cancelled().await }).await
}
