//! The limits that keep one analyst or one slow client from taking the server down: analysts'
//! SQL within a memory budget (huge values, huge answers, too many queries at once) on a real
//! `tidemark serve` process whose peak memory is read from `/proc`, `tidemark query` over the
//! same limits, and the HTTP listener's header-read timeout, connection limit and JSON error
//! answers. Loopback only; every loop is bounded in count and time.

use std::net::TcpListener;
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

use serde_json::Value;
use tidemark::app::access;
use tidemark::serve::HttpLimits;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

use crate::api::{extract, token};
use crate::support::{Env, day, get, proc_status_kib, run, source_toml, tidemark};

/// The peak memory the served store may reach while four hostile queries run at once.
/// Before the limits, four such queries took the server to 4.6 GB.
const PEAK_RSS_BOUND_KIB: u64 = 1024 * 1024;

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

/// A real `tidemark serve` process, killed when dropped.
struct Server {
    child: Child,
    port: u16,
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Server {
    /// Starts `tidemark serve` on `config` (which binds `port`) and waits for `/healthz`.
    fn start(config: &Path, port: u16) -> Server {
        let child = Command::new(assert_cmd::cargo::cargo_bin!("tidemark"))
            .arg("--config")
            .arg(config)
            .arg("serve")
            .env_remove("TIDEMARK_CONFIG")
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        let server = Server { child, port };
        let started = Instant::now();
        while get(port, "/healthz").map(|(status, _)| status) != Some(200) {
            assert!(started.elapsed() < Duration::from_secs(20), "tidemark serve did not start");
            std::thread::sleep(Duration::from_millis(50));
        }
        server
    }

    fn base(&self) -> String {
        format!("http://127.0.0.1:{}", self.port)
    }

    /// A line of `/proc/<pid>/status` in KiB, e.g. `VmHWM` (the peak resident set).
    fn status_kib(&self, key: &str) -> u64 {
        proc_status_kib(self.child.id(), key).unwrap()
    }
}

/// A store with a few cases, served on a free port with `serve_toml` in its `[serve]` table.
fn served_store(serve_toml: &str) -> (Env, Server, String) {
    let port = free_port();
    let mut env = Env::with_sources(&[format!(
        "[serve]\nbind = \"127.0.0.1:{port}\"\n{serve_toml}\n{}",
        source_toml("full", "csv", "full", "")
    )]);
    env.ingest("full", &extract(2, 30), day(2));
    let sql = token(&Arc::new(env.config.clone()), "etl", "sql");
    let server = Server::start(&env.config_path, port);
    (env, server, sql)
}

/// POSTs one statement to the SQL endpoint: (status, body).
async fn post_sql(client: &reqwest::Client, base: &str, token: &str, sql: &str) -> (u16, String) {
    let response = client
        .post(format!("{base}/api/v1/query"))
        .bearer_auth(token)
        .header("content-type", "application/json")
        .body(serde_json::json!({ "sql": sql }).to_string())
        .send()
        .await
        .unwrap();
    let status = response.status().as_u16();
    (status, response.text().await.unwrap())
}

fn error_of(body: &str) -> String {
    let value: Value =
        serde_json::from_str(body).unwrap_or_else(|err| panic!("not JSON ({err}): {body:.200}"));
    value["error"].as_str().unwrap_or_else(|| panic!("no error: {body:.200}")).to_string()
}

/// Statements that each ask SQLite (or the answer) for hundreds of megabytes.
const HUGE: &[&str] = &[
    "SELECT zeroblob(1000000000) AS b",
    "SELECT printf('%.*c', 200000000, 'x') AS s",
    "SELECT length(zeroblob(1000000000)) AS n",
    "SELECT printf('%.*c', 200000000, 'y') AS s",
];

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn four_huge_queries_at_once_stay_within_memory() {
    let (_env, server, sql) = served_store("");
    let client = reqwest::Client::new();
    let before = server.status_kib("VmHWM");
    let tasks: Vec<_> = HUGE
        .iter()
        .map(|statement| {
            let (client, base, sql) = (client.clone(), server.base(), sql.clone());
            tokio::spawn(async move { (statement, post_sql(&client, &base, &sql, statement).await) })
        })
        .collect();
    for task in tasks {
        let (statement, (status, body)) = task.await.unwrap();
        assert!((400..500).contains(&status), "{statement}: {status} {:.200}", body);
        let message = error_of(&body);
        assert!(message.contains("limit"), "{statement}: {message}");
    }
    let peak = server.status_kib("VmHWM");
    println!("four huge queries: server peak RSS {} MiB (before them {} MiB)", peak / 1024, before / 1024);
    assert!(peak < PEAK_RSS_BOUND_KIB, "peak RSS {peak} KiB");
    // The server still answers an ordinary query.
    let (status, body) =
        post_sql(&client, &server.base(), &sql, "SELECT count(*) AS n FROM current_case").await;
    assert_eq!((status, body.contains("30")), (200, true), "{body}");
}

/// A short statement that keeps many values just under the value limit alive at once (each
/// distinct constant expression is computed once and kept): the per-connection limits do not
/// see it, the process-wide cap on SQLite's memory stops it.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn many_large_values_at_once_meet_the_sqlite_memory_cap() {
    let (_env, server, sql) = served_store("");
    let terms: Vec<String> =
        (0..60).map(|i| format!("length(printf('%.*c', {}, 'x'))", 16_000_000 - i)).collect();
    let statement = format!("SELECT {} AS n", terms.join(" + "));
    let client = reqwest::Client::new();
    let (status, body) = post_sql(&client, &server.base(), &sql, &statement).await;
    assert_eq!(status, 400, "{body:.200}");
    assert!(error_of(&body).contains("memory limit"), "{body}");
    let peak = server.status_kib("VmHWM");
    println!("60 values of 16 MB in one statement: server peak RSS {} MiB", peak / 1024);
    assert!(peak < PEAK_RSS_BOUND_KIB, "peak RSS {peak} KiB");
    let (status, _) = post_sql(&client, &server.base(), &sql, "SELECT 1 AS one").await;
    assert_eq!(status, 200);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_query_beyond_the_concurrency_limit_is_told_to_retry() {
    let (_env, server, sql) = served_store("query_concurrency = 1\nquery_timeout = \"4s\"");
    let client = reqwest::Client::new();
    let forever = "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT count(*) FROM c";
    let long = {
        let (client, base, sql) = (client.clone(), server.base(), sql.clone());
        tokio::spawn(async move { post_sql(&client, &base, &sql, forever).await })
    };
    // Long enough for the first query to hold the only slot, well within its time limit.
    tokio::time::sleep(Duration::from_secs(1)).await;
    let started = Instant::now();
    let response = client
        .post(format!("{}/api/v1/query", server.base()))
        .bearer_auth(&sql)
        .body(r#"{"sql": "SELECT 1 AS one"}"#)
        .send()
        .await
        .unwrap();
    let waited = started.elapsed();
    assert_eq!(response.status().as_u16(), 503);
    assert_eq!(response.headers()["retry-after"], "1");
    let message = error_of(&response.text().await.unwrap());
    assert!(message.contains("too many SQL queries") && message.contains("limit is 1"), "{message}");
    assert!(waited >= Duration::from_millis(900) && waited < Duration::from_millis(2500), "{waited:?}");
    let (status, body) = long.await.unwrap();
    assert_eq!(status, 400, "{body}");
    assert!(error_of(&body).contains("time limit"), "{body}");
    // The slot is free again.
    assert_eq!(post_sql(&client, &server.base(), &sql, "SELECT 1 AS one").await.0, 200);
}

#[test]
fn query_command_stops_at_the_memory_limits() {
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "")]);
    env.ingest("full", &extract(2, 30), day(2));
    for (statement, reason) in [
        ("SELECT zeroblob(1000000000) AS b", "value limit of 16 MiB"),
        ("SELECT printf('%.*c', 200000000, 'x') AS s", "value limit of 16 MiB"),
        (
            "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c LIMIT 40)
             SELECT printf('%.*c', 1000000, 'x') AS s FROM c",
            "answer limit of 32 MiB",
        ),
    ] {
        let (code, stdout, stderr) =
            run(tidemark().arg("--config").arg(&env.config_path).args(["query", statement]));
        assert_eq!(code, 1, "{statement}: {stdout:.200}");
        assert!(
            stderr.starts_with("error: query stopped: ") && stderr.contains(reason),
            "{statement}: {stderr}"
        );
        assert!(stdout.is_empty(), "{statement}: {stdout:.200}");
    }
}

