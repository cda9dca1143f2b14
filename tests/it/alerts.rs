//! Alerts end to end with real parts: the lifecycle on a real SQLite file (dedupe, re-send,
//! acknowledge, resolve after M clear evaluations); a held snapshot raising an alert whose
//! message goes through the outbox to a real HTTP receiver on loopback (signature checked
//! with HMAC-SHA256 here, idempotency key checked, slow then 500 then 200) and to a real
//! SMTP server (mailin-embedded) that is down first and up later; and a privacy scan of
//! every delivered message for every case key and patient field value in the store.

use std::collections::VecDeque;
use std::net::TcpListener as StdListener;
use std::sync::{Arc, Mutex};
use std::time::Duration;

use axum::body::Bytes;
use axum::extract::State;
use axum::http::{HeaderMap, StatusCode};
use chrono::{DateTime, Utc};
use hmac::{Hmac, KeyInit, Mac};
use sha2::Sha256;

use tidemark::app::alerting::{
    channels_for, deliver_due, delivery_client, flush_scheduled_digests, scheduled_channels_for,
};
use tidemark::app::writer;
use tidemark::store::alerts::{Cleared, Delivery, Evaluation, Finding, Lifecycle, MessageFacts};

use crate::support::{Env, Mailbox, config_toml, count, day, open_store, source_toml, write_config};

const SECRET_ENV: &str = "TIDEMARK_IT_ALERT_HOOK_SECRET";
const SECRET: &str = "it-secret-4f1c";

/// Sets the webhook secret for this test process. `set_var` is unsafe in Rust 2024 because
/// another thread may read the environment at the same time; every test here sets the
/// same value, so a concurrent read sees either nothing or this value.
#[allow(unsafe_code)]
fn set_secret() {
    unsafe { std::env::set_var(SECRET_ENV, SECRET) };
}

fn free_port() -> u16 {
    StdListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

/// Invented records with dates in February and ages that are unlikely figures.
fn rows(n: usize) -> String {
    let ages = [47, 58, 63, 29, 71];
    let mut text = String::from("case_id,district,onset,reported,age,sex,symptoms\n");
    for i in 0..n {
        let district = ["Amberlee", "Brackwater"][i % 2];
        text.push_str(&format!(
            "K-{:04},{district},2026-02-{:02},2026-02-{:02},{},F,cough\n",
            7001 + i,
            1 + i % 9,
            11 + i % 9,
            ages[i % ages.len()]
        ));
    }
    text
}

fn env_with(alert: &str) -> Env {
    let mut env = Env::with_sources(&[source_toml("feed", "csv", "full", "")]);
    let text = format!("{}\n{alert}", config_toml(&[source_toml("feed", "csv", "full", "")]));
    let (path, config) = write_config(env.dir.path(), &text);
    env.config_path = path;
    env.config = config;
    env
}

/// 60 records, then a 6-record extract that the truncated-feed guard holds: one critical
/// `held_snapshot` alert.
fn raise_held_alert(env: &mut Env) {
    env.ingest("feed", &rows(60), day(0));
    let held = env.ingest("feed", &rows(6), day(1));
    assert_eq!(held.status.name(), "held");
    let db = env.db();
    assert_eq!(count(&db, "SELECT count(*) FROM alert WHERE rule = 'held_snapshot' AND state = 'open'"), 1);
}

/// Every case key and patient field value in the store, as text tokens.
fn patient_tokens(env: &Env) -> Vec<String> {
    let db = env.db();
    let mut stmt = db
        .prepare(
            "SELECT case_key, onset_date, report_date, CAST(CAST(age_lo AS INTEGER) AS TEXT), jurisdiction || '-' || case_key
             FROM case_version",
        )
        .unwrap();
    let mut tokens: Vec<String> = stmt
        .query_map([], |r| {
            Ok(vec![
                r.get::<_, String>(0)?,
                r.get::<_, Option<String>>(1)?.unwrap_or_default(),
                r.get::<_, Option<String>>(2)?.unwrap_or_default(),
                r.get::<_, Option<String>>(3)?.unwrap_or_default(),
            ])
        })
        .unwrap()
        .flat_map(|r| r.unwrap())
        .filter(|t| !t.is_empty())
        .collect();
    tokens.sort();
    tokens.dedup();
    assert!(tokens.iter().any(|t| t == "47") && tokens.iter().any(|t| t == "K-7001"));
    tokens
}

/// Fails if any message contains a patient token as a whole token (a figure 0.47 is not
/// the age 47; the date 2026-02-01 is found inside 2026-02-01T00:00:00Z; the minute of a
/// time 21:47:05 is not the age 47 either).
fn assert_private(messages: &[String], tokens: &[String]) {
    for message in messages {
        let message = &join_clock_times(message);
        let words: Vec<&str> =
            message.split(|c: char| !(c.is_ascii_alphanumeric() || c == '-' || c == '.')).collect();
        for token in tokens {
            let dated = token.len() == 10 && message.contains(token.as_str());
            assert!(
                !dated && !words.contains(&token.as_str()),
                "a message carries the patient value {token:?}"
            );
        }
    }
}

/// A colon between two digits (a clock time) becomes a letter, so a time is one word.
fn join_clock_times(message: &str) -> String {
    let chars: Vec<char> = message.chars().collect();
    let digit = |i: Option<&char>| i.is_some_and(|c| c.is_ascii_digit());
    (0..chars.len())
        .map(|i| {
            let clock = chars[i] == ':' && i > 0 && digit(chars.get(i - 1)) && digit(chars.get(i + 1));
            if clock { 'h' } else { chars[i] }
        })
        .collect()
}

/// A finding of `rule` for the whole of source `feed`.
fn finding(rule: &str, severity: tidemark::model::Severity) -> Finding {
    Finding {
        fingerprint: format!("{rule}|feed|"),
        rule: rule.parse().unwrap(),
        source: "feed".into(),
        subject: String::new(),
        severity,
        summary: format!("{rule} fired"),
        figures: "{}".into(),
        snapshot_id: None,
    }
}

/// Routing without digest schedules: no channel waits for one.
fn no_schedule(_: tidemark::model::Severity) -> Vec<&'static str> {
    Vec::new()
}

