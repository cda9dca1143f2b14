//! URL sources: one GET per poll with conditional validators (ETag / If-None-Match and
//! Last-Modified / If-Modified-Since; 304 means nothing new), connect and total timeouts, a
//! body size limit, a redirect limit, gzip, an auth header whose value comes from an
//! environment variable, and retries with capped exponential backoff and jitter. A body that
//! ends early, fails its Content-Length or exceeds the limit is discarded, never returned.

use std::time::Duration;

use chrono::{DateTime, Utc};
use rand::RngExt;
use reqwest::header::{CONTENT_LENGTH, ETAG, HeaderMap, HeaderName, HeaderValue, LAST_MODIFIED};
use reqwest::{Client, StatusCode, redirect};
use tokio_util::sync::CancellationToken;

use crate::config::UrlSettings;

/// Validators remembered from the last 200 response.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Validators {
    pub etag: Option<String>,
    pub last_modified: Option<String>,
}

/// What one fetch brought.
#[derive(Debug)]
pub enum Fetched {
    /// 304: the server has nothing newer than the validators we sent.
    NotModified,
    Body {
        bytes: Vec<u8>,
        validators: Validators,
        /// Response headers, for an `as_of = "header:NAME"` rule.
        headers: HeaderMap,
        /// Attempts it took (1 = first try).
        attempts: u32,
    },
}

#[derive(Debug, thiserror::Error)]
pub enum FetchError {
    #[error("HTTP {0}")]
    Status(u16),
    #[error("body larger than the limit of {limit} bytes")]
    TooLarge { limit: u64 },
    #[error("body ended after {got} of {expected} bytes")]
    Truncated { expected: u64, got: u64 },
    #[error("timed out")]
    Timeout,
    #[error("too many redirects")]
    Redirects,
    #[error("auth: environment variable {0} is not set")]
    MissingSecret(String),
    #[error("{0}")]
    Transport(String),
    #[error("cancelled")]
    Cancelled,
}

impl FetchError {
    /// Whether trying again may help: network trouble and server errors, not 4xx answers.
    fn is_retryable(&self) -> bool {
        match self {
            FetchError::Status(code) => *code >= 500 || *code == 429 || *code == 408,
            FetchError::Timeout | FetchError::Transport(_) | FetchError::Truncated { .. } => true,
            _ => false,
        }
    }
}

/// A client for one URL source.
pub fn client(settings: &UrlSettings) -> Result<Client, FetchError> {
    Client::builder()
        .connect_timeout(settings.connect_timeout)
        .timeout(settings.timeout)
        .redirect(redirect::Policy::limited(settings.max_redirects))
        .user_agent(concat!("tidemark/", env!("CARGO_PKG_VERSION")))
        .build()
        .map_err(|err| FetchError::Transport(err.to_string()))
}

/// Fetches the URL, retrying retryable failures up to `settings.retries` times.
pub async fn fetch(
    client: &Client,
    settings: &UrlSettings,
    validators: &Validators,
    cancel: &CancellationToken,
) -> Result<Fetched, FetchError> {
    let headers = request_headers(settings, validators)?;
    let mut attempt = 0;
    loop {
        attempt += 1;
        let result = tokio::select! {
            result = fetch_once(client, settings, headers.clone()) => result,
            () = cancel.cancelled() => return Err(FetchError::Cancelled),
        };
        match result {
            Ok(Fetched::Body { bytes, validators, headers, .. }) => {
                return Ok(Fetched::Body { bytes, validators, headers, attempts: attempt });
            }
            Ok(not_modified) => return Ok(not_modified),
            Err(err) if err.is_retryable() && attempt <= settings.retries => {
                let wait = backoff(settings, attempt);
                tracing::info!(url = %crate::config::redact_url(&settings.url), attempt, error = %err, wait_ms = wait.as_millis() as u64, "fetch failed; retrying");
                tokio::select! {
                    () = tokio::time::sleep(wait) => {}
                    () = cancel.cancelled() => return Err(FetchError::Cancelled),
                }
            }
            Err(err) => return Err(err),
        }
    }
}

/// Capped exponential backoff with jitter: `min(cap, base * 2^(attempt-1))`, scaled by a
/// random factor in [0.5, 1) so that many daemons do not retry in step.
pub fn backoff(settings: &UrlSettings, attempt: u32) -> Duration {
    let exp = settings.retry_base.saturating_mul(1u32 << (attempt - 1).min(20));
    let capped = exp.min(settings.retry_cap);
    capped.mul_f64(rand::rng().random_range(0.5..1.0))
}

