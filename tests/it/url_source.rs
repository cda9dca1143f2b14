//! URL sources against real HTTP servers on loopback, started by each test on port 0: axum
//! for well-formed answers, and a hand-written server on a raw TCP socket for malformed ones
//! (a body cut off mid-stream, a Content-Length that lies, a stall, chunked or
//! close-delimited bodies without a length). First `source::http::fetch` on its own:
//! conditional GET with ETag and with Last-Modified, retries with short capped backoff,
//! timeouts, size limits with and without Content-Length, redirect loops, an auth header from
//! an environment variable, gzip. Then the whole daemon in-process on a temporary store: a
//! bad server never yields a snapshot (nor an archived extract) and shows in `source_health`
//! as consecutive failures with a last error; a good server yields one applied snapshot, and
//! a 304 or the same bytes again add nothing. Every record and token is invented.

use std::collections::HashMap;
use std::io::{Read, Write};
use std::net::{Shutdown, TcpStream};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, Once};
use std::time::{Duration, Instant};

use axum::Router;
use axum::http::{HeaderMap, StatusCode, Uri, header};
use axum::response::{IntoResponse, Response};
use tokio::net::TcpListener;
use tokio::sync::{Notify, mpsc};
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;

use tidemark::app::daemon::{self, Hooks, PollEvent};
use tidemark::config::{Config, UrlSettings};
use tidemark::model::SnapshotStatus;
use tidemark::source::http::{self, FetchError, Fetched, Validators};
use tidemark::store::{Reader, SnapshotRow, SourceStatus};

use crate::support;

/// An invented lab extract: two records, newline-delimited JSON.
const EXTRACT: &str = concat!(
    r#"{"case_id":"L-0001","district":"Amberlee","onset":"2026-03-01"}"#,
    "\n",
    r#"{"case_id":"L-0002","district":"Brackwater","onset":"2026-03-02"}"#,
    "\n",
);

/// The same feed a day later: one more record.
const EXTRACT_DAY2: &str = concat!(
    r#"{"case_id":"L-0001","district":"Amberlee","onset":"2026-03-01"}"#,
    "\n",
    r#"{"case_id":"L-0002","district":"Brackwater","onset":"2026-03-02"}"#,
    "\n",
    r#"{"case_id":"L-0003","district":"Dunhollow","onset":"2026-03-03"}"#,
    "\n",
);

const ETAG: &str = "\"lab-v1\"";
const LAST_MODIFIED: &str = "Tue, 03 Mar 2026 06:00:00 GMT";

/// The token the authenticating servers accept, and the environment variables holding a
/// right, a wrong and no value. The names are used by this file only.
const GOOD_TOKEN: &str = "Bearer amberlee-lab-token-0001";
const TOKEN_RIGHT_ENV: &str = "TIDEMARK_TEST_TOKEN_URL_RIGHT";
const TOKEN_WRONG_ENV: &str = "TIDEMARK_TEST_TOKEN_URL_WRONG";
const TOKEN_WRONG_VALUE: &str = "Bearer brackwater-stale-token";
const TOKEN_UNSET_ENV: &str = "TIDEMARK_TEST_TOKEN_URL_NEVER_SET";
const TOKEN_UNSET_DAEMON_ENV: &str = "TIDEMARK_TEST_TOKEN_URL_DAEMON_NEVER_SET";

/// Sets the token variables once for the whole test binary.
#[allow(unsafe_code)]
fn set_test_tokens() {
    static ONCE: Once = Once::new();
    ONCE.call_once(|| {
        // SAFETY: setting the environment races only with reads that bypass std's environment
        // lock (C code calling getenv). These names are unique to this file, written once,
        // and before any test that reads them; nothing in the process reads them from C.
        unsafe {
            std::env::set_var(TOKEN_RIGHT_ENV, GOOD_TOKEN);
            std::env::set_var(TOKEN_WRONG_ENV, TOKEN_WRONG_VALUE);
        }
    });
}

// ---------------------------------------------------------------------------------------
// Servers
// ---------------------------------------------------------------------------------------

/// One request as an axum test server saw it.
#[derive(Debug, Clone)]
struct Seen {
    /// 1 for the first request the server received.
    n: usize,
    path: String,
    headers: HeaderMap,
}

impl Seen {
    fn header(&self, name: header::HeaderName) -> Option<String> {
        self.headers.get(name).and_then(|v| v.to_str().ok()).map(String::from)
    }
}

/// Every request a test server received, in order.
#[derive(Debug, Clone, Default)]
struct Log(Arc<Mutex<Vec<Seen>>>);

impl Log {
    fn push(&self, path: String, headers: HeaderMap) -> Seen {
        let mut all = self.0.lock().unwrap();
        let seen = Seen { n: all.len() + 1, path, headers };
        all.push(seen.clone());
        seen
    }

    fn count(&self) -> usize {
        self.0.lock().unwrap().len()
    }

    fn all(&self) -> Vec<Seen> {
        self.0.lock().unwrap().clone()
    }

    fn last(&self) -> Seen {
        self.0.lock().unwrap().last().cloned().expect("the server saw a request")
    }
}

/// A well-formed axum server on loopback that records every request and answers it with
/// `answer`. Returns the URL of its extract and the request log.
async fn axum_server<F>(answer: F) -> (String, Log)
where
    F: Fn(&Seen) -> Response + Clone + Send + Sync + 'static,
{
    let log = Log::default();
    let recorded = log.clone();
    let router = Router::new().fallback(move |uri: Uri, headers: HeaderMap| {
        let (log, answer) = (recorded.clone(), answer.clone());
        async move {
            let seen = log.push(uri.path().to_string(), headers);
            answer(&seen)
        }
    });
    let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    tokio::spawn(async move {
        let _ = axum::serve(listener, router).await;
    });
    (format!("http://{addr}/extract.ndjson"), log)
}

