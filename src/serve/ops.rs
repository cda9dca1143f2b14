//! The operators' endpoints: `/healthz` (200 when the scheduler runs and the store opens and
//! answers, 503 otherwise) and `/metrics` (Prometheus text). Bound to localhost by default.

use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use axum::Router;
use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::IntoResponse;
use axum::routing::get;

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

async fn healthz(State(state): State<OpsState>) -> impl IntoResponse {
    if !state.scheduler_running.load(Ordering::SeqCst) {
        return (StatusCode::SERVICE_UNAVAILABLE, "scheduler not running\n");
    }
    let store = state.store.clone();
    let answers = tokio::task::spawn_blocking(move || Reader::open(&store).and_then(|r| r.ping())).await;
    match answers {
        Ok(Ok(())) => (StatusCode::OK, "ok\n"),
        Ok(Err(err)) => {
            tracing::warn!(error = %err, "healthz: store does not answer");
            (StatusCode::SERVICE_UNAVAILABLE, "store unavailable\n")
        }
        Err(_) => (StatusCode::SERVICE_UNAVAILABLE, "store check failed\n"),
    }
}

async fn metrics(State(state): State<OpsState>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4")], state.metrics.render(Instant::now()))
}
