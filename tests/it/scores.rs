//! Continuous scoring of the stored nowcasts on a store fed a daily full extract: scores
//! appear only once their truth has matured, `--as-of` sees no later score (no look-ahead),
//! `auto` and its reason are the same through the CLI, the API and the dashboard, an ad hoc
//! backtest changes none of it, a reversed backtest range is a usage error, and a
//! report-date nowcast whose completeness is 1 says exactly the observed count. The feed is
//! invented and deterministic.

use std::sync::Arc;

use axum::body::Body;
use axum::http::{Request, StatusCode};
use chrono::{Duration, NaiveDate};
use serde_json::Value;
use tower::ServiceExt;

use tidemark::app::access;
use tidemark::app::commands::{self, BacktestArgs, NowcastArgs, ScoresArgs};
use tidemark::model::MethodChoice;
use tidemark::serve::routes::API_BASE;
use tidemark::table::OutputFormat;

use crate::api::token;
use crate::support::{Env, count, day, run, source_toml, tidemark};

/// Days of truth maturation (`analysis.backtest_lag`) in this store.
const LAG: i64 = 7;
/// Daily extracts ingested.
const DAYS: i64 = 24;

/// The analysis settings of the test: a short lag and delay, few draws, no delay fits.
const ANALYSIS: &str = r#"
[analysis]
reference_fields = ["onset_date", "report_date"]
strata = ["jurisdiction"]
max_delay = 7
backtest_lag = 7
window = 21
draws = 200
delays = []
bootstrap = 10
"#;

/// The full extract of day `s` (days after 2026-03-01): every case reported by then. Onset
/// day t has 6-12 cases, each reported 0-5 days after onset.
fn extract(s: i64) -> String {
    let start = NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
    let places = ["Amberlee", "Brackwater"];
    let mut rows = Vec::new();
    for t in 0..=s {
        for k in 0..(6 + (t * 5) % 7) {
            let delay = (t * 3 + k * 5) % 6;
            if t + delay > s {
                continue;
            }
            let onset = start + Duration::days(t);
            let report = onset + Duration::days(delay);
            let sex = if k % 2 == 0 { "F" } else { "M" };
            rows.push(format!(
                "C-{t:03}-{k:02},{},{onset},{report},{},{sex},cough",
                places[k as usize % 2],
                20 + k
            ));
        }
    }
    crate::support::csv(&rows.iter().map(String::as_str).collect::<Vec<_>>())
}

fn feed() -> Env {
    Env::with_sources(&[source_toml("full", "csv", "full", ""), ANALYSIS.to_string()])
}

fn scores_text(env: &Env, as_of: Option<&str>, format: OutputFormat) -> String {
    let args = ScoresArgs { source: "full", by: "onset", as_of };
    commands::scores(&env.config, &args, format).unwrap()
}

fn auto_nowcast(env: &Env, by: &str, as_of: Option<&str>) -> Value {
    let args = NowcastArgs {
        source: "full",
        by,
        as_of,
        method: MethodChoice::Auto,
        stratify: None,
        format: OutputFormat::Json,
    };
    serde_json::from_str(&commands::nowcast(&env.config, &args).unwrap()).unwrap()
}

/// The one `method_choice` text of a nowcast listing.
fn reason(rows: &Value) -> String {
    let rows = rows.as_array().unwrap();
    assert!(!rows.is_empty());
    let text = rows[0]["method_choice"].as_str().unwrap().to_string();
    assert!(rows.iter().all(|r| r["method_choice"] == text.as_str()));
    text
}

