//! The words of an alert message, built from aggregates only: rule, source, subject, the
//! figures that tripped the rule and its baseline, the snapshot time and a dashboard link,
//! with the caution that a signal needs investigation. The JSON payload is what the webhook
//! posts and what the email is rendered from, so both say exactly the same. Pure: no IO.

use serde_json::{Value, json};

use crate::store::alerts::{DigestFacts, DigestItem, MessageFacts};

/// Said in every message: a statistical signal is not an event.
pub const CAUTION: &str = "This is a statistical signal that needs investigation; it is not a confirmed \
     outbreak or event. Check the data and follow your local protocols before acting.";

/// The dashboard link of a source: `<base>/sources/<name>`.
pub fn dashboard_link(base: &str, source: &str) -> String {
    if source.is_empty() {
        base.trim_end_matches('/').to_string()
    } else {
        format!("{}/sources/{source}", base.trim_end_matches('/'))
    }
}

/// Figures that are case counts, released as a range when small (see [`payload`]).
pub const CASE_COUNT_FIGURES: [&str; 2] = ["count", "three_day_count"];

/// The JSON payload of one notifying event. Case-count figures from 1 to `small_cell_max`
/// leave the server as a range ("1-4"), never exactly (small-cell suppression; the
/// summary is already written so by the rules).
pub fn payload(facts: &MessageFacts, dashboard_base: &str, small_cell_max: u32) -> String {
    let mut figures: Value = serde_json::from_str(&facts.figures).unwrap_or_else(|_| json!({}));
    if let Value::Object(map) = &mut figures {
        for key in CASE_COUNT_FIGURES {
            if let Some(n) = map.get(key).and_then(Value::as_f64)
                && crate::alert::rules::is_small_cell(n, small_cell_max)
            {
                map.insert(key.to_string(), json!(crate::alert::rules::cell(n, small_cell_max)));
            }
        }
    }
    let body = json!({
        "event_id": facts.event_id,
        "kind": facts.kind,
        "alert_id": facts.alert_id,
        "rule": facts.rule,
        "source": facts.source,
        "subject": facts.subject,
        "severity": facts.severity,
        "summary": facts.summary,
        "figures": figures,
        "snapshot_id": facts.snapshot_id,
        "snapshot_as_of": facts.snapshot_as_of,
        "opened_at": facts.opened_at,
        "sent_at": facts.at,
        "dashboard": dashboard_link(dashboard_base, &facts.source),
        "caution": CAUTION,
    });
    body.to_string()
}

/// The JSON payload of one channel's digest (after a catch-up, or on the channel's digest
/// schedule): what opened, what resolved and what is
/// still open, each alert with its data day and its summary (small cells already written
/// as ranges by the rules).
pub fn digest_payload(facts: &DigestFacts, dashboard_base: &str) -> String {
    let items = |list: &[DigestItem]| -> Vec<Value> {
        list.iter()
            .map(|i| {
                json!({
                    "alert_id": i.alert_id,
                    "rule": i.rule,
                    "source": i.source,
                    "subject": i.subject,
                    "severity": i.severity,
                    "summary": i.summary,
                    "data_day": i.data_day,
                    "opened_as_of": i.opened_as_of,
                    "resolved_as_of": i.resolved_as_of,
                })
            })
            .collect()
    };
    let reopened = facts.opened.iter().filter(|i| i.resolved_as_of.is_some()).count();
    let label = digest_label(facts.reason);
    let summary = format!(
        "{label} digest: {} opened ({reopened} of them resolved again), {} resolved, {} still open; \
         it stands for {} held messages",
        facts.opened.len(),
        facts.resolved.len(),
        facts.still_open.len(),
        facts.held_messages
    );
    json!({
        "event_id": facts.event_id,
        "kind": "digest",
        "reason": facts.reason,
        "channel": facts.channel,
        "summary": summary,
        "opened": items(&facts.opened),
        "resolved": items(&facts.resolved),
        "still_open": items(&facts.still_open),
        "sent_at": facts.at,
        "dashboard": dashboard_link(dashboard_base, ""),
        "caution": CAUTION,
    })
    .to_string()
}

