//! The writer: one connection, one extract = one transaction. Rows are staged in a temporary
//! table as they stream in, duplicate keys are resolved (the last row wins), the stage is
//! diffed against the current versions, and only new and changed records write a version.
//! Dropping an `Ingest` without `apply` or `hold` rolls everything back, so a crash or a
//! cancelled ingest leaves nothing half-applied.

use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};
use rusqlite::{Connection, OptionalExtension, Transaction, TransactionBehavior, params};

use super::lock::{self, WriterLock};
use super::triangle::{TriangleSpec, record_deltas};
use super::{StoreError, open_writer, parse_time, time_text};
use crate::extract::{Problem, Row};
use crate::model::{CaseRecord, ExtractKind, ExtractMeta, Field, RowCounts, SnapshotStatus};

/// The writer connection.
#[derive(Debug)]
pub struct Store {
    pub(super) conn: Connection,
    path: PathBuf,
    /// Held while the store is open for writing; released on drop or process death.
    _lock: WriterLock,
}

/// The latest applied snapshot of a source, for the truncated-feed guard and ordering.
#[derive(Debug, Clone)]
pub struct LastApplied {
    pub snapshot_id: i64,
    pub as_of: DateTime<Utc>,
    pub rows_accepted: u64,
}

/// What applying the staged extract would do.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Plan {
    pub accepted: u64,
    pub new: u64,
    pub changed: u64,
    pub removed: u64,
    /// Current records of the source before this extract.
    pub current_before: u64,
}

/// One extract being written; see the module docs.
#[derive(Debug)]
pub struct Ingest<'s> {
    tx: Transaction<'s>,
    source_id: i64,
    snapshot_id: i64,
    kind: ExtractKind,
    key_column: String,
    rejected: u64,
    field_problems: u64,
}

const VERSION_COLUMNS: &str = "line, case_key, row_hash, jurisdiction, onset_date, specimen_date, result_date, \
     report_date, admit_date, death_date, outcome, age_lo, age_hi, sex, hospitalised, symptoms, \
     conditions, invalid, extra_json";

impl Store {
    /// Opens (creating and migrating if needed) the store at `path` for writing.
    pub fn open(path: &Path) -> Result<Store, StoreError> {
        let lock = lock::acquire(path)?;
        let conn = open_writer(path)?;
        conn.execute_batch(
            "CREATE TEMP TABLE IF NOT EXISTS stage (
                 line INTEGER, case_key TEXT, row_hash INTEGER, raw TEXT, jurisdiction TEXT,
                 onset_date TEXT, specimen_date TEXT, result_date TEXT, report_date TEXT,
                 admit_date TEXT, death_date TEXT, outcome TEXT, age_lo REAL, age_hi REAL,
                 sex TEXT, hospitalised INTEGER, symptoms TEXT, conditions TEXT, invalid TEXT,
                 extra_json TEXT);",
        )?;
        Ok(Store { conn, path: path.to_path_buf(), _lock: lock })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The id of a source, registering it (or updating its kind and config hash).
    pub fn source_id(&mut self, name: &str, kind: &str, config_hash: &str) -> Result<i64, StoreError> {
        self.conn.execute(
            "INSERT INTO source (name, kind, config_hash) VALUES (?1, ?2, ?3)
             ON CONFLICT(name) DO UPDATE SET kind = excluded.kind, config_hash = excluded.config_hash",
            (name, kind, config_hash),
        )?;
        Ok(self.conn.query_row("SELECT source_id FROM source WHERE name = ?1", [name], |r| r.get(0))?)
    }

    pub fn last_applied(&self, source_id: i64) -> Result<Option<LastApplied>, StoreError> {
        last_applied(&self.conn, source_id)
    }

    /// A snapshot with the same bytes that is the source's latest applied one, or a held or
    /// rejected one after it: nothing new. The same bytes as an *older*, superseded snapshot
    /// are a real full extract that restores that state, and are applied; a failed one may be
    /// retried after a mapping fix.
    pub fn duplicate_of(&self, source_id: i64, sha256: &str) -> Result<Option<i64>, StoreError> {
        Ok(self
            .conn
            .query_row(
                "SELECT min(snapshot_id) FROM snapshot WHERE source_id = ?1 AND sha256 = ?2
                 AND status IN ('applied', 'held', 'rejected')
                 AND snapshot_id >= coalesce(
                     (SELECT max(snapshot_id) FROM snapshot WHERE source_id = ?1 AND status = 'applied'), 0)",
                (source_id, sha256),
                |row| row.get(0),
            )
            .optional()?
            .flatten())
    }