async fn get(router: &axum::Router, uri: &str, token: &str) -> (StatusCode, String) {
    let request = Request::builder()
        .uri(uri)
        .header("authorization", format!("Bearer {token}"))
        .body(Body::empty())
        .unwrap();
    let response = router.clone().oneshot(request).await.unwrap();
    let status = response.status();
    let bytes = axum::body::to_bytes(response.into_body(), 1 << 24).await.unwrap();
    (status, String::from_utf8_lossy(&bytes).into_owned())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn stored_nowcasts_are_scored_when_their_truth_matures_and_drive_auto() {
    let mut env = feed();
    let scored = |env: &Env| count(&env.db(), "SELECT count(*) FROM nowcast_score");
    for s in 0..LAG {
        env.ingest("full", &extract(s), day(s));
    }
    assert_eq!(scored(&env), 0, "no nowcast is a lag old yet");
    let early = reason(&auto_nowcast(&env, "onset", None));
    assert!(early.contains("fewer than 7 forecast days have matured") && early.contains("smooth"), "{early}");
    env.ingest("full", &extract(LAG), day(LAG));
    assert!(scored(&env) > 0, "the nowcasts of the first snapshot are scored a lag later");
    // Every score is of a nowcast made at least the lag before the snapshot that scored it.
    let conn = env.db();
    let too_early = count(
        &conn,
        "SELECT count(*) FROM nowcast_score WHERE julianday(scored_day) - julianday(forecast_day) < 7",
    );
    assert_eq!(too_early, 0);
    drop(conn);

    for s in LAG + 1..=12 {
        env.ingest("full", &extract(s), day(s));
    }
    let then = "2026-03-13";
    let scores_then = scores_text(&env, None, OutputFormat::Csv);
    let auto_then = auto_nowcast(&env, "onset", None);
    for s in 13..DAYS {
        env.ingest("full", &extract(s), day(s));
    }
    // No look-ahead: as of day 12 everything reads as it did on day 12.
    assert_eq!(scores_text(&env, Some(then), OutputFormat::Csv), scores_then);
    assert_eq!(auto_nowcast(&env, "onset", Some(then)), auto_then);
    let now = auto_nowcast(&env, "onset", None);
    let chosen = reason(&now);
    assert!(chosen.contains("matured forecast days"), "chosen by scores at the end: {chosen}");

    // The API and the dashboard say the same.
    let config = Arc::new(env.config.clone());
    let read = token(&config, "analyst", "read");
    let router = access::app_router(&config, None);
    let (status, body) =
        get(&router, &format!("{API_BASE}/nowcast?source=full&by=onset&method=auto"), &read).await;
    assert_eq!(status, StatusCode::OK, "{body}");
    assert_eq!(serde_json::from_str::<Value>(&body).unwrap(), now);
    let (status, body) =
        get(&router, &format!("{API_BASE}/scores?source=full&by=onset&format=csv"), &read).await;
    assert_eq!(status, StatusCode::OK, "{body}");
    assert_eq!(body, scores_text(&env, None, OutputFormat::Csv));
    let (status, page) = get(&router, "/sources/full", &read).await;
    assert_eq!(status, StatusCode::OK, "{page}");
    let mut capitalised = chosen.clone();
    capitalised[..1].make_ascii_uppercase();
    let page = page.replace("&#39;", "'").replace("&#x27;", "'").replace("&apos;", "'");
    assert!(page.contains(&capitalised), "the dashboard names the same choice: {chosen}");

    // An ad hoc backtest changes neither the scores nor the choice.
    let args = BacktestArgs {
        source: "full",
        by: "onset",
        from: Some("2026-03-05"),
        to: Some("2026-03-09"),
        lag: Some(3),
        format: OutputFormat::Csv,
    };
    commands::backtest(&env.config, &args).unwrap();
    assert_eq!(auto_nowcast(&env, "onset", None), now);
    let backtests = count(&env.db(), "SELECT count(*) FROM backtest");
    // A reversed range is a usage error that stores nothing.
    let (code, _, err) = run(tidemark().args([
        "--config",
        env.config_path.to_str().unwrap(),
        "backtest",
        "--source",
        "full",
        "--by",
        "onset",
        "--from",
        "2026-03-10",
        "--to",
        "2026-03-05",
    ]));
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("--from") && err.contains("--to"), "{err}");
    assert_eq!(count(&env.db(), "SELECT count(*) FROM backtest"), backtests);

    // A report-date nowcast is complete where it says so.
    for row in auto_nowcast(&env, "report", None).as_array().unwrap() {
        let completeness = row["completeness"].as_f64().unwrap();
        if completeness >= 0.9995 {
            for bound in ["median", "lower90", "upper90"] {
                assert_eq!(row[bound], row["observed"], "completeness 1 means the count is final: {row}");
            }
        }
    }
}
