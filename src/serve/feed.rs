//! A minimal extract server: `GET /<name>` returns the current body with an ETag (its
//! SHA-256) and Last-Modified, and answers 304 to a matching If-None-Match. The demo uses it
//! to play the lab network's export endpoint on loopback; tests use it as a well-behaved
//! server.

use std::sync::{Arc, Mutex};

use axum::Router;
use axum::body::Body;
use axum::extract::State;
use axum::http::{HeaderMap, StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use chrono::{DateTime, Utc};
use sha2::{Digest, Sha256};

/// The body currently offered.
#[derive(Debug, Clone)]
pub struct FeedBody {
    pub bytes: Arc<Vec<u8>>,
    pub etag: String,
    pub last_modified: String,
}

/// Shared, swappable state of the feed.
#[derive(Debug, Default)]
pub struct Feed {
    current: Mutex<Option<FeedBody>>,
}

impl Feed {
    /// Offers `bytes`, last modified at `modified`, from now on.
    pub fn set(&self, bytes: Vec<u8>, modified: DateTime<Utc>) {
        let digest = Sha256::digest(&bytes);
        let etag = format!("\"{}\"", digest.iter().take(16).map(|b| format!("{b:02x}")).collect::<String>());
        let last_modified = modified.format("%a, %d %b %Y %H:%M:%S GMT").to_string();
        let body = FeedBody { bytes: Arc::new(bytes), etag, last_modified };
        *self.current.lock().unwrap_or_else(|p| p.into_inner()) = Some(body);
    }

    fn get(&self) -> Option<FeedBody> {
        self.current.lock().unwrap_or_else(|p| p.into_inner()).clone()
    }
}

/// Serves the feed at every path.
pub fn router(feed: Arc<Feed>) -> Router {
    Router::new().fallback(get(serve_feed)).with_state(feed)
}

async fn serve_feed(State(feed): State<Arc<Feed>>, headers: HeaderMap) -> Response {
    let Some(body) = feed.get() else {
        return (StatusCode::SERVICE_UNAVAILABLE, "no extract yet").into_response();
    };
    let matches =
        headers.get(header::IF_NONE_MATCH).and_then(|v| v.to_str().ok()) == Some(body.etag.as_str());
    if matches {
        return (StatusCode::NOT_MODIFIED, [(header::ETAG, body.etag)]).into_response();
    }
    let bytes = Body::from(body.bytes.as_ref().clone());
    (
        StatusCode::OK,
        [
            (header::ETAG, body.etag),
            (header::LAST_MODIFIED, body.last_modified),
            (header::CONTENT_TYPE, "application/x-ndjson".to_string()),
        ],
        bytes,
    )
        .into_response()
}