#[test]
fn lifecycle_dedupes_resends_acknowledges_and_resolves() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("store.db");
    let mut store = open_store(&path);
    let t0: DateTime<Utc> = "2026-03-01T08:00:00Z".parse().unwrap();
    let at = |hours: i64| t0 + chrono::Duration::hours(hours);
    let life = |now| Lifecycle { now, snapshot_id: None, resend_after: Duration::from_secs(6 * 3600) };
    let route = |_: tidemark::model::Severity| vec!["webhook"];
    let payload = |f: &MessageFacts| format!("{{\"event_id\":{},\"kind\":\"{}\"}}", f.event_id, f.kind);
    let delivery = Delivery { route: &route, payload: &payload, hold: false, scheduled: &no_schedule };
    let finding = Finding {
        fingerprint: "volume_drop|feed|".into(),
        rule: "volume_drop".parse().unwrap(),
        source: "feed".into(),
        subject: String::new(),
        severity: tidemark::model::Severity::Warning,
        summary: "12 new records, baseline median 40".into(),
        figures: "{\"new\":12}".into(),
        snapshot_id: None,
    };
    let fp = &Evaluation {
        clear: vec![Cleared { fingerprint: finding.fingerprint.clone(), resolve_after: 3 }],
        ..Evaluation::default()
    };
    let found = &Evaluation { findings: vec![finding.clone()], ..Evaluation::default() };
    let first = store.apply_findings(found, &life(at(0)), &delivery).unwrap();
    assert_eq!((first.opened, first.enqueued), (1, 1));
    let again = store.apply_findings(found, &life(at(1)), &delivery).unwrap();
    assert_eq!((again.opened, again.updated, again.resent), (0, 1, 0), "deduplicated, not re-sent yet");
    let later = store.apply_findings(found, &life(at(7)), &delivery).unwrap();
    assert_eq!(later.resent, 1, "re-sent after 6 h unacknowledged");
    let alert_id: i64 = {
        let db = crate::support::open_ro(&path);
        db.query_row("SELECT alert_id FROM alert", [], |r| r.get(0)).unwrap()
    };
    store.ack_alert(alert_id, "looking into it", at(8)).unwrap();
    let acked = store.apply_findings(found, &life(at(20)), &delivery).unwrap();
    assert_eq!(acked.resent, 0, "an acknowledged alert is not re-sent");
    for hours in [21, 22] {
        let clear = store.apply_findings(fp, &life(at(hours)), &delivery).unwrap();
        assert_eq!(clear.resolved, 0);
    }
    let resolved = store.apply_findings(fp, &life(at(23)), &delivery).unwrap();
    assert_eq!(resolved.resolved, 1, "resolved after 3 clear evaluations");
    let reopened = store.apply_findings(found, &life(at(24)), &delivery).unwrap();
    assert_eq!(reopened.opened, 1, "a new alert once the old one is resolved");
    let db = crate::support::open_ro(&path);
    assert_eq!(count(&db, "SELECT count(*) FROM alert"), 2);
    assert_eq!(count(&db, "SELECT count(*) FROM alert_open"), 1);
    let kinds: Vec<String> = db
        .prepare("SELECT kind FROM alert_event ORDER BY event_id")
        .unwrap()
        .query_map([], |r| r.get(0))
        .unwrap()
        .map(|r| r.unwrap())
        .collect();
    assert_eq!(kinds, ["opened", "resent", "acknowledged", "resolved", "opened"]);
    assert_eq!(count(&db, "SELECT count(*) FROM outbox"), 4, "opened, resent, resolved, opened");
    assert!(store.ack_alert(999, "x", at(25)).is_err());
}

