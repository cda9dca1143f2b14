//! The alert lifecycle and the delivery outbox in SQL. One evaluation pass (the findings of
//! some rules for some sources at one time) is one transaction: alerts are opened, updated,
//! re-sent or resolved, and every message they call for is written to `alert_event` and
//! `outbox` in the same transaction, so an alert is never raised without its notification
//! nor a notification queued for an alert that was rolled back. Delivery (in `app`) takes
//! due outbox rows and reports back; it is at-least-once, the event id being the
//! idempotency key. States: open -> notified (a message was delivered) -> acknowledged ->
//! resolved; a fingerprint (episode, source, subject; the count rules share the episode
//! `count`) has at most one alert not resolved. While the daemon catches up, messages are
//! held (events without outbox rows) and later go out as one digest per channel. Every
//! rule's latest outcome is kept in `rule_status`. [`AlertDesk`] does the operator's writes
//! (acknowledge, test) on a connection of its own, beside a running daemon.

use std::borrow::BorrowMut;
use std::collections::HashSet;
use std::path::Path;
use std::time::Duration;

use chrono::{DateTime, Utc};
use rusqlite::{Connection, OptionalExtension, Transaction, params};

use super::{Reader, Store, StoreError, open_writer, time_text};
use crate::model::{Rule, Severity, SnapshotId, SourceId};

/// How long a test message waits before a running daemon's delivery loop may take it.
pub const TEST_HANDOVER: chrono::Duration = chrono::Duration::minutes(5);

/// What one rule found for one subject at one evaluation: aggregates only.
#[derive(Debug, Clone, PartialEq)]
pub struct Finding {
    pub fingerprint: String,
    pub rule: Rule,
    pub source: String,
    pub subject: String,
    pub severity: Severity,
    pub summary: String,
    /// JSON object of the figures that tripped the rule (and its baseline).
    pub figures: String,
    /// The snapshot evaluated; an alert keeps the one that opened it.
    pub snapshot_id: Option<SnapshotId>,
}

/// A condition evaluated on enough data that did not trip: one clear evaluation of its
/// live alert, which resolves after `resolve_after` of them in a row.
#[derive(Debug, Clone, PartialEq)]
pub struct Cleared {
    pub fingerprint: String,
    pub resolve_after: u32,
}

/// The latest outcome of one rule for one subject, kept in `rule_status` so the operator can
/// see which rules cannot decide yet and why.
#[derive(Debug, Clone, PartialEq)]
pub struct RuleStatus {
    pub fingerprint: String,
    pub rule: Rule,
    pub source: String,
    pub subject: String,
    /// `signal`, `clear` or `not_enough_data`.
    pub outcome: &'static str,
    /// Why the rule could not decide (no patient-level value).
    pub reason: Option<String>,
}

/// Everything one evaluation pass concluded.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Evaluation {
    pub findings: Vec<Finding>,
    pub clear: Vec<Cleared>,
    pub statuses: Vec<RuleStatus>,
}

/// Lifecycle settings of one evaluation.
#[derive(Debug, Clone, Copy)]
pub struct Lifecycle {
    pub now: DateTime<Utc>,
    /// The snapshot the pass evaluated (its as-of time is the data time of what the pass
    /// opens, sees and resolves); `None` for the rules evaluated after a poll.
    pub snapshot_id: Option<SnapshotId>,
    pub resend_after: Duration,
}

/// Everything a message about one event says; `app` turns it into the payload.
#[derive(Debug, Clone, PartialEq)]
pub struct MessageFacts {
    pub event_id: i64,
    /// `opened`, `resent`, `resolved` or `test`.
    pub kind: String,
    pub alert_id: Option<i64>,
    /// The rule's name (`test` for a delivery test).
    pub rule: String,
    pub source: String,
    pub subject: String,
    pub severity: Severity,
    pub summary: String,
    pub figures: String,
    pub snapshot_id: Option<SnapshotId>,
    pub snapshot_as_of: Option<String>,
    pub opened_at: String,
    pub at: String,
}

/// How an evaluation pass routes and words its messages.
pub struct Delivery<'a> {
    /// Channels (`email`, `webhook`) that take an alert of this severity.
    pub route: &'a dyn Fn(Severity) -> Vec<&'static str>,
    /// The JSON payload stored with a notifying event.
    pub payload: &'a dyn Fn(&MessageFacts) -> String,
    /// Hold the messages for a digest (the daemon is catching up on a backlog) instead of
    /// queueing them.
    pub hold: bool,
    /// The channels of `route` that take this severity in their scheduled digest instead of
    /// at once (channels with a `digest` schedule, below critical).
    pub scheduled: &'a dyn Fn(Severity) -> Vec<&'static str>,
}

/// One alert as a digest lists it.
#[derive(Debug, Clone, PartialEq)]
pub struct DigestItem {
    pub alert_id: i64,
    pub rule: String,
    pub source: String,
    pub subject: String,
    pub severity: Severity,
    pub summary: String,
    pub data_day: Option<String>,
    pub opened_as_of: Option<String>,
    pub resolved_as_of: Option<String>,
}