/// A hand-written HTTP/1.1 server on a raw socket: for each connection it reads the request
/// head, lets `respond` write whatever bytes it likes (on a thread of its own, so it may
/// sleep), then closes. Returns the URL and a count of connections.
async fn raw_server(respond: fn(&mut TcpStream)) -> (String, Arc<AtomicUsize>) {
    let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
    let url = format!("http://{}/extract.ndjson", listener.local_addr().unwrap());
    let hits = Arc::new(AtomicUsize::new(0));
    let counter = hits.clone();
    tokio::spawn(async move {
        while let Ok((stream, _)) = listener.accept().await {
            counter.fetch_add(1, Ordering::SeqCst);
            let mut stream = stream.into_std().unwrap();
            stream.set_nonblocking(false).unwrap();
            std::thread::spawn(move || {
                if read_request_head(&mut stream) {
                    respond(&mut stream);
                    let _ = stream.flush();
                    let _ = stream.shutdown(Shutdown::Both);
                }
            });
        }
    });
    (url, hits)
}

fn read_request_head(stream: &mut TcpStream) -> bool {
    let _ = stream.set_read_timeout(Some(Duration::from_secs(5)));
    let mut head = Vec::new();
    let mut buf = [0u8; 1024];
    while !head.windows(4).any(|w| w == b"\r\n\r\n") {
        match stream.read(&mut buf) {
            Ok(0) | Err(_) => return false,
            Ok(n) => head.extend_from_slice(&buf[..n]),
        }
    }
    true
}

/// `n` bytes of plausible extract text (whole invented records, cut at `n`).
fn filler(n: usize) -> Vec<u8> {
    let line = r#"{"case_id":"L-0009","district":"Carrowmere","onset":"2026-03-04"}"#.to_string() + "\n";
    line.repeat(n / line.len() + 1).into_bytes()[..n].to_vec()
}

/// Writes errors are ignored: the client may have given up, which is the point of the test.
fn send(stream: &mut TcpStream, bytes: &[u8]) {
    let _ = stream.write_all(bytes);
    let _ = stream.flush();
}

/// Content-Length says 1000, 300 bytes arrive, the connection closes.
fn respond_truncated_length(stream: &mut TcpStream) {
    send(stream, b"HTTP/1.1 200 OK\r\nContent-Type: application/x-ndjson\r\nContent-Length: 1000\r\nConnection: close\r\n\r\n");
    send(stream, &filler(300));
}

/// A chunked body whose second chunk is cut short and which never sends the last chunk.
fn respond_truncated_chunked(stream: &mut TcpStream) {
    send(stream, b"HTTP/1.1 200 OK\r\nContent-Type: application/x-ndjson\r\nTransfer-Encoding: chunked\r\nConnection: close\r\n\r\n");
    send(stream, b"64\r\n");
    send(stream, &filler(100));
    send(stream, b"\r\n64\r\n");
    send(stream, &filler(40));
}

/// Never answers within any test's timeout.
fn respond_slow_head(stream: &mut TcpStream) {
    std::thread::sleep(Duration::from_secs(3));
    send(stream, b"HTTP/1.1 200 OK\r\nContent-Length: 0\r\nConnection: close\r\n\r\n");
}

/// Sends the head and a quarter of the body, then stalls past the timeout.
fn respond_stall_mid_body(stream: &mut TcpStream) {
    send(stream, b"HTTP/1.1 200 OK\r\nContent-Type: application/x-ndjson\r\nContent-Length: 400\r\nConnection: close\r\n\r\n");
    send(stream, &filler(100));
    std::thread::sleep(Duration::from_secs(3));
    send(stream, &filler(300));
}

/// 2000 bytes in 100-byte chunks, properly terminated, with no Content-Length.
fn respond_chunked_2000(stream: &mut TcpStream) {
    send(stream, b"HTTP/1.1 200 OK\r\nContent-Type: application/x-ndjson\r\nTransfer-Encoding: chunked\r\nConnection: close\r\n\r\n");
    for chunk in filler(2000).chunks(100) {
        send(stream, b"64\r\n");
        send(stream, chunk);
        send(stream, b"\r\n");
    }
    send(stream, b"0\r\n\r\n");
}

/// 2000 bytes delimited only by closing the connection (no length, not chunked).
fn respond_close_delimited_2000(stream: &mut TcpStream) {
    send(stream, b"HTTP/1.1 200 OK\r\nContent-Type: application/x-ndjson\r\nConnection: close\r\n\r\n");
    send(stream, &filler(2000));
}

fn gzip(bytes: &[u8]) -> Vec<u8> {
    let mut encoder = flate2::write::GzEncoder::new(Vec::new(), flate2::Compression::default());
    encoder.write_all(bytes).unwrap();
    encoder.finish().unwrap()
}

/// Answers 200 with the extract, an ETag and Last-Modified, or 304 to a matching
/// If-None-Match.
fn answer_with_etag(seen: &Seen) -> Response {
    if seen.header(header::IF_NONE_MATCH).as_deref() == Some(ETAG) {
        return (StatusCode::NOT_MODIFIED, [(header::ETAG, ETAG)]).into_response();
    }
    (StatusCode::OK, [(header::ETAG, ETAG), (header::LAST_MODIFIED, LAST_MODIFIED)], EXTRACT).into_response()
}

