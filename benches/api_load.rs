//! API load benchmark: 50 concurrent clients make 200 requests each to `curve` and `nowcast`
//! over a loopback socket while snapshots of a few thousand rows are ingested through the
//! store's writer on another thread. Prints the request count, errors, p50/p99 latency, and
//! checks that every curve adds up to exactly the case count of the snapshot it names (no
//! partly applied snapshot is ever visible). `cargo bench --bench api_load` (release), or
//! `cargo test --release --bench api_load`; `cargo test --bench api_load` runs it in the dev profile.

use std::sync::Arc;
use std::time::{Duration, Instant};

use serde_json::Value;

use tidemark::app::{access, ingest};
use tidemark::config::Config;
use tidemark::store::{Store, run_sql};

#[path = "support/machine.rs"]
mod machine;

const CLIENTS: usize = 50;
const REQUESTS: usize = 200;
const BASE_ROWS: usize = 3000;
const STEP_ROWS: usize = 300;
const INGESTS: usize = 6;

fn extract(d: i64, n: usize) -> String {
    let places = ["Amberlee", "Brackwater", "Corran Vale", "Dunhollow"];
    let start = chrono::NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
    let mut text = String::from("case_id,district,onset,reported,age,sex,symptoms\n");
    for i in 0..n {
        let onset = start + chrono::Duration::days((i as i64 * 7 + d) % (d + 1));
        let report =
            (onset + chrono::Duration::days(1 + (i as i64 % 2))).min(start + chrono::Duration::days(d));
        let sex = if i % 2 == 0 { "F" } else { "M" };
        text.push_str(&format!("C-{i:05},{},{onset},{report},{},{sex},cough\n", places[i % 4], 20 + i % 60));
    }
    text
}

fn as_of(d: i64) -> chrono::DateTime<chrono::Utc> {
    let date = chrono::NaiveDate::from_ymd_opt(2026, 3, 1).unwrap() + chrono::Duration::days(d);
    ingest::end_of_day(date)
}

const CONFIG: &str = r#"
[store]
path = "store/tidemark.db"
archive = "store/archive"

[[source]]
name = "county"
kind = "folder"
path = "incoming"
key = "case_id"
[source.fields]
jurisdiction = "district"
onset_date = "onset"
report_date = "reported"
age = "age"
sex = "sex"
symptoms = "symptoms"
[source.values.sex]
F = "female"
M = "male"
"#;

fn ingest_day(store: &mut Store, config: &Config, dir: &std::path::Path, d: i64) {
    let path = dir.join(format!("county-{d}.csv"));
    std::fs::write(&path, extract(d, BASE_ROWS + STEP_ROWS * d as usize)).unwrap();
    let source = config.source("county").unwrap();
    tidemark::app::pipeline::ingest_file(store, config, source, &path, Some(as_of(d))).unwrap();
}

fn percentile(sorted: &[Duration], p: f64) -> Duration {
    sorted[((sorted.len() as f64 - 1.0) * p).round() as usize]
}

fn hardware() -> String {
    let cpu = machine::cpu_model().unwrap_or_else(|| "unknown CPU".into());
    let cores = machine::cores();
    let profile = if cfg!(debug_assertions) { "dev profile (opt-level 1)" } else { "release build" };
    format!("{cores} cores ({cpu}), shared with other work; {profile}")
}

