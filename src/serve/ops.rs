//! The operators' endpoints: `/healthz` (200 `ok` when the scheduler runs and the store opens
//! and answers, 503 with a JSON error saying which not) and `/metrics` (Prometheus text).
//! Bound to localhost by default.

use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use axum::Router;
use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::get;

use super::api::ApiError;
use crate::metrics::Metrics;
use crate::store::Reader;

/// What the ops endpoints look at.
#[derive(Debug, Clone)]
pub struct OpsState {
    pub metrics: Arc<Metrics>,
    pub scheduler_running: Arc<AtomicBool>,
    pub store: PathBuf,
}

pub fn router(state: OpsState) -> Router {
    Router::new().route("/healthz", get(healthz)).route("/metrics", get(metrics)).with_state(state)
}

async fn healthz(State(state): State<OpsState>) -> Response {
    let unhealthy = |why: &str| ApiError::new(StatusCode::SERVICE_UNAVAILABLE, why).into_response();
    if !state.scheduler_running.load(Ordering::SeqCst) {
        return unhealthy("scheduler not running");
    }
    let store = state.store.clone();
    let answers = tokio::task::spawn_blocking(move || Reader::open(&store).and_then(|r| r.ping())).await;
    match answers {
        Ok(Ok(())) => (StatusCode::OK, "ok\n").into_response(),
        Ok(Err(err)) => {
            tracing::warn!(error = %err, "healthz: store does not answer");
            unhealthy("store unavailable")
        }
        Err(_) => unhealthy("store check failed"),
    }
}

async fn metrics(State(state): State<OpsState>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4")], state.metrics.render(Instant::now()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use axum::body::Body;
    use axum::http::Request;
    use tower::ServiceExt;

    async fn status(state: OpsState, path: &str) -> (StatusCode, String) {
        let response = router(state).oneshot(Request::get(path).body(Body::empty()).unwrap()).await.unwrap();
        let status = response.status();
        let bytes = axum::body::to_bytes(response.into_body(), 1 << 20).await.unwrap();
        (status, String::from_utf8_lossy(&bytes).into_owned())
    }

    fn state(running: bool, store: PathBuf) -> OpsState {
        OpsState { metrics: Arc::default(), scheduler_running: Arc::new(AtomicBool::new(running)), store }
    }

    #[tokio::test]
    async fn healthz_needs_the_scheduler_and_the_store() {
        let dir = tempfile::tempdir().unwrap();
        let store = dir.path().join("t.db");
        assert_eq!(status(state(true, store.clone()), "/healthz").await.0, StatusCode::OK);
        let (code, body) = status(state(false, store), "/healthz").await;
        assert_eq!(
            (code, body.as_str()),
            (StatusCode::SERVICE_UNAVAILABLE, r#"{"error":"scheduler not running"}"#)
        );
        let unreachable = PathBuf::from("/proc/tidemark-no-such-dir/t.db");
        assert_eq!(status(state(true, unreachable), "/healthz").await.0, StatusCode::SERVICE_UNAVAILABLE);
    }

    #[tokio::test]
    async fn metrics_are_prometheus_text() {
        let dir = tempfile::tempdir().unwrap();
        let ops = state(true, dir.path().join("t.db"));
        ops.metrics.poll_finished("county", std::time::Duration::from_millis(5), false);
        let (code, body) = status(ops, "/metrics").await;
        assert_eq!(code, StatusCode::OK);
        assert!(body.contains("tidemark_poll_failures_total{source=\"county\"} 1"), "{body}");
    }
}