/// Requires `GOOD_TOKEN` in Authorization.
fn answer_with_auth(seen: &Seen) -> Response {
    if seen.header(header::AUTHORIZATION).as_deref() == Some(GOOD_TOKEN) {
        (StatusCode::OK, EXTRACT).into_response()
    } else {
        (StatusCode::UNAUTHORIZED, [(header::WWW_AUTHENTICATE, "Bearer")], "no").into_response()
    }
}

/// `/a` redirects to `/b` and `/b` back to `/a`; anything else goes to `/a`.
fn answer_redirect_loop(seen: &Seen) -> Response {
    let next = if seen.path == "/a" { "/b" } else { "/a" };
    (StatusCode::FOUND, [(header::LOCATION, next)]).into_response()
}

/// Two failures, then the extract.
fn answer_500_500_200(seen: &Seen) -> Response {
    if seen.n <= 2 {
        (StatusCode::INTERNAL_SERVER_ERROR, "busy").into_response()
    } else {
        (StatusCode::OK, EXTRACT).into_response()
    }
}

fn answer_always_500(_: &Seen) -> Response {
    (StatusCode::INTERNAL_SERVER_ERROR, "down").into_response()
}

// ---------------------------------------------------------------------------------------
// `http::fetch` on its own
// ---------------------------------------------------------------------------------------

/// Settings for a well-behaved server: generous timeouts, no retries, a 1 MiB limit.
fn settings(url: &str) -> UrlSettings {
    UrlSettings {
        url: url.to_string(),
        auth_header: "Authorization".into(),
        auth_env: None,
        connect_timeout: Duration::from_secs(2),
        timeout: Duration::from_secs(2),
        max_bytes: 1 << 20,
        max_redirects: 3,
        retries: 0,
        retry_base: Duration::from_millis(20),
        retry_cap: Duration::from_millis(100),
    }
}

async fn fetch(settings: &UrlSettings, validators: &Validators) -> Result<Fetched, FetchError> {
    let client = http::client(settings).unwrap();
    http::fetch(&client, settings, validators, &CancellationToken::new()).await
}

/// The body of a successful fetch, or a panic naming what came instead.
fn body(result: Result<Fetched, FetchError>) -> (Vec<u8>, Validators, u32) {
    match result {
        Ok(Fetched::Body { bytes, validators, attempts, .. }) => (bytes, validators, attempts),
        other => panic!("expected a body, got {other:?}"),
    }
}

/// The error of a failed fetch; a body here would be bad bytes handed to the ingest path.
fn error(result: Result<Fetched, FetchError>) -> FetchError {
    match result {
        Err(err) => err,
        Ok(fetched) => panic!("expected an error, got {fetched:?}"),
    }
}

#[tokio::test(flavor = "multi_thread")]
async fn etag_then_304_with_if_none_match() {
    let (url, log) = axum_server(answer_with_etag).await;
    let s = settings(&url);

    let (bytes, validators, attempts) = body(fetch(&s, &Validators::default()).await);
    assert_eq!(bytes, EXTRACT.as_bytes());
    assert_eq!(attempts, 1);
    assert_eq!(validators.etag.as_deref(), Some(ETAG));
    assert_eq!(validators.last_modified.as_deref(), Some(LAST_MODIFIED));
    assert_eq!(log.last().header(header::IF_NONE_MATCH), None, "the first fetch has no validator");

    let second = fetch(&s, &validators).await;
    assert!(matches!(second, Ok(Fetched::NotModified)), "{second:?}");
    assert_eq!(log.count(), 2);
    assert_eq!(log.last().header(header::IF_NONE_MATCH).as_deref(), Some(ETAG));

    // A stale validator gets the current body again.
    let stale = Validators { etag: Some("\"lab-v0\"".into()), last_modified: None };
    let (bytes, _, _) = body(fetch(&s, &stale).await);
    assert_eq!(bytes, EXTRACT.as_bytes());
}

#[tokio::test(flavor = "multi_thread")]
async fn last_modified_then_304_with_if_modified_since() {
    let (url, log) = axum_server(|seen: &Seen| {
        if seen.header(header::IF_MODIFIED_SINCE).as_deref() == Some(LAST_MODIFIED) {
            return StatusCode::NOT_MODIFIED.into_response();
        }
        (StatusCode::OK, [(header::LAST_MODIFIED, LAST_MODIFIED)], EXTRACT).into_response()
    })
    .await;
    let s = settings(&url);

    let (bytes, validators, _) = body(fetch(&s, &Validators::default()).await);
    assert_eq!(bytes, EXTRACT.as_bytes());
    assert_eq!(validators, Validators { etag: None, last_modified: Some(LAST_MODIFIED.into()) });
    assert_eq!(log.last().header(header::IF_MODIFIED_SINCE), None);

    let second = fetch(&s, &validators).await;
    assert!(matches!(second, Ok(Fetched::NotModified)), "{second:?}");
    let seen = log.last();
    assert_eq!(seen.header(header::IF_MODIFIED_SINCE).as_deref(), Some(LAST_MODIFIED));
    assert_eq!(seen.header(header::IF_NONE_MATCH), None, "no ETag was given, none is sent");
}

#[tokio::test(flavor = "multi_thread")]
async fn two_500s_then_200_succeeds_after_short_backoff() {
    let (url, log) = axum_server(answer_500_500_200).await;
    let s = UrlSettings { retries: 3, ..settings(&url) };
    let started = Instant::now();
    let (bytes, _, attempts) = body(fetch(&s, &Validators::default()).await);
    let took = started.elapsed();
    assert_eq!(bytes, EXTRACT.as_bytes());
    assert_eq!(attempts, 3);
    assert_eq!(log.count(), 3);
    // Backoff with jitter: [10, 20) ms after the first failure, [20, 40) ms after the second.
    assert!(took >= Duration::from_millis(30), "no backoff at all: {took:?}");
    assert!(took < Duration::from_millis(1500), "backoff was not short: {took:?}");
}

