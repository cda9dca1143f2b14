//! Alert evaluation and delivery glue. After each applied or held snapshot (a step of the
//! post-snapshot pipeline), and after each poll in the daemon, the inputs of the pure rules (`alert::rules`) are read from the store,
//! the rules run, and their findings go to `Store::apply_findings`, which opens, updates,
//! re-sends and resolves alerts and writes their outbox rows in one transaction. The
//! delivery loop takes due outbox rows, sends them by email or webhook, and records the
//! result (retry with capped backoff, or a dead letter past the maximum age). Also the
//! `tidemark alerts` commands.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, Result};
use chrono::{DateTime, Days, NaiveDate, Utc};

use super::writer::Writer;
use crate::alert::outbox::{RetryPolicy, next_try};
use crate::alert::rules::{
    self, CountInput, HeldInput, LagInput, MissingCount, MissingnessInput, StalenessInput, VolumeInput,
};
use crate::alert::{self, DeliveryError, Outcome, Rule, Severity, Signal, email, message, webhook};
use crate::config::schedule::Schedule;
use crate::config::{Config, SourceConfig};
use crate::model::{SnapshotId, SnapshotStatus, SourceId};
use crate::store::alerts::{
    AlertDesk, Cleared, Delivery, DigestFacts, EvalOutcome, Evaluation, Finding, Lifecycle, MessageFacts,
    OutboxItem, RuleStatus, TEST_HANDOVER,
};
use crate::store::{OwedAnalysis, Reader, Store};
use crate::table::{OutputFormat, Table};

/// How often the daemon's delivery task looks for due outbox rows.
pub const DELIVERY_TICK: Duration = Duration::from_secs(1);
/// Outbox rows taken per look; the rest wait for the next tick.
const DELIVERY_BATCH: usize = 20;

/// What the rules concluded in one pass, and the snapshot it evaluated (`None` for the rules
/// run after a poll).
#[derive(Debug, Default)]
pub struct Pass {
    evaluation: Evaluation,
    snapshot_id: Option<SnapshotId>,
    /// Clear evaluations that resolve an alert: `[alert] resolve_after`, and for the count
    /// episodes `[alert.rules.count] resolve_after`.
    resolve_after: u32,
    count_resolve_after: u32,
    /// The snapshot is part of a catch-up: its messages are held for a digest.
    catch_up: bool,
}

impl Pass {
    fn new(config: &Config, snapshot_id: Option<SnapshotId>) -> Pass {
        Pass {
            evaluation: Evaluation::default(),
            snapshot_id,
            resolve_after: config.alerting.resolve_after,
            count_resolve_after: config.alerting.rules.count.resolve_after,
            catch_up: false,
        }
    }

    fn add(
        &mut self,
        rule: Rule,
        source: &str,
        subject: &str,
        outcome: Outcome,
        snapshot_id: Option<SnapshotId>,
    ) {
        let fingerprint = alert::fingerprint(rule, source, subject);
        let (label, reason) = match &outcome {
            Outcome::Signal(_) => ("signal", None),
            Outcome::Clear => ("clear", None),
            Outcome::NotEnoughData(why) => ("not_enough_data", Some(why.clone())),
        };
        self.evaluation.statuses.push(RuleStatus {
            fingerprint: fingerprint.clone(),
            rule,
            source: source.to_string(),
            subject: subject.to_string(),
            outcome: label,
            reason,
        });
        match outcome {
            Outcome::Signal(signal) => self.evaluation.findings.push(finding(&signal, snapshot_id)),
            Outcome::Clear => {
                let resolve_after =
                    if rule.episode() == "count" { self.count_resolve_after } else { self.resolve_after };
                self.evaluation.clear.push(Cleared { fingerprint, resolve_after });
            }
            Outcome::NotEnoughData(_) => {}
        }
    }
}

fn finding(signal: &Signal, snapshot_id: Option<SnapshotId>) -> Finding {
    let mut figures = serde_json::Map::new();
    figures.insert(signal.measure.to_string(), serde_json::json!(signal.observed));
    figures.insert("threshold".into(), serde_json::json!(signal.threshold));
    for figure in &signal.figures {
        figures.insert(figure.name.to_string(), serde_json::json!(figure.value));
    }
    Finding {
        fingerprint: signal.fingerprint(),
        rule: signal.rule,
        source: signal.source.clone(),
        subject: signal.subject.clone(),
        severity: signal.severity,
        summary: signal.summary.clone(),
        figures: serde_json::Value::Object(figures).to_string(),
        snapshot_id,
    }
}

