//! A daemon catching up on a 30-day backlog pages once: the real daemon takes thirty daily
//! extracts, all older than the catch-up age, waiting in its folder (the last one truncated,
//! so the guard holds it and the `held_snapshot` alert opens), evaluates the rules, holds
//! their messages, and sends one digest per channel through a real SMTP server
//! (mailin-embedded) and a real webhook receiver on loopback once the held messages have
//! waited `digest_wait` with no catch-up pass ending it.

use std::collections::HashMap;
use std::fs;
use std::net::TcpListener as StdListener;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use axum::body::Bytes;
use axum::extract::State;
use axum::http::StatusCode;
use chrono::{Days, Utc};
use tidemark::app::daemon::{self, Hooks};
use tidemark::config::Config;
use tokio_util::sync::CancellationToken;

use crate::support::{Mailbox, count, open_ro};

async fn receive(State(bodies): State<Arc<Mutex<Vec<String>>>>, body: Bytes) -> StatusCode {
    bodies.lock().unwrap().push(String::from_utf8_lossy(&body).into_owned());
    StatusCode::OK
}

/// A full extract of `n` invented records reported over the days before `date`.
fn extract(n: usize, date: chrono::NaiveDate) -> String {
    let mut text = String::from("id,district,onset,reported\n");
    for i in 0..n {
        let reported = date - Days::new((i % 20) as u64);
        let onset = reported - Days::new(2 + (i % 3) as u64);
        text.push_str(&format!("R-{i:05},{},{onset},{reported}\n", ["Amberlee", "Brackwater"][i % 2]));
    }
    text
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_thirty_day_backlog_sends_one_digest_per_channel() {
    let dir = tempfile::tempdir().unwrap();
    let inbox = dir.path().join("inbox");
    fs::create_dir_all(&inbox).unwrap();
    let today = Utc::now().date_naive();
    // Thirty daily extracts ending three days ago (older than the catch-up age); the last
    // one is truncated, so whichever of them the coalescing pipeline analyses, the held
    // last one is among them.
    for back in 0..30u64 {
        let date = today - Days::new(32 - back);
        let rows = if back == 29 { 60 } else { 300 + 10 * back as usize };
        fs::write(inbox.join(format!("county-{date}.csv")), extract(rows, date)).unwrap();
    }

    let smtp = StdListener::bind("127.0.0.1:0").unwrap();
    let smtp_port = smtp.local_addr().unwrap().port();
    let mailbox = Mailbox::serve(smtp);
    let hooks_received = Arc::new(Mutex::new(Vec::new()));
    let router =
        axum::Router::new().route("/hook", axum::routing::post(receive)).with_state(hooks_received.clone());
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let hook_port = listener.local_addr().unwrap().port();
    tokio::spawn(async move { axum::serve(listener, router).await.unwrap() });

    let text = format!(
        "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n\
         [[source]]\nname = \"county\"\nkind = \"folder\"\npath = \"inbox\"\npattern = \"*.csv\"\n\
         schedule = \"0 0 0 1 1 *\"\nsettle = \"150ms\"\nas_of = \"name:%Y-%m-%d\"\nkey = \"id\"\n\
         [source.fields]\nonset_date = \"onset\"\nreport_date = \"reported\"\njurisdiction = \"district\"\n\
         [alert]\nretry_base = \"1s\"\ndigest_wait = \"3s\"\n\
         [alert.email]\nsmtp = \"127.0.0.1:{smtp_port}\"\ntls = \"none\"\nfrom = \"tidemark@health.example\"\n\
         to = [\"oncall@health.example\"]\nmin_severity = \"info\"\n\
         [alert.webhook]\nurl = \"http://127.0.0.1:{hook_port}/hook\"\nmin_severity = \"info\"\n"
    );
    let config = Arc::new(Config::parse(&text, &dir.path().join("t.toml")).unwrap());
    let store = config.store.path.clone();
    let shutdown = CancellationToken::new();
    let hooks = Hooks { events: None, nudges: HashMap::new(), analysed: None, analysis_gate: None };
    let task = tokio::spawn(daemon::run(config, shutdown.clone(), hooks, None));

    // Wait until every extract is in, nothing is owed, and the outbox is empty.
    let deadline = Instant::now() + Duration::from_secs(180);
    let mut last = (0, 0, 0, 0);
    loop {
        assert!(Instant::now() < deadline, "the backlog was not worked off in time: {last:?}");
        tokio::time::sleep(Duration::from_millis(500)).await;
        if !store.exists() {
            continue;
        }
        let db = open_ro(&store);
        let snapshots = count(&db, "SELECT count(*) FROM snapshot");
        let owed = count(&db, "SELECT count(*) FROM analysis_owed WHERE state IN ('pending', 'failed')");
        let undelivered =
            count(&db, "SELECT count(*) FROM outbox WHERE delivered_at IS NULL AND dead_at IS NULL");
        let digests = count(&db, "SELECT count(*) FROM alert_event WHERE kind = 'digest'");
        last = (snapshots, owed, undelivered, digests);
        if snapshots == 30 && owed == 0 && undelivered == 0 && digests > 0 {
            break;
        }
    }
    tokio::time::sleep(Duration::from_secs(3)).await;
    shutdown.cancel();
    task.await.unwrap().unwrap();

    let db = open_ro(&store);
    assert_eq!(count(&db, "SELECT count(*) FROM snapshot WHERE status = 'held'"), 1);
    let held_alerts = count(&db, "SELECT count(*) FROM alert WHERE rule = 'held_snapshot'");
    assert!(held_alerts >= 1, "the truncated extract raised its alert");
    assert!(
        count(&db, "SELECT count(*) FROM alert_event WHERE held = 1") >= 1,
        "the alert's message was held"
    );
    assert_eq!(count(&db, "SELECT count(*) FROM alert_event WHERE held = 1 AND digest_event_id IS NULL"), 0);

    let hooks = hooks_received.lock().unwrap().clone();
    assert_eq!(hooks.len(), 1, "one webhook for the whole backlog: {hooks:#?}");
    let digest: serde_json::Value = serde_json::from_str(&hooks[0]).unwrap();
    assert_eq!(digest["kind"], "digest");
    let opened = digest["opened"].as_array().unwrap();
    let held = opened.iter().find(|a| a["rule"] == "held_snapshot").expect("the held extract is listed");
    assert!(held["data_day"].as_str().unwrap().len() == 10, "with its data day: {held}");
    assert!(digest["caution"].as_str().unwrap().contains("not a confirmed"));

    let mails = mailbox.messages.lock().unwrap().clone();
    assert_eq!(mails.len(), 1, "one email for the whole backlog");
    let mail = mails[0].replace("=\r\n", "");
    assert!(mail.contains("[tidemark digest] catch-up:"), "{mail}");
    assert!(mail.contains("held_snapshot"));
}
