//! The HTTP API through the router (`oneshot`) and over a real loopback socket (reqwest):
//! tokens (none, wrong, revoked, without the scope), JSON and CSV, `as_of`, the same answers
//! as the CLI, the OpenAPI document against the routes both ways, the SQL endpoint and
//! `tidemark query` refusing every kind of write with the store file unchanged, every stable
//! view, and a load test with an ingest running.

use std::path::Path;
use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::body::Body;
use axum::http::{Request, StatusCode};
use serde_json::Value;
use sha2::{Digest, Sha256};
use tower::ServiceExt;

use tidemark::app::access;
use tidemark::app::commands::{self, CurveArgs};
use tidemark::config::Config;
use tidemark::serve::routes::{API_BASE, Handler, Method, ROUTES, openapi};
use tidemark::table::OutputFormat;

use crate::support::{Env, count, day, run, source_toml, tidemark};

/// An extract of the `full` source on day `d`: `n` cases, onsets spread over the days before
/// the extract, reports a day or two after onset. Everything invented.
pub fn extract(d: i64, n: usize) -> String {
    let places = ["Amberlee", "Brackwater", "Corran Vale", "Dunhollow"];
    let start = chrono::NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
    let mut rows = Vec::with_capacity(n);
    for i in 0..n {
        let onset = start + chrono::Duration::days((i as i64 * 7 + d) % (d + 1));
        let report =
            (onset + chrono::Duration::days(1 + (i as i64 % 2))).min(start + chrono::Duration::days(d));
        let sex = if i % 2 == 0 { "F" } else { "M" };
        rows.push(format!("C-{i:05},{},{onset},{report},{},{sex},cough", places[i % 4], 20 + i % 60));
    }
    crate::support::csv(&rows.iter().map(String::as_str).collect::<Vec<_>>())
}

/// A store with `days` daily snapshots of the `full` source, growing by `step` cases a day.
pub fn store_with_days(days: i64, base: usize, step: usize) -> Env {
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "")]);
    for d in 0..days {
        env.ingest("full", &extract(d + 2, base + step * d as usize), day(d + 2));
    }
    env
}

/// Creates a token and returns it (the first line `token create` prints).
pub fn token(config: &Config, name: &str, scope: &str) -> String {
    let text = access::token_create(config, name, scope.parse().unwrap()).unwrap();
    text.lines().next().unwrap().to_string()
}

struct Answer {
    status: StatusCode,
    content_type: String,
    body: String,
}

impl Answer {
    fn json(&self) -> Value {
        serde_json::from_str(&self.body).unwrap_or_else(|err| panic!("not JSON ({err}): {}", self.body))
    }
}

async fn call(
    router: &axum::Router,
    method: &str,
    uri: &str,
    token: Option<&str>,
    body: Option<&str>,
) -> Answer {
    let mut request = Request::builder().method(method).uri(uri);
    if let Some(token) = token {
        request = request.header("authorization", format!("Bearer {token}"));
    }
    let request = request.body(body.map(|b| Body::from(b.to_string())).unwrap_or_else(Body::empty)).unwrap();
    let response = router.clone().oneshot(request).await.unwrap();
    let status = response.status();
    let content_type =
        response.headers().get("content-type").map(|v| v.to_str().unwrap().to_string()).unwrap_or_default();
    let bytes = axum::body::to_bytes(response.into_body(), 1 << 24).await.unwrap();
    Answer { status, content_type, body: String::from_utf8_lossy(&bytes).into_owned() }
}

/// SHA-256 of the store file and its WAL: any write would change one of them.
fn store_fingerprint(path: &Path) -> String {
    let mut hasher = Sha256::new();
    for suffix in ["", "-wal"] {
        let file = format!("{}{suffix}", path.display());
        hasher.update(std::fs::read(&file).unwrap_or_default());
    }
    hasher.finalize().iter().map(|b| format!("{b:02x}")).collect()
}