/// The dashboard's base address for links: `serve.public_url`, else the bind address.
pub fn dashboard_base(config: &Config) -> String {
    config.public_url.clone().unwrap_or_else(|| format!("http://{}", config.bind))
}

/// The channels configured to take an alert of `severity`.
pub fn channels_for(config: &Config, severity: Severity) -> Vec<&'static str> {
    let mut channels = Vec::new();
    if config.email.as_ref().is_some_and(|e| severity >= e.min_severity) {
        channels.push("email");
    }
    if config.webhook.as_ref().is_some_and(|w| severity >= w.min_severity) {
        channels.push("webhook");
    }
    channels
}

/// The channels that take an alert of this severity in their scheduled digest rather than
/// at once: those with a `digest` schedule, for alerts below critical.
pub fn scheduled_channels_for(config: &Config, severity: Severity) -> Vec<&'static str> {
    if severity >= Severity::Critical {
        return Vec::new();
    }
    let mut channels = Vec::new();
    if config.email.as_ref().is_some_and(|e| e.digest.is_some()) {
        channels.push("email");
    }
    if config.webhook.as_ref().is_some_and(|w| w.digest.is_some()) {
        channels.push("webhook");
    }
    channels
}

/// The channels with a digest schedule, each with the severities it takes.
fn digest_schedules(config: &Config) -> Vec<(&'static str, &Schedule, Severity)> {
    let email = config.email.as_ref().and_then(|e| Some(("email", e.digest.as_ref()?, e.min_severity)));
    let webhook = config.webhook.as_ref().and_then(|w| Some(("webhook", w.digest.as_ref()?, w.min_severity)));
    email.into_iter().chain(webhook).collect()
}

/// Queues each scheduled channel's digest whose fire time has come (see
/// `Store::flush_scheduled_digest`); returns how many were queued.
pub fn flush_scheduled_digests(store: &mut Store, config: &Config, now: DateTime<Utc>) -> Result<usize> {
    let base = dashboard_base(config);
    let mut queued = 0;
    for (channel, schedule, min_severity) in digest_schedules(config) {
        let Some(fired) = schedule.latest_at_or_before(now) else { continue };
        let takes = |severity: Severity| severity >= min_severity;
        let payload = |facts: &DigestFacts| message::digest_payload(facts, &base);
        if store.flush_scheduled_digest(channel, fired, now, &takes, &payload)? {
            queued += 1;
        }
    }
    Ok(queued)
}

/// Writes a pass through the lifecycle. While the daemon catches up (this pass's snapshot is
/// old or has later ones waiting), and after that while held messages wait for their digest,
/// the pass's messages are held; the first snapshot pass that is not catching up ends the
/// catch-up, and each channel gets one digest of everything held.
pub fn apply_pass(
    store: &mut Store,
    config: &Config,
    pass: &Pass,
    now: DateTime<Utc>,
) -> Result<EvalOutcome> {
    let life = Lifecycle { now, snapshot_id: pass.snapshot_id, resend_after: config.alerting.resend_after };
    let base = dashboard_base(config);
    let route = |severity: Severity| channels_for(config, severity);
    let small = config.alerting.small_cell_max;
    let payload = |facts: &MessageFacts| message::payload(facts, &base, small);
    let hold = pass.catch_up || store.digest_pending()?;
    let scheduled = |severity: Severity| scheduled_channels_for(config, severity);
    let delivery = Delivery { route: &route, payload: &payload, hold, scheduled: &scheduled };
    let outcome = store.apply_findings(&pass.evaluation, &life, &delivery)?;
    if hold && !pass.catch_up && pass.snapshot_id.is_some() {
        let digests = flush_digest(store, config, now)?;
        tracing::info!(digests, "catch-up over: one digest per channel queued");
    }
    Ok(outcome)
}