/// Everything one channel's digest says: the alerts whose messages were held, by what
/// happened to them, and every alert still live.
#[derive(Debug, Clone, PartialEq)]
pub struct DigestFacts {
    pub event_id: i64,
    pub channel: String,
    pub at: String,
    /// Why the messages waited: `catch_up` (a backlog) or `scheduled` (the channel's digest
    /// schedule).
    pub reason: &'static str,
    /// Opened while the messages waited (and resolved again, when `resolved_as_of` is set).
    pub opened: Vec<DigestItem>,
    /// Opened earlier, resolved while the messages waited.
    pub resolved: Vec<DigestItem>,
    /// Live now.
    pub still_open: Vec<DigestItem>,
    /// Messages the digest stands for.
    pub held_messages: usize,
}

impl DigestFacts {
    /// The facts of a digest for `channel` not yet written (no event id, nothing filed as
    /// opened or resolved).
    fn new(
        channel: &str,
        reason: &'static str,
        at: &str,
        still_open: Vec<DigestItem>,
        held_messages: usize,
    ) -> DigestFacts {
        DigestFacts {
            event_id: 0,
            channel: channel.to_string(),
            reason,
            at: at.to_string(),
            opened: Vec::new(),
            resolved: Vec::new(),
            still_open,
            held_messages,
        }
    }

    /// Files each waiting alert under `opened` (opened while its messages waited) or
    /// `resolved` (opened earlier, resolved while they waited).
    fn add_waiting(&mut self, waiting: impl IntoIterator<Item = (DigestItem, bool)>) {
        for (item, opened) in waiting {
            if opened { self.opened.push(item) } else { self.resolved.push(item) }
        }
    }
}

impl std::fmt::Debug for Delivery<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Delivery")
    }
}

/// What one evaluation pass changed.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct EvalOutcome {
    pub opened: usize,
    pub updated: usize,
    pub resent: usize,
    pub resolved: usize,
    /// Outbox rows written.
    pub enqueued: usize,
    /// Messages held for a digest instead.
    pub held: usize,
    /// Messages left for a channel's scheduled digest.
    pub scheduled: usize,
}

/// One row of `tidemark alerts`.
#[derive(Debug, Clone, PartialEq)]
pub struct AlertRow {
    pub alert_id: i64,
    pub rule: Rule,
    pub source: String,
    pub subject: String,
    pub severity: Severity,
    pub state: String,
    pub summary: String,
    pub opened_at: String,
    pub last_seen_at: String,
    pub times_seen: i64,
    pub clear_count: i64,
    pub last_sent_at: Option<String>,
    pub sent_count: i64,
    pub delivered: i64,
    pub pending: i64,
    pub dead_letters: i64,
    pub acked_at: Option<String>,
    pub ack_note: Option<String>,
    pub resolved_at: Option<String>,
}

/// One outbox row to deliver.
#[derive(Debug, Clone, PartialEq)]
pub struct OutboxItem {
    pub outbox_id: i64,
    pub event_id: i64,
    pub channel: String,
    pub payload: String,
    pub attempts: i64,
    pub created_at: DateTime<Utc>,
}

/// A dead letter: (outbox id, event id, channel, attempts, last error, dead at).
pub type DeadLetter = (i64, i64, String, i64, Option<String>, String);

/// A live alert as the evaluation needs it.
struct Live {
    alert_id: i64,
    state: String,
    last_sent_at: Option<String>,
    severity: Severity,
}

impl Store {
    /// Applies one evaluation pass: its findings tripped; its clear conditions were evaluated
    /// on enough data and did not trip (each counts one clear evaluation of a live alert). A
    /// rule without enough data appears in neither and changes no alert; every rule's latest
    /// outcome goes to `rule_status`.
    pub fn apply_findings(
        &mut self,
        evaluation: &Evaluation,
        life: &Lifecycle,
        delivery: &Delivery<'_>,
    ) -> Result<EvalOutcome, StoreError> {
        let tx = self.conn.transaction()?;
        let mut outcome = EvalOutcome::default();
        let mut seen = HashSet::new();
        for status in &evaluation.statuses {
            record_status(&tx, status, life)?;
        }
        for finding in &evaluation.findings {
            if !seen.insert(finding.fingerprint.clone()) {
                continue;
            }
            raise(&tx, finding, life, delivery, &mut outcome)?;
        }
        for cleared in evaluation.clear.iter().filter(|c| !seen.contains(&c.fingerprint)) {
            clear_one(&tx, cleared, life, delivery, &mut outcome)?;
        }
        tx.commit()?;
        Ok(outcome)
    }

    /// Whether notifying events are held for a digest.
    pub fn digest_pending(&self) -> Result<bool, StoreError> {
        Ok(self.conn.query_row(
            "SELECT EXISTS (SELECT 1 FROM alert_event WHERE held = 1 AND digest_event_id IS NULL)",
            [],
            |r| r.get(0),
        )?)
    }

