-- tidemark store, version 1: sources, snapshots, record versions, rejects and field problems.
-- Times are RFC 3339 UTC text ('2026-03-01T23:59:59Z'); dates are ISO 8601 text ('2026-03-01').

CREATE TABLE source (
    source_id   INTEGER PRIMARY KEY,
    name        TEXT NOT NULL UNIQUE,
    kind        TEXT NOT NULL,
    config_hash TEXT NOT NULL
);

-- One row per extract received, whatever became of it.
CREATE TABLE snapshot (
    snapshot_id   INTEGER PRIMARY KEY,
    source_id     INTEGER NOT NULL REFERENCES source(source_id),
    seq           INTEGER NOT NULL,             -- 1, 2, ... within the source
    as_of         TEXT NOT NULL,                -- when the extract's data was taken
    received_at   TEXT NOT NULL,                -- when tidemark received it
    origin        TEXT NOT NULL,                -- file path or URL
    sha256        TEXT NOT NULL,                -- of the bytes as received; names the archive file
    bytes         INTEGER NOT NULL,
    extract_kind  TEXT NOT NULL CHECK (extract_kind IN ('full', 'delta')),
    rows_total    INTEGER NOT NULL DEFAULT 0,
    rows_accepted INTEGER NOT NULL DEFAULT 0,
    rows_rejected INTEGER NOT NULL DEFAULT 0,
    rows_new      INTEGER NOT NULL DEFAULT 0,
    rows_changed  INTEGER NOT NULL DEFAULT 0,
    rows_removed  INTEGER NOT NULL DEFAULT 0,
    field_problems INTEGER NOT NULL DEFAULT 0,
    status        TEXT NOT NULL CHECK (status IN ('applied', 'held', 'failed', 'duplicate', 'rejected')),
    note          TEXT,
    applied_at    TEXT,
    UNIQUE (source_id, seq)
);
CREATE INDEX snapshot_sha ON snapshot(source_id, sha256);

-- Record-level temporal table. valid_from / valid_to are snapshot ids; the current version
-- has valid_to IS NULL. A version is valid as of snapshot S when
-- valid_from <= S AND (valid_to IS NULL OR valid_to > S).
CREATE TABLE case_version (
    version_id    INTEGER PRIMARY KEY,
    source_id     INTEGER NOT NULL REFERENCES source(source_id),
    case_key      TEXT NOT NULL,
    valid_from    INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    valid_to      INTEGER REFERENCES snapshot(snapshot_id),
    row_hash      INTEGER NOT NULL,
    line          INTEGER,                      -- line in the extract that wrote this version
    jurisdiction  TEXT,
    onset_date    TEXT,
    specimen_date TEXT,
    result_date   TEXT,
    report_date   TEXT,
    admit_date    TEXT,
    death_date    TEXT,
    outcome       TEXT,
    age_lo        REAL,                         -- age interval in years, [age_lo, age_hi)
    age_hi        REAL,
    sex           TEXT,
    hospitalised  INTEGER,                      -- 1 yes, 0 no, NULL missing
    symptoms      TEXT,                         -- JSON array; NULL missing ('[]' = none)
    conditions    TEXT,                         -- JSON array; NULL missing
    invalid       TEXT,                         -- comma-separated fields whose value was unusable
    extra_json    TEXT                          -- unmapped columns, JSON object
);
CREATE UNIQUE INDEX case_version_current ON case_version(source_id, case_key) WHERE valid_to IS NULL;
CREATE INDEX case_version_key ON case_version(source_id, case_key, valid_from);
CREATE INDEX case_version_from ON case_version(valid_from);
CREATE INDEX case_version_to ON case_version(valid_to) WHERE valid_to IS NOT NULL;

-- Multi-valued fields as rows, for SQL: kind is 'symptom' or 'condition'.
CREATE TABLE case_attr (
    version_id INTEGER NOT NULL REFERENCES case_version(version_id),
    kind       TEXT NOT NULL,
    value      TEXT NOT NULL,
    PRIMARY KEY (version_id, kind, value)
) WITHOUT ROWID;
CREATE INDEX case_attr_value ON case_attr(kind, value);

-- Every row that could not be used, with why and the row as read.
CREATE TABLE reject (
    reject_id   INTEGER PRIMARY KEY,
    snapshot_id INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    line        INTEGER NOT NULL,
    field       TEXT,
    kind        TEXT NOT NULL,
    reason      TEXT NOT NULL,
    raw         TEXT
);
CREATE INDEX reject_snapshot ON reject(snapshot_id);

-- Cells whose value could not be used; the row was kept with the field marked invalid.
CREATE TABLE field_problem (
    problem_id  INTEGER PRIMARY KEY,
    snapshot_id INTEGER NOT NULL REFERENCES snapshot(snapshot_id),
    line        INTEGER NOT NULL,
    case_key    TEXT NOT NULL,
    field       TEXT NOT NULL,
    kind        TEXT NOT NULL,
    reason      TEXT NOT NULL
);
CREATE INDEX field_problem_snapshot ON field_problem(snapshot_id);