/// Queues one digest per channel of the held messages; returns how many.
pub fn flush_digest(store: &mut Store, config: &Config, now: DateTime<Utc>) -> Result<usize> {
    let base = dashboard_base(config);
    let route = |severity: Severity| channels_for(config, severity);
    Ok(store.flush_digest(now, &route, &|facts| message::digest_payload(facts, &base))?)
}

/// The delivery loop's safety net: a digest for messages held longer than `[alert]
/// digest_wait` (a catch-up whose end never comes: every extract of a source arrives old).
pub fn flush_stale_digest(store: &mut Store, config: &Config, now: DateTime<Utc>) -> Result<usize> {
    let wait = chrono::Duration::from_std(config.alerting.digest_wait).unwrap_or_default();
    match store.oldest_held()? {
        Some(oldest) if now - oldest >= wait => flush_digest(store, config, now),
        _ => Ok(0),
    }
}

/// The snapshot rules' findings for an applied or held snapshot, read on a read-only
/// connection; `apply_pass` stores them (the one short write). `unattended`: the daemon is
/// evaluating, so an old snapshot, or one with later snapshots waiting, is a catch-up.
pub fn snapshot_pass(
    config: &Config,
    source: &SourceConfig,
    outcome: &OwedAnalysis,
    unattended: bool,
) -> Result<Pass> {
    let reader = Reader::open(&config.store.path)?;
    let source_id = reader.source_id(&source.name)?.context("source not registered")?;
    let params = &config.alerting.rules;
    let snapshot_id = outcome.snapshot_id;
    let mut pass = Pass::new(config, Some(snapshot_id));
    let older_than =
        Utc::now() - chrono::Duration::from_std(config.alerting.catch_up_age).unwrap_or_default();
    pass.catch_up = unattended && reader.catching_up(source_id, snapshot_id, older_than)?;
    let volumes = reader.volumes(source_id, snapshot_id)?;
    let applied: Vec<_> = volumes
        .iter()
        .filter(|v| v.status == SnapshotStatus::Applied && v.snapshot_id < snapshot_id)
        .collect();
    if params.enabled("held_snapshot") {
        let input = HeldInput {
            source: source.name.clone(),
            held: outcome.status == SnapshotStatus::Held,
            rows: outcome.rows_accepted,
            previous_rows: applied.last().map(|v| v.rows_accepted as u64),
        };
        pass.add(Rule::HeldSnapshot, &source.name, "", rules::held_snapshot(&input), Some(snapshot_id));
    }
    if outcome.status == SnapshotStatus::Applied {
        if params.enabled("volume_drop") {
            let input = VolumeInput {
                source: source.name.clone(),
                subject: String::new(),
                latest_new: outcome.rows_new,
                baseline_new: applied.iter().map(|v| v.rows_new as u64).collect(),
            };
            let whole = rules::volume_drop(&input, &params.volume);
            let whole_dropped = whole.signal().is_some();
            pass.add(Rule::VolumeDrop, &source.name, "", whole, Some(snapshot_id));
            if !whole_dropped {
                let baseline: Vec<SnapshotId> = applied.iter().map(|v| v.snapshot_id).collect();
                stratum_volumes(&reader, source_id, snapshot_id, &baseline, &source.name, config, &mut pass)?;
            }
        }
        if params.enabled("missingness_jump") {
            missingness(&reader, source_id, snapshot_id, &source.name, config, &mut pass)?;
        }
        let day = super::analyse::snapshot_day(&reader, snapshot_id)?;
        if params.enabled("lag_jump") {
            lags(&reader, source_id, snapshot_id, &source.name, day, config, &mut pass)?;
        }
        if params.enabled("count") {
            counts(&reader, source_id, snapshot_id, &source.name, day, config, &mut pass)?;
        }
        if params.enabled("nowcast_calibration") {
            calibration(&reader, source_id, snapshot_id, &source.name, config, &mut pass)?;
        }
    }
    Ok(pass)
}