    /// When the oldest held event was written, if any.
    pub fn oldest_held(&self) -> Result<Option<DateTime<Utc>>, StoreError> {
        let at: Option<String> = self.conn.query_row(
            "SELECT min(at) FROM alert_event WHERE held = 1 AND digest_event_id IS NULL",
            [],
            |r| r.get(0),
        )?;
        Ok(at.as_deref().and_then(super::parse_time))
    }

    /// Ends a catch-up: one digest event per channel that takes any of the held events'
    /// alerts, queued in the outbox, and the held events marked as sent in it; all in one
    /// transaction. Returns the digests queued.
    pub fn flush_digest(
        &mut self,
        now: DateTime<Utc>,
        route: &dyn Fn(Severity) -> Vec<&'static str>,
        payload: &dyn Fn(&DigestFacts) -> String,
    ) -> Result<usize, StoreError> {
        let tx = self.conn.transaction()?;
        let held = held_alerts(&tx)?;
        if held.is_empty() {
            return Ok(0);
        }
        let live = digest_items(&tx, "WHERE a.state <> 'resolved'")?;
        let held_messages = tx.query_row(
            "SELECT count(*) FROM alert_event WHERE held = 1 AND digest_event_id IS NULL",
            [],
            |r| r.get::<_, i64>(0),
        )? as usize;
        let at = time_text(now);
        let mut channels: Vec<&'static str> =
            held.iter().flat_map(|(item, _)| route(item.severity)).collect();
        channels.sort_unstable();
        channels.dedup();
        let mut first_digest = None;
        for channel in &channels {
            let routed = |item: &DigestItem| route(item.severity).contains(channel);
            let still_open = live.iter().filter(|i| routed(i)).cloned().collect();
            let facts = DigestFacts::new(channel, "catch_up", &at, still_open, held_messages);
            let waiting = held.iter().filter(|(item, _)| routed(item)).cloned();
            first_digest.get_or_insert(queue_digest(&tx, facts, waiting, payload)?);
        }
        tx.execute(
            "UPDATE alert_event SET digest_event_id = ?1 WHERE held = 1 AND digest_event_id IS NULL",
            [first_digest.unwrap_or(0)],
        )?;
        tx.commit()?;
        Ok(channels.len())
    }

    /// A channel's scheduled digest: when a message for `channel` has waited since `fired` or
    /// earlier (the schedule's latest fire time), one digest event lists every waiting one
    /// (what opened, what resolved) and every live alert the channel `takes`, is queued for
    /// the channel, and the waiting messages point at it; one transaction. Returns whether a
    /// digest was queued.
    pub fn flush_scheduled_digest(
        &mut self,
        channel: &str,
        fired: DateTime<Utc>,
        now: DateTime<Utc>,
        takes: &dyn Fn(Severity) -> bool,
        payload: &dyn Fn(&DigestFacts) -> String,
    ) -> Result<bool, StoreError> {
        let tx = self.conn.transaction()?;
        let due: bool = tx.query_row(
            "SELECT EXISTS (SELECT 1 FROM digest_wait WHERE channel = ?1 AND digest_event_id IS NULL AND at <= ?2)",
            params![channel, time_text(fired)],
            |r| r.get(0),
        )?;
        if !due {
            return Ok(false);
        }
        let waiting = waiting_alerts(
            &tx,
            &format!(
                "SELECT event_id FROM digest_wait WHERE channel = {} AND digest_event_id IS NULL",
                sql_text(channel)
            ),
        )?;
        let held_messages = tx.query_row(
            "SELECT count(*) FROM digest_wait WHERE channel = ?1 AND digest_event_id IS NULL",
            [channel],
            |r| r.get::<_, i64>(0),
        )? as usize;
        let at = time_text(now);
        let live = digest_items(&tx, "WHERE a.state <> 'resolved'")?;
        let still_open = live.into_iter().filter(|i| takes(i.severity)).collect();
        let facts = DigestFacts::new(channel, "scheduled", &at, still_open, held_messages);
        let event_id = queue_digest(&tx, facts, waiting, payload)?;
        tx.execute(
            "UPDATE digest_wait SET digest_event_id = ?2 WHERE channel = ?1 AND digest_event_id IS NULL",
            params![channel, event_id],
        )?;
        tx.commit()?;
        Ok(true)
    }

    /// Acknowledges a live alert (see [`AlertDesk::ack_alert`]).
    pub fn ack_alert(&mut self, alert_id: i64, note: &str, now: DateTime<Utc>) -> Result<(), StoreError> {
        desk(&mut self.conn).ack_alert(alert_id, note, now)
    }