fn main() {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(dir.path().join("incoming")).unwrap();
    let config_path = dir.path().join("tidemark.toml");
    std::fs::write(&config_path, CONFIG).unwrap();
    let config = Config::load(&config_path).unwrap();
    {
        let mut store = Store::open(&config.store.path).unwrap();
        for d in 2..4 {
            ingest_day(&mut store, &config, dir.path(), d);
        }
    }
    let token = access::token_create(&config, "bench", tidemark::model::TokenScope::Read)
        .unwrap()
        .lines()
        .next()
        .unwrap()
        .to_string();
    let config = Arc::new(config);
    let runtime = tokio::runtime::Runtime::new().unwrap();
    let (seen, mut latencies, errors, took) = runtime.block_on(async {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let base = format!("http://{}/api/v1", listener.local_addr().unwrap());
        let shutdown = tokio_util::sync::CancellationToken::new();
        tokio::spawn(tidemark::serve::serve(listener, access::app_router(&config, None), shutdown.clone()));
        let ingest_config = config.clone();
        let ingest_dir = dir.path().to_path_buf();
        let ingest = std::thread::spawn(move || {
            let mut store = Store::open(&ingest_config.store.path).unwrap();
            for d in 4..4 + INGESTS as i64 {
                ingest_day(&mut store, &ingest_config, &ingest_dir, d);
            }
        });
        let client = reqwest::Client::new();
        let started = Instant::now();
        let mut tasks = Vec::new();
        for c in 0..CLIENTS {
            let (client, base, token) = (client.clone(), base.clone(), token.clone());
            tasks.push(tokio::spawn(async move {
                let (mut seen, mut latencies, mut errors) = (Vec::new(), Vec::new(), 0usize);
                for i in 0..REQUESTS {
                    let curve = (c + i) % 2 == 0;
                    let path = if curve {
                        "curve?source=county&by=onset"
                    } else {
                        "nowcast?source=county&by=onset&method=hazard"
                    };
                    let t = Instant::now();
                    let response = client.get(format!("{base}/{path}")).bearer_auth(&token).send().await;
                    let body = match response {
                        Ok(r) if r.status().is_success() => r.text().await.ok(),
                        _ => None,
                    };
                    latencies.push(t.elapsed());
                    let Some(body) = body else {
                        errors += 1;
                        continue;
                    };
                    let rows: Value = serde_json::from_str(&body).unwrap();
                    if curve {
                        let total: i64 =
                            rows.as_array().unwrap().iter().map(|r| r["count"].as_i64().unwrap()).sum();
                        seen.push((rows[0]["snapshot_id"].as_i64().unwrap(), total));
                    }
                }
                (seen, latencies, errors)
            }));
        }
        let (mut seen, mut latencies, mut errors) = (Vec::new(), Vec::new(), 0);
        for task in tasks {
            let (s, l, e) = task.await.unwrap();
            seen.extend(s);
            latencies.extend(l);
            errors += e;
        }
        let took = started.elapsed();
        ingest.join().unwrap();
        shutdown.cancel();
        (seen, latencies, errors, took)
    });
    let limits = tidemark::store::SqlLimits::default();
    let mut partial = 0;
    let mut snapshots = std::collections::BTreeSet::new();
    for (snapshot, total) in &seen {
        snapshots.insert(*snapshot);
        let sql = format!(
            "SELECT count(*) FROM case_version WHERE valid_from <= {snapshot} AND (valid_to IS NULL OR valid_to > {snapshot})"
        );
        let table = run_sql(&config.store.path, &sql, &limits).unwrap();
        if table.rows[0][0] != tidemark::table::Cell::Int(*total) {
            partial += 1;
        }
    }
    latencies.sort();
    println!(
        "api load: {CLIENTS} clients x {REQUESTS} requests (curve and nowcast, alternating) while {INGESTS} snapshots of {}-{} rows were ingested",
        BASE_ROWS + STEP_ROWS * 4,
        BASE_ROWS + STEP_ROWS * (3 + INGESTS)
    );
    println!(
        "  requests {}, errors {errors}, wall {:.1} s, {:.0} requests/s",
        latencies.len(),
        took.as_secs_f64(),
        latencies.len() as f64 / took.as_secs_f64()
    );
    println!(
        "  latency p50 {:.1} ms, p99 {:.1} ms, max {:.1} ms",
        percentile(&latencies, 0.5).as_secs_f64() * 1e3,
        percentile(&latencies, 0.99).as_secs_f64() * 1e3,
        latencies.last().unwrap().as_secs_f64() * 1e3
    );
    println!(
        "  curve responses {} over {} distinct snapshots; partial snapshots seen: {partial}",
        seen.len(),
        snapshots.len()
    );
    println!("  hardware: {}", hardware());
    assert_eq!(errors, 0, "requests failed");
    assert_eq!(partial, 0, "a curve did not match its snapshot");
}