/// The calibration of the nowcast `auto` chooses, per reference field (whole source), from
/// the scores matured by this snapshot.
fn calibration(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    source: &str,
    config: &Config,
    pass: &mut Pass,
) -> Result<()> {
    use super::analyse::{TriangleKey, resolve_method};
    for &field in &config.analysis.reference_fields {
        let key = TriangleKey::all(field);
        let choice =
            resolve_method(reader, config, source_id, snapshot_id, &key, crate::model::MethodChoice::Auto)?;
        let score = match choice.score {
            Some(score) => Some(score),
            None => {
                let series = (field.name(), "all", "");
                let scores =
                    reader.rolling_scores(source_id, series, snapshot_id, config.analysis.score_window)?;
                scores.into_iter().find(|s| s.method == choice.method)
            }
        };
        let input =
            rules::CalibrationInput { source: source.to_string(), subject: field.name().to_string(), score };
        pass.add(
            Rule::NowcastCalibration,
            source,
            field.name(),
            rules::nowcast_calibration(&input),
            Some(snapshot_id),
        );
    }
    Ok(())
}

/// The missingness rule per field for the whole source, and per field and jurisdiction
/// where feeds usually break (subject `field (jurisdiction)`, the rule's `min_records`
/// keeping small units from paging on noise). A field whose whole-source share jumped is
/// reported once, for the source, not again for every jurisdiction.
fn missingness(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    source: &str,
    config: &Config,
    pass: &mut Pass,
) -> Result<()> {
    let params = &config.alerting.rules.missingness;
    let mut source_wide = BTreeMap::new();
    for (field, series) in missing_series(reader, source_id, snapshot_id, "all")? {
        let outcome = missingness_outcome(source, &field, series, snapshot_id, params);
        if let Some(outcome) = outcome {
            source_wide.insert(field.clone(), outcome.signal().is_some());
            pass.add(Rule::MissingnessJump, source, &field, outcome, Some(snapshot_id));
        }
    }
    let stratum_params = rules::MissingnessParams { min_records: params.stratum_min_records, ..*params };
    for (key, series) in missing_series(reader, source_id, snapshot_id, "jurisdiction")? {
        let Some((field, jurisdiction)) = key.split_once('\u{1f}') else { continue };
        if jurisdiction == crate::store::quality::NO_JURISDICTION
            || source_wide.get(field).copied().unwrap_or(false)
        {
            continue;
        }
        let subject = format!("{field} ({jurisdiction})");
        if let Some(outcome) = missingness_outcome(source, &subject, series, snapshot_id, &stratum_params) {
            pass.add(Rule::MissingnessJump, source, &subject, outcome, Some(snapshot_id));
        }
    }
    Ok(())
}

/// Missing counts of new or changed records by snapshot, oldest first, per field (and, for
/// `jurisdiction`, per field and jurisdiction, keyed `field\u{1f}jurisdiction`).
fn missing_series(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    stratum_kind: &str,
) -> Result<BTreeMap<String, Vec<(SnapshotId, MissingCount)>>> {
    let mut by_key: BTreeMap<String, Vec<(SnapshotId, MissingCount)>> = BTreeMap::new();
    for r in reader.quality_history(source_id, snapshot_id, "new_changed", stratum_kind)? {
        let count = MissingCount { missing: r.missing as u64, records: r.records as u64 };
        let key = if stratum_kind == "all" { r.field } else { format!("{}\u{1f}{}", r.field, r.stratum) };
        by_key.entry(key).or_default().push((r.snapshot_id, count));
    }
    Ok(by_key)
}

/// The rule on one series, `None` when the series has no row for this snapshot.
fn missingness_outcome(
    source: &str,
    subject: &str,
    mut series: Vec<(SnapshotId, MissingCount)>,
    snapshot_id: SnapshotId,
    params: &rules::MissingnessParams,
) -> Option<Outcome> {
    let (last_id, latest) = series.pop()?;
    if last_id != snapshot_id {
        return None;
    }
    let input = MissingnessInput {
        source: source.to_string(),
        subject: subject.to_string(),
        latest,
        baseline: series.into_iter().map(|(_, c)| c).collect(),
    };
    Some(rules::missingness_jump(&input, params))
}

/// The days `first..=last`, as ISO dates.
fn days(first: NaiveDate, last: NaiveDate) -> Vec<String> {
    first.iter_days().take_while(|d| *d <= last).map(|d| d.to_string()).collect()
}

