-- tidemark store, version 7: what the post-snapshot analysis owes.
--
-- Every applied or held snapshot is entered here as 'pending' in the transaction that
-- commits it, so a crash, a full disk or a shutdown between the commit and the analysis
-- (nowcasts, delay fits, quality measures, alert rules) never loses the analysis: whatever
-- is still owed is run at the daemon's start, after every commit, and by `tidemark ingest`.
--   pending     owed, not tried yet (or interrupted)
--   failed      owed; the last try failed with `error` (retried like a pending one)
--   done        the results are stored
--   superseded  not analysed: a later snapshot of the source (`superseded_by`) was analysed
--               instead, because it committed before this one's turn came
CREATE TABLE analysis_owed (
    snapshot_id   INTEGER PRIMARY KEY REFERENCES snapshot(snapshot_id),
    source_id     INTEGER NOT NULL REFERENCES source(source_id),
    state         TEXT NOT NULL CHECK (state IN ('pending', 'failed', 'done', 'superseded')),
    attempts      INTEGER NOT NULL DEFAULT 0,
    error         TEXT,
    superseded_by INTEGER REFERENCES snapshot(snapshot_id),
    updated_at    TEXT NOT NULL
);
CREATE INDEX analysis_owed_open ON analysis_owed(source_id) WHERE state IN ('pending', 'failed');

-- Stores from before this version: each source's latest applied snapshot without quality
-- measures (its analysis was lost to a crash after the commit) is owed.
INSERT INTO analysis_owed (snapshot_id, source_id, state, updated_at)
SELECT latest.snapshot_id, latest.source_id, 'pending', strftime('%Y-%m-%dT%H:%M:%SZ', 'now')
FROM (SELECT max(snapshot_id) AS snapshot_id, source_id FROM snapshot
      WHERE status = 'applied' GROUP BY source_id) AS latest
WHERE NOT EXISTS (SELECT 1 FROM quality q WHERE q.snapshot_id = latest.snapshot_id);