#[tokio::test(flavor = "multi_thread")]
async fn server_errors_until_retries_run_out() {
    let (url, log) = axum_server(answer_always_500).await;
    let s = UrlSettings { retries: 2, ..settings(&url) };
    let err = error(fetch(&s, &Validators::default()).await);
    assert!(matches!(err, FetchError::Status(500)), "{err:?}");
    assert_eq!(log.count(), 3, "the first try and two retries");
}

#[tokio::test(flavor = "multi_thread")]
async fn slow_server_times_out() {
    let (url, hits) = raw_server(respond_slow_head).await;
    let s = UrlSettings { timeout: Duration::from_millis(300), retries: 1, ..settings(&url) };
    let started = Instant::now();
    let err = error(fetch(&s, &Validators::default()).await);
    assert!(matches!(err, FetchError::Timeout), "{err:?}");
    assert_eq!(hits.load(Ordering::SeqCst), 2, "a timeout is worth one retry");
    assert!(started.elapsed() < Duration::from_secs(2), "took {:?}", started.elapsed());
}

#[tokio::test(flavor = "multi_thread")]
async fn stall_mid_body_times_out() {
    let (url, _) = raw_server(respond_stall_mid_body).await;
    let s = UrlSettings { timeout: Duration::from_millis(300), ..settings(&url) };
    let started = Instant::now();
    let err = error(fetch(&s, &Validators::default()).await);
    assert!(matches!(err, FetchError::Timeout), "{err:?}");
    assert!(started.elapsed() < Duration::from_secs(2), "took {:?}", started.elapsed());
}

#[tokio::test(flavor = "multi_thread")]
async fn body_shorter_than_content_length_is_discarded() {
    let (url, hits) = raw_server(respond_truncated_length).await;
    let s = UrlSettings { retries: 1, ..settings(&url) };
    let err = error(fetch(&s, &Validators::default()).await);
    assert!(
        matches!(err, FetchError::Truncated { expected: 1000, got } if got <= 300),
        "expected Truncated (1000 declared, at most 300 received), got {err:?}"
    );
    assert_eq!(hits.load(Ordering::SeqCst), 2, "a truncated body is worth one retry");
}

#[tokio::test(flavor = "multi_thread")]
async fn chunked_body_cut_off_is_discarded() {
    let (url, _) = raw_server(respond_truncated_chunked).await;
    let err = error(fetch(&settings(&url), &Validators::default()).await);
    // No length was declared, so the error is the transport's, with its cause.
    assert!(matches!(&err, FetchError::Transport(text) if text.contains("body: ")), "{err:?}");
}

#[tokio::test(flavor = "multi_thread")]
async fn oversize_body_with_content_length() {
    let big = String::from_utf8(filler(5000)).unwrap();
    let (url, log) = axum_server(move |_: &Seen| (StatusCode::OK, big.clone()).into_response()).await;
    let err = error(
        fetch(&UrlSettings { max_bytes: 1000, retries: 2, ..settings(&url) }, &Validators::default()).await,
    );
    assert!(matches!(err, FetchError::TooLarge { limit: 1000 }), "{err:?}");
    assert_eq!(log.count(), 1, "too large is not retried");
    // Exactly at the limit is fine.
    let (bytes, _, _) =
        body(fetch(&UrlSettings { max_bytes: 5000, ..settings(&url) }, &Validators::default()).await);
    assert_eq!(bytes.len(), 5000);
}

#[tokio::test(flavor = "multi_thread")]
async fn oversize_body_without_content_length() {
    for respond in [respond_chunked_2000, respond_close_delimited_2000] {
        let (url, hits) = raw_server(respond).await;
        let err = error(
            fetch(&UrlSettings { max_bytes: 1000, retries: 2, ..settings(&url) }, &Validators::default())
                .await,
        );
        assert!(matches!(err, FetchError::TooLarge { limit: 1000 }), "{err:?}");
        assert_eq!(hits.load(Ordering::SeqCst), 1, "too large is not retried");
        // The same server within a large enough limit: the whole body.
        let (bytes, _, _) =
            body(fetch(&UrlSettings { max_bytes: 2000, ..settings(&url) }, &Validators::default()).await);
        assert_eq!(bytes, filler(2000));
    }
}

#[tokio::test(flavor = "multi_thread")]
async fn redirect_loop_is_refused() {
    let (url, log) = axum_server(answer_redirect_loop).await;
    let s = UrlSettings { max_redirects: 3, retries: 2, ..settings(&url) };
    let err = error(fetch(&s, &Validators::default()).await);
    assert!(matches!(err, FetchError::Redirects), "{err:?}");
    assert_eq!(log.count(), 4, "the first request and three redirects, no retries");
}

#[tokio::test(flavor = "multi_thread")]
async fn redirects_within_the_limit_are_followed() {
    let (url, _) = axum_server(|seen: &Seen| match seen.path.as_str() {
        "/extract.ndjson" => (StatusCode::FOUND, [(header::LOCATION, "/moved")]).into_response(),
        "/moved" => (StatusCode::MOVED_PERMANENTLY, [(header::LOCATION, "/final.ndjson")]).into_response(),
        _ => (StatusCode::OK, EXTRACT).into_response(),
    })
    .await;
    let (bytes, _, _) = body(fetch(&settings(&url), &Validators::default()).await);
    assert_eq!(bytes, EXTRACT.as_bytes());
}