fn request_headers(settings: &UrlSettings, validators: &Validators) -> Result<HeaderMap, FetchError> {
    let mut headers = HeaderMap::new();
    let bad = |what: &str| FetchError::Transport(format!("{what} is not a valid header value"));
    if let Some(env) = &settings.auth_env {
        let value = std::env::var(env).map_err(|_| FetchError::MissingSecret(env.clone()))?;
        let name = HeaderName::from_bytes(settings.auth_header.as_bytes()).map_err(|_| bad("auth_header"))?;
        let mut value = HeaderValue::from_str(&value).map_err(|_| bad("the auth secret"))?;
        value.set_sensitive(true);
        headers.insert(name, value);
    }
    if let Some(etag) = &validators.etag {
        headers.insert(reqwest::header::IF_NONE_MATCH, HeaderValue::from_str(etag).map_err(|_| bad("ETag"))?);
    }
    if let Some(modified) = &validators.last_modified {
        headers.insert(
            reqwest::header::IF_MODIFIED_SINCE,
            HeaderValue::from_str(modified).map_err(|_| bad("Last-Modified"))?,
        );
    }
    Ok(headers)
}

async fn fetch_once(
    client: &Client,
    settings: &UrlSettings,
    headers: HeaderMap,
) -> Result<Fetched, FetchError> {
    let mut response = client.get(&settings.url).headers(headers).send().await.map_err(transport)?;
    let status = response.status();
    if status == StatusCode::NOT_MODIFIED {
        return Ok(Fetched::NotModified);
    }
    if !status.is_success() {
        return Err(FetchError::Status(status.as_u16()));
    }
    let declared = declared_length(response.headers());
    if declared.is_some_and(|n| n > settings.max_bytes) {
        return Err(FetchError::TooLarge { limit: settings.max_bytes });
    }
    let mut bytes = Vec::with_capacity(declared.unwrap_or(0).min(64 << 20) as usize);
    loop {
        let chunk = match response.chunk().await {
            Ok(Some(chunk)) => chunk,
            Ok(None) => break,
            // The body broke off before its declared length: say so, rather than reqwest's
            // "error decoding response body".
            Err(err) => match declared.filter(|n| *n > bytes.len() as u64) {
                Some(expected) if !err.is_timeout() => {
                    return Err(FetchError::Truncated { expected, got: bytes.len() as u64 });
                }
                _ => return Err(transport(err)),
            },
        };
        if bytes.len() as u64 + chunk.len() as u64 > settings.max_bytes {
            return Err(FetchError::TooLarge { limit: settings.max_bytes });
        }
        bytes.extend_from_slice(&chunk);
    }
    if let Some(expected) = declared.filter(|n| *n != bytes.len() as u64) {
        return Err(FetchError::Truncated { expected, got: bytes.len() as u64 });
    }
    let headers = response.headers().clone();
    let text = |name| headers.get(name).and_then(|v: &HeaderValue| v.to_str().ok()).map(String::from);
    let validators = Validators { etag: text(ETAG), last_modified: text(LAST_MODIFIED) };
    Ok(Fetched::Body { bytes, validators, headers, attempts: 1 })
}

/// Content-Length, unless the body was compressed (then it counts compressed bytes, and
/// the decoder checks the stream itself).
fn declared_length(headers: &HeaderMap) -> Option<u64> {
    if headers.contains_key(reqwest::header::CONTENT_ENCODING) {
        return None;
    }
    headers.get(CONTENT_LENGTH)?.to_str().ok()?.parse().ok()
}

fn transport(err: reqwest::Error) -> FetchError {
    if err.is_timeout() {
        FetchError::Timeout
    } else if err.is_redirect() {
        FetchError::Redirects
    } else {
        // The URL may carry a token; describe the failure without it, but with its causes
        // (reqwest's own text, e.g. "error decoding response body", rarely says what broke).
        let err = err.without_url();
        let mut text = err.to_string();
        let mut cause = std::error::Error::source(&err);
        while let Some(inner) = cause {
            text.push_str(": ");
            text.push_str(&inner.to_string());
            cause = inner.source();
        }
        FetchError::Transport(text)
    }
}

/// Parses an HTTP date (RFC 7231 IMF-fixdate, e.g. `Tue, 03 Mar 2026 06:00:00 GMT`).
pub fn parse_http_date(text: &str) -> Option<DateTime<Utc>> {
    DateTime::parse_from_rfc2822(text).ok().map(|t| t.with_timezone(&Utc))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings() -> UrlSettings {
        UrlSettings {
            url: "http://127.0.0.1:1/x".into(),
            auth_header: "Authorization".into(),
            auth_env: None,
            connect_timeout: Duration::from_secs(1),
            timeout: Duration::from_secs(1),
            max_bytes: 10,
            max_redirects: 2,
            retries: 3,
            retry_base: Duration::from_millis(100),
            retry_cap: Duration::from_millis(300),
        }
    }

    #[test]
    fn backoff_doubles_is_capped_and_jittered() {
        let s = settings();
        for attempt in 1..8 {
            let wait = backoff(&s, attempt);
            let full = Duration::from_millis((100u64 << (attempt - 1)).min(300));
            assert!(wait >= full / 2 && wait < full, "attempt {attempt}: {wait:?} vs {full:?}");
        }
    }

    #[test]
    fn http_dates() {
        let t = parse_http_date("Tue, 03 Mar 2026 06:00:00 GMT").unwrap();
        assert_eq!(t.to_rfc3339(), "2026-03-03T06:00:00+00:00");
        assert!(parse_http_date("yesterday").is_none());
    }
}