fn sum_counts(rows: &Value) -> i64 {
    rows.as_array().unwrap().iter().map(|r| r["count"].as_i64().unwrap()).sum()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tokens_scopes_and_revocation() {
    let env = store_with_days(2, 40, 10);
    let config = Arc::new(env.config.clone());
    let read = token(&config, "analyst", "read");
    let sql = token(&config, "etl", "sql");
    let router = access::app_router(&config, None);
    let uri = format!("{API_BASE}/sources");
    let no_token = call(&router, "GET", &uri, None, None).await;
    assert_eq!(no_token.status, StatusCode::UNAUTHORIZED, "{}", no_token.body);
    assert!(no_token.json()["error"].as_str().unwrap().contains("missing bearer token"));
    let wrong = format!("tmk_{}", "0".repeat(64));
    assert_eq!(call(&router, "GET", &uri, Some(&wrong), None).await.status, StatusCode::UNAUTHORIZED);
    assert_eq!(call(&router, "GET", &uri, Some(&read), None).await.status, StatusCode::OK);
    assert_eq!(call(&router, "GET", &uri, Some(&sql), None).await.status, StatusCode::OK, "sql implies read");
    let query = format!("{API_BASE}/query");
    let body = r#"{"sql": "SELECT count(*) AS n FROM current_case"}"#;
    let forbidden = call(&router, "POST", &query, Some(&read), Some(body)).await;
    assert_eq!(forbidden.status, StatusCode::FORBIDDEN, "{}", forbidden.body);
    let allowed = call(&router, "POST", &query, Some(&sql), Some(body)).await;
    assert_eq!(allowed.status, StatusCode::OK, "{}", allowed.body);
    assert_eq!(allowed.json()[0]["n"], 50);
    access::token_revoke(&config, "analyst").unwrap();
    let revoked = call(&router, "GET", &uri, Some(&read), None).await;
    assert_eq!(revoked.status, StatusCode::UNAUTHORIZED, "{}", revoked.body);
    // Health and metrics stay open; the store keeps only hashes.
    assert_eq!(call(&router, "GET", "/healthz", None, None).await.status, StatusCode::OK);
    assert_eq!(call(&router, "GET", "/metrics", None, None).await.status, StatusCode::OK);
    let conn = env.db();
    assert_eq!(count(&conn, &format!("SELECT count(*) FROM api_token WHERE sha256 = '{read}'")), 0);
    let listed = access::token_list(&config, OutputFormat::Csv).unwrap();
    assert!(!listed.contains(&read) && listed.contains("analyst,read,tmk_"), "{listed}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn listings_agree_with_the_cli_in_json_and_csv() {
    let env = store_with_days(3, 40, 10);
    let config = Arc::new(env.config.clone());
    let read = token(&config, "analyst", "read");
    let router = access::app_router(&config, None);
    let curve = |as_of: Option<&'static str>| CurveArgs {
        source: "full",
        by: "onset",
        as_of,
        stratify: Some("jurisdiction"),
        format: OutputFormat::Json,
    };
    let cli: Value = serde_json::from_str(&commands::curve(&config, &curve(None)).unwrap()).unwrap();
    let api = call(
        &router,
        "GET",
        &format!("{API_BASE}/curve?source=full&by=onset&stratify=jurisdiction"),
        Some(&read),
        None,
    )
    .await;
    assert_eq!(api.status, StatusCode::OK, "{}", api.body);
    assert!(api.content_type.starts_with("application/json"));
    assert_eq!(api.json(), cli);
    assert_eq!(sum_counts(&cli), 60);
    // as_of: the second snapshot (day 3) had 50 cases; a plain date and RFC 3339 agree.
    let old = call(
        &router,
        "GET",
        &format!("{API_BASE}/curve?source=full&by=onset&as_of=2026-03-04"),
        Some(&read),
        None,
    )
    .await;
    assert_eq!(sum_counts(&old.json()), 50, "{}", old.body);
    let old_rfc = call(
        &router,
        "GET",
        &format!("{API_BASE}/curve?source=full&by=onset&as_of=2026-03-04T23:59:59Z"),
        Some(&read),
        None,
    )
    .await;
    assert_eq!(old_rfc.json(), old.json());
    // CSV by parameter or by Accept header, same as the CLI's CSV.
    let cli_csv = commands::curve(&config, &CurveArgs { format: OutputFormat::Csv, ..curve(None) }).unwrap();
    let csv = call(
        &router,
        "GET",
        &format!("{API_BASE}/curve?source=full&by=onset&stratify=jurisdiction&format=csv"),
        Some(&read),
        None,
    )
    .await;
    assert!(csv.content_type.starts_with("text/csv"), "{}", csv.content_type);
    assert_eq!(csv.body, cli_csv);
    let request = Request::get(format!("{API_BASE}/curve?source=full&by=onset&stratify=jurisdiction"))
        .header("authorization", format!("Bearer {read}"))
        .header("accept", "text/csv")
        .body(Body::empty())
        .unwrap();
    let response = router.clone().oneshot(request).await.unwrap();
    let bytes = axum::body::to_bytes(response.into_body(), 1 << 20).await.unwrap();
    assert_eq!(String::from_utf8_lossy(&bytes), cli_csv);
    // Nowcast and snapshots agree with the CLI too.
    let args = commands::NowcastArgs {
        source: "full",
        by: "onset",
        as_of: None,
        method: tidemark::model::MethodChoice::Hazard,
        stratify: None,
        format: OutputFormat::Json,
    };
    let cli: Value = serde_json::from_str(&commands::nowcast(&config, &args).unwrap()).unwrap();
    let api = call(
        &router,
        "GET",
        &format!("{API_BASE}/nowcast?source=full&by=onset&method=hazard"),
        Some(&read),
        None,
    )
    .await;
    assert_eq!(api.json(), cli);
    let snaps = call(&router, "GET", &format!("{API_BASE}/snapshots?source=full"), Some(&read), None).await;
    assert_eq!(snaps.json().as_array().unwrap().len(), 3);
    let delays = call(
        &router,
        "GET",
        &format!("{API_BASE}/delays?source=full&from=onset&to=report&by_week=true"),
        Some(&read),
        None,
    )
    .await;
    assert_eq!(delays.status, StatusCode::OK, "{}", delays.body);
    // Quality and alerts come with the monitoring tables; without them the answer says so.
    let quality = call(&router, "GET", &format!("{API_BASE}/quality?source=full"), Some(&read), None).await;
    if env.db().prepare("SELECT 1 FROM quality_latest").is_err() {
        assert_eq!(quality.status, StatusCode::SERVICE_UNAVAILABLE, "{}", quality.body);
        assert!(quality.body.contains("not available in this store"), "{}", quality.body);
    } else {
        assert_eq!(quality.status, StatusCode::OK, "{}", quality.body);
    }
    // Clear errors: bad field 400, unknown source 400, unknown parameter 400, before data 404.
    for (uri, status, text) in [
        ("/curve?source=full&by=colour", StatusCode::BAD_REQUEST, "is not a field"),
        ("/curve?source=nope&by=onset", StatusCode::BAD_REQUEST, "no source named"),
        ("/curve?source=full&by=onset&asof=2026-03-04", StatusCode::BAD_REQUEST, "unknown query parameter"),
        ("/curve?source=full", StatusCode::BAD_REQUEST, "missing query parameter by"),
        ("/curve?source=full&by=onset&as_of=yesterday", StatusCode::BAD_REQUEST, "not an RFC 3339 time"),
        ("/curve?source=full&by=onset&as_of=2026-01-01", StatusCode::NOT_FOUND, "no applied snapshot"),
        ("/curve?source=full&by=onset&format=xml", StatusCode::BAD_REQUEST, "use json or csv"),
    ] {
        let answer = call(&router, "GET", &format!("{API_BASE}{uri}"), Some(&read), None).await;
        assert_eq!(answer.status, status, "{uri}: {}", answer.body);
        assert!(answer.json()["error"].as_str().unwrap().contains(text), "{uri}: {}", answer.body);
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn openapi_document_matches_the_routes() {
    let env = store_with_days(2, 20, 5);
    let config = Arc::new(env.config.clone());
    let sql = token(&config, "etl", "sql");
    let router = access::app_router(&config, None);
    let doc = call(&router, "GET", &format!("{API_BASE}/openapi.json"), None, None).await;
    assert_eq!(doc.status, StatusCode::OK);
    let doc = doc.json();
    assert_eq!(doc, openapi());
    assert!(doc["openapi"].as_str().unwrap().starts_with("3."));
    let paths = doc["paths"].as_object().unwrap();
    let mut documented: Vec<(String, String)> = Vec::new();
    for (path, ops) in paths {
        for method in ops.as_object().unwrap().keys() {
            documented.push((method.clone(), path.clone()));
        }
    }
    let mut routed: Vec<(String, String)> =
        ROUTES.iter().map(|r| (r.method.name().to_string(), format!("{API_BASE}{}", r.path))).collect();
    documented.sort();
    routed.sort();
    assert_eq!(documented, routed, "every route documented and every documented path routed");
    // Every documented operation answers (not 404/405) with its required parameters.
    for route in ROUTES {
        let op = &paths[&format!("{API_BASE}{}", route.path)][route.method.name()];
        let required: Vec<String> = op["parameters"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|p| p["required"] == true)
            .map(|p| {
                let name = p["name"].as_str().unwrap();
                let value = match name {
                    "source" => "full",
                    "by" | "from" => "onset",
                    "to" => "report",
                    other => panic!("no test value for {other}"),
                };
                format!("{name}={value}")
            })
            .collect();
        let uri = format!("{API_BASE}{}?{}", route.path, required.join("&"));
        let (method, body) = match route.method {
            Method::Get => ("GET", None),
            Method::Post => ("POST", Some(r#"{"sql": "SELECT 1 AS one"}"#)),
        };
        let answer = call(&router, method, &uri, Some(&sql), body).await;
        let fine = answer.status == StatusCode::OK
            || (matches!(route.handler, Handler::Listing(_))
                && answer.status == StatusCode::SERVICE_UNAVAILABLE);
        assert!(fine, "{method} {uri}: {} {}", answer.status, answer.body);
        if route.scope.is_some() {
            assert_eq!(
                call(&router, method, &uri, None, body).await.status,
                StatusCode::UNAUTHORIZED,
                "{uri}"
            );
        }
    }
    let unknown = call(&router, "GET", &format!("{API_BASE}/nothing-here"), Some(&sql), None).await;
    assert_eq!(unknown.status, StatusCode::NOT_FOUND);
}

/// The statements that must be refused or stopped, each with a word of the expected error.
fn hostile_sql(dir: &Path) -> Vec<(String, &'static str)> {
    let evil = dir.join("evil.db");
    vec![
        ("INSERT INTO source (name, kind, config_hash) VALUES ('x', 'folder', 'x')".into(), "INSERT"),
        ("UPDATE case_version SET onset_date = NULL".into(), "UPDATE"),
        ("DELETE FROM case_version".into(), "DELETE"),
        ("DROP TABLE case_version".into(), "changing the schema"),
        ("CREATE TABLE scratch (x)".into(), "CREATE"),
        (format!("ATTACH DATABASE '{}' AS evil", evil.display()), "ATTACH"),
        ("PRAGMA journal_mode=DELETE".into(), "PRAGMA journal_mode"),
        ("PRAGMA query_only=0".into(), "PRAGMA query_only"),
        ("SELECT load_extension('/usr/lib/x86_64-linux-gnu/libsqlite3.so.0')".into(), "load_extension"),
        ("VACUUM INTO '/tmp/tidemark-api-vacuum.db'".into(), "only statements that read"),
        (
            "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT count(*) FROM c".into(),
            "time limit",
        ),
        (
            "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c) SELECT x FROM c".into(),
            "row limit",
        ),
    ]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sql_endpoint_refuses_writes_and_stops_runaways() {
    let env = Env::with_sources(&[format!(
        "[serve]\nquery_timeout = \"1s\"\nquery_max_rows = 500\n{}",
        source_toml("full", "csv", "full", "")
    )]);
    let mut env = env;
    env.ingest("full", &extract(2, 30), day(2));
    let config = Arc::new(env.config.clone());
    let sql = token(&config, "etl", "sql");
    let router = access::app_router(&config, None);
    let uri = format!("{API_BASE}/query");
    let before = store_fingerprint(&config.store.path);
    for (statement, reason) in hostile_sql(env.dir.path()) {
        let body = serde_json::json!({ "sql": statement }).to_string();
        let started = Instant::now();
        let answer = call(&router, "POST", &uri, Some(&sql), Some(&body)).await;
        assert_eq!(answer.status, StatusCode::BAD_REQUEST, "{statement}: {}", answer.body);
        let message = answer.json()["error"].as_str().unwrap().to_string();
        assert!(message.contains(reason), "{statement}: {message}");
        assert!(started.elapsed() < Duration::from_secs(10), "{statement} took {:?}", started.elapsed());
        assert_eq!(store_fingerprint(&config.store.path), before, "{statement} changed the store");
    }
    assert!(!env.dir.path().join("evil.db").exists());
    assert!(!Path::new("/tmp/tidemark-api-vacuum.db").exists());
    // Bad bodies and oversize bodies are refused clearly.
    let bad = call(&router, "POST", &uri, Some(&sql), Some("SELECT 1")).await;
    assert_eq!(bad.status, StatusCode::BAD_REQUEST);
    let huge = serde_json::json!({ "sql": format!("SELECT '{}'", "x".repeat(100_000)) }).to_string();
    assert_eq!(
        call(&router, "POST", &uri, Some(&sql), Some(&huge)).await.status,
        StatusCode::PAYLOAD_TOO_LARGE
    );
    let csv = call(
        &router,
        "POST",
        &format!("{uri}?format=csv"),
        Some(&sql),
        Some(r#"{"sql": "SELECT count(*) AS n FROM current_case"}"#),
    )
    .await;
    assert_eq!(csv.body, "n\n30\n");
}

#[test]
fn query_command_refuses_writes_and_stops_runaways() {
    let mut env = Env::with_sources(&[source_toml("full", "csv", "full", "")]);
    env.ingest("full", &extract(2, 30), day(2));
    let before = store_fingerprint(&env.config.store.path);
    for (statement, reason) in hostile_sql(env.dir.path()) {
        let started = Instant::now();
        let (code, stdout, stderr) = run(tidemark().arg("--config").arg(&env.config_path).args([
            "query",
            &statement,
            "--timeout",
            "1s",
            "--max-rows",
            "500",
        ]));
        assert_eq!(code, 1, "{statement} was allowed: {stdout}");
        assert!(stderr.starts_with("error: ") && stderr.contains(reason), "{statement}: {stderr}");
        assert!(started.elapsed() < Duration::from_secs(20), "{statement} took {:?}", started.elapsed());
        assert_eq!(store_fingerprint(&env.config.store.path), before, "{statement} changed the store");
    }
    let (code, stdout, _) = run(tidemark().arg("--config").arg(&env.config_path).args([
        "query",
        "SELECT count(*) AS n FROM current_case",
        "--format",
        "csv",
    ]));
    assert_eq!((code, stdout.as_str()), (0, "n\n30\n"));
}

#[test]
fn every_stable_view_answers() {
    let env = store_with_days(4, 60, 20);
    let conn = env.db();
    let current = count(&conn, "SELECT count(*) FROM current_case WHERE source = 'full'");
    assert_eq!(current, 120);
    let summary =
        count(&conn, "SELECT count(*) FROM snapshot_summary WHERE source = 'full' AND status = 'applied'");
    assert_eq!(summary, 4);
    // The triangle's last cumulative count per reference date adds up to the current cases
    // with an onset date.
    let latest_cells = count(
        &conn,
        "SELECT sum(count) FROM (SELECT ref_date, count, row_number() OVER (PARTITION BY ref_date ORDER BY snapshot_id DESC) AS k
           FROM triangle_cell WHERE source = 'full' AND ref_field = 'onset_date' AND stratum_kind = 'all') WHERE k = 1",
    );
    let with_onset =
        count(&conn, "SELECT count(*) FROM current_case WHERE source = 'full' AND onset_date IS NOT NULL");
    assert_eq!(latest_cells, with_onset);
    let delay = count(&conn, "SELECT min(delay_days) FROM triangle_cell");
    assert!(delay >= 0, "{delay}");
    let latest_snapshot = count(&conn, "SELECT max(snapshot_id) FROM snapshot WHERE status = 'applied'");
    assert_eq!(count(&conn, "SELECT min(snapshot_id) FROM nowcast_latest"), latest_snapshot);
    assert!(count(&conn, "SELECT count(*) FROM nowcast_latest WHERE method = 'hazard'") > 0);
    assert_eq!(count(&conn, "SELECT min(snapshot_id) FROM delay_fit_latest"), latest_snapshot);
    assert!(count(&conn, "SELECT count(*) FROM delay_fit_latest WHERE rank = 1") > 0);
    // The documented as-of recipe: the line list at the second snapshot.
    let second = count(&conn, "SELECT snapshot_id FROM snapshot_summary WHERE seq = 2");
    let as_of = count(
        &conn,
        &format!(
            "SELECT count(*) FROM case_version WHERE valid_from <= {second} AND (valid_to IS NULL OR valid_to > {second})"
        ),
    );
    assert_eq!(as_of, 80);
}

/// A loopback server on a free port, serving `router` until the token is cancelled.
pub async fn loopback(router: axum::Router) -> (String, tokio_util::sync::CancellationToken) {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let base = format!("http://{}", listener.local_addr().unwrap());
    let shutdown = tokio_util::sync::CancellationToken::new();
    tokio::spawn(tidemark::serve::serve(listener, router, shutdown.clone()));
    (base, shutdown)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn over_a_loopback_socket() {
    let env = store_with_days(2, 30, 10);
    let config = Arc::new(env.config.clone());
    let read = token(&config, "analyst", "read");
    let (base, shutdown) = loopback(access::app_router(&config, None)).await;
    let client = reqwest::Client::new();
    let url = format!("{base}{API_BASE}/curve?source=full&by=onset");
    let response = client.get(&url).bearer_auth(&read).send().await.unwrap();
    assert_eq!(response.status(), StatusCode::OK);
    let rows: Value = serde_json::from_str(&response.text().await.unwrap()).unwrap();
    assert_eq!(sum_counts(&rows), 40);
    let none = client.get(&url).send().await.unwrap();
    assert_eq!(none.status(), StatusCode::UNAUTHORIZED);
    assert_eq!(none.headers()["www-authenticate"], "Bearer");
    let csv = client.get(format!("{url}&format=csv")).bearer_auth(&read).send().await.unwrap();
    assert!(csv.text().await.unwrap().starts_with("onset_date,count,snapshot_id\n"));
    shutdown.cancel();
}

/// 10 clients x 50 requests to curve and nowcast while snapshots are ingested: no errors,
/// and every curve adds up to exactly the case count of the snapshot it names (never a
/// partly applied one). The full-size run is `cargo bench --bench api_load`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn load_while_ingesting_sees_only_whole_snapshots() {
    let env = store_with_days(2, 2000, 300);
    let config = Arc::new(env.config.clone());
    let read = token(&config, "analyst", "read");
    let (base, shutdown) = loopback(access::app_router(&config, None)).await;
    let ingest_config = env.config.clone();
    let ingest = std::thread::spawn(move || {
        let mut store = crate::support::open_store(&ingest_config.store.path);
        let source = ingest_config.source("full").unwrap().clone();
        let dir = tempfile::tempdir().unwrap();
        for d in 2..6 {
            let path = dir.path().join(format!("full-{d}.csv"));
            std::fs::write(&path, extract(d + 2, 2000 + 300 * d as usize)).unwrap();
            tidemark::app::pipeline::ingest_file(
                &mut store,
                &ingest_config,
                &source,
                &path,
                Some(day(d + 2)),
            )
            .unwrap();
        }
    });
    let client = reqwest::Client::new();
    let mut tasks = Vec::new();
    for c in 0..10 {
        let (client, base, read) = (client.clone(), base.clone(), read.clone());
        tasks.push(tokio::spawn(async move {
            let mut seen = Vec::new();
            for i in 0..50 {
                let path = if (c + i) % 2 == 0 {
                    "curve?source=full&by=onset"
                } else {
                    "nowcast?source=full&by=onset&method=hazard"
                };
                let response =
                    client.get(format!("{base}{API_BASE}/{path}")).bearer_auth(&read).send().await.unwrap();
                let status = response.status();
                let body = response.text().await.unwrap();
                assert_eq!(status, StatusCode::OK, "{path}: {body}");
                let rows: Value = serde_json::from_str(&body).unwrap();
                let snapshot = rows[0]["snapshot_id"].as_i64().unwrap();
                if path.starts_with("curve") {
                    seen.push((snapshot, sum_counts(&rows)));
                }
            }
            seen
        }));
    }
    let mut seen = Vec::new();
    for task in tasks {
        seen.extend(task.await.unwrap());
    }
    ingest.join().unwrap();
    shutdown.cancel();
    let conn = env.db();
    for (snapshot, total) in &seen {
        let expected = count(
            &conn,
            &format!(
                "SELECT count(*) FROM case_version v JOIN snapshot n ON n.snapshot_id = {snapshot}
                 WHERE n.status = 'applied' AND v.source_id = n.source_id
                   AND v.valid_from <= {snapshot} AND (v.valid_to IS NULL OR v.valid_to > {snapshot})"
            ),
        );
        assert_eq!(*total, expected, "curve of snapshot {snapshot}");
    }
    assert_eq!(seen.len(), 250);
}
