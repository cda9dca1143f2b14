-- tidemark store, version 4: data-quality measures per applied snapshot, the alert
-- lifecycle and the delivery outbox. Quality rows are keyed by the snapshot they describe;
-- alerts and their outbox rows are always written in one transaction.

-- Missing and invalid shares of one canonical field, among the current records of a
-- snapshot (scope 'current') or among the records the snapshot added or changed (scope
-- 'new_changed'); for the whole source (stratum_kind 'all', stratum '') or per jurisdiction.
-- missing = empty cell (NULL and not marked invalid); invalid = a value that could not be
-- used (the version's `invalid` column, the same cells `field_problem` lists by line).
CREATE TABLE quality (
    snapshot_id   INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    source_id     INTEGER NOT NULL REFERENCES source(source_id),
    scope         TEXT NOT NULL CHECK (scope IN ('current', 'new_changed')),
    stratum_kind  TEXT NOT NULL,             -- 'all' or 'jurisdiction'
    stratum       TEXT NOT NULL,             -- '' for 'all'; '(missing)' without a jurisdiction
    field         TEXT NOT NULL,
    records       INTEGER NOT NULL,
    missing       INTEGER NOT NULL,
    invalid       INTEGER NOT NULL,
    share_missing REAL,                      -- NULL when records = 0
    share_invalid REAL,
    PRIMARY KEY (snapshot_id, scope, stratum_kind, stratum, field)
) WITHOUT ROWID;
CREATE INDEX quality_source ON quality(source_id, snapshot_id);

-- Reporting lag of the records first seen in a snapshot: days from the reference date
-- (the first present of the configured fields, e.g. onset else specimen date) to the
-- snapshot's as-of day.
CREATE TABLE quality_lag (
    snapshot_id  INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    source_id    INTEGER NOT NULL REFERENCES source(source_id),
    stratum_kind TEXT NOT NULL,
    stratum      TEXT NOT NULL,
    ref_fields   TEXT NOT NULL,              -- e.g. 'onset_date,specimen_date'
    new_records  INTEGER NOT NULL,           -- records first seen in this snapshot
    n            INTEGER NOT NULL,           -- of which with a reference date
    median_days  REAL,
    p90_days     REAL,
    PRIMARY KEY (snapshot_id, stratum_kind, stratum)
) WITHOUT ROWID;

-- The lag histogram behind quality_lag: how many records first seen in the snapshot had
-- each lag (days); the lag-jump rule reads it per day. Counts only, no record keys.
CREATE TABLE quality_lag_hist (
    snapshot_id  INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    source_id    INTEGER NOT NULL REFERENCES source(source_id),
    stratum_kind TEXT NOT NULL,
    stratum      TEXT NOT NULL,
    lag_days     INTEGER NOT NULL,
    n            INTEGER NOT NULL,
    PRIMARY KEY (snapshot_id, stratum_kind, stratum, lag_days)
) WITHOUT ROWID;
CREATE INDEX quality_lag_hist_source ON quality_lag_hist(source_id, snapshot_id);

-- The latest quality rows of every source, with the snapshot's volume.
CREATE VIEW quality_latest AS
SELECT s.name AS source, q.snapshot_id, n.as_of, q.scope, q.stratum_kind, q.stratum, q.field,
       q.records, q.missing, q.invalid, q.share_missing, q.share_invalid,
       n.rows_total, n.rows_new, n.rows_changed, n.rows_removed, n.rows_rejected
FROM quality q
JOIN snapshot n ON n.snapshot_id = q.snapshot_id
JOIN source s ON s.source_id = q.source_id
WHERE q.snapshot_id = (SELECT max(snapshot_id) FROM quality l WHERE l.source_id = q.source_id);

-- One row per live or past alert. A fingerprint (rule, source, subject) has at most one
-- alert that is not resolved.
CREATE TABLE alert (
    alert_id      INTEGER PRIMARY KEY,
    fingerprint   TEXT NOT NULL,
    rule          TEXT NOT NULL,
    source        TEXT NOT NULL,
    subject       TEXT NOT NULL,             -- field or stratum, '' for the whole source
    severity      TEXT NOT NULL CHECK (severity IN ('info', 'warning', 'critical')),
    state         TEXT NOT NULL CHECK (state IN ('open', 'notified', 'acknowledged', 'resolved')),
    summary       TEXT NOT NULL,             -- aggregates only
    figures       TEXT NOT NULL,             -- JSON object of the figures that tripped the rule
    snapshot_id   INTEGER REFERENCES snapshot(snapshot_id),
    opened_at     TEXT NOT NULL,
    last_seen_at  TEXT NOT NULL,             -- last evaluation that found the condition
    times_seen    INTEGER NOT NULL DEFAULT 1,
    clear_count   INTEGER NOT NULL DEFAULT 0, -- consecutive clear evaluations
    last_sent_at  TEXT,                      -- last time a notification was enqueued
    sent_count    INTEGER NOT NULL DEFAULT 0,
    acked_at      TEXT,
    ack_note      TEXT,
    resolved_at   TEXT
);
CREATE UNIQUE INDEX alert_live ON alert(fingerprint) WHERE state <> 'resolved';
CREATE INDEX alert_source ON alert(source, rule);

-- What happened to an alert, in order. Notification events are what the outbox delivers;
-- their id is the idempotency key receivers see.
CREATE TABLE alert_event (
    event_id   INTEGER PRIMARY KEY,
    alert_id   INTEGER REFERENCES alert(alert_id),  -- NULL for a test message
    kind       TEXT NOT NULL,             -- opened, resent, acknowledged, resolved, test
    at         TEXT NOT NULL,
    note       TEXT,
    payload    TEXT                       -- JSON message body for notifying events
);
CREATE INDEX alert_event_alert ON alert_event(alert_id);

-- One row per (event, channel) to deliver. A row is done when delivered or dead.
CREATE TABLE outbox (
    outbox_id    INTEGER PRIMARY KEY,
    event_id     INTEGER NOT NULL REFERENCES alert_event(event_id),
    channel      TEXT NOT NULL CHECK (channel IN ('email', 'webhook')),
    created_at   TEXT NOT NULL,
    due_at       TEXT NOT NULL,
    attempts     INTEGER NOT NULL DEFAULT 0,
    last_error   TEXT,
    delivered_at TEXT,
    dead_at      TEXT,                    -- gave up: older than the maximum age
    UNIQUE (event_id, channel)
);
CREATE INDEX outbox_due ON outbox(due_at) WHERE delivered_at IS NULL AND dead_at IS NULL;

-- Alerts that are not resolved, with their delivery state.
CREATE VIEW alert_open AS
SELECT a.alert_id, a.rule, a.source, a.subject, a.severity, a.state, a.summary, a.figures,
       a.opened_at, a.last_seen_at, a.times_seen, a.clear_count, a.last_sent_at, a.sent_count,
       a.acked_at, a.ack_note,
       (SELECT count(*) FROM outbox o JOIN alert_event e USING (event_id)
         WHERE e.alert_id = a.alert_id AND o.delivered_at IS NULL AND o.dead_at IS NULL) AS pending,
       (SELECT count(*) FROM outbox o JOIN alert_event e USING (event_id)
         WHERE e.alert_id = a.alert_id AND o.dead_at IS NOT NULL) AS dead_letters
FROM alert a
WHERE a.state <> 'resolved';