/// One episode, one page: a live alert is sent again when it reaches a higher severity than
/// it had, once, and not when it falls back and rises to that peak again; a count episode
/// needs its own number of clear evaluations; every outcome, "not enough data" included, is
/// kept in `rule_status`.
#[test]
fn a_live_alert_pages_again_only_on_a_new_peak_severity() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("store.db");
    let mut store = open_store(&path);
    let t0: DateTime<Utc> = "2026-03-01T08:00:00Z".parse().unwrap();
    let life = |hours: i64| Lifecycle {
        now: t0 + chrono::Duration::hours(hours),
        snapshot_id: None,
        resend_after: Duration::from_secs(24 * 3600),
    };
    let route = |_: tidemark::model::Severity| vec!["webhook"];
    let payload = |f: &MessageFacts| format!("{{\"event_id\":{},\"kind\":\"{}\"}}", f.event_id, f.kind);
    let delivery = Delivery { route: &route, payload: &payload, hold: false, scheduled: &no_schedule };
    let rule: tidemark::model::Rule = "count_z_guarded".parse().unwrap();
    let fingerprint = tidemark::alert::fingerprint(rule, "feed", "North");
    assert_eq!(fingerprint, "count|feed|North", "the count rules of a subject share one episode");
    let at_severity = |severity| Evaluation {
        findings: vec![Finding {
            fingerprint: fingerprint.clone(),
            rule,
            source: "feed".into(),
            subject: "North".into(),
            severity,
            summary: "a rise".into(),
            figures: "{}".into(),
            snapshot_id: None,
        }],
        ..Evaluation::default()
    };
    use tidemark::model::Severity::{Critical, Warning};
    let mut kinds = Vec::new();
    for (hour, severity) in [(0, Warning), (1, Critical), (2, Warning), (3, Critical)] {
        let outcome = store.apply_findings(&at_severity(severity), &life(hour), &delivery).unwrap();
        kinds.push((outcome.opened, outcome.resent));
    }
    assert_eq!(kinds, [(1, 0), (0, 1), (0, 0), (0, 0)], "escalated once, at the first critical");
    let undecided = tidemark::store::alerts::RuleStatus {
        fingerprint: fingerprint.clone(),
        rule,
        source: "feed".into(),
        subject: "North".into(),
        outcome: "not_enough_data",
        reason: Some("needs 10 known days of counts, has 4 days".into()),
    };
    let clear = Evaluation {
        clear: vec![Cleared { fingerprint: fingerprint.clone(), resolve_after: 7 }],
        statuses: vec![undecided],
        ..Evaluation::default()
    };
    let resolved: Vec<usize> =
        (4..11).map(|hour| store.apply_findings(&clear, &life(hour), &delivery).unwrap().resolved).collect();
    assert_eq!(resolved, [0, 0, 0, 0, 0, 0, 1], "a count episode resolves after 7 clear evaluations");
    let db = crate::support::open_ro(&path);
    let severity: String = db.query_row("SELECT severity FROM alert", [], |r| r.get(0)).unwrap();
    assert_eq!(severity, "critical", "an episode keeps its peak severity");
    let events = count(&db, "SELECT count(*) FROM alert_event WHERE kind = 'escalated'");
    assert_eq!(events, 1);
    let reason: String = db
        .query_row("SELECT reason FROM rule_status WHERE outcome = 'not_enough_data'", [], |r| r.get(0))
        .unwrap();
    assert!(reason.starts_with("needs 10 known days"));
}