    /// Records a snapshot that writes no versions (failed or duplicate).
    pub fn record_unapplied(
        &mut self,
        source_id: i64,
        meta: &ExtractMeta,
        status: SnapshotStatus,
        note: &str,
    ) -> Result<i64, StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let snapshot_id = insert_snapshot(&tx, source_id, meta, status, note)?;
        tx.commit()?;
        Ok(snapshot_id)
    }

    /// Starts writing a new extract: a snapshot row and an empty stage, in one transaction.
    pub fn begin(
        &mut self,
        source_id: i64,
        meta: &ExtractMeta,
        key_column: &str,
    ) -> Result<Ingest<'_>, StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let snapshot_id = insert_snapshot(&tx, source_id, meta, SnapshotStatus::Failed, "incomplete")?;
        Ingest::start(tx, source_id, snapshot_id, meta.kind, key_column)
    }

    /// Starts re-applying a held snapshot (its bytes are parsed again by the caller). Refused
    /// unless it is held and no later snapshot of its source has been applied: applying it
    /// after newer data would rewrite history.
    pub fn begin_release(&mut self, snapshot_id: i64, key_column: &str) -> Result<Ingest<'_>, StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let (source_id, kind) = held_snapshot(&tx, snapshot_id)?;
        if let Some(last) = last_applied(&tx, source_id)?.filter(|l| l.snapshot_id > snapshot_id) {
            return Err(StoreError::Refused(format!(
                "snapshot {snapshot_id} is older than applied snapshot {}; newer data has superseded it, so reject it instead",
                last.snapshot_id
            )));
        }
        tx.execute("DELETE FROM reject WHERE snapshot_id = ?1", [snapshot_id])?;
        tx.execute("DELETE FROM field_problem WHERE snapshot_id = ?1", [snapshot_id])?;
        Ingest::start(tx, source_id, snapshot_id, kind, key_column)
    }

    /// Discards a held snapshot: it stays listed with status `rejected`, nothing is applied.
    pub fn reject_held(&mut self, snapshot_id: i64, note: &str) -> Result<(), StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        held_snapshot(&tx, snapshot_id)?;
        tx.execute(
            "UPDATE snapshot SET status = 'rejected', note = coalesce(note || '; ', '') || ?2
             WHERE snapshot_id = ?1",
            (snapshot_id, note),
        )?;
        tx.commit()?;
        Ok(())
    }

    /// The source name and SHA-256 of a snapshot (to find its archived bytes).
    pub fn snapshot_origin(&self, snapshot_id: i64) -> Result<(String, String, DateTime<Utc>), StoreError> {
        let found = self
            .conn
            .query_row(
                "SELECT s.name, n.sha256, n.as_of FROM snapshot n JOIN source s USING (source_id)
                 WHERE n.snapshot_id = ?1",
                [snapshot_id],
                |row| Ok((row.get::<_, String>(0)?, row.get::<_, String>(1)?, row.get::<_, String>(2)?)),
            )
            .optional()?;
        let (name, sha, as_of) =
            found.ok_or_else(|| StoreError::Refused(format!("no snapshot {snapshot_id}")))?;
        Ok((name, sha, parse_time(&as_of).unwrap_or_default()))
    }
}

