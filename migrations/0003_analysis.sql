-- tidemark store, version 3: the reporting triangle and analysis results, each keyed by the
-- snapshot it was computed from so that any past figure can be reproduced.

-- Net change, made by one snapshot, of the count of records with a reference date in a
-- stratum. The count as known on day s is the sum of the deltas of snapshots with
-- snapshot_day <= s (the last snapshot of a day wins; days without one carry forward).
CREATE TABLE triangle (
    source_id    INTEGER NOT NULL REFERENCES source(source_id),
    ref_field    TEXT NOT NULL,              -- onset_date, specimen_date, report_date, death_date, ...
    stratum_kind TEXT NOT NULL,              -- 'all', 'jurisdiction', 'age', 'sex'
    stratum      TEXT NOT NULL,              -- '' for 'all'; '(missing)' when the record has none
    ref_date     TEXT NOT NULL,
    snapshot_id  INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    snapshot_day TEXT NOT NULL,              -- the snapshot's as-of date
    delta        INTEGER NOT NULL,
    PRIMARY KEY (source_id, ref_field, stratum_kind, stratum, ref_date, snapshot_id)
) WITHOUT ROWID;
CREATE INDEX triangle_snapshot ON triangle(snapshot_id);

CREATE TABLE nowcast (
    snapshot_id  INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    source_id    INTEGER NOT NULL REFERENCES source(source_id),
    ref_field    TEXT NOT NULL,
    stratum_kind TEXT NOT NULL,
    stratum      TEXT NOT NULL,
    method       TEXT NOT NULL,
    ref_date     TEXT NOT NULL,
    horizon      INTEGER NOT NULL,           -- days between ref_date and the snapshot day
    observed     REAL NOT NULL,
    median       REAL NOT NULL,
    mean         REAL NOT NULL,
    lower50      REAL NOT NULL,
    upper50      REAL NOT NULL,
    lower90      REAL NOT NULL,
    upper90      REAL NOT NULL,
    lower95      REAL NOT NULL,
    upper95      REAL NOT NULL,
    completeness REAL NOT NULL,
    PRIMARY KEY (snapshot_id, ref_field, stratum_kind, stratum, method, ref_date)
) WITHOUT ROWID;

CREATE TABLE delay_fit (
    snapshot_id    INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    source_id      INTEGER NOT NULL REFERENCES source(source_id),
    from_field     TEXT NOT NULL,
    to_field       TEXT NOT NULL,            -- a date field, or 'first_seen' (first appearance in the store)
    stratum_kind   TEXT NOT NULL,
    stratum        TEXT NOT NULL,
    family         TEXT NOT NULL,            -- gamma, lognormal, weibull
    n              INTEGER NOT NULL,
    param1         REAL,
    param2         REAL,
    log_likelihood REAL,
    aic            REAL,
    rank           INTEGER NOT NULL,         -- 1 = lowest AIC
    mean           REAL, mean_lo REAL, mean_hi REAL,
    median         REAL, median_lo REAL, median_hi REAL,
    p95            REAL, p95_lo REAL, p95_hi REAL,
    identifiable   INTEGER NOT NULL,
    warnings       TEXT,
    PRIMARY KEY (snapshot_id, from_field, to_field, stratum_kind, stratum, family)
) WITHOUT ROWID;

CREATE TABLE backtest (
    snapshot_id    INTEGER NOT NULL REFERENCES snapshot(snapshot_id),  -- latest snapshot used as truth
    source_id      INTEGER NOT NULL REFERENCES source(source_id),
    ref_field      TEXT NOT NULL,
    method         TEXT NOT NULL,            -- hazard, smooth, naive
    horizon        INTEGER NOT NULL,
    n              INTEGER NOT NULL,
    coverage50     REAL, coverage90 REAL, coverage95 REAL,
    wis            REAL,
    rel_error      REAL,                     -- mean relative error of the median
    from_day       TEXT NOT NULL,
    to_day         TEXT NOT NULL,
    lag_days       INTEGER NOT NULL,
    PRIMARY KEY (snapshot_id, ref_field, method, horizon)
) WITHOUT ROWID;