    /// Queues a test message (see [`AlertDesk::enqueue_test`]).
    pub fn enqueue_test(
        &mut self,
        channels: &[&'static str],
        now: DateTime<Utc>,
        payload: &dyn Fn(&MessageFacts) -> String,
    ) -> Result<i64, StoreError> {
        desk(&mut self.conn).enqueue_test(channels, now, payload)
    }

    /// Outbox rows due at `now`, oldest first.
    pub fn due_outbox(&self, now: DateTime<Utc>, limit: usize) -> Result<Vec<OutboxItem>, StoreError> {
        due_outbox(&self.conn, now, limit)
    }

    /// Marks a row delivered (see [`AlertDesk::mark_delivered`]).
    pub fn mark_delivered(&mut self, outbox_id: i64, now: DateTime<Utc>) -> Result<(), StoreError> {
        desk(&mut self.conn).mark_delivered(outbox_id, now)
    }

    /// Records a failed attempt (see [`AlertDesk::mark_failed`]).
    pub fn mark_failed(
        &mut self,
        outbox_id: i64,
        error: &str,
        now: DateTime<Utc>,
        retry_at: Option<DateTime<Utc>>,
    ) -> Result<(), StoreError> {
        desk(&mut self.conn).mark_failed(outbox_id, error, now, retry_at)
    }
}

/// The alert tables' own writes (acknowledging, test messages, delivery results) on a
/// connection of their own, without the store's writer lock: each is one short transaction
/// that touches only `alert`, `alert_event` and `outbox`, and SQLite serialises it with the
/// daemon's writer (busy timeout), so `alerts ack` and `alerts test` work while the daemon
/// runs, as the token commands do.
#[derive(Debug)]
pub struct AlertDesk<C = Connection> {
    conn: C,
}

impl AlertDesk {
    /// Opens the store at `path` (creating and migrating it if needed) for these writes.
    pub fn open(path: &Path) -> Result<AlertDesk, StoreError> {
        Ok(AlertDesk { conn: open_writer(path)? })
    }
}

fn desk(conn: &mut Connection) -> AlertDesk<&mut Connection> {
    AlertDesk { conn }
}

impl<C: BorrowMut<Connection>> AlertDesk<C> {
    /// Acknowledges a live alert: no more re-sends; it still resolves when clear.
    pub fn ack_alert(&mut self, alert_id: i64, note: &str, now: DateTime<Utc>) -> Result<(), StoreError> {
        let tx = self.conn.borrow_mut().transaction()?;
        let state: Option<String> = tx
            .query_row("SELECT state FROM alert WHERE alert_id = ?1", [alert_id], |r| r.get(0))
            .optional()?;
        match state.as_deref() {
            None => return Err(StoreError::Refused(format!("there is no alert {alert_id}"))),
            Some("resolved") => {
                return Err(StoreError::Refused(format!("alert {alert_id} is resolved already")));
            }
            Some(_) => {}
        }
        let at = time_text(now);
        tx.execute(
            "UPDATE alert SET state = 'acknowledged', acked_at = ?2, ack_note = ?3 WHERE alert_id = ?1",
            params![alert_id, at, note],
        )?;
        tx.execute(
            "INSERT INTO alert_event (alert_id, kind, at, note) VALUES (?1, 'acknowledged', ?2, ?3)",
            params![alert_id, at, note],
        )?;
        tx.commit()?;
        Ok(())
    }

