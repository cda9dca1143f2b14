-- tidemark store, version 5: analysts' access. API tokens (only their SHA-256 is kept) and
-- stable views over the tables, documented in docs/store.md, so
-- that scripts in R, Python or SQL do not depend on how the tables are laid out.

CREATE TABLE api_token (
    token_id    INTEGER PRIMARY KEY,
    name        TEXT NOT NULL UNIQUE,
    scope       TEXT NOT NULL CHECK (scope IN ('read', 'sql')),
    sha256      TEXT NOT NULL UNIQUE,    -- hex SHA-256 of the whole token; the token itself is never stored
    hint        TEXT NOT NULL,           -- the token's prefix and first characters, to recognise it
    created_at  TEXT NOT NULL,
    revoked_at  TEXT                     -- NULL while the token is valid
);

-- The current version of every record, with its source's name.
CREATE VIEW current_case AS
SELECT s.name AS source, v.case_key, v.version_id, v.valid_from,
       v.jurisdiction, v.onset_date, v.specimen_date, v.result_date, v.report_date,
       v.admit_date, v.death_date, v.outcome, v.age_lo, v.age_hi, v.sex, v.hospitalised,
       v.symptoms, v.conditions, v.invalid, v.extra_json
FROM case_version v JOIN source s USING (source_id)
WHERE v.valid_to IS NULL;

-- Every snapshot with its source's name, status and row counts, and how many versions it
-- opened (new or changed records) and closed.
CREATE VIEW snapshot_summary AS
SELECT n.snapshot_id, s.name AS source, n.seq, n.as_of, n.received_at, n.status,
       n.extract_kind, n.rows_total, n.rows_accepted, n.rows_rejected, n.rows_new,
       n.rows_changed, n.rows_removed, n.field_problems, n.applied_at, n.origin, n.sha256,
       n.bytes, n.note
FROM snapshot n JOIN source s USING (source_id);

-- The reporting triangle, one row per cell that some snapshot changed: the count of records
-- with reference date ref_date (in a stratum) as known after snapshot snapshot_id, with the
-- snapshot's change to it (delta) and the delay in days from ref_date to the snapshot day.
-- On days without a snapshot the count carries forward; when a day has several snapshots,
-- the last one (highest snapshot_id) is the day's count.
CREATE VIEW triangle_cell AS
SELECT s.name AS source, t.ref_field, t.stratum_kind, t.stratum, t.ref_date,
       t.snapshot_id, t.snapshot_day,
       CAST(julianday(t.snapshot_day) - julianday(t.ref_date) AS INTEGER) AS delay_days,
       t.delta,
       sum(t.delta) OVER (
           PARTITION BY t.source_id, t.ref_field, t.stratum_kind, t.stratum, t.ref_date
           ORDER BY t.snapshot_day, t.snapshot_id
           ROWS UNBOUNDED PRECEDING) AS count
FROM triangle t JOIN source s USING (source_id);

-- The nowcasts of each source's latest applied snapshot that has nowcasts.
CREATE VIEW nowcast_latest AS
WITH latest AS (
    SELECT w.source_id, max(w.snapshot_id) AS snapshot_id
    FROM nowcast w JOIN snapshot n ON n.snapshot_id = w.snapshot_id
    WHERE n.status = 'applied'
    GROUP BY w.source_id)
SELECT s.name AS source, w.snapshot_id, n.as_of, w.ref_field, w.stratum_kind, w.stratum,
       w.method, w.ref_date, w.horizon, w.observed, w.median, w.mean, w.lower50, w.upper50,
       w.lower90, w.upper90, w.lower95, w.upper95, w.completeness
FROM latest l
JOIN nowcast w ON w.snapshot_id = l.snapshot_id
JOIN snapshot n ON n.snapshot_id = w.snapshot_id
JOIN source s ON s.source_id = w.source_id;

-- The delay fits of each source's latest applied snapshot that has fits.
CREATE VIEW delay_fit_latest AS
WITH latest AS (
    SELECT f.source_id, max(f.snapshot_id) AS snapshot_id
    FROM delay_fit f JOIN snapshot n ON n.snapshot_id = f.snapshot_id
    WHERE n.status = 'applied'
    GROUP BY f.source_id)
SELECT s.name AS source, f.snapshot_id, n.as_of, f.from_field, f.to_field, f.stratum_kind,
       f.stratum, f.family, f.rank, f.n, f.param1, f.param2, f.log_likelihood, f.aic,
       f.mean, f.mean_lo, f.mean_hi, f.median, f.median_lo, f.median_hi,
       f.p95, f.p95_lo, f.p95_hi, f.identifiable, f.warnings
FROM latest l
JOIN delay_fit f ON f.snapshot_id = l.snapshot_id
JOIN snapshot n ON n.snapshot_id = f.snapshot_id
JOIN source s ON s.source_id = f.source_id;