fn lags(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    source: &str,
    day: NaiveDate,
    config: &Config,
    pass: &mut Pass,
) -> Result<()> {
    let p = &config.alerting.rules.lag;
    let span = (p.baseline_days + p.recent_days) as u64;
    let first = day.checked_sub_days(Days::new(span.saturating_sub(1))).unwrap_or(day);
    let all_days = days(first, day);
    let mut series: BTreeMap<String, BTreeMap<String, Vec<f64>>> = BTreeMap::new();
    for (as_of_day, kind, stratum, lag, n) in
        reader.lag_histograms(source_id, snapshot_id, &first.to_string())?
    {
        let subject = if kind == "all" { String::new() } else { stratum };
        let lags = series.entry(subject).or_default().entry(as_of_day).or_default();
        lags.extend(std::iter::repeat_n(lag, n as usize));
    }
    for (subject, by_day) in series {
        let daily_lags = all_days.iter().map(|d| by_day.get(d).cloned().unwrap_or_default()).collect();
        let input = LagInput { source: source.to_string(), subject: subject.clone(), daily_lags };
        pass.add(Rule::LagJump, source, &subject, rules::lag_jump(&input, p), Some(snapshot_id));
    }
    Ok(())
}

/// `volume_drop` per jurisdiction, with its own (stricter) fraction and minimum, from the new
/// records of each stratum in the latest snapshot and the baseline snapshots (a stratum with
/// no row in a snapshot had no new records in it). Not run when the whole source dropped, so
/// one broken extract is one page.
fn stratum_volumes(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    baseline: &[SnapshotId],
    source: &str,
    config: &Config,
    pass: &mut Pass,
) -> Result<()> {
    let params = config.alerting.rules.volume.for_stratum();
    let baseline = &baseline[baseline.len().saturating_sub(params.baseline_snapshots)..];
    let mut new_records: BTreeMap<String, BTreeMap<SnapshotId, u64>> = BTreeMap::new();
    let wanted: Vec<SnapshotId> = baseline.iter().copied().chain([snapshot_id]).collect();
    for (id, stratum, n) in reader.stratum_new_records(source_id, &wanted)? {
        new_records.entry(stratum).or_default().insert(id, n.max(0) as u64);
    }
    for (subject, by_snapshot) in new_records {
        let input = VolumeInput {
            source: source.to_string(),
            subject: subject.clone(),
            latest_new: by_snapshot.get(&snapshot_id).copied().unwrap_or(0),
            baseline_new: baseline.iter().map(|id| by_snapshot.get(id).copied().unwrap_or(0)).collect(),
        };
        pass.add(Rule::VolumeDrop, source, &subject, rules::volume_drop(&input, &params), Some(snapshot_id));
    }
    Ok(())
}

fn counts(
    reader: &Reader,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    source: &str,
    day: NaiveDate,
    config: &Config,
    pass: &mut Pass,
) -> Result<()> {
    let p = &config.alerting.rules.count;
    let Some(known_from) = reader.first_report_day(source_id, snapshot_id)? else { return Ok(()) };
    let known_from: NaiveDate = known_from.parse().unwrap_or(day);
    let span = rules::count_history_days(p) as u64;
    let first = day.checked_sub_days(Days::new(span - 1)).unwrap_or(day).max(known_from);
    let all_days = days(first, day);
    let mut series: BTreeMap<String, BTreeMap<String, f64>> = BTreeMap::new();
    for (kind, stratum, date, n) in reader.report_counts(source_id, snapshot_id, &first.to_string())? {
        let subject = if kind == "all" { String::new() } else { stratum };
        *series.entry(subject).or_default().entry(date).or_default() += n as f64;
    }
    for (subject, by_day) in series {
        let daily_counts = all_days.iter().map(|d| by_day.get(d).copied().unwrap_or(0.0)).collect();
        let input =
            CountInput { source: source.to_string(), subject: subject.clone(), daily_counts, last_day: day };
        if let Some((rule, outcome)) = rules::count_episode(rules::count_aberration(&input, p)) {
            pass.add(rule, source, &subject, outcome, Some(snapshot_id));
        }
    }
    Ok(())
}