/// Held messages (a catch-up) go out as one digest per channel, each listing only the
/// alerts routed to it, in one transaction that marks the held events as sent.
#[test]
fn held_messages_go_out_as_one_digest_per_channel() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("store.db");
    let mut store = open_store(&path);
    let now: DateTime<Utc> = "2026-03-01T08:00:00Z".parse().unwrap();
    let life = Lifecycle { now, snapshot_id: None, resend_after: Duration::from_secs(3600) };
    use tidemark::model::Severity::{Critical, Info};
    // Email takes critical only; the webhook takes everything.
    let route =
        |s: tidemark::model::Severity| if s == Critical { vec!["email", "webhook"] } else { vec!["webhook"] };
    let payload = |f: &MessageFacts| format!("{{\"event_id\":{}}}", f.event_id);
    let evaluation = Evaluation {
        findings: vec![finding("held_snapshot", Critical), finding("volume_drop", Info)],
        ..Evaluation::default()
    };
    let held = Delivery { route: &route, payload: &payload, hold: true, scheduled: &no_schedule };
    let outcome = store.apply_findings(&evaluation, &life, &held).unwrap();
    assert_eq!((outcome.opened, outcome.enqueued, outcome.held), (2, 0, 2));
    assert!(store.digest_pending().unwrap());
    let digest = |facts: &tidemark::store::alerts::DigestFacts| {
        let rules: Vec<&str> = facts.opened.iter().map(|i| i.rule.as_str()).collect();
        format!("{}:{}", facts.channel, rules.join(","))
    };
    assert_eq!(store.flush_digest(now, &route, &digest).unwrap(), 2);
    assert!(!store.digest_pending().unwrap());
    let db = crate::support::open_ro(&path);
    let mut stmt = db
        .prepare("SELECT o.channel, e.payload FROM outbox o JOIN alert_event e USING (event_id) ORDER BY o.channel")
        .unwrap();
    let rows: Vec<(String, String)> =
        stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?))).unwrap().map(|r| r.unwrap()).collect();
    assert_eq!(
        rows,
        [
            ("email".to_string(), "email:held_snapshot".to_string()),
            ("webhook".to_string(), "webhook:held_snapshot,volume_drop".to_string())
        ]
    );
    assert_eq!(store.flush_digest(now, &route, &digest).unwrap(), 0, "nothing held any more");
}

/// Missingness per jurisdiction: a feed that stops sending onset dates for one small
/// jurisdiction (too small to move the source's share by the minimum effect) raises
/// `missingness_jump` for `onset_date (Brackwater)` only; a share that jumps for the whole
/// source is reported once, for the source.
#[test]
fn missingness_is_watched_per_jurisdiction_too() {
    let mut env = env_with("");
    let extract = |day_index: usize, blank_in: &[&str]| {
        let mut text = String::from("case_id,district,onset,reported,age,sex,symptoms\n");
        for i in 0..1_100 {
            let district = if i < 1_000 { "Amberlee" } else { "Brackwater" };
            let onset = if blank_in.contains(&district) { String::new() } else { "2026-02-20".into() };
            text.push_str(&format!("D{day_index}-{i:05},{district},{onset},2026-02-25,40,F,cough\n"));
        }
        text
    };
    let mut rows = String::new();
    for d in 0..8 {
        let day_rows = extract(d, &[]);
        rows.push_str(if d == 0 { &day_rows } else { day_rows.split_once('\n').unwrap().1 });
        env.ingest("feed", &rows, day(d as i64));
    }
    let subjects = |env: &Env| -> Vec<String> {
        let db = env.db();
        let mut stmt = db
            .prepare("SELECT subject FROM alert WHERE rule = 'missingness_jump' ORDER BY alert_id")
            .unwrap();
        stmt.query_map([], |r| r.get(0)).unwrap().map(|r| r.unwrap()).collect()
    };
    assert!(subjects(&env).is_empty(), "a steady feed raises nothing");
    rows.push_str(extract(8, &["Brackwater"]).split_once('\n').unwrap().1);
    env.ingest("feed", &rows, day(8));
    assert_eq!(subjects(&env), ["onset_date (Brackwater)"], "one jurisdiction broke");
    rows.push_str(extract(9, &["Amberlee", "Brackwater"]).split_once('\n').unwrap().1);
    env.ingest("feed", &rows, day(9));
    let now = subjects(&env);
    assert_eq!(now.iter().filter(|s| *s == "onset_date").count(), 1, "the source's share jumped: {now:?}");
    assert!(!now.iter().any(|s| s == "onset_date (Amberlee)"), "reported once, for the source: {now:?}");
}