#[tokio::test(flavor = "multi_thread")]
async fn auth_secret_not_set_is_missing_secret() {
    let (url, log) = axum_server(answer_with_auth).await;
    let s = UrlSettings { auth_env: Some(TOKEN_UNSET_ENV.into()), retries: 2, ..settings(&url) };
    let err = error(fetch(&s, &Validators::default()).await);
    assert!(matches!(&err, FetchError::MissingSecret(name) if name == TOKEN_UNSET_ENV), "{err:?}");
    assert_eq!(log.count(), 0, "nothing is sent without the secret");
}

#[tokio::test(flavor = "multi_thread")]
async fn wrong_auth_is_401_and_not_retried() {
    set_test_tokens();
    let (url, log) = axum_server(answer_with_auth).await;
    let wrong = UrlSettings { auth_env: Some(TOKEN_WRONG_ENV.into()), retries: 3, ..settings(&url) };
    let err = error(fetch(&wrong, &Validators::default()).await);
    assert!(matches!(err, FetchError::Status(401)), "{err:?}");
    assert_eq!(log.count(), 1, "401 is not retryable");
    assert_eq!(log.last().header(header::AUTHORIZATION).as_deref(), Some(TOKEN_WRONG_VALUE));
    assert!(!err.to_string().contains("brackwater"), "the error names no secret: {err}");

    let right = UrlSettings { auth_env: Some(TOKEN_RIGHT_ENV.into()), ..settings(&url) };
    let (bytes, _, _) = body(fetch(&right, &Validators::default()).await);
    assert_eq!(bytes, EXTRACT.as_bytes());
    assert_eq!(log.last().header(header::AUTHORIZATION).as_deref(), Some(GOOD_TOKEN));
}

#[tokio::test(flavor = "multi_thread")]
async fn gzip_content_encoding_is_decoded() {
    let (url, log) = axum_server(|_: &Seen| {
        (StatusCode::OK, [(header::CONTENT_ENCODING, "gzip")], gzip(EXTRACT.as_bytes())).into_response()
    })
    .await;
    let (bytes, _, _) = body(fetch(&settings(&url), &Validators::default()).await);
    assert_eq!(bytes, EXTRACT.as_bytes());
    let accept = log.last().header(header::ACCEPT_ENCODING).unwrap_or_default();
    assert!(accept.contains("gzip"), "Accept-Encoding: {accept}");
}

#[tokio::test(flavor = "multi_thread")]
async fn gzip_limit_counts_decoded_bytes() {
    // A megabyte of zeros compresses to about a kilobyte: the limit applies after decoding.
    let (url, _) = axum_server(|_: &Seen| {
        (StatusCode::OK, [(header::CONTENT_ENCODING, "gzip")], gzip(&vec![0u8; 1 << 20])).into_response()
    })
    .await;
    let err =
        error(fetch(&UrlSettings { max_bytes: 100_000, ..settings(&url) }, &Validators::default()).await);
    assert!(matches!(err, FetchError::TooLarge { limit: 100_000 }), "{err:?}");
}

#[tokio::test(flavor = "multi_thread")]
async fn nothing_listening_is_a_transport_error() {
    let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
    let url = format!("http://{}/extract.ndjson", listener.local_addr().unwrap());
    drop(listener);
    let err = error(fetch(&UrlSettings { retries: 1, ..settings(&url) }, &Validators::default()).await);
    assert!(matches!(err, FetchError::Transport(_)), "{err:?}");
}

// ---------------------------------------------------------------------------------------
// End to end through the daemon
// ---------------------------------------------------------------------------------------

const SOURCE: &str = "amberlee-lab";

/// The config as TOML text: one URL source polled every second, with short timeouts and
/// backoff; `overrides` replace or add keys of the source table (values as TOML).
fn daemon_config(url: &str, overrides: &[(&str, &str)]) -> String {
    let quoted = |s: &str| format!("\"{s}\"");
    let mut keys: Vec<(String, String)> = vec![
        ("name".into(), quoted(SOURCE)),
        ("kind".into(), quoted("url")),
        ("url".into(), quoted(url)),
        ("format".into(), quoted("ndjson")),
        ("key".into(), quoted("case_id")),
        ("schedule".into(), quoted("* * * * * *")),
        ("timeout".into(), quoted("2s")),
        ("connect_timeout".into(), quoted("300ms")),
        ("retries".into(), "1".into()),
        ("retry_base".into(), quoted("20ms")),
        ("retry_cap".into(), quoted("50ms")),
        ("max_bytes".into(), "100000".into()),
        ("max_redirects".into(), "3".into()),
    ];
    for (key, value) in overrides {
        match keys.iter_mut().find(|(k, _)| k == key) {
            Some(entry) => entry.1 = value.to_string(),
            None => keys.push((key.to_string(), value.to_string())),
        }
    }
    let mut text =
        String::from("[store]\npath = \"store/tidemark.db\"\narchive = \"store/archive\"\n\n[[source]]\n");
    for (key, value) in keys {
        text.push_str(&format!("{key} = {value}\n"));
    }
    text.push_str("\n[source.fields]\njurisdiction = \"district\"\nonset_date = \"onset\"\n");
    text
}

/// The daemon running in-process on the store in `dir`, with one URL source.
struct Daemon {
    config: Arc<Config>,
    shutdown: CancellationToken,
    handle: JoinHandle<Result<(), String>>,
    events: mpsc::UnboundedReceiver<PollEvent>,
    nudge: Arc<Notify>,
    /// Poll events received so far.
    polls: usize,
}