/// Evaluates the staleness and failing-poll rules of one source (after a poll).
pub fn after_poll(
    store: &mut Store,
    config: &Config,
    source: &SourceConfig,
    watching_since: DateTime<Utc>,
    now: DateTime<Utc>,
) -> Result<EvalOutcome> {
    let reader = Reader::open(&config.store.path)?;
    let Some(source_id) = reader.source_id(&source.name)? else { return Ok(EvalOutcome::default()) };
    let failures = reader
        .source_statuses()?
        .into_iter()
        .find(|s| s.name == source.name)
        .map(|s| s.consecutive_failures.max(0) as u32)
        .unwrap_or(0);
    let last_applied = reader.last_received(source_id)?;
    let input = StalenessInput {
        source: source.name.clone(),
        now,
        last_applied,
        watching_since,
        expect_every: source.expect_every,
        consecutive_failures: failures,
    };
    let params = &config.alerting.rules;
    let mut pass = Pass::new(config, None);
    if params.enabled("stale_source") {
        pass.add(Rule::StaleSource, &source.name, "", rules::stale_source(&input), None);
    }
    if params.enabled("failing_polls") {
        pass.add(Rule::FailingPolls, &source.name, "", rules::failing_polls(&input, &params.staleness), None);
    }
    apply_pass(store, config, &pass, now)
}

/// The retry policy of the config.
pub fn retry_policy(config: &Config) -> RetryPolicy {
    RetryPolicy {
        base: config.alerting.retry_base,
        cap: config.alerting.retry_cap,
        max_age: config.alerting.max_age,
    }
}

/// Sends one outbox row through its channel.
pub async fn deliver(
    config: &Config,
    client: &reqwest::Client,
    item: &OutboxItem,
) -> Result<(), DeliveryError> {
    match item.channel.as_str() {
        "email" => match &config.email {
            Some(email_config) => email::send(email_config, item.event_id, &item.payload).await,
            None => Err(DeliveryError::Setup("alert.email is no longer configured".into())),
        },
        "webhook" => match &config.webhook {
            Some(hook) => webhook::send(client, hook, item.event_id, &item.payload).await,
            None => Err(DeliveryError::Setup("alert.webhook is no longer configured".into())),
        },
        other => Err(DeliveryError::Setup(format!("unknown channel {other}"))),
    }
}

/// The webhook client (with the configured timeout), or a default one.
pub fn delivery_client(config: &Config) -> reqwest::Client {
    config.webhook.as_ref().and_then(|w| webhook::client(w).ok()).unwrap_or_default()
}

/// Delivers every due outbox row once; returns (delivered, failed).
pub async fn deliver_due(
    writer: &Writer,
    config: &Arc<Config>,
    client: &reqwest::Client,
) -> Result<(usize, usize)> {
    let flush_config = config.clone();
    let digests = writer.run(move |store| flush_stale_digest(store, &flush_config, Utc::now())).await??;
    if digests > 0 {
        tracing::info!(digests, "held messages waited too long: digest queued");
    }
    let schedule_config = config.clone();
    let scheduled =
        writer.run(move |store| flush_scheduled_digests(store, &schedule_config, Utc::now())).await??;
    if scheduled > 0 {
        tracing::info!(digests = scheduled, "scheduled digest queued");
    }
    let items = writer.run(|store| store.due_outbox(Utc::now(), DELIVERY_BATCH)).await??;
    let (mut delivered, mut failed) = (0, 0);
    for item in items {
        let result = deliver(config, client, &item).await;
        let now = Utc::now();
        let (id, attempt) = (item.outbox_id, item.attempts as u32 + 1);
        match result {
            Ok(()) => {
                delivered += 1;
                tracing::info!(event_id = item.event_id, channel = %item.channel, "alert message delivered");
                writer.run(move |store| store.mark_delivered(id, now)).await??;
            }
            Err(err) => {
                failed += 1;
                let retry = next_try(&retry_policy(config), item.created_at, attempt, now);
                tracing::warn!(event_id = item.event_id, channel = %item.channel, attempt, error = %err,
                    dead_letter = retry.is_none(), "alert message not delivered");
                let text = err.to_string();
                writer.run(move |store| store.mark_failed(id, &text, now, retry)).await??;
            }
        }
    }
    Ok((delivered, failed))
}