impl<'s> Ingest<'s> {
    fn start(
        tx: Transaction<'s>,
        source_id: i64,
        snapshot_id: i64,
        kind: ExtractKind,
        key_column: &str,
    ) -> Result<Ingest<'s>, StoreError> {
        tx.execute_batch(
            "DELETE FROM temp.stage;
             DROP INDEX IF EXISTS temp.stage_key;
             DROP TABLE IF EXISTS temp.diff;
             DROP TABLE IF EXISTS temp.gone;",
        )?;
        Ok(Ingest {
            tx,
            source_id,
            snapshot_id,
            kind,
            key_column: key_column.to_string(),
            rejected: 0,
            field_problems: 0,
        })
    }

    pub fn snapshot_id(&self) -> i64 {
        self.snapshot_id
    }

    /// Stages an accepted row or records a rejected one.
    pub fn add(&mut self, row: Row) -> Result<(), StoreError> {
        match row {
            Row::Accepted { line, record, raw, problems } => {
                for problem in &problems {
                    self.add_field_problem(&record.case_key, problem)?;
                }
                self.stage(line, &record, &raw)
            }
            Row::Rejected(problem) => self.add_reject(&problem),
        }
    }

    fn stage(&mut self, line: u64, record: &CaseRecord, raw: &str) -> Result<(), StoreError> {
        let mut stmt = self.tx.prepare_cached(
            "INSERT INTO temp.stage VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, \
             ?14, ?15, ?16, ?17, ?18, ?19, ?20)",
        )?;
        let date = |field: Field| record.date(field).map(|d| d.to_string());
        let list = |items: &Option<Vec<String>>| {
            items.as_ref().map(|i| serde_json::to_string(i).unwrap_or_default())
        };
        let invalid = (!record.invalid.is_empty())
            .then(|| record.invalid.iter().map(|f| f.name()).collect::<Vec<_>>().join(","));
        let extra =
            (!record.extra.is_empty()).then(|| serde_json::to_string(&record.extra).unwrap_or_default());
        stmt.execute(params![
            line as i64,
            record.case_key,
            record.row_hash(),
            raw,
            record.jurisdiction,
            date(Field::OnsetDate),
            date(Field::SpecimenDate),
            date(Field::ResultDate),
            date(Field::ReportDate),
            date(Field::AdmitDate),
            date(Field::DeathDate),
            record.outcome,
            record.age.map(|a| a.lo),
            record.age.map(|a| a.hi),
            record.sex,
            record.hospitalised,
            list(&record.symptoms),
            list(&record.conditions),
            invalid,
            extra,
        ])?;
        Ok(())
    }

    fn add_reject(&mut self, problem: &Problem) -> Result<(), StoreError> {
        self.rejected += 1;
        let mut stmt = self.tx.prepare_cached(
            "INSERT INTO reject (snapshot_id, line, field, kind, reason, raw) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        )?;
        stmt.execute(params![
            self.snapshot_id,
            problem.line as i64,
            problem.field,
            problem.kind.code(),
            problem.message,
            problem.raw,
        ])?;
        Ok(())
    }

    fn add_field_problem(&mut self, case_key: &str, problem: &Problem) -> Result<(), StoreError> {
        self.field_problems += 1;
        let mut stmt = self.tx.prepare_cached(
            "INSERT INTO field_problem (snapshot_id, line, case_key, field, kind, reason)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
        )?;
        stmt.execute(params![
            self.snapshot_id,
            problem.line as i64,
            case_key,
            problem.field.as_deref().unwrap_or(""),
            problem.kind.code(),
            problem.message,
        ])?;
        Ok(())
    }

    /// Resolves duplicate keys (the last row wins; the others are rejected with their raw
    /// text) and works out what applying would do. Call once, after the last `add`.
    pub fn plan(&mut self) -> Result<Plan, StoreError> {
        self.resolve_duplicate_keys()?;
        let tx = &self.tx;
        tx.execute(
            "CREATE TEMP TABLE diff AS
             SELECT s.rowid AS srow, v.version_id AS prev
             FROM temp.stage s
             LEFT JOIN case_version v
               ON v.source_id = ?1 AND v.case_key = s.case_key AND v.valid_to IS NULL
             WHERE v.version_id IS NULL OR v.row_hash <> s.row_hash",
            [self.source_id],
        )?;
        tx.execute("CREATE TEMP TABLE gone (version_id INTEGER PRIMARY KEY)", [])?;
        if self.kind == ExtractKind::Full {
            tx.execute(
                "INSERT INTO temp.gone
                 SELECT v.version_id FROM case_version v
                 WHERE v.source_id = ?1 AND v.valid_to IS NULL
                   AND NOT EXISTS (SELECT 1 FROM temp.stage s WHERE s.case_key = v.case_key)",
                [self.source_id],
            )?;
        }
        let count = |sql: &str| -> Result<u64, StoreError> {
            Ok(tx.query_row(sql, [], |r| r.get::<_, i64>(0))? as u64)
        };
        let current_before: i64 = tx.query_row(
            "SELECT count(*) FROM case_version WHERE source_id = ?1 AND valid_to IS NULL",
            [self.source_id],
            |r| r.get(0),
        )?;
        Ok(Plan {
            accepted: count("SELECT count(*) FROM temp.stage")?,
            new: count("SELECT count(*) FROM temp.diff WHERE prev IS NULL")?,
            changed: count("SELECT count(*) FROM temp.diff WHERE prev IS NOT NULL")?,
            removed: count("SELECT count(*) FROM temp.gone")?,
            current_before: current_before as u64,
        })
    }

    fn resolve_duplicate_keys(&mut self) -> Result<(), StoreError> {
        let tx = &self.tx;
        tx.execute_batch("CREATE INDEX temp.stage_key ON stage (case_key)")?;
        let reason = format!(
            "column \"{}\": the same key appears again at line ' || d.keep_line || '; the last row was kept",
            self.key_column.replace('\'', "''")
        );
        let rejected = tx.execute(
            &format!(
                "INSERT INTO reject (snapshot_id, line, field, kind, reason, raw)
                 WITH dup AS (SELECT case_key, max(rowid) AS keep, max(line) AS keep_line
                              FROM temp.stage GROUP BY case_key HAVING count(*) > 1)
                 SELECT ?1, s.line, 'case_key', 'duplicate_key', '{reason}', s.raw
                 FROM temp.stage s JOIN dup d ON d.case_key = s.case_key
                 WHERE s.rowid <> d.keep"
            ),
            [self.snapshot_id],
        )?;
        if rejected > 0 {
            tx.execute(
                "DELETE FROM temp.stage WHERE rowid IN (
                     SELECT s.rowid FROM temp.stage s
                     WHERE s.rowid < (SELECT max(t.rowid) FROM temp.stage t WHERE t.case_key = s.case_key))",
                [],
            )?;
        }
        self.rejected += rejected as u64;
        Ok(())
    }

    /// Applies the plan and commits: closes changed and removed versions, writes new ones.
    /// With a `triangle` spec, the reporting triangle's deltas are recorded in the same
    /// transaction, so the triangle never disagrees with the versions.
    pub fn apply(
        self,
        plan: &Plan,
        rows_total: u64,
        note: Option<&str>,
        triangle: Option<&TriangleSpec>,
    ) -> Result<RowCounts, StoreError> {
        let tx = &self.tx;
        let s = self.snapshot_id;
        tx.execute(
            "UPDATE case_version SET valid_to = ?1
             WHERE version_id IN (SELECT prev FROM temp.diff WHERE prev IS NOT NULL)",
            [s],
        )?;
        tx.execute(
            "UPDATE case_version SET valid_to = ?1 WHERE version_id IN (SELECT version_id FROM temp.gone)",
            [s],
        )?;
        tx.execute(
            &format!(
                "INSERT INTO case_version (source_id, valid_from, {VERSION_COLUMNS})
                 SELECT ?1, ?2, {VERSION_COLUMNS} FROM temp.diff d JOIN temp.stage s ON s.rowid = d.srow
                 ORDER BY s.rowid"
            ),
            (self.source_id, s),
        )?;
        for (column, kind) in [("symptoms", "symptom"), ("conditions", "condition")] {
            tx.execute(
                &format!(
                    "INSERT OR IGNORE INTO case_attr (version_id, kind, value)
                     SELECT v.version_id, '{kind}', j.value FROM case_version v, json_each(v.{column}) j
                     WHERE v.valid_from = ?1 AND v.{column} IS NOT NULL"
                ),
                [s],
            )?;
        }
        let counts = RowCounts {
            total: rows_total,
            accepted: plan.accepted,
            rejected: self.rejected,
            new: plan.new,
            changed: plan.changed,
            removed: plan.removed,
        };
        if let Some(spec) = triangle {
            record_deltas(tx, self.source_id, s, spec)?;
        }
        self.finish(SnapshotStatus::Applied, &counts, note)?;
        Ok(counts)
    }

    /// Stores the snapshot as `held` without applying it, and commits. Its rejects and field
    /// problems are kept so an operator can see them.
    pub fn hold(self, plan: &Plan, rows_total: u64, note: &str) -> Result<RowCounts, StoreError> {
        let counts = RowCounts {
            total: rows_total,
            accepted: plan.accepted,
            rejected: self.rejected,
            new: plan.new,
            changed: plan.changed,
            removed: plan.removed,
        };
        self.finish(SnapshotStatus::Held, &counts, Some(note))?;
        Ok(counts)
    }

    fn finish(
        self,
        status: SnapshotStatus,
        counts: &RowCounts,
        note: Option<&str>,
    ) -> Result<(), StoreError> {
        let applied_at = (status == SnapshotStatus::Applied).then(|| time_text(Utc::now()));
        self.tx.execute(
            "UPDATE snapshot SET status = ?2, note = ?3, rows_total = ?4, rows_accepted = ?5,
                 rows_rejected = ?6, rows_new = ?7, rows_changed = ?8, rows_removed = ?9,
                 field_problems = ?10, applied_at = ?11
             WHERE snapshot_id = ?1",
            params![
                self.snapshot_id,
                status.name(),
                note,
                counts.total as i64,
                counts.accepted as i64,
                counts.rejected as i64,
                counts.new as i64,
                counts.changed as i64,
                counts.removed as i64,
                self.field_problems as i64,
                applied_at,
            ],
        )?;
        self.tx.execute_batch(
            "DELETE FROM temp.stage; DROP INDEX IF EXISTS temp.stage_key;
             DROP TABLE IF EXISTS temp.diff; DROP TABLE IF EXISTS temp.gone;",
        )?;
        self.tx.commit()?;
        Ok(())
    }
}