/// How a digest names why its messages waited.
fn digest_label(reason: &str) -> &'static str {
    if reason == "scheduled" { "scheduled" } else { "catch-up" }
}

/// An email's subject, plain text and HTML, rendered from a payload.
#[derive(Debug, Clone, PartialEq)]
pub struct EmailText {
    pub subject: String,
    pub plain: String,
    pub html: String,
}

/// Renders a payload as an email. Unknown or missing keys render as `-`.
pub fn email_text(payload: &str) -> EmailText {
    let v: Value = serde_json::from_str(payload).unwrap_or_else(|_| json!({}));
    if v["kind"] == "digest" {
        return digest_email(&v);
    }
    let s = |key: &str| match &v[key] {
        Value::String(text) => text.clone(),
        Value::Null => "-".into(),
        other => other.to_string(),
    };
    let verb = match s("kind").as_str() {
        "resolved" => "resolved",
        "resent" => "still active",
        "escalated" => "severity rose",
        "test" => "test",
        _ => "signal",
    };
    let subject_part = if s("subject").is_empty() || s("subject") == "-" {
        String::new()
    } else {
        format!(" {}", s("subject"))
    };
    let subject = format!(
        "[tidemark {}] {verb}: {} on {}{subject_part} (needs investigation)",
        s("severity"),
        s("rule"),
        s("source")
    );
    let lines = message_lines(&v, &s);
    let plain = format!(
        "{}\n\n{}\n",
        lines.iter().map(|(k, val)| format!("{k}: {val}")).collect::<Vec<_>>().join("\n"),
        CAUTION
    );
    let rows: String = lines
        .iter()
        .map(|(k, val)| format!("<tr><th align=\"left\">{}</th><td>{}</td></tr>", escape(k), escape(val)))
        .collect();
    let html = format!(
        "<html><body><p><strong>{}</strong></p><table>{rows}</table><p><em>{}</em></p><p><a href=\"{}\">Open the dashboard</a></p></body></html>",
        escape(&s("summary")),
        escape(CAUTION),
        escape(&s("dashboard"))
    );
    EmailText { subject, plain, html }
}

fn message_lines(v: &Value, s: &dyn Fn(&str) -> String) -> Vec<(String, String)> {
    let mut lines: Vec<(String, String)> = [
        "summary",
        "rule",
        "source",
        "subject",
        "severity",
        "kind",
        "snapshot_as_of",
        "opened_at",
        "sent_at",
        "dashboard",
        "event_id",
    ]
    .iter()
    .map(|k| (k.to_string(), s(k)))
    .collect();
    if let Value::Object(figures) = &v["figures"] {
        for (key, value) in figures {
            lines.push((format!("figure {key}"), value.to_string()));
        }
    }
    lines
}

/// A digest as an email: the summary, then one line per alert under each heading.
fn digest_email(v: &Value) -> EmailText {
    let text = |value: &Value| value.as_str().unwrap_or("-").to_string();
    let count = |key: &str| v[key].as_array().map_or(0, Vec::len);
    let subject = format!(
        "[tidemark digest] {}: {} opened, {} resolved, {} still open (needs investigation)",
        digest_label(v["reason"].as_str().unwrap_or("catch_up")),
        count("opened"),
        count("resolved"),
        count("still_open")
    );
    let mut sections = Vec::new();
    for (key, heading) in [("opened", "Opened"), ("resolved", "Resolved"), ("still_open", "Still open")] {
        let lines: Vec<String> = v[key]
            .as_array()
            .map(|items| {
                items
                    .iter()
                    .map(|i| {
                        let subject = text(&i["subject"]);
                        let subject =
                            if subject.is_empty() { String::new() } else { format!(" ({subject})") };
                        format!(
                            "[{}] {} on {}{subject}, data day {}: {}",
                            text(&i["severity"]),
                            text(&i["rule"]),
                            text(&i["source"]),
                            text(&i["data_day"]),
                            text(&i["summary"])
                        )
                    })
                    .collect()
            })
            .unwrap_or_default();
        sections.push((heading, lines));
    }
    let mut plain = format!("{}\n", text(&v["summary"]));
    let mut html = format!("<html><body><p><strong>{}</strong></p>", escape(&text(&v["summary"])));
    for (heading, lines) in &sections {
        plain.push_str(&format!("\n{heading} ({}):\n", lines.len()));
        html.push_str(&format!("<h3>{heading} ({})</h3><ul>", lines.len()));
        for line in lines {
            plain.push_str(&format!("- {line}\n"));
            html.push_str(&format!("<li>{}</li>", escape(line)));
        }
        html.push_str("</ul>");
    }
    plain.push_str(&format!("\n{CAUTION}\n"));
    html.push_str(&format!(
        "<p><em>{}</em></p><p><a href=\"{}\">Open the dashboard</a></p></body></html>",
        escape(CAUTION),
        escape(&text(&v["dashboard"]))
    ));
    EmailText { subject, plain, html }
}