/// What the loopback receiver does with the next request.
#[derive(Debug, Clone, Copy)]
enum Answer {
    SlowOk,
    Error500,
    Ok,
}

#[derive(Debug, Default)]
struct Received {
    script: VecDeque<Answer>,
    /// (idempotency key, signature valid, body) of every request.
    requests: Vec<(String, bool, String)>,
}

async fn hook(State(state): State<Arc<Mutex<Received>>>, headers: HeaderMap, body: Bytes) -> StatusCode {
    let key = headers.get("idempotency-key").and_then(|v| v.to_str().ok()).unwrap_or_default().to_string();
    let signature = headers.get("x-tidemark-signature").and_then(|v| v.to_str().ok()).unwrap_or_default();
    let mut mac = <Hmac<Sha256> as KeyInit>::new_from_slice(SECRET.as_bytes()).unwrap();
    mac.update(&body);
    let expected: String = mac.finalize().into_bytes().iter().map(|b| format!("{b:02x}")).collect();
    let valid = signature == format!("sha256={expected}");
    let answer = {
        let mut s = state.lock().unwrap();
        s.requests.push((key, valid, String::from_utf8_lossy(&body).into_owned()));
        s.script.pop_front().unwrap_or(Answer::Ok)
    };
    match answer {
        Answer::SlowOk => {
            tokio::time::sleep(Duration::from_secs(3)).await;
            StatusCode::OK
        }
        Answer::Error500 => StatusCode::INTERNAL_SERVER_ERROR,
        Answer::Ok => StatusCode::OK,
    }
}