fn insert_snapshot(
    tx: &Transaction<'_>,
    source_id: i64,
    meta: &ExtractMeta,
    status: SnapshotStatus,
    note: &str,
) -> Result<i64, StoreError> {
    let seq: i64 = tx.query_row(
        "SELECT coalesce(max(seq), 0) + 1 FROM snapshot WHERE source_id = ?1",
        [source_id],
        |row| row.get(0),
    )?;
    tx.execute(
        "INSERT INTO snapshot (source_id, seq, as_of, received_at, origin, sha256, bytes, extract_kind, status, note)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
        params![
            source_id,
            seq,
            time_text(meta.as_of),
            time_text(meta.received_at),
            meta.origin,
            meta.sha256,
            meta.bytes as i64,
            meta.kind.name(),
            status.name(),
            note,
        ],
    )?;
    Ok(tx.last_insert_rowid())
}

fn last_applied(conn: &Connection, source_id: i64) -> Result<Option<LastApplied>, StoreError> {
    Ok(conn
        .query_row(
            "SELECT snapshot_id, as_of, rows_accepted FROM snapshot
             WHERE source_id = ?1 AND status = 'applied' ORDER BY snapshot_id DESC LIMIT 1",
            [source_id],
            |row| {
                Ok(LastApplied {
                    snapshot_id: row.get(0)?,
                    as_of: parse_time(&row.get::<_, String>(1)?).unwrap_or_default(),
                    rows_accepted: row.get::<_, i64>(2)? as u64,
                })
            },
        )
        .optional()?)
}

fn held_snapshot(tx: &Transaction<'_>, snapshot_id: i64) -> Result<(i64, ExtractKind), StoreError> {
    let found: Option<(i64, String, String)> = tx
        .query_row(
            "SELECT source_id, status, extract_kind FROM snapshot WHERE snapshot_id = ?1",
            [snapshot_id],
            |row| Ok((row.get(0)?, row.get(1)?, row.get(2)?)),
        )
        .optional()?;
    match found {
        None => Err(StoreError::Refused(format!("no snapshot {snapshot_id}"))),
        Some((_, status, _)) if status != "held" => {
            Err(StoreError::Refused(format!("snapshot {snapshot_id} is {status}, not held")))
        }
        Some((source_id, _, kind)) => {
            Ok((source_id, if kind == "delta" { ExtractKind::Delta } else { ExtractKind::Full }))
        }
    }
}