/// Opens a loopback connection to `addr` that sends half a request line and stalls.
async fn stalled(addr: &str) -> tokio::net::TcpStream {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream.write_all(b"GET /api/v1/openapi.json HT").await.unwrap();
    stream
}

/// Reads until the server closes `stream` or `within` passes; how long it took, if it closed.
async fn closed_after(mut stream: tokio::net::TcpStream, within: Duration) -> Option<Duration> {
    let started = Instant::now();
    let mut buf = [0u8; 4096];
    loop {
        let left = within.checked_sub(started.elapsed())?;
        match tokio::time::timeout(left, stream.read(&mut buf)).await {
            Err(_) => return None,
            Ok(Ok(0)) | Ok(Err(_)) => return Some(started.elapsed()),
            Ok(Ok(_)) => {}
        }
    }
}

/// A loopback server of the whole app (API, dashboard, ops) within `limits`.
async fn app_on_loopback(env: &Env, limits: HttpLimits) -> (String, tokio_util::sync::CancellationToken) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap().to_string();
    let shutdown = tokio_util::sync::CancellationToken::new();
    let router = access::app_router(&Arc::new(env.config.clone()), None);
    tokio::spawn(tidemark::serve::serve_with(listener, router, shutdown.clone(), limits));
    (addr, shutdown)
}