    /// Queues a test message on every channel given, due [`TEST_HANDOVER`] from `now`;
    /// returns the event id.
    pub fn enqueue_test(
        &mut self,
        channels: &[&'static str],
        now: DateTime<Utc>,
        payload: &dyn Fn(&MessageFacts) -> String,
    ) -> Result<i64, StoreError> {
        let tx = self.conn.borrow_mut().transaction()?;
        let at = time_text(now);
        tx.execute("INSERT INTO alert_event (kind, at) VALUES ('test', ?1)", [&at])?;
        let event_id = tx.last_insert_rowid();
        let facts = MessageFacts {
            event_id,
            kind: "test".into(),
            alert_id: None,
            rule: "test".into(),
            source: String::new(),
            subject: String::new(),
            severity: Severity::Info,
            summary: "test message: delivery from tidemark works".into(),
            figures: "{}".into(),
            snapshot_id: None,
            snapshot_as_of: None,
            opened_at: at.clone(),
            at: at.clone(),
        };
        tx.execute(
            "UPDATE alert_event SET payload = ?2 WHERE event_id = ?1",
            params![event_id, payload(&facts)],
        )?;
        // Due a little later: the command that queued it delivers it now, and a running
        // daemon's delivery loop takes it only if that command died first.
        let due = time_text(now + TEST_HANDOVER);
        for channel in channels {
            enqueue(&tx, event_id, channel, &at)?;
            tx.execute(
                "UPDATE outbox SET due_at = ?3 WHERE event_id = ?1 AND channel = ?2",
                params![event_id, channel, due],
            )?;
        }
        tx.commit()?;
        Ok(event_id)
    }

    /// Outbox rows due at `now`, oldest first.
    pub fn due_outbox(&self, now: DateTime<Utc>, limit: usize) -> Result<Vec<OutboxItem>, StoreError> {
        due_outbox(self.conn.borrow(), now, limit)
    }

    /// Marks a row delivered; its alert becomes `notified` if it was `open`.
    pub fn mark_delivered(&mut self, outbox_id: i64, now: DateTime<Utc>) -> Result<(), StoreError> {
        let tx = self.conn.borrow_mut().transaction()?;
        tx.execute(
            "UPDATE outbox SET delivered_at = ?2, attempts = attempts + 1, last_error = NULL WHERE outbox_id = ?1",
            params![outbox_id, time_text(now)],
        )?;
        tx.execute(
            "UPDATE alert SET state = 'notified'
             WHERE state = 'open' AND alert_id =
                 (SELECT e.alert_id FROM outbox o JOIN alert_event e USING (event_id) WHERE o.outbox_id = ?1)",
            [outbox_id],
        )?;
        // A digest notifies every alert whose held message it stands for.
        tx.execute(
            "UPDATE alert SET state = 'notified'
             WHERE state = 'open' AND alert_id IN
                 (SELECT h.alert_id FROM outbox o JOIN alert_event d ON d.event_id = o.event_id
                  JOIN alert_event h ON h.digest_event_id = d.event_id
                  WHERE o.outbox_id = ?1 AND d.kind = 'digest')",
            [outbox_id],
        )?;
        tx.execute(
            "UPDATE alert SET state = 'notified'
             WHERE state = 'open' AND alert_id IN
                 (SELECT h.alert_id FROM outbox o JOIN digest_wait w ON w.digest_event_id = o.event_id
                  JOIN alert_event h ON h.event_id = w.event_id
                  WHERE o.outbox_id = ?1)",
            [outbox_id],
        )?;
        tx.commit()?;
        Ok(())
    }

    /// Records a failed attempt: retried at `retry_at`, or a dead letter when `None`.
    pub fn mark_failed(
        &mut self,
        outbox_id: i64,
        error: &str,
        now: DateTime<Utc>,
        retry_at: Option<DateTime<Utc>>,
    ) -> Result<(), StoreError> {
        match retry_at {
            Some(at) => self.conn.borrow_mut().execute(
                "UPDATE outbox SET attempts = attempts + 1, last_error = ?2, due_at = ?3 WHERE outbox_id = ?1",
                params![outbox_id, error, time_text(at)],
            )?,
            None => self.conn.borrow_mut().execute(
                "UPDATE outbox SET attempts = attempts + 1, last_error = ?2, dead_at = ?3 WHERE outbox_id = ?1",
                params![outbox_id, error, time_text(now)],
            )?,
        };
        Ok(())
    }
}

/// Outbox rows due at `now`, oldest first.
fn due_outbox(conn: &Connection, now: DateTime<Utc>, limit: usize) -> Result<Vec<OutboxItem>, StoreError> {
    let mut stmt = conn.prepare(
        "SELECT o.outbox_id, o.event_id, o.channel, e.payload, o.attempts, o.created_at
         FROM outbox o JOIN alert_event e USING (event_id)
         WHERE o.delivered_at IS NULL AND o.dead_at IS NULL AND o.due_at <= ?1
         ORDER BY o.due_at, o.outbox_id LIMIT ?2",
    )?;
    let rows = stmt.query_map(params![time_text(now), limit as i64], |r| {
        Ok(OutboxItem {
            outbox_id: r.get(0)?,
            event_id: r.get(1)?,
            channel: r.get(2)?,
            payload: r.get::<_, Option<String>>(3)?.unwrap_or_default(),
            attempts: r.get(4)?,
            created_at: super::parse_time(&r.get::<_, String>(5)?).unwrap_or_default(),
        })
    })?;
    Ok(rows.collect::<Result<_, _>>()?)
}

/// Opens an alert for a new fingerprint, or updates (and maybe re-sends) the live one.
fn raise(
    tx: &Transaction<'_>,
    f: &Finding,
    life: &Lifecycle,
    delivery: &Delivery<'_>,
    outcome: &mut EvalOutcome,
) -> Result<(), StoreError> {
    let now = time_text(life.now);
    let live: Option<Live> = tx
        .query_row(
            "SELECT alert_id, state, last_sent_at, severity FROM alert WHERE fingerprint = ?1 AND state <> 'resolved'",
            [&f.fingerprint],
            |r| Ok(Live { alert_id: r.get(0)?, state: r.get(1)?, last_sent_at: r.get(2)?, severity: r.get(3)? }),
        )
        .optional()?;
    let Some(live) = live else {
        tx.execute(
            "INSERT INTO alert (fingerprint, rule, source, subject, severity, state, summary, figures, snapshot_id,
                 opened_at, last_seen_at, opened_as_of, last_seen_as_of, data_day)
             SELECT ?1, ?2, ?3, ?4, ?5, 'open', ?6, ?7, ?8, ?9, ?9, n.as_of, n.as_of, substr(n.as_of, 1, 10)
             FROM (SELECT 1) LEFT JOIN snapshot n ON n.snapshot_id = ?8",
            params![f.fingerprint, f.rule, f.source, f.subject, f.severity, f.summary, f.figures, f.snapshot_id, now],
        )?;
        outcome.opened += 1;
        return notify(tx, tx.last_insert_rowid(), "opened", life, delivery, outcome);
    };
    tx.execute(
        "UPDATE alert SET last_seen_at = ?2, times_seen = times_seen + 1, clear_count = 0, summary = ?3,
             figures = ?4, severity = ?5,
             last_seen_as_of = coalesce((SELECT as_of FROM snapshot WHERE snapshot_id = ?6), last_seen_as_of)
         WHERE alert_id = ?1",
        params![live.alert_id, now, f.summary, f.figures, f.severity.max(live.severity), f.snapshot_id],
    )?;
    outcome.updated += 1;
    if live.state == "acknowledged" {
        return Ok(());
    }
    // One episode, one page: a live alert is sent again only when it reaches a higher
    // severity than any it had (kept at its peak), or after the re-send interval.
    if f.severity > live.severity {
        outcome.resent += 1;
        notify(tx, live.alert_id, "escalated", life, delivery, outcome)?;
    } else if resend_due(live.last_sent_at.as_deref(), life) {
        outcome.resent += 1;
        notify(tx, live.alert_id, "resent", life, delivery, outcome)?;
    }
    Ok(())
}

/// An unacknowledged alert is sent again once `resend_after` has passed since the last
/// send; one that was never sent (no channel took it) is not.
fn resend_due(last_sent_at: Option<&str>, life: &Lifecycle) -> bool {
    let Some(last) = last_sent_at.and_then(super::parse_time) else { return false };
    let since = (life.now - last).to_std().unwrap_or_default();
    since >= life.resend_after
}

/// The alerts with held events: `(item, true)` for those opened while held (resolved again
/// or not), `(item, false)` for those opened earlier that resolved while held. Alerts only
/// re-sent or escalated while held are in the digest's still-open list.
fn held_alerts(tx: &Transaction<'_>) -> Result<Vec<(DigestItem, bool)>, StoreError> {
    waiting_alerts(tx, "SELECT event_id FROM alert_event WHERE held = 1 AND digest_event_id IS NULL")
}

/// As [`held_alerts`], for the events selected by `events` (a query of event ids written
/// here, never from input).
fn waiting_alerts(tx: &Transaction<'_>, events: &str) -> Result<Vec<(DigestItem, bool)>, StoreError> {
    // Per alert with waiting events: whether one of them opened it, and whether one resolved it.
    let mut stmt = tx.prepare(&format!(
        "SELECT alert_id, max(kind = 'opened'), max(kind = 'resolved') FROM alert_event
         WHERE event_id IN ({events}) AND alert_id IS NOT NULL GROUP BY alert_id"
    ))?;
    let kinds: std::collections::HashMap<i64, (bool, bool)> =
        stmt.query_map([], |r| Ok((r.get(0)?, (r.get(1)?, r.get(2)?))))?.collect::<Result<_, _>>()?;
    let items = digest_items(
        tx,
        &format!("WHERE a.alert_id IN (SELECT alert_id FROM alert_event WHERE event_id IN ({events}))"),
    )?;
    Ok(items
        .into_iter()
        .filter_map(|item| match kinds.get(&item.alert_id) {
            Some((true, _)) => Some((item, true)),
            Some((false, true)) => Some((item, false)),
            _ => None,
        })
        .collect())
}

/// A channel name as an SQL string literal (channel names are fixed words; quotes doubled
/// all the same).
fn sql_text(text: &str) -> String {
    format!("'{}'", text.replace('\'', "''"))
}

/// Alerts in digest order (critical first, then by id), filtered by `filter` (a WHERE
/// clause written here, never from input).
fn digest_items(tx: &Transaction<'_>, filter: &str) -> Result<Vec<DigestItem>, StoreError> {
    let sql = format!(
        "SELECT a.alert_id, a.rule, a.source, a.subject, a.severity, a.summary, a.data_day, a.opened_as_of,
                CASE WHEN a.state = 'resolved' THEN coalesce(a.resolved_as_of, a.resolved_at) END
         FROM alert a {filter}
         ORDER BY CASE a.severity WHEN 'critical' THEN 0 WHEN 'warning' THEN 1 ELSE 2 END, a.alert_id"
    );
    let mut stmt = tx.prepare(&sql)?;
    let rows = stmt.query_map([], |r| {
        Ok(DigestItem {
            alert_id: r.get(0)?,
            rule: r.get(1)?,
            source: r.get(2)?,
            subject: r.get(3)?,
            severity: r.get(4)?,
            summary: r.get(5)?,
            data_day: r.get(6)?,
            opened_as_of: r.get(7)?,
            resolved_as_of: r.get(8)?,
        })
    })?;
    Ok(rows.collect::<Result<_, _>>()?)
}

/// Keeps the latest outcome of one rule for one subject.
fn record_status(tx: &Transaction<'_>, status: &RuleStatus, life: &Lifecycle) -> Result<(), StoreError> {
    tx.execute(
        "INSERT INTO rule_status (fingerprint, rule, source, subject, outcome, reason, snapshot_id, evaluated_at)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)
         ON CONFLICT (fingerprint) DO UPDATE SET rule = excluded.rule, outcome = excluded.outcome,
             reason = excluded.reason, snapshot_id = excluded.snapshot_id, evaluated_at = excluded.evaluated_at",
        params![
            status.fingerprint,
            status.rule,
            status.source,
            status.subject,
            status.outcome,
            status.reason,
            life.snapshot_id,
            time_text(life.now)
        ],
    )?;
    Ok(())
}

/// Counts a clear evaluation of the live alert of a fingerprint, if any, and resolves it
/// once it has been clear for its `resolve_after` evaluations in a row.
fn clear_one(
    tx: &Transaction<'_>,
    cleared: &Cleared,
    life: &Lifecycle,
    delivery: &Delivery<'_>,
    outcome: &mut EvalOutcome,
) -> Result<(), StoreError> {
    let live: Option<(i64, i64, i64)> = tx
        .query_row(
            "SELECT alert_id, clear_count, sent_count FROM alert WHERE fingerprint = ?1 AND state <> 'resolved'",
            [&cleared.fingerprint],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .optional()?;
    let Some((alert_id, clear_count, sent_count)) = live else { return Ok(()) };
    if clear_count + 1 < i64::from(cleared.resolve_after.max(1)) {
        tx.execute("UPDATE alert SET clear_count = clear_count + 1 WHERE alert_id = ?1", [alert_id])?;
        return Ok(());
    }
    let now = time_text(life.now);
    tx.execute(
        "UPDATE alert SET clear_count = clear_count + 1, state = 'resolved', resolved_at = ?2,
             resolved_as_of = (SELECT as_of FROM snapshot WHERE snapshot_id = ?3)
         WHERE alert_id = ?1",
        params![alert_id, now, life.snapshot_id],
    )?;
    outcome.resolved += 1;
    if sent_count > 0 {
        notify(tx, alert_id, "resolved", life, delivery, outcome)?;
    } else {
        tx.execute(
            "INSERT INTO alert_event (alert_id, kind, at) VALUES (?1, 'resolved', ?2)",
            params![alert_id, now],
        )?;
    }
    Ok(())
}

/// Writes a notifying event with its payload and one outbox row per routed channel.
fn notify(
    tx: &Transaction<'_>,
    alert_id: i64,
    kind: &str,
    life: &Lifecycle,
    delivery: &Delivery<'_>,
    outcome: &mut EvalOutcome,
) -> Result<(), StoreError> {
    let at = time_text(life.now);
    tx.execute(
        "INSERT INTO alert_event (alert_id, kind, at) VALUES (?1, ?2, ?3)",
        params![alert_id, kind, at],
    )?;
    let event_id = tx.last_insert_rowid();
    let mut facts = tx.query_row(
        "SELECT a.rule, a.source, a.subject, a.severity, a.summary, a.figures, a.snapshot_id,
                coalesce(a.last_seen_as_of, n.as_of), a.opened_at
         FROM alert a LEFT JOIN snapshot n ON n.snapshot_id = a.snapshot_id WHERE a.alert_id = ?1",
        [alert_id],
        |r| {
            Ok(MessageFacts {
                event_id,
                kind: kind.to_string(),
                alert_id: Some(alert_id),
                rule: r.get(0)?,
                source: r.get(1)?,
                subject: r.get(2)?,
                severity: r.get(3)?,
                summary: r.get(4)?,
                figures: r.get(5)?,
                snapshot_id: r.get(6)?,
                snapshot_as_of: r.get(7)?,
                opened_at: r.get(8)?,
                at: at.clone(),
            })
        },
    )?;
    facts.kind = kind.to_string();
    tx.execute(
        "UPDATE alert_event SET payload = ?2 WHERE event_id = ?1",
        params![event_id, (delivery.payload)(&facts)],
    )?;
    let channels = (delivery.route)(facts.severity);
    if delivery.hold && !channels.is_empty() {
        tx.execute("UPDATE alert_event SET held = 1 WHERE event_id = ?1", [event_id])?;
        outcome.held += 1;
    } else {
        let scheduled = (delivery.scheduled)(facts.severity);
        for channel in &channels {
            if scheduled.contains(channel) {
                tx.execute(
                    "INSERT INTO digest_wait (event_id, channel, at) VALUES (?1, ?2, ?3)",
                    params![event_id, channel, at],
                )?;
                outcome.scheduled += 1;
            } else {
                enqueue(tx, event_id, channel, &at)?;
                outcome.enqueued += 1;
            }
        }
    }
    if !channels.is_empty() && kind != "resolved" {
        tx.execute(
            "UPDATE alert SET last_sent_at = ?2, sent_count = sent_count + 1 WHERE alert_id = ?1",
            params![alert_id, at],
        )?;
    }
    Ok(())
}

/// Writes one digest: its event (kind `digest`, at `facts.at`), the waiting alerts filed into
/// its facts, its payload, and its outbox row for `facts.channel`. Returns the event id.
fn queue_digest(
    tx: &Transaction<'_>,
    mut facts: DigestFacts,
    waiting: impl IntoIterator<Item = (DigestItem, bool)>,
    payload: &dyn Fn(&DigestFacts) -> String,
) -> Result<i64, StoreError> {
    tx.execute("INSERT INTO alert_event (kind, at) VALUES ('digest', ?1)", [&facts.at])?;
    facts.event_id = tx.last_insert_rowid();
    facts.add_waiting(waiting);
    tx.execute(
        "UPDATE alert_event SET payload = ?2 WHERE event_id = ?1",
        params![facts.event_id, payload(&facts)],
    )?;
    enqueue(tx, facts.event_id, &facts.channel, &facts.at)?;
    Ok(facts.event_id)
}

fn enqueue(tx: &Transaction<'_>, event_id: i64, channel: &str, at: &str) -> Result<(), StoreError> {
    tx.execute(
        "INSERT INTO outbox (event_id, channel, created_at, due_at) VALUES (?1, ?2, ?3, ?3)",
        params![event_id, channel, at],
    )?;
    Ok(())
}

impl Reader {
    /// When the source's latest applied snapshot was received (the staleness rule's clock:
    /// arrival, not the extract's own as-of time).
    pub fn last_received(&self, source_id: SourceId) -> Result<Option<DateTime<Utc>>, StoreError> {
        let text: Option<String> = self.conn.query_row(
            "SELECT max(received_at) FROM snapshot WHERE source_id = ?1 AND status = 'applied'",
            [source_id],
            |r| r.get(0),
        )?;
        Ok(text.as_deref().and_then(super::parse_time))
    }

    /// Alerts, live ones first, newest first, with their delivery counts.
    pub fn alerts(&self, include_resolved: bool) -> Result<Vec<AlertRow>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT a.alert_id, a.rule, a.source, a.subject, a.severity, a.state, a.summary, a.opened_at,
                    a.last_seen_at, a.times_seen, a.clear_count, a.last_sent_at, a.sent_count,
                    coalesce(sum(o.delivered_at IS NOT NULL), 0),
                    coalesce(sum(o.outbox_id IS NOT NULL AND o.delivered_at IS NULL AND o.dead_at IS NULL), 0),
                    coalesce(sum(o.dead_at IS NOT NULL), 0),
                    a.acked_at, a.ack_note, a.resolved_at
             FROM alert a
             LEFT JOIN alert_event e ON e.alert_id = a.alert_id
             LEFT JOIN outbox o ON o.event_id = e.event_id
             WHERE ?1 OR a.state <> 'resolved'
             GROUP BY a.alert_id
             ORDER BY a.state = 'resolved', a.alert_id DESC",
        )?;
        let rows = stmt.query_map([include_resolved], |r| {
            Ok(AlertRow {
                alert_id: r.get(0)?,
                rule: r.get(1)?,
                source: r.get(2)?,
                subject: r.get(3)?,
                severity: r.get(4)?,
                state: r.get(5)?,
                summary: r.get(6)?,
                opened_at: r.get(7)?,
                last_seen_at: r.get(8)?,
                times_seen: r.get(9)?,
                clear_count: r.get(10)?,
                last_sent_at: r.get(11)?,
                sent_count: r.get(12)?,
                delivered: r.get(13)?,
                pending: r.get(14)?,
                dead_letters: r.get(15)?,
                acked_at: r.get(16)?,
                ack_note: r.get(17)?,
                resolved_at: r.get(18)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Whether evaluating `snapshot_id` is part of a catch-up: its as-of time is before
    /// `older_than`, or a later snapshot of its source is already committed.
    pub fn catching_up(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        older_than: DateTime<Utc>,
    ) -> Result<bool, StoreError> {
        let found: Option<bool> = self
            .conn
            .query_row(
                "SELECT as_of < ?3 OR EXISTS (SELECT 1 FROM snapshot l WHERE l.source_id = ?1 AND l.snapshot_id > ?2)
                 FROM snapshot WHERE snapshot_id = ?2",
                params![source_id, snapshot_id, time_text(older_than)],
                |r| r.get(0),
            )
            .optional()?;
        Ok(found.unwrap_or(false))
    }

    /// The rules that could not decide at their latest evaluation: (rule, source, subject,
    /// reason, evaluated at), by source and rule.
    pub fn undecided_rules(&self) -> Result<Vec<[String; 5]>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT rule, source, subject, coalesce(reason, ''), evaluated_at FROM rule_status
             WHERE outcome = 'not_enough_data' ORDER BY source, rule, subject",
        )?;
        let rows = stmt.query_map([], |r| Ok([r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?]))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Dead letters and the test messages' outbox rows: (outbox id, event id, channel,
    /// attempts, last error, dead at), newest first.
    pub fn dead_letters(&self) -> Result<Vec<DeadLetter>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT outbox_id, event_id, channel, attempts, last_error, dead_at FROM outbox
             WHERE dead_at IS NOT NULL ORDER BY outbox_id DESC",
        )?;
        let rows =
            stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }
}