async fn start_receiver(script: &[Answer]) -> (u16, Arc<Mutex<Received>>) {
    let state =
        Arc::new(Mutex::new(Received { script: script.iter().copied().collect(), ..Received::default() }));
    let router = axum::Router::new().route("/hook", axum::routing::post(hook)).with_state(state.clone());
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let port = listener.local_addr().unwrap().port();
    tokio::spawn(async move { axum::serve(listener, router).await.unwrap() });
    (port, state)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn webhook_is_signed_keyed_and_retried_through_timeout_and_500() {
    set_secret();
    let (port, received) = start_receiver(&[Answer::SlowOk, Answer::Error500, Answer::Ok]).await;
    let alert = format!(
        "[alert]\nretry_base = \"1s\"\nretry_cap = \"2s\"\n[alert.webhook]\nurl = \"http://127.0.0.1:{port}/hook\"\nsecret_env = \"{SECRET_ENV}\"\ntimeout = \"500ms\"\n"
    );
    let mut env = env_with(&alert);
    raise_held_alert(&mut env);
    let config = Arc::new(env.config.clone());
    let (writer, thread) = writer::start(open_store(&config.store.path)).unwrap();
    let client = delivery_client(&config);
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    let mut delivered = 0;
    while delivered == 0 && std::time::Instant::now() < deadline {
        delivered += deliver_due(&writer, &config, &client).await.unwrap().0;
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    assert_eq!(delivered, 1, "delivered after a timeout and a 500");
    // Nothing more is due: the row is done.
    tokio::time::sleep(Duration::from_secs(3)).await;
    assert_eq!(deliver_due(&writer, &config, &client).await.unwrap(), (0, 0));
    drop(writer);
    thread.join();

    let db = env.db();
    let event_id: i64 =
        db.query_row("SELECT event_id FROM outbox WHERE channel = 'webhook'", [], |r| r.get(0)).unwrap();
    let (attempts, state): (i64, String) = db
        .query_row(
            "SELECT o.attempts, a.state FROM outbox o JOIN alert_event e USING (event_id) JOIN alert a USING (alert_id)",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((attempts, state.as_str()), (3, "notified"));
    let requests = received.lock().unwrap().requests.clone();
    assert_eq!(requests.len(), 3, "slow, 500, 200");
    for (key, valid, body) in &requests {
        assert_eq!(key, &event_id.to_string(), "idempotency key = event id");
        assert!(valid, "HMAC-SHA256 signature over the body");
        let json: serde_json::Value = serde_json::from_str(body).unwrap();
        assert_eq!(json["rule"], "held_snapshot");
        assert!(json["caution"].as_str().unwrap().contains("not a confirmed"));
        assert!(json["dashboard"].as_str().unwrap().ends_with("/sources/feed"));
    }
    let bodies: Vec<String> = requests.into_iter().map(|r| r.2).collect();
    assert_private(&bodies, &patient_tokens(&env));
}

/// Undoes quoted-printable soft breaks and escapes, enough to read lettre's parts.
fn decode_qp(text: &str) -> String {
    let joined = text.replace("=\r\n", "").replace("=\n", "");
    let mut out = Vec::new();
    let bytes = joined.as_bytes();
    let mut i = 0;
    while i < bytes.len() {
        if bytes[i] == b'='
            && i + 2 < bytes.len()
            && let Ok(b) = u8::from_str_radix(&joined[i + 1..i + 3], 16)
        {
            out.push(b);
            i += 3;
            continue;
        }
        out.push(bytes[i]);
        i += 1;
    }
    String::from_utf8_lossy(&out).into_owned()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn email_arrives_once_after_the_smtp_server_comes_up() {
    let port = free_port();
    let alert = format!(
        "[alert]\nretry_base = \"1s\"\nretry_cap = \"1s\"\n[alert.email]\nsmtp = \"127.0.0.1:{port}\"\ntls = \"none\"\nfrom = \"tidemark@health.example\"\nto = [\"oncall@health.example\"]\ntimeout = \"2s\"\n"
    );
    let mut env = env_with(&alert);
    raise_held_alert(&mut env);
    let config = Arc::new(env.config.clone());
    let (writer, thread) = writer::start(open_store(&config.store.path)).unwrap();
    let client = delivery_client(&config);
    assert_eq!(deliver_due(&writer, &config, &client).await.unwrap(), (0, 1), "server down: failed, kept");

    let mailbox = Mailbox::serve(StdListener::bind(("127.0.0.1", port)).unwrap());
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    while mailbox.messages.lock().unwrap().is_empty() && std::time::Instant::now() < deadline {
        deliver_due(&writer, &config, &client).await.unwrap();
        tokio::time::sleep(Duration::from_millis(300)).await;
    }
    tokio::time::sleep(Duration::from_secs(2)).await;
    assert_eq!(deliver_due(&writer, &config, &client).await.unwrap(), (0, 0), "nothing left to send");
    drop(writer);
    thread.join();

    let messages = mailbox.messages.lock().unwrap().clone();
    assert_eq!(messages.len(), 1, "exactly one email after recovery");
    let mail = decode_qp(&messages[0]);
    let db = env.db();
    let event_id: i64 = db.query_row("SELECT event_id FROM outbox", [], |r| r.get(0)).unwrap();
    assert!(mail.contains(&format!("tidemark-event-{event_id}@")), "Message-ID names the event");
    assert!(mail.contains("text/plain") && mail.contains("text/html"), "plain-text and HTML parts");
    assert!(mail.contains("held_snapshot") && mail.contains("not a confirmed"));
    assert_eq!(count(&db, "SELECT count(*) FROM outbox WHERE delivered_at IS NOT NULL AND attempts = 2"), 1);
    // The transport headers carry the delivery time (a minute of 47 is not an age): check
    // the subject and the body.
    let (headers, body) = mail.split_once("\r\n\r\n").or_else(|| mail.split_once("\n\n")).unwrap();
    let subject: Vec<&str> = headers.lines().filter(|line| line.starts_with("Subject:")).collect();
    assert_private(&[subject.join("\n"), body.to_string()], &patient_tokens(&env));
}

/// A channel with a digest schedule takes warnings in one digest at the schedule's fire time
/// and critical alerts at once: both arrive through a real SMTP server, and the digest
/// notifies the alert it lists.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn scheduled_digest_takes_warnings_and_lets_critical_through() {
    use tidemark::model::Severity::{Critical, Warning};
    let port = free_port();
    let alert = format!(
        "[alert.email]\nsmtp = \"127.0.0.1:{port}\"\ntls = \"none\"\nfrom = \"tidemark@health.example\"\nto = [\"oncall@health.example\"]\ntimeout = \"2s\"\ndigest = \"0 0 7 * * *\"\n"
    );
    let env = env_with(&alert);
    let config = env.config.clone();
    let mut store = open_store(&config.store.path);
    let t0: DateTime<Utc> = "2026-03-01T08:00:00Z".parse().unwrap();
    let life = Lifecycle { now: t0, snapshot_id: None, resend_after: Duration::from_secs(6 * 3600) };
    let route = |severity| channels_for(&config, severity);
    let scheduled = |severity| scheduled_channels_for(&config, severity);
    let payload = |f: &MessageFacts| tidemark::alert::message::payload(f, "", 4);
    let delivery = Delivery { route: &route, payload: &payload, hold: false, scheduled: &scheduled };
    let evaluation = Evaluation {
        findings: vec![finding("volume_drop", Warning), finding("held_snapshot", Critical)],
        ..Evaluation::default()
    };
    let outcome = store.apply_findings(&evaluation, &life, &delivery).unwrap();
    assert_eq!((outcome.opened, outcome.enqueued, outcome.scheduled), (2, 1, 1));
    let at = |text: &str| text.parse::<DateTime<Utc>>().unwrap();
    assert_eq!(flush_scheduled_digests(&mut store, &config, at("2026-03-02T06:59:00Z")).unwrap(), 0);
    assert_eq!(flush_scheduled_digests(&mut store, &config, at("2026-03-02T07:00:05Z")).unwrap(), 1);
    assert_eq!(flush_scheduled_digests(&mut store, &config, at("2026-03-02T07:30:00Z")).unwrap(), 0, "once");
    drop(store);

    let mailbox = Mailbox::serve(StdListener::bind(("127.0.0.1", port)).unwrap());
    let config = Arc::new(config);
    let (writer, thread) = writer::start(open_store(&config.store.path)).unwrap();
    let client = delivery_client(&config);
    let deadline = std::time::Instant::now() + Duration::from_secs(20);
    while mailbox.messages.lock().unwrap().len() < 2 && std::time::Instant::now() < deadline {
        deliver_due(&writer, &config, &client).await.unwrap();
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    drop(writer);
    thread.join();
    let mails: Vec<String> = mailbox.messages.lock().unwrap().iter().map(|m| decode_qp(m)).collect();
    assert_eq!(mails.len(), 2, "the critical alert and one digest");
    let digest =
        mails.iter().find(|m| m.contains("[tidemark digest] scheduled: 1 opened")).expect("a digest");
    assert!(digest.contains("volume_drop") && !digest.contains("Opened\n[critical]"), "{digest}");
    assert!(mails.iter().any(|m| m.contains("held_snapshot") && !m.contains("[tidemark digest]")));
    let db = env.db();
    assert_eq!(
        count(&db, "SELECT count(*) FROM alert WHERE state = 'notified'"),
        2,
        "the digest notified its alert"
    );
    assert_eq!(count(&db, "SELECT count(*) FROM digest_wait WHERE digest_event_id IS NOT NULL"), 1);
}

#[test]
fn check_config_redacts_channel_secrets() {
    let alert = "[alert.webhook]\nurl = \"https://hooks.example/T0/secret-path\"\nsecret_env = \"TIDEMARK_IT_UNSET\"\nmin_severity = \"warning\"\n[alert.rules.missingness_jump]\nmin_effect = 0.2\n";
    let env = env_with(alert);
    let text = tidemark::app::commands::check_config(&env.config);
    assert!(text.contains("webhook: https://hooks.example/[redacted]"), "{text}");
    assert!(!text.contains("secret-path"));
    assert!(text.contains("min_severity=warning") && text.contains("min_effect: 0.2"));
}

/// The daemon killed (SIGKILL) while its outbox holds undelivered messages: after a restart
/// they are delivered, each event id once. (The extracts are dated in the past, so the
/// catch-up age is set long: this test is about pages, not digests.)
#[test]
fn pending_outbox_rows_survive_sigkill_and_are_delivered_once() {
    let dir = tempfile::tempdir().unwrap();
    let hook_port = free_port();
    let config = dir.path().join("tidemark.toml");
    std::fs::create_dir_all(dir.path().join("inbox")).unwrap();
    std::fs::write(
        &config,
        format!(
            "[store]\npath = \"data/t.db\"\narchive = \"data/archive\"\n\
             [[source]]\nname = \"county\"\nkind = \"folder\"\npath = \"inbox\"\npattern = \"*.csv\"\n\
             schedule = \"* * * * * *\"\nsettle = \"100ms\"\nas_of = \"name:%Y-%m-%d\"\nkey = \"case_id\"\n\
             [source.fields]\njurisdiction = \"district\"\nonset_date = \"onset\"\nreport_date = \"reported\"\nage = \"age\"\n\
             [alert]\nretry_base = \"1s\"\nretry_cap = \"1s\"\ncatch_up_age = \"3650d\"\n\
             [alert.webhook]\nurl = \"http://127.0.0.1:{hook_port}/hook\"\ntimeout = \"500ms\"\n"
        ),
    )
    .unwrap();
    let spawn = || {
        std::process::Command::new(assert_cmd::cargo::cargo_bin!("tidemark"))
            .arg("--config")
            .arg(&config)
            .args(["run", "--no-ops"])
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .spawn()
            .unwrap()
    };
    let db_path = dir.path().join("data/t.db");
    let query = |sql: &str| -> i64 {
        rusqlite::Connection::open(&db_path)
            .ok()
            .and_then(|c| c.query_row(sql, [], |r| r.get(0)).ok())
            .unwrap_or(0)
    };
    let wait = |what: &str, secs: u64, ready: &dyn Fn() -> bool| {
        let until = std::time::Instant::now() + Duration::from_secs(secs);
        while !ready() {
            assert!(std::time::Instant::now() < until, "timed out waiting for {what}");
            std::thread::sleep(Duration::from_millis(100));
        }
    };
    let mut daemon = spawn();
    std::fs::write(dir.path().join("inbox/county-2026-03-01.csv"), rows(60)).unwrap();
    wait("the first snapshot", 30, &|| query("SELECT count(*) FROM snapshot WHERE status = 'applied'") == 1);
    std::fs::write(dir.path().join("inbox/county-2026-03-02.csv"), rows(6)).unwrap();
    wait("a failed delivery attempt", 30, &|| query("SELECT count(*) FROM outbox WHERE attempts > 0") >= 1);
    daemon.kill().unwrap();
    daemon.wait().unwrap();
    let pending = query("SELECT count(*) FROM outbox WHERE delivered_at IS NULL AND dead_at IS NULL");
    assert!(pending >= 1, "undelivered rows at the kill");

    let runtime = tokio::runtime::Runtime::new().unwrap();
    let received = runtime.block_on(async {
        let state = Arc::new(Mutex::new(Received::default()));
        let router = axum::Router::new().route("/hook", axum::routing::post(hook)).with_state(state.clone());
        let listener = tokio::net::TcpListener::bind(("127.0.0.1", hook_port)).await.unwrap();
        tokio::spawn(async move { axum::serve(listener, router).await.unwrap() });
        state
    });
    let mut daemon = spawn();
    wait("delivery after the restart", 30, &|| {
        query("SELECT count(*) FROM outbox WHERE delivered_at IS NULL AND dead_at IS NULL") == 0
    });
    std::thread::sleep(Duration::from_secs(3));
    daemon.kill().unwrap();
    daemon.wait().unwrap();
    let keys: Vec<String> = received.lock().unwrap().requests.iter().map(|r| r.0.clone()).collect();
    let mut distinct = keys.clone();
    distinct.sort();
    distinct.dedup();
    assert_eq!(keys.len(), distinct.len(), "no event id delivered twice: {keys:?}");
    assert_eq!(keys.len() as i64, query("SELECT count(*) FROM outbox"), "every outbox row delivered");
    assert!(query("SELECT count(*) FROM alert WHERE rule = 'held_snapshot'") == 1);
}