/// How many connections stall at once: more than the default connection limit (256).
const STALLED: usize = 300;

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn slow_headers_do_not_hold_the_server() {
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "")]);
    env.ingest("full", &extract(2, 30), day(2));
    let (addr, shutdown) = app_on_loopback(&env, HttpLimits::default()).await;
    let opened = Instant::now();
    let mut watchers = Vec::with_capacity(STALLED);
    for _ in 0..STALLED {
        let stream = stalled(&addr).await;
        watchers.push(tokio::spawn(closed_after(stream, Duration::from_secs(20))));
    }
    println!("{STALLED} stalled connections opened in {:?}", opened.elapsed());
    let client = reqwest::Client::new();
    let started = Instant::now();
    let response = client.get(format!("http://{addr}/api/v1/openapi.json")).send().await.unwrap();
    let status = response.status().as_u16();
    let took = started.elapsed();
    println!("a normal request beside {STALLED} stalled connections took {took:?}");
    assert_eq!(status, 200);
    assert!(response.text().await.unwrap().contains("\"openapi\""));
    assert!(took < Duration::from_secs(1), "{took:?}");
    // Past the connection limit the oldest stalled ones were closed at once; the header-read
    // timeout (10 s) closes the rest.
    let mut closed = Vec::new();
    for watcher in watchers {
        closed.push(watcher.await.unwrap().expect("a stalled connection stayed open past 20 s"));
    }
    let at_once = closed.iter().filter(|t| **t < Duration::from_secs(5)).count();
    assert!(at_once > STALLED - tidemark::serve::listen::DEFAULT_MAX_CONNECTIONS, "{at_once} closed at once");
    let last = closed.iter().max().unwrap();
    assert!(*last >= Duration::from_secs(9) && *last < Duration::from_secs(16), "last closed after {last:?}");
    shutdown.cancel();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn idle_and_slow_connections_are_closed_but_answers_in_progress_are_not() {
    let mut env = Env::with_sources(&[format!(
        "[serve]\nquery_timeout = \"1s\"\n{}",
        source_toml("full", "csv", "full", "")
    )]);
    env.ingest("full", &extract(2, 30), day(2));
    let sql = token(&Arc::new(env.config.clone()), "etl", "sql");
    let limits = HttpLimits { header_read_timeout: Duration::from_secs(1), max_connections: 2 };
    let (addr, shutdown) = app_on_loopback(&env, limits).await;
    // Half a request line: closed after the header-read timeout.
    let took = closed_after(stalled(&addr).await, Duration::from_secs(5)).await.expect("stalled stayed open");
    assert!(took >= Duration::from_millis(800) && took < Duration::from_secs(3), "{took:?}");
    // Idle after an answer (keep-alive): closed after the same timeout.
    let mut idle = tokio::net::TcpStream::connect(&addr).await.unwrap();
    idle.write_all(b"GET /healthz HTTP/1.1\r\nHost: localhost\r\n\r\n").await.unwrap();
    let mut buf = vec![0u8; 1024];
    let n = idle.read(&mut buf).await.unwrap();
    assert!(String::from_utf8_lossy(&buf[..n]).starts_with("HTTP/1.1 200"));
    let took = closed_after(idle, Duration::from_secs(5)).await.expect("idle stayed open");
    assert!(took >= Duration::from_millis(800) && took < Duration::from_secs(3), "{took:?}");
    // A query being answered keeps its connection while stalled ones come and go (limit 2).
    let body = r#"{"sql": "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT count(*) FROM c"}"#;
    let mut busy = tokio::net::TcpStream::connect(&addr).await.unwrap();
    let request = format!(
        "POST /api/v1/query HTTP/1.1\r\nHost: localhost\r\nAuthorization: Bearer {sql}\r\n\
         Content-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        body.len()
    );
    busy.write_all(request.as_bytes()).await.unwrap();
    tokio::time::sleep(Duration::from_millis(200)).await;
    let mut others = Vec::new();
    for _ in 0..3 {
        others.push(stalled(&addr).await);
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    // Of the three stalled ones, the first two were closed to make room, well before the
    // header-read timeout; the newest stays.
    let newest = others.pop().unwrap();
    for older in others {
        assert!(closed_after(older, Duration::from_millis(200)).await.is_some(), "not closed for room");
    }
    assert_eq!(closed_after(newest, Duration::from_millis(100)).await, None);
    let mut answer = String::new();
    tokio::time::timeout(Duration::from_secs(5), busy.read_to_string(&mut answer)).await.unwrap().unwrap();
    assert!(answer.starts_with("HTTP/1.1 400"), "{answer}");
    assert!(answer.contains("time limit"), "{answer}");
    shutdown.cancel();
}

/// One raw HTTP/1.1 exchange on loopback (the request closes the connection): the answer.
async fn raw_exchange(addr: &str, request: &[u8]) -> String {
    let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    stream.write_all(request).await.unwrap();
    let mut answer = Vec::new();
    let _ = tokio::time::timeout(Duration::from_secs(5), stream.read_to_end(&mut answer)).await.unwrap();
    String::from_utf8_lossy(&answer).into_owned()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_error_answer_is_json() {
    let mut env = Env::with_sources(&[format!(
        "[serve]\nrequest_timeout = \"1s\"\nquery_timeout = \"3s\"\n{}",
        source_toml("full", "csv", "full", "")
    )]);
    env.ingest("full", &extract(2, 30), day(2));
    let config = Arc::new(env.config.clone());
    let (read, sql) = (token(&config, "analyst", "read"), token(&config, "etl", "sql"));
    let (addr, shutdown) = app_on_loopback(&env, HttpLimits::default()).await;
    let base = format!("http://{addr}");
    let client = reqwest::Client::new();
    let huge = serde_json::json!({ "sql": format!("SELECT '{}'", "x".repeat(100_000)) }).to_string();
    let forever = r#"{"sql": "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT count(*) FROM c"}"#;
    let cases = [
        (client.get(format!("{base}/no-such-page")), 404, "no such path"),
        (client.get(format!("{base}/api/v1/nothing-here")).bearer_auth(&read), 404, "no such path"),
        (client.delete(format!("{base}/healthz")), 405, "does not take that method"),
        (client.get(format!("{base}/api/v1/query")).bearer_auth(&sql), 405, "does not take that method"),
        (
            client.post(format!("{base}/api/v1/query")).bearer_auth(&sql).body(huge),
            413,
            "larger than the limit of 65536 bytes",
        ),
        (
            client.post(format!("{base}/api/v1/query")).bearer_auth(&sql).body(forever),
            408,
            "longer than the limit of 1 s",
        ),
        (
            client.get(format!("{base}/api/v1/snapshots?source=full&source=other")).bearer_auth(&read),
            400,
            "query parameter \"source\" is given more than once",
        ),
        (
            client.get(format!("{base}/api/v1/curve?source=full&by=onset&by=report")).bearer_auth(&read),
            400,
            "query parameter \"by\" is given more than once",
        ),
        (
            client
                .post(format!("{base}/api/v1/query?format=csv&format=json"))
                .bearer_auth(&sql)
                .body(r#"{"sql": "SELECT 1"}"#),
            400,
            "query parameter \"format\" is given more than once",
        ),
    ];
    for (request, status, text) in cases {
        let response = request.send().await.unwrap();
        let url = response.url().to_string();
        assert_eq!(response.status().as_u16(), status, "{url}");
        if status == 405 {
            assert!(response.headers().contains_key("allow"), "{url}: no Allow header");
        }
        let content_type = response.headers()["content-type"].to_str().unwrap().to_string();
        assert_eq!(content_type, "application/json", "{url}");
        let message = error_of(&response.text().await.unwrap());
        assert!(message.contains(text), "{url}: {message}");
    }
    // A chunked body (no length given up front) over the limit: the same JSON 413.
    let chunk = "x".repeat(70_000);
    let request = format!(
        "POST /api/v1/query HTTP/1.1\r\nHost: localhost\r\nAuthorization: Bearer {sql}\r\n\
         Transfer-Encoding: chunked\r\nConnection: close\r\n\r\n{:x}\r\n{chunk}\r\n0\r\n\r\n",
        chunk.len()
    );
    let answer = raw_exchange(&addr, request.as_bytes()).await;
    assert!(answer.starts_with("HTTP/1.1 413"), "{answer:.300}");
    let body = answer.split_once("\r\n\r\n").unwrap().1;
    assert!(error_of(body).contains("larger than the limit"), "{body}");
    // Parameters given once still work.
    let once =
        client.get(format!("{base}/api/v1/snapshots?source=full")).bearer_auth(&read).send().await.unwrap();
    assert_eq!(once.status().as_u16(), 200);
    shutdown.cancel();
}

#[test]
fn the_limits_come_from_serve_and_are_checked() {
    use tidemark::config::Config;
    let path = Path::new("/nonexistent/tidemark.toml");
    let config = Config::parse(
        "[serve]\nquery_max_value_bytes = 1048576\nquery_max_answer_bytes = 4194304\n\
         query_concurrency = 2\nsqlite_heap_bytes = 0\n",
        path,
    )
    .unwrap();
    let limits = config.serve;
    assert_eq!((limits.query.max_value_bytes, limits.query.max_answer_bytes), (1 << 20, 4 << 20));
    assert_eq!((limits.query_concurrency, limits.query.sqlite_heap_bytes), (2, 0));
    let defaults = Config::parse("", path).unwrap().serve;
    assert_eq!(defaults.query.max_value_bytes, 16 * 1024 * 1024);
    assert_eq!(defaults.query.max_answer_bytes, 32 * 1024 * 1024);
    assert_eq!(defaults.query.sqlite_heap_bytes, 512 * 1024 * 1024);
    assert_eq!(defaults.query_concurrency, 4);
    let err = Config::parse(
        "[serve]\nquery_max_value_bytes = 2000000000\nquery_max_answer_bytes = 0\nquery_concurrency = 0\n",
        path,
    )
    .unwrap_err()
    .to_string();
    for key in [
        "serve.query_max_value_bytes: at most",
        "serve.query_max_answer_bytes: must be",
        "serve.query_concurrency: must be",
    ] {
        assert!(err.contains(key), "{key}: {err}");
    }
}