fn escape(text: &str) -> String {
    text.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;").replace('"', "&quot;")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn facts() -> MessageFacts {
        MessageFacts {
            event_id: 7,
            kind: "opened".into(),
            alert_id: Some(2),
            rule: "missingness_jump".into(),
            source: "county-reports".into(),
            subject: "onset_date".into(),
            severity: crate::model::Severity::Warning,
            summary: "onset_date missing in 31% of new records, baseline 4%".into(),
            figures: r#"{"share":0.31,"baseline":0.04,"records":412}"#.into(),
            snapshot_id: Some(crate::model::SnapshotId(40)),
            snapshot_as_of: Some("2026-03-10T23:59:59Z".into()),
            opened_at: "2026-03-11T00:01:00Z".into(),
            at: "2026-03-11T00:01:00Z".into(),
        }
    }

    #[test]
    fn payload_carries_aggregates_link_and_caution() {
        let body: Value = serde_json::from_str(&payload(&facts(), "http://127.0.0.1:8440/", 4)).unwrap();
        assert_eq!(body["event_id"], 7);
        assert_eq!(body["figures"]["baseline"], 0.04);
        assert_eq!(body["dashboard"], "http://127.0.0.1:8440/sources/county-reports");
        assert!(body["caution"].as_str().unwrap().contains("not a confirmed"));
    }

    #[test]
    fn email_has_both_parts_and_escapes() {
        let mut f = facts();
        f.summary = "a < b & c".into();
        let email = email_text(&payload(&f, "http://h", 4));
        assert!(email.subject.contains("missingness_jump on county-reports onset_date"));
        assert!(email.plain.contains("figure share: 0.31") && email.plain.contains(CAUTION));
        assert!(
            email.html.contains("a &lt; b &amp; c")
                && email.html.contains("href=\"http://h/sources/county-reports\"")
        );
    }

    /// Small-cell suppression: case counts of 1 to 4 leave as "1-4"; 0 and 5 or more are
    /// exact; other figures (shares, baselines) are untouched.
    #[test]
    fn small_case_counts_leave_the_server_as_a_range() {
        let mut f = facts();
        f.figures = r#"{"count":3,"three_day_count":12,"baseline_mean":2.5}"#.into();
        let body: Value = serde_json::from_str(&payload(&f, "http://h", 4)).unwrap();
        assert_eq!(body["figures"]["count"], "1-4");
        assert_eq!(body["figures"]["three_day_count"], 12);
        assert_eq!(body["figures"]["baseline_mean"], 2.5);
        let off: Value = serde_json::from_str(&payload(&f, "http://h", 0)).unwrap();
        assert_eq!(off["figures"]["count"], 3);
        assert_eq!(crate::alert::rules::cases(3.0, 4), "1-4 cases");
        assert_eq!(crate::alert::rules::cases(1.0, 0), "1 case");
        assert_eq!(crate::alert::rules::cases(0.0, 4), "0 cases");
    }
}
