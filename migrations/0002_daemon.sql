-- tidemark store, version 2: what the daemon knows about its sources.

-- Poll health of each source; one row per source, updated after every poll.
CREATE TABLE source_health (
    source_id            INTEGER PRIMARY KEY REFERENCES source(source_id),
    last_poll            TEXT,
    last_success         TEXT,                 -- last poll that completed without error
    consecutive_failures INTEGER NOT NULL DEFAULT 0,
    last_error           TEXT,
    last_snapshot_id     INTEGER REFERENCES snapshot(snapshot_id),
    etag                 TEXT,                 -- URL sources: validators for conditional GET
    last_modified        TEXT
);

-- Files a folder source has taken, by fingerprint, so a file is never ingested twice, even
-- after a restart or a rename. A renamed copy adds a row with the same sha256.
CREATE TABLE source_file (
    source_id   INTEGER NOT NULL REFERENCES source(source_id),
    path        TEXT NOT NULL,
    size        INTEGER NOT NULL,
    mtime_ns    INTEGER NOT NULL,
    sha256      TEXT NOT NULL,
    snapshot_id INTEGER REFERENCES snapshot(snapshot_id),
    seen_at     TEXT NOT NULL,
    PRIMARY KEY (source_id, path, size, mtime_ns)
);
CREATE INDEX source_file_sha ON source_file(source_id, sha256);

-- The daemon's own state (pid, start time, heartbeat), for `tidemark status`.
CREATE TABLE daemon_state (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