impl Daemon {
    fn start(dir: &Path, url: &str, overrides: &[(&str, &str)]) -> Daemon {
        let (_, config) = support::write_config(dir, &daemon_config(url, overrides));
        let config = Arc::new(config);
        let (events_tx, events) = mpsc::unbounded_channel();
        let nudge = Arc::new(Notify::new());
        let hooks = Hooks {
            events: Some(events_tx),
            nudges: HashMap::from([(SOURCE.to_string(), nudge.clone())]),
            analysed: None,
            analysis_gate: None,
        };
        let shutdown = CancellationToken::new();
        let (run_config, token) = (config.clone(), shutdown.clone());
        let handle = tokio::spawn(async move {
            daemon::run(run_config, token, hooks, None).await.map_err(|err| format!("{err:#}"))
        });
        Daemon { config, shutdown, handle, events, nudge, polls: 0 }
    }

    /// The next poll the daemon reports.
    async fn next_poll(&mut self) -> PollEvent {
        let event = tokio::time::timeout(Duration::from_secs(10), self.events.recv())
            .await
            .expect("the daemon polled in time")
            .expect("the daemon is running");
        assert_eq!(event.source, SOURCE);
        self.polls += 1;
        event
    }

    /// Nudges the source and returns the first poll that started after the nudge.
    async fn poll_now(&mut self) -> PollEvent {
        let mark = Instant::now();
        self.nudge.notify_one();
        loop {
            let event = self.next_poll().await;
            if event.started >= mark {
                return event;
            }
        }
    }

    /// Cancels the daemon, waits for it to end and returns how many polls it made.
    async fn stop(mut self) -> usize {
        self.shutdown.cancel();
        tokio::time::timeout(Duration::from_secs(10), self.handle)
            .await
            .expect("the daemon stopped in time")
            .expect("the daemon did not panic")
            .expect("the daemon ended without error");
        while self.events.try_recv().is_ok() {
            self.polls += 1;
        }
        self.polls
    }

    /// Nudges, then waits (a few polls at most) for a poll that made a snapshot.
    async fn poll_until_snapshot(&mut self) -> PollEvent {
        self.nudge.notify_one();
        for _ in 0..5 {
            let event = self.next_poll().await;
            if !event.snapshots.is_empty() || event.error.is_some() {
                return event;
            }
        }
        panic!("no snapshot in five polls");
    }

    fn store(&self) -> PathBuf {
        self.config.store.path.clone()
    }

    fn snapshots(&self) -> Vec<SnapshotRow> {
        Reader::open(&self.store()).unwrap().snapshots(Some(SOURCE)).unwrap()
    }

    fn health(&self) -> SourceStatus {
        let statuses = Reader::open(&self.store()).unwrap().source_statuses().unwrap();
        statuses.into_iter().find(|s| s.name == SOURCE).expect("the source is registered")
    }

    /// Extracts kept in the raw archive (files, excluding folders).
    fn archived(&self) -> usize {
        fn walk(dir: &Path) -> usize {
            let Ok(entries) = std::fs::read_dir(dir) else { return 0 };
            entries.flatten().map(|e| if e.path().is_dir() { walk(&e.path()) } else { 1 }).sum()
        }
        walk(&self.config.store.archive)
    }
}

