-- tidemark store, version 6: two changes for a faster ingest and faster post-snapshot work.
--
-- 1. No index on case_attr(kind, value). Nothing in tidemark reads the attributes by value,
--    and keeping the index cost every ingest a second B-tree insert per symptom and condition
--    (2.5 million of them for a 1,000,000-record extract: about a fifth of the store's bytes
--    and of a first ingest's time; docs/performance.md). Analysts' queries by value
--    scan case_attr instead (WITHOUT ROWID, keyed by version), a fraction of a second per
--    million records; an operator who needs faster ones may create an index of their own.
DROP INDEX IF EXISTS case_attr_value;

-- 2. case_version.first_seen: the snapshot of the record's first version, kept only where
--    it is earlier than this version's valid_from (NULL: this version is the record's
--    first). The day a record first appeared, `coalesce(first_seen, valid_from)`, is then a
--    column read instead of a search of every record's history. The writer sets it for the
--    versions a snapshot writes for records seen before; here it is filled in for the
--    versions already stored.
ALTER TABLE case_version ADD COLUMN first_seen INTEGER;  -- a snapshot_id
UPDATE case_version
SET first_seen = (SELECT min(p.valid_from) FROM case_version p
                  WHERE p.source_id = case_version.source_id AND p.case_key = case_version.case_key)
WHERE EXISTS (SELECT 1 FROM case_version p
              WHERE p.source_id = case_version.source_id AND p.case_key = case_version.case_key
                AND p.valid_from < case_version.valid_from);
