-- tidemark store, version 8: every stored nowcast scored once its truth has matured.
--
-- After each applied snapshot S, the stored nowcasts made `analysis.backtest_lag` or more
-- days before S's day, and not scored yet, are scored against the count known at S (at most
-- the maximum delay after the reference date): whether the truth lies in the 50/90/95%
-- intervals, the weighted interval score, the error of the median, and the naive count's
-- score (its absolute error). A row is scored once and never rewritten; `scored_snapshot_id`
-- says when its truth became known, so `auto` as of a snapshot reads only the scores that
-- had matured by then.
CREATE TABLE IF NOT EXISTS nowcast_score (
    source_id            INTEGER NOT NULL REFERENCES source(source_id),
    ref_field            TEXT NOT NULL,
    stratum_kind         TEXT NOT NULL,
    stratum              TEXT NOT NULL,
    method               TEXT NOT NULL,
    forecast_snapshot_id INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    forecast_day         TEXT NOT NULL,      -- the day of the snapshot the nowcast was made from
    ref_date             TEXT NOT NULL,
    horizon              INTEGER NOT NULL,
    scored_snapshot_id   INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    scored_day           TEXT NOT NULL,
    truth                REAL NOT NULL,      -- the count known at the scoring snapshot
    observed             REAL NOT NULL,      -- the count known when the nowcast was made
    median               REAL NOT NULL,
    completeness         REAL NOT NULL,
    in50                 INTEGER NOT NULL,
    in90                 INTEGER NOT NULL,
    in95                 INTEGER NOT NULL,
    wis                  REAL NOT NULL,
    naive_wis            REAL NOT NULL,      -- |truth - observed|
    median_error         REAL NOT NULL,      -- median - truth
    PRIMARY KEY (source_id, ref_field, stratum_kind, stratum, method, forecast_snapshot_id, ref_date)
) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS nowcast_score_scored ON nowcast_score(source_id, scored_snapshot_id);

-- Rolling scores: per source, reference field, stratum, method and horizon, over the
-- nowcasts of the last 28 forecast days scored so far (the window `auto` uses by default).
CREATE VIEW IF NOT EXISTS nowcast_score_rolling AS
WITH latest AS (
    SELECT source_id, ref_field, max(forecast_day) AS last_day
    FROM nowcast_score GROUP BY source_id, ref_field)
SELECT s.name AS source, c.ref_field, c.stratum_kind, c.stratum, c.method, c.horizon,
       count(*) AS n, min(c.forecast_day) AS from_day, max(c.forecast_day) AS to_day,
       avg(c.in50) AS coverage50, avg(c.in90) AS coverage90, avg(c.in95) AS coverage95,
       avg(c.wis) AS wis, avg(c.naive_wis) AS naive_wis, avg(c.median_error) AS median_error
FROM nowcast_score c
JOIN latest l ON l.source_id = c.source_id AND l.ref_field = c.ref_field
JOIN source s ON s.source_id = c.source_id
WHERE c.forecast_day > date(l.last_day, '-28 days')
GROUP BY c.source_id, c.ref_field, c.stratum_kind, c.stratum, c.method, c.horizon;