/// Runs the daemon against a bad server for two polls and checks that nothing reached the
/// store: no snapshot, no record version, no archived bytes, and the failures in
/// `source_health`. Returns the recorded last error and the number of polls made.
async fn daemon_takes_nothing(url: &str, overrides: &[(&str, &str)]) -> (String, usize) {
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), url, overrides);
    let first = daemon.next_poll().await;
    assert!(first.error.is_some() && first.snapshots.is_empty(), "first poll: {first:?}");
    let second = daemon.poll_now().await;
    assert!(second.error.is_some() && second.snapshots.is_empty(), "second poll: {second:?}");

    assert_eq!(daemon.snapshots(), Vec::new(), "no snapshot from a bad server");
    let db = support::open_ro(&daemon.store());
    assert_eq!(support::count(&db, "SELECT count(*) FROM snapshot"), 0);
    assert_eq!(support::count(&db, "SELECT count(*) FROM case_version"), 0);
    assert_eq!(daemon.archived(), 0, "bad bytes are not even archived");
    let health = daemon.health();
    assert!(health.consecutive_failures >= 2, "{health:?}");
    assert!(health.last_poll.is_some() && health.last_success.is_none(), "{health:?}");
    assert_eq!(health.last_snapshot_id, None);
    let last_error = health.last_error.clone().expect("a failed poll records its error");
    let polls = daemon.stop().await;
    (last_error, polls)
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_good_server_then_304_then_restart() {
    let (url, log) = axum_server(answer_with_etag).await;
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), &url, &[]);

    let first = daemon.next_poll().await;
    assert_eq!(first.error, None);
    let [(snapshot_id, SnapshotStatus::Applied)] = first.snapshots[..] else {
        panic!("expected one applied snapshot, got {:?}", first.snapshots);
    };
    let snapshots = daemon.snapshots();
    assert_eq!(snapshots.len(), 1);
    assert_eq!((snapshots[0].snapshot_id, snapshots[0].status.name()), (snapshot_id, "applied"));
    assert_eq!((snapshots[0].rows_accepted, snapshots[0].rows_new), (2, 2));
    // The as-of time comes from Last-Modified.
    assert!(snapshots[0].as_of.starts_with("2026-03-03T06:00:00"), "{}", snapshots[0].as_of);
    let health = daemon.health();
    assert_eq!((health.consecutive_failures, health.last_error.as_deref()), (0, None));
    assert_eq!(health.last_snapshot_id, Some(snapshot_id));
    assert_eq!(daemon.archived(), 1);

    let second = daemon.poll_now().await;
    assert_eq!((second.error.as_deref(), second.snapshots.len()), (None, 0), "{second:?}");
    assert_eq!(log.last().header(header::IF_NONE_MATCH).as_deref(), Some(ETAG));
    assert_eq!(daemon.snapshots().len(), 1, "a 304 adds nothing");
    assert_eq!(daemon.health().consecutive_failures, 0);
    daemon.stop().await;

    // A restarted daemon remembers the validators from the store.
    let before = log.count();
    let mut daemon = Daemon::start(dir.path(), &url, &[]);
    let first = daemon.next_poll().await;
    assert_eq!((first.error.as_deref(), first.snapshots.len()), (None, 0), "{first:?}");
    let after_restart = &log.all()[before];
    assert_eq!(after_restart.header(header::IF_NONE_MATCH).as_deref(), Some(ETAG));
    assert_eq!(daemon.snapshots().len(), 1);
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_same_bytes_without_etag_add_no_snapshot() {
    let current = Arc::new(Mutex::new(EXTRACT));
    let offered = current.clone();
    let (url, log) =
        axum_server(move |_: &Seen| (StatusCode::OK, *offered.lock().unwrap()).into_response()).await;
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), &url, &[]);

    let first = daemon.next_poll().await;
    assert_eq!(first.error, None);
    assert!(matches!(first.snapshots[..], [(_, SnapshotStatus::Applied)]), "{first:?}");

    let second = daemon.poll_now().await;
    assert_eq!((second.error.as_deref(), second.snapshots.len()), (None, 0), "{second:?}");
    let seen = log.last();
    assert!(seen.n >= 2);
    assert_eq!(seen.header(header::IF_NONE_MATCH), None);
    assert_eq!(seen.header(header::IF_MODIFIED_SINCE), None);
    assert_eq!(daemon.snapshots().len(), 1, "the same bytes again add no snapshot");
    assert_eq!(daemon.health().consecutive_failures, 0);

    // New bytes are a new snapshot (a scheduled poll may be the one to see them first).
    *current.lock().unwrap() = EXTRACT_DAY2;
    let third = daemon.poll_until_snapshot().await;
    assert!(matches!(third.snapshots[..], [(_, SnapshotStatus::Applied)]), "{third:?}");
    let snapshots = daemon.snapshots();
    assert_eq!(snapshots.len(), 2);
    assert_eq!((snapshots[1].rows_new, snapshots[1].rows_changed), (1, 0));
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_retries_500s_into_one_snapshot() {
    let (url, log) = axum_server(answer_500_500_200).await;
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), &url, &[("retries", "3")]);
    let first = daemon.next_poll().await;
    assert_eq!(first.error, None);
    assert!(matches!(first.snapshots[..], [(_, SnapshotStatus::Applied)]), "{first:?}");
    assert!(log.count() >= 3, "two failures and the success, in the first poll");
    assert_eq!(daemon.snapshots().len(), 1);
    assert_eq!(daemon.health().consecutive_failures, 0);
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_gzip_body_is_ingested_decoded() {
    let (url, _) = axum_server(|_: &Seen| {
        (StatusCode::OK, [(header::CONTENT_ENCODING, "gzip")], gzip(EXTRACT.as_bytes())).into_response()
    })
    .await;
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), &url, &[]);
    let first = daemon.next_poll().await;
    assert!(matches!(first.snapshots[..], [(_, SnapshotStatus::Applied)]), "{first:?}");
    assert_eq!(daemon.snapshots()[0].rows_accepted, 2);
    daemon.stop().await;
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_server_errors_take_nothing() {
    let (url, _) = axum_server(answer_always_500).await;
    let (error, _) = daemon_takes_nothing(&url, &[]).await;
    assert!(error.contains("HTTP 500"), "{error}");
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_slow_server_takes_nothing() {
    let (url, _) = raw_server(respond_slow_head).await;
    let (error, _) = daemon_takes_nothing(&url, &[("timeout", "\"300ms\""), ("retries", "0")]).await;
    assert!(error.contains("timed out"), "{error}");
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_truncated_body_takes_nothing() {
    let (url, _) = raw_server(respond_truncated_length).await;
    let (error, _) = daemon_takes_nothing(&url, &[]).await;
    assert!(error.contains("300 of 1000"), "{error}");
    let (url, _) = raw_server(respond_truncated_chunked).await;
    let (error, _) = daemon_takes_nothing(&url, &[]).await;
    assert!(!error.is_empty());
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_oversize_body_takes_nothing() {
    let big = String::from_utf8(filler(5000)).unwrap();
    let (url, _) = axum_server(move |_: &Seen| (StatusCode::OK, big.clone()).into_response()).await;
    let (error, _) = daemon_takes_nothing(&url, &[("max_bytes", "1000")]).await;
    assert!(error.contains("larger than the limit"), "{error}");
    let (url, _) = raw_server(respond_chunked_2000).await;
    let (error, _) = daemon_takes_nothing(&url, &[("max_bytes", "1000")]).await;
    assert!(error.contains("larger than the limit"), "{error}");
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_redirect_loop_takes_nothing() {
    let (url, _) = axum_server(answer_redirect_loop).await;
    let (error, _) = daemon_takes_nothing(&url, &[]).await;
    assert!(error.contains("redirects"), "{error}");
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_missing_secret_takes_nothing() {
    let (url, log) = axum_server(answer_with_auth).await;
    let env = format!("\"{TOKEN_UNSET_DAEMON_ENV}\"");
    let (error, _) = daemon_takes_nothing(&url, &[("auth_env", &env)]).await;
    assert!(error.contains(TOKEN_UNSET_DAEMON_ENV), "{error}");
    assert_eq!(log.count(), 0);
}

#[tokio::test(flavor = "multi_thread")]
async fn daemon_wrong_auth_takes_nothing() {
    set_test_tokens();
    let (url, log) = axum_server(answer_with_auth).await;
    let env = format!("\"{TOKEN_WRONG_ENV}\"");
    let (error, polls) = daemon_takes_nothing(&url, &[("auth_env", &env), ("retries", "3")]).await;
    assert!(error.contains("HTTP 401"), "{error}");
    assert!(!error.contains("brackwater"), "no secret in the recorded error: {error}");
    // At most one request per poll: 401 is never retried (with retries it would be four).
    let requests = log.count();
    assert!(requests >= 2 && requests <= polls, "{requests} requests in {polls} polls");
    assert!(log.all().iter().all(|s| s.header(header::AUTHORIZATION).as_deref() == Some(TOKEN_WRONG_VALUE)));
}

/// The feed sends A (30 records), then B (the first 29: one withdrawn), then A again:
/// the current line list must follow the latest body, so the third body is a new
/// observation and is applied even though its bytes were seen before. Only a body equal to
/// the *latest* applied one adds nothing.
#[tokio::test(flavor = "multi_thread")]
async fn daemon_applies_an_older_body_seen_again_a_b_a() {
    let lines: Vec<String> = (1..=30)
        .map(|n| format!("{{\"case_id\":\"L-{n:04}\",\"district\":\"Amberlee\",\"onset\":\"2026-03-01\"}}\n"))
        .collect();
    let body_a: &'static str = Box::leak(lines.concat().into_boxed_str());
    let body_b: &'static str = Box::leak(lines[..29].concat().into_boxed_str());
    let current = Arc::new(Mutex::new(body_a));
    let offered = current.clone();
    let (url, _log) =
        axum_server(move |_: &Seen| (StatusCode::OK, *offered.lock().unwrap()).into_response()).await;
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), &url, &[]);
    let current_records = |daemon: &Daemon| {
        let db = support::open_ro(&daemon.store());
        support::count(&db, "SELECT count(*) FROM case_version WHERE valid_to IS NULL")
    };
    let first = daemon.next_poll().await;
    assert_eq!(first.snapshots.len(), 1, "{first:?}");
    assert_eq!(current_records(&daemon), 30);
    *current.lock().unwrap() = body_b;
    let second = daemon.poll_now().await;
    assert_eq!(second.snapshots.len(), 1, "{second:?}");
    assert_eq!(current_records(&daemon), 29);
    *current.lock().unwrap() = body_a;
    let third = daemon.poll_now().await;
    assert!(
        matches!(third.snapshots[..], [(_, SnapshotStatus::Applied)]),
        "A seen again is applied: {third:?}"
    );
    assert_eq!(current_records(&daemon), 30, "the line list is the latest body's");
    let fourth = daemon.poll_now().await;
    assert_eq!(
        (fourth.snapshots.len(), fourth.error.as_deref()),
        (0, None),
        "the latest body again: {fourth:?}"
    );
    assert_eq!(daemon.snapshots().len(), 3);
    daemon.stop().await;
}

/// A body that fails (here cut off: its last line has no newline and does not parse) is a
/// failed poll, and so is every later poll that fetches the same bytes, without parsing
/// them again; the failing-polls count keeps growing until a good body arrives.
#[tokio::test(flavor = "multi_thread")]
async fn daemon_counts_a_failing_body_as_failed_polls_until_it_is_fixed() {
    let cut: &'static str = concat!(
        r#"{"case_id":"L-0001","district":"Amberlee","onset":"2026-03-01"}"#,
        "\n",
        r#"{"case_id":"L-00"#
    );
    let current = Arc::new(Mutex::new(EXTRACT));
    let offered = current.clone();
    let (url, _log) =
        axum_server(move |_: &Seen| (StatusCode::OK, *offered.lock().unwrap()).into_response()).await;
    let dir = tempfile::tempdir().unwrap();
    let mut daemon = Daemon::start(dir.path(), &url, &[]);
    let first = daemon.next_poll().await;
    assert_eq!((first.snapshots.len(), first.error.as_deref()), (1, None));
    let success = daemon.health().last_success.clone();

    *current.lock().unwrap() = cut;
    let second = daemon.poll_now().await;
    assert!(matches!(second.snapshots[..], [(_, SnapshotStatus::Failed)]), "{second:?}");
    let error = second.error.clone().unwrap_or_default();
    assert!(error.contains("truncated"), "{error}");
    for _ in 0..2 {
        let again = daemon.poll_now().await;
        assert!(again.snapshots.is_empty(), "the same failing bytes are not parsed again: {again:?}");
        assert!(
            again.error.as_deref().unwrap_or_default().contains("same bytes as failed snapshot"),
            "{again:?}"
        );
    }
    let health = daemon.health();
    assert_eq!(health.consecutive_failures, 3, "{health:?}");
    assert_eq!(health.last_success, success, "a failing body is never a success");
    assert_eq!(daemon.snapshots().len(), 2, "one failed snapshot, not one per poll");
    let db = support::open_ro(&daemon.store());
    assert_eq!(support::count(&db, "SELECT count(*) FROM case_version WHERE valid_to IS NULL"), 2);

    *current.lock().unwrap() = EXTRACT_DAY2;
    let fixed = daemon.poll_now().await;
    assert!(matches!(fixed.snapshots[..], [(_, SnapshotStatus::Applied)]), "{fixed:?}");
    assert_eq!(daemon.health().consecutive_failures, 0);
    daemon.stop().await;
}