/// `tidemark alerts`: alerts (live first) with state, counts, last sent and dead letters.
pub fn list(config: &Config, all: bool, as_of: Option<&str>, format: OutputFormat) -> Result<String> {
    let reader = Reader::open(&config.store.path)?;
    if let Some(text) = as_of {
        return as_of_listing(&reader, text, format);
    }
    let mut table = Table::new(&[
        "id",
        "rule",
        "source",
        "subject",
        "severity",
        "state",
        "opened_at",
        "last_seen_at",
        "seen",
        "clear",
        "last_sent_at",
        "sent",
        "delivered",
        "pending",
        "dead_letters",
        "summary",
    ]);
    for a in reader.alerts(all)? {
        table.push(vec![
            a.alert_id.into(),
            a.rule.name().into(),
            a.source.into(),
            a.subject.into(),
            a.severity.name().into(),
            a.state.into(),
            a.opened_at.into(),
            a.last_seen_at.into(),
            a.times_seen.into(),
            a.clear_count.into(),
            a.last_sent_at.into(),
            a.sent_count.into(),
            a.delivered.into(),
            a.pending.into(),
            a.dead_letters.into(),
            a.summary.into(),
        ]);
    }
    let mut text = table.render(format);
    if format == OutputFormat::Table {
        let dead = reader.dead_letters()?;
        for (outbox_id, event_id, channel, attempts, error, at) in dead.iter().take(20) {
            text.push_str(&format!(
                "dead letter {outbox_id}: event {event_id} via {channel}, {attempts} attempts, gave up {at}: {}\n",
                error.as_deref().unwrap_or("-")
            ));
        }
        for [rule, source, subject, reason, at] in reader.undecided_rules()? {
            let subject = if subject.is_empty() { String::new() } else { format!(" ({subject})") };
            text.push_str(&format!("not enough data: {rule} on {source}{subject} at {at}: {reason}\n"));
        }
        text.push_str("Alerts are statistical signals for investigation, not confirmed events.\n");
    }
    Ok(text)
}

/// `tidemark alerts --as-of T`: the alerts live at data time `T` (opened by a snapshot as of
/// `T` or earlier, not resolved by one), whatever their state today.
fn as_of_listing(reader: &Reader, text: &str, format: OutputFormat) -> Result<String> {
    let as_of = super::queries::parse_time_arg(text)?;
    let table = reader.alerts_table(None, Some(as_of))?.unwrap_or_default();
    let mut out = table.render(format);
    if format == OutputFormat::Table {
        out.push_str(&format!("Alerts live at data time {as_of}; the state column is today's.\n"));
        out.push_str("Alerts are statistical signals for investigation, not confirmed events.\n");
    }
    Ok(out)
}

/// `tidemark alerts ack ID --note TEXT`.
pub fn ack(config: &Config, alert_id: i64, note: &str) -> Result<String> {
    let mut desk = AlertDesk::open(&config.store.path)?;
    desk.ack_alert(alert_id, note, Utc::now())?;
    Ok(format!("alert {alert_id} acknowledged; it will not be re-sent and resolves when clear\n"))
}

/// `tidemark alerts test`: queues a test message on every configured channel and delivers
/// it now; prints what each channel did.
pub fn test(config: &Config) -> Result<String> {
    let channels = channels_for(config, Severity::Critical);
    if channels.is_empty() {
        anyhow::bail!("no alert channel is configured (add [alert.email] or [alert.webhook])");
    }
    let mut store = AlertDesk::open(&config.store.path)?;
    let base = dashboard_base(config);
    let event_id = store.enqueue_test(&channels, Utc::now(), &|facts| {
        message::payload(facts, &base, config.alerting.small_cell_max)
    })?;
    let runtime = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
    let client = delivery_client(config);
    let items: Vec<OutboxItem> = store
        .due_outbox(Utc::now() + TEST_HANDOVER + chrono::Duration::seconds(1), 1000)?
        .into_iter()
        .filter(|i| i.event_id == event_id)
        .collect();
    let mut text = String::new();
    for item in items {
        let result = runtime.block_on(deliver(config, &client, &item));
        let now = Utc::now();
        match result {
            Ok(()) => {
                store.mark_delivered(item.outbox_id, now)?;
                text.push_str(&format!("{}: delivered (event {event_id})\n", item.channel));
            }
            Err(err) => {
                store.mark_failed(item.outbox_id, &err.to_string(), now, None)?;
                text.push_str(&format!("{}: FAILED: {err}\n", item.channel));
            }
        }
    }
    Ok(text)
}
