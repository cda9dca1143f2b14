-- tidemark store, version 9: the short-baseline count rules are named by their method, and
-- alerts keep the data time they are about.
--
-- Rule ids: the three z-score rules on daily counts are renamed (C1, C2 and C3 of the
-- published method keep their names in the docs). Message payloads already sent keep the id
-- they were sent with.
--
-- Episodes: the count rules of one source and subject are now one alert (fingerprint
-- `count|source|subject`), so a rise that trips C1, C2 and C3 pages once. Of the live count
-- alerts of one source and subject the newest stays live and the others are resolved here,
-- with an event saying why, before the fingerprints merge (live fingerprints are unique).
INSERT INTO alert_event (alert_id, kind, at, note)
SELECT alert_id, 'resolved', strftime('%Y-%m-%dT%H:%M:%SZ', 'now'), 'merged into one count episode by the store upgrade'
FROM alert
WHERE state <> 'resolved' AND rule IN ('ears_c1', 'ears_c2', 'ears_c3', 'count_cusum')
  AND alert_id NOT IN (SELECT max(alert_id) FROM alert
                       WHERE state <> 'resolved' AND rule IN ('ears_c1', 'ears_c2', 'ears_c3', 'count_cusum')
                       GROUP BY source, subject);
UPDATE alert SET state = 'resolved', resolved_at = strftime('%Y-%m-%dT%H:%M:%SZ', 'now')
WHERE alert_id IN (SELECT alert_id FROM alert_event
                   WHERE note = 'merged into one count episode by the store upgrade');
UPDATE alert SET fingerprint = 'count' || substr(fingerprint, instr(fingerprint, '|'))
WHERE rule IN ('ears_c1', 'ears_c2', 'ears_c3', 'count_cusum');
UPDATE alert SET rule = 'count_z_recent' WHERE rule = 'ears_c1';
UPDATE alert SET rule = 'count_z_guarded' WHERE rule = 'ears_c2';
UPDATE alert SET rule = 'count_z_guarded_3day' WHERE rule = 'ears_c3';

-- The latest outcome of every rule for every subject it evaluated, including "not enough
-- data" and its reason, so `alerts` can say which rules cannot decide yet.
CREATE TABLE rule_status (
    fingerprint  TEXT PRIMARY KEY,
    rule         TEXT NOT NULL,
    source       TEXT NOT NULL,
    subject      TEXT NOT NULL,
    outcome      TEXT NOT NULL CHECK (outcome IN ('signal', 'clear', 'not_enough_data')),
    reason       TEXT,
    snapshot_id  INTEGER,
    evaluated_at TEXT NOT NULL
);

-- Data time: the as-of time of the snapshot whose evaluation opened, last saw and resolved
-- the alert (NULL for rules evaluated after a poll, whose data time is the evaluation time),
-- and the day the figure that opened it is about. `alerts --as-of` filters by these, so a
-- past figure's alerts can be listed by the data they came from, not by when the daemon ran.
ALTER TABLE alert ADD COLUMN opened_as_of TEXT;
ALTER TABLE alert ADD COLUMN last_seen_as_of TEXT;
ALTER TABLE alert ADD COLUMN resolved_as_of TEXT;
ALTER TABLE alert ADD COLUMN data_day TEXT;
UPDATE alert SET opened_as_of = (SELECT n.as_of FROM snapshot n WHERE n.snapshot_id = alert.snapshot_id),
                 data_day = (SELECT substr(n.as_of, 1, 10) FROM snapshot n WHERE n.snapshot_id = alert.snapshot_id);
CREATE INDEX alert_opened_as_of ON alert(opened_as_of);

DROP VIEW IF EXISTS alert_open;
CREATE VIEW alert_open AS
SELECT a.alert_id, a.rule, a.source, a.subject, a.severity, a.state, a.summary, a.figures,
       a.data_day, a.opened_as_of, a.last_seen_as_of,
       a.opened_at, a.last_seen_at, a.times_seen, a.clear_count, a.last_sent_at, a.sent_count,
       a.acked_at, a.ack_note,
       (SELECT count(*) FROM outbox o JOIN alert_event e USING (event_id)
         WHERE e.alert_id = a.alert_id AND o.delivered_at IS NULL AND o.dead_at IS NULL) AS pending,
       (SELECT count(*) FROM outbox o JOIN alert_event e USING (event_id)
         WHERE e.alert_id = a.alert_id AND o.dead_at IS NOT NULL) AS dead_letters
FROM alert a
WHERE a.state <> 'resolved';

-- Digests: while the daemon catches up on a backlog, notifying events are written with their
-- payload but held (`held = 1`, no outbox rows); at the end of the catch-up each channel gets
-- one `digest` event listing them, and the held events point at it.
ALTER TABLE alert_event ADD COLUMN held INTEGER NOT NULL DEFAULT 0;
ALTER TABLE alert_event ADD COLUMN digest_event_id INTEGER;
CREATE INDEX alert_event_held ON alert_event(held) WHERE held = 1 AND digest_event_id IS NULL;
