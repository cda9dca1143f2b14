//! The writer: one connection, one extract = one transaction. As rows stream in, a sorting
//! thread (`sorter`) compares each with its record's current version through a map of the
//! source's current keys and row hashes, read once per extract: an unchanged record writes
//! nothing, a new or changed one comes back to this thread, which writes its version at once
//! and closes the previous one. A key that appears again supersedes its earlier row (the last
//! row wins; the earlier ones are rejected at `plan` with their raw text). `apply` closes the
//! records a full extract no longer contains and commits; `hold` takes the new versions out
//! again and commits only the snapshot with its rejects and field problems. Dropping an
//! `Ingest` without `apply` or `hold` rolls everything back, so a crash or a cancelled ingest
//! leaves nothing half-applied.

mod sorter;

use std::fmt;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Datelike, NaiveDate, Utc};
use rusqlite::types::ValueRef;
use rusqlite::{CachedStatement, Connection, OptionalExtension, Transaction, TransactionBehavior, params};

use self::sorter::{Accepted, Action, Pipeline, Sorted, Sorter};

use super::lock::{self, WriterLock};
use super::triangle::{TriangleSpec, record_deltas};
use super::{StoreError, open_writer, parse_time, time_text};
use crate::extract::{Problem, Row};
use crate::model::{
    CaseRecord, ExtractKind, ExtractMeta, Field, RowCounts, SnapshotId, SnapshotStatus, SourceId,
};

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
    pub snapshot_id: SnapshotId,
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
pub struct Ingest<'s> {
    tx: Transaction<'s>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    kind: ExtractKind,
    key_column: String,
    rejected: u64,
    field_problems: u64,
    /// Accepted rows not yet handed to the sorter.
    pending: Vec<Accepted>,
    /// The sorting thread; `None` once `plan` has drained it.
    pipeline: Option<Pipeline>,
    /// What `plan` found.
    sorted: Sorted,
    scratch: Scratch,
}

impl fmt::Debug for Ingest<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Ingest")
            .field("source_id", &self.source_id)
            .field("snapshot_id", &self.snapshot_id)
            .field("kind", &self.kind)
            .field("rejected", &self.rejected)
            .field("field_problems", &self.field_problems)
            .finish_non_exhaustive()
    }
}

/// Accepted rows handed to the sorting thread at a time: large enough that handing over
/// and looking up statements cost little per row, small enough to keep both threads busy.
const BATCH_ROWS: usize = 1024;

/// Reusable buffers for the JSON columns, so that writing a version allocates little.
#[derive(Debug, Default)]
struct Scratch {
    symptoms: Vec<u8>,
    conditions: Vec<u8>,
    extra: Vec<u8>,
}

const VERSION_INSERT: &str = "INSERT INTO case_version (source_id, valid_from, line, case_key, row_hash, \
     jurisdiction, onset_date, specimen_date, result_date, report_date, admit_date, death_date, outcome, \
     age_lo, age_hi, sex, hospitalised, symptoms, conditions, invalid, extra_json)
     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20, ?21)";

const ATTR_INSERT: &str = "INSERT OR IGNORE INTO case_attr (version_id, kind, value) VALUES (?1, ?2, ?3)";

const CLOSE_VERSION: &str = "UPDATE case_version SET valid_to = ?1 WHERE version_id = ?2";

const REOPEN_VERSION: &str = "UPDATE case_version SET valid_to = NULL WHERE version_id = ?1";

/// The version this extract wrote for a key (there is at most one: a later row with the same
/// key takes it over or deletes it).
const WRITTEN_VERSION: &str =
    "SELECT version_id FROM case_version WHERE source_id = ?1 AND case_key = ?2 AND valid_from = ?3";

/// Rewrites the content of a version this extract wrote, in place, for a later row with the
/// same key: the parameters are `VERSION_INSERT`'s and the version's id as ?22 (source,
/// snapshot and key, ?1, ?2 and ?4, are bound but unused: the version already has them). In place, because no
/// indexed column changes, so none of the four indexes of `case_version` is touched: a
/// duplicate key then costs about one more normal row (the rejected row's text) instead of
/// a delete from every index and a second insert.
const REWRITE_VERSION: &str = "UPDATE case_version SET line = ?3, row_hash = ?5, jurisdiction = ?6, \
     onset_date = ?7, specimen_date = ?8, result_date = ?9, report_date = ?10, admit_date = ?11, \
     death_date = ?12, outcome = ?13, age_lo = ?14, age_hi = ?15, sex = ?16, hospitalised = ?17, \
     symptoms = ?18, conditions = ?19, invalid = ?20, extra_json = ?21 \
     WHERE version_id = ?22";

/// Deletes a version's attributes, by the version's id (not by an `IN (SELECT ..)`, which
/// builds a temporary B-tree per statement whose page cache SQLite allocates and frees every
/// time: that made a duplicate key cost several normal rows).
const DELETE_ATTRS: &str = "DELETE FROM case_attr WHERE version_id = ?1";

/// Deletes one version by id (its attributes go first, with `DELETE_ATTRS`).
const DELETE_VERSION: &str = "DELETE FROM case_version WHERE version_id = ?1";

impl Store {
    /// Opens (creating and migrating if needed) the store at `path` for writing.
    pub fn open(path: &Path) -> Result<Store, StoreError> {
        let lock = lock::acquire(path)?;
        let conn = open_writer(path)?;
        Ok(Store { conn, path: path.to_path_buf(), _lock: lock })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The id of a source, registering it (or updating its kind and config hash).
    pub fn source_id(&mut self, name: &str, kind: &str, config_hash: &str) -> Result<SourceId, StoreError> {
        self.conn.execute(
            "INSERT INTO source (name, kind, config_hash) VALUES (?1, ?2, ?3)
             ON CONFLICT(name) DO UPDATE SET kind = excluded.kind, config_hash = excluded.config_hash",
            (name, kind, config_hash),
        )?;
        Ok(self.conn.query_row("SELECT source_id FROM source WHERE name = ?1", [name], |r| r.get(0))?)
    }

    pub fn last_applied(&self, source_id: SourceId) -> Result<Option<LastApplied>, StoreError> {
        last_applied(&self.conn, source_id)
    }

    /// A snapshot with the same bytes that is the source's latest applied one, or a held or
    /// rejected one after it: nothing new. The same bytes as an *older*, superseded snapshot
    /// are a real full extract that restores that state, and are applied; a failed one may be
    /// retried after a mapping fix.
    pub fn duplicate_of(&self, source_id: SourceId, sha256: &str) -> Result<Option<SnapshotId>, StoreError> {
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
        source_id: SourceId,
        meta: &ExtractMeta,
        status: SnapshotStatus,
        note: &str,
    ) -> Result<SnapshotId, StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let snapshot_id = insert_snapshot(&tx, source_id, meta, status, note)?;
        tx.commit()?;
        Ok(snapshot_id)
    }

    /// Starts writing a new extract: a snapshot row and an empty stage, in one transaction.
    pub fn begin(
        &mut self,
        source_id: SourceId,
        meta: &ExtractMeta,
        key_column: &str,
    ) -> Result<Ingest<'_>, StoreError> {
        let tx = self.conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
        let snapshot_id = insert_snapshot(&tx, source_id, meta, SnapshotStatus::Failed, "incomplete")?;
        Ingest::start(tx, spill_dir(&self.path), source_id, snapshot_id, meta.kind, key_column)
    }

    /// Starts re-applying a held snapshot (its bytes are parsed again by the caller). Refused
    /// unless it is held and no later snapshot of its source has been applied: applying it
    /// after newer data would rewrite history.
    pub fn begin_release(
        &mut self,
        snapshot_id: SnapshotId,
        key_column: &str,
    ) -> Result<Ingest<'_>, StoreError> {
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
        Ingest::start(tx, spill_dir(&self.path), source_id, snapshot_id, kind, key_column)
    }

    /// Discards a held snapshot: it stays listed with status `rejected`, nothing is applied.
    pub fn reject_held(&mut self, snapshot_id: SnapshotId, note: &str) -> Result<(), StoreError> {
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
    pub fn snapshot_origin(
        &self,
        snapshot_id: SnapshotId,
    ) -> Result<(String, String, DateTime<Utc>), StoreError> {
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
        spill_dir: PathBuf,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        kind: ExtractKind,
        key_column: &str,
    ) -> Result<Ingest<'s>, StoreError> {
        let pipeline = current_versions(&tx, source_id, spill_dir)?;
        Ok(Ingest {
            tx,
            source_id,
            snapshot_id,
            kind,
            key_column: key_column.to_string(),
            rejected: 0,
            field_problems: 0,
            pending: Vec::with_capacity(BATCH_ROWS),
            pipeline: Some(pipeline),
            sorted: Sorted::default(),
            scratch: Scratch::default(),
        })
    }

    pub fn snapshot_id(&self) -> SnapshotId {
        self.snapshot_id
    }

    /// Takes an accepted row (written if new or changed) or records a rejected one. Accepted
    /// rows are decided in batches on the sorting thread, so an error may surface at a later
    /// `add` or at `plan`.
    pub fn add(&mut self, row: Row) -> Result<(), StoreError> {
        match row {
            Row::Accepted { line, record, raw, problems } => {
                for problem in &problems {
                    add_field_problem(&self.tx, self.snapshot_id, &record.case_key, problem)?;
                    self.field_problems += 1;
                }
                self.pending.push(Accepted { line, record, raw });
                if self.pending.len() >= BATCH_ROWS {
                    self.send_pending()?;
                }
                Ok(())
            }
            Row::Rejected(problem) => {
                add_reject(&self.tx, self.snapshot_id, &problem)?;
                self.rejected += 1;
                Ok(())
            }
        }
    }

    /// Hands the pending rows to the sorter and executes whatever it has decided so far.
    fn send_pending(&mut self) -> Result<(), StoreError> {
        let batch = std::mem::replace(&mut self.pending, Vec::with_capacity(BATCH_ROWS));
        let pipeline = self.pipeline.as_mut().ok_or_else(planned)?;
        pipeline.send(batch)?;
        while let Some(actions) = pipeline.next(false) {
            let actions = actions?;
            execute(&self.tx, self.source_id, self.snapshot_id, &mut self.scratch, &actions)?;
            pipeline.discard(actions);
        }
        Ok(())
    }

    /// Waits for the sorter's last decisions, rejects the rows that a later row with the same
    /// key superseded (with their raw text) and works out what applying would do. Call once,
    /// after the last `add`.
    pub fn plan(&mut self) -> Result<Plan, StoreError> {
        self.send_pending()?;
        let mut pipeline = self.pipeline.take().ok_or_else(planned)?;
        while let Some(actions) = pipeline.next(true) {
            let actions = actions?;
            execute(&self.tx, self.source_id, self.snapshot_id, &mut self.scratch, &actions)?;
            pipeline.discard(actions);
        }
        self.sorted = pipeline.finish()?.finish(self.kind)?;
        let mut stmt = self.tx.prepare_cached(
            "INSERT INTO reject (snapshot_id, line, field, kind, reason, raw)
             VALUES (?1, ?2, 'case_key', 'duplicate_key', ?3, ?4)",
        )?;
        for row in &self.sorted.superseded {
            let reason = format!(
                "column \"{}\": the same key appears again at line {}; the last row was kept",
                self.key_column, row.keep_line
            );
            stmt.execute(params![self.snapshot_id, row.line as i64, reason, row.raw])?;
        }
        self.rejected += self.sorted.superseded.len() as u64;
        Ok(self.sorted.plan)
    }

    /// Applies the plan and commits: new and changed versions are written already; this
    /// closes the records a full extract no longer contains. With a `triangle` spec, the
    /// reporting triangle's deltas are recorded in the same transaction, so the triangle
    /// never disagrees with the versions.
    pub fn apply(
        self,
        plan: &Plan,
        rows_total: u64,
        note: Option<&str>,
        triangle: Option<&TriangleSpec>,
    ) -> Result<RowCounts, StoreError> {
        {
            let mut close = self.tx.prepare_cached(CLOSE_VERSION)?;
            for version_id in &self.sorted.gone {
                close.execute((self.snapshot_id, version_id))?;
            }
        }
        mark_first_seen(&self.tx, self.source_id, self.snapshot_id)?;
        if let Some(spec) = triangle {
            record_deltas(&self.tx, self.source_id, self.snapshot_id, spec)?;
        }
        let counts = self.counts(plan, rows_total);
        self.finish(SnapshotStatus::Applied, &counts, note)?;
        Ok(counts)
    }

    /// Stores the snapshot as `held` without applying it, and commits: the versions written
    /// while the rows streamed in are taken out again and the versions they closed reopened.
    /// Its rejects and field problems are kept so an operator can see them.
    pub fn hold(self, plan: &Plan, rows_total: u64, note: &str) -> Result<RowCounts, StoreError> {
        self.tx.execute(
            "DELETE FROM case_attr WHERE version_id IN
                 (SELECT version_id FROM case_version WHERE valid_from = ?1)",
            [self.snapshot_id],
        )?;
        self.tx.execute("DELETE FROM case_version WHERE valid_from = ?1", [self.snapshot_id])?;
        self.tx.execute("UPDATE case_version SET valid_to = NULL WHERE valid_to = ?1", [self.snapshot_id])?;
        let counts = self.counts(plan, rows_total);
        self.finish(SnapshotStatus::Held, &counts, Some(note))?;
        Ok(counts)
    }

    fn counts(&self, plan: &Plan, rows_total: u64) -> RowCounts {
        RowCounts {
            total: rows_total,
            accepted: plan.accepted,
            rejected: self.rejected,
            new: plan.new,
            changed: plan.changed,
            removed: plan.removed,
        }
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
        if matches!(status, SnapshotStatus::Applied | SnapshotStatus::Held) {
            super::owed::mark_pending(&self.tx, self.source_id, self.snapshot_id)?;
        }
        self.tx.commit()?;
        Ok(())
    }
}

fn planned() -> StoreError {
    StoreError::Refused("rows added after the extract was planned".into())
}

/// Starts the sorting thread and feeds it the source's current versions. They are read here
/// and handed over in chunks, so that the map is built on the sorting thread while this one
/// goes on reading (and then parsing).
fn current_versions(
    tx: &Transaction<'_>,
    source_id: SourceId,
    spill_dir: PathBuf,
) -> Result<Pipeline, StoreError> {
    // The last applied snapshot's size sizes the map, so it rarely grows while rows stream in.
    let expected: i64 = tx
        .query_row(
            "SELECT rows_accepted FROM snapshot WHERE source_id = ?1 AND status = 'applied'
             ORDER BY snapshot_id DESC LIMIT 1",
            [source_id],
            |row| row.get(0),
        )
        .optional()?
        .unwrap_or_default();
    let expected = expected.max(0) as usize;
    let pipeline = Pipeline::start(Sorter::new(expected + expected / KEY_HEADROOM_DIVISOR, spill_dir))?;
    let mut stmt = tx.prepare(
        "SELECT case_key, version_id, row_hash FROM case_version WHERE source_id = ?1 AND valid_to IS NULL",
    )?;
    let mut rows = stmt.query([source_id])?;
    let mut chunk = Vec::with_capacity(CURRENT_CHUNK);
    let mut current = 0usize;
    while let Some(row) = rows.next()? {
        let key = match row.get_ref(0)? {
            ValueRef::Text(text) => Box::from(String::from_utf8_lossy(text)),
            _ => row.get::<_, String>(0)?.into_boxed_str(),
        };
        chunk.push((key, row.get(1)?, row.get(2)?));
        if chunk.len() == CURRENT_CHUNK {
            current += chunk.len();
            pipeline.add_current(std::mem::replace(&mut chunk, Vec::with_capacity(CURRENT_CHUNK)))?;
        }
    }
    current += chunk.len();
    pipeline.add_current(chunk)?;
    tracing::debug!(source_id = source_id.0, current, "current versions read");
    Ok(pipeline)
}

/// Current versions handed to the sorting thread at a time.
const CURRENT_CHUNK: usize = 8192;

/// Room for new keys beyond the last snapshot's: one in this many (about 6%).
const KEY_HEADROOM_DIVISOR: usize = 16;

/// Executes one batch of the sorter's decisions, in order.
fn execute(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    scratch: &mut Scratch,
    actions: &[Action],
) -> Result<(), StoreError> {
    if actions.is_empty() {
        return Ok(());
    }
    let mut insert_version = tx.prepare_cached(VERSION_INSERT)?;
    let mut insert_attr = tx.prepare_cached(ATTR_INSERT)?;
    let written = |key: &str| -> Result<Option<i64>, StoreError> {
        Ok(tx
            .prepare_cached(WRITTEN_VERSION)?
            .query_row(params![source_id, key, snapshot_id], |row| row.get(0))
            .optional()?)
    };
    for action in actions {
        match action {
            Action::Write { line, record, hash, replace, close } => {
                let replacing = if *replace { written(&record.case_key)? } else { None };
                if let Some(prev) = close {
                    tx.prepare_cached(CLOSE_VERSION)?.execute((snapshot_id, prev))?;
                }
                let version = VersionRow { source_id, snapshot_id, line: *line, record, hash: *hash };
                let version_id = match replacing {
                    Some(id) => {
                        tx.prepare_cached(DELETE_ATTRS)?.execute([id])?;
                        version.write(&mut tx.prepare_cached(REWRITE_VERSION)?, scratch, Some(id))?;
                        id
                    }
                    None => {
                        version.write(&mut insert_version, scratch, None)?;
                        tx.last_insert_rowid()
                    }
                };
                for (items, kind) in [(&record.symptoms, "symptom"), (&record.conditions, "condition")] {
                    for item in items.iter().flatten() {
                        insert_attr.execute(params![version_id, kind, item])?;
                    }
                }
            }
            Action::Restore { key, replace, reopen } => {
                if *replace && let Some(id) = written(key)? {
                    tx.prepare_cached(DELETE_ATTRS)?.execute([id])?;
                    tx.prepare_cached(DELETE_VERSION)?.execute([id])?;
                }
                if let Some(prev) = reopen {
                    tx.prepare_cached(REOPEN_VERSION)?.execute([prev])?;
                }
            }
        }
    }
    Ok(())
}

/// One version to insert.
struct VersionRow<'r> {
    source_id: SourceId,
    snapshot_id: SnapshotId,
    line: u64,
    record: &'r CaseRecord,
    hash: i64,
}

impl VersionRow<'_> {
    /// Inserts the version with `VERSION_INSERT`, or rewrites version `replacing` in place
    /// with `REWRITE_VERSION`.
    fn write(
        &self,
        stmt: &mut CachedStatement<'_>,
        scratch: &mut Scratch,
        replacing: Option<i64>,
    ) -> Result<(), StoreError> {
        let record = self.record;
        let dates = record.dates.map(|date| date.map(IsoDate::new));
        let date = |field: Field| field.date_index().and_then(|idx| dates[idx].as_ref()).map(IsoDate::as_str);
        let symptoms = json_text(&mut scratch.symptoms, record.symptoms.as_ref());
        let conditions = json_text(&mut scratch.conditions, record.conditions.as_ref());
        let extra = json_text(&mut scratch.extra, Some(&record.extra).filter(|e| !e.is_empty()));
        let invalid = (!record.invalid.is_empty())
            .then(|| record.invalid.iter().map(|f| f.name()).collect::<Vec<_>>().join(","));
        let values = params![
            self.source_id,
            self.snapshot_id,
            self.line as i64,
            record.case_key,
            self.hash,
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
            symptoms,
            conditions,
            invalid,
            extra,
        ];
        match replacing {
            Some(id) => stmt.execute(&*[values, &[&id as &dyn rusqlite::ToSql]].concat())?,
            None => stmt.execute(values)?,
        };
        Ok(())
    }
}

/// A value as JSON text written into `buffer` (the same text as `serde_json::to_string`);
/// `None` if the value is missing.
fn json_text<'b>(buffer: &'b mut Vec<u8>, value: Option<&impl serde::Serialize>) -> Option<&'b str> {
    let value = value?;
    buffer.clear();
    serde_json::to_writer(&mut *buffer, value).ok()?;
    std::str::from_utf8(buffer).ok()
}

/// A date as ISO 8601 text without an allocation: the same text as `NaiveDate`'s `Display`.
enum IsoDate {
    Short([u8; 10]),
    Long(String),
}

impl IsoDate {
    fn new(date: NaiveDate) -> IsoDate {
        let (year, month, day) = (date.year(), date.month(), date.day());
        if !(0..=9999).contains(&year) {
            return IsoDate::Long(date.to_string());
        }
        let year = year as u32;
        let digit = |n: u32| b'0' + (n % 10) as u8;
        IsoDate::Short([
            digit(year / 1000),
            digit(year / 100),
            digit(year / 10),
            digit(year),
            b'-',
            digit(month / 10),
            digit(month),
            b'-',
            digit(day / 10),
            digit(day),
        ])
    }

    fn as_str(&self) -> &str {
        match self {
            IsoDate::Short(bytes) => std::str::from_utf8(bytes).unwrap_or_default(),
            IsoDate::Long(text) => text,
        }
    }
}

fn add_reject(tx: &Transaction<'_>, snapshot_id: SnapshotId, problem: &Problem) -> Result<(), StoreError> {
    let mut stmt = tx.prepare_cached(
        "INSERT INTO reject (snapshot_id, line, field, kind, reason, raw) VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
    )?;
    stmt.execute(params![
        snapshot_id,
        problem.line as i64,
        problem.field,
        problem.kind.code(),
        problem.message,
        problem.raw,
    ])?;
    Ok(())
}

fn add_field_problem(
    tx: &Transaction<'_>,
    snapshot_id: SnapshotId,
    case_key: &str,
    problem: &Problem,
) -> Result<(), StoreError> {
    let mut stmt = tx.prepare_cached(
        "INSERT INTO field_problem (snapshot_id, line, case_key, field, kind, reason)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
    )?;
    stmt.execute(params![
        snapshot_id,
        problem.line as i64,
        case_key,
        problem.field.as_deref().unwrap_or(""),
        problem.kind.code(),
        problem.message,
    ])?;
    Ok(())
}

/// Sets `first_seen` (the snapshot of the record's first version) on the versions snapshot
/// `snapshot_id` wrote for records that had versions before: changed records, and removed
/// ones that came back. On a source's first snapshot there are none, and the per-version
/// look at the history is skipped. Returns the number of versions marked.
fn mark_first_seen(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
) -> Result<usize, StoreError> {
    let history: bool = tx.query_row(
        "SELECT EXISTS (SELECT 1 FROM snapshot WHERE source_id = ?1 AND status = 'applied' AND snapshot_id < ?2)",
        params![source_id, snapshot_id],
        |r| r.get(0),
    )?;
    if !history {
        return Ok(0);
    }
    Ok(tx.execute(
        "UPDATE case_version
         SET first_seen = (SELECT min(p.valid_from) FROM case_version p
                           WHERE p.source_id = case_version.source_id AND p.case_key = case_version.case_key)
         WHERE source_id = ?1 AND valid_from = ?2
           AND EXISTS (SELECT 1 FROM case_version p
                       WHERE p.source_id = case_version.source_id AND p.case_key = case_version.case_key
                         AND p.valid_from < ?2)",
        params![source_id, snapshot_id],
    )?)
}

/// The store's folder, where the spill file goes: it holds patient-level text, so it stays
/// beside the store (a private folder) rather than in a shared temporary folder.
fn spill_dir(store: &Path) -> PathBuf {
    match store.parent() {
        Some(parent) if !parent.as_os_str().is_empty() => parent.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

fn insert_snapshot(
    tx: &Transaction<'_>,
    source_id: SourceId,
    meta: &ExtractMeta,
    status: SnapshotStatus,
    note: &str,
) -> Result<SnapshotId, StoreError> {
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
    Ok(SnapshotId(tx.last_insert_rowid()))
}

fn last_applied(conn: &Connection, source_id: SourceId) -> Result<Option<LastApplied>, StoreError> {
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

fn held_snapshot(
    tx: &Transaction<'_>,
    snapshot_id: SnapshotId,
) -> Result<(SourceId, ExtractKind), StoreError> {
    let found: Option<(SourceId, SnapshotStatus, ExtractKind)> = tx
        .query_row(
            "SELECT source_id, status, extract_kind FROM snapshot WHERE snapshot_id = ?1",
            [snapshot_id],
            |row| Ok((row.get(0)?, row.get(1)?, row.get(2)?)),
        )
        .optional()?;
    match found {
        None => Err(StoreError::Refused(format!("no snapshot {snapshot_id}"))),
        Some((_, status, _)) if status != SnapshotStatus::Held => {
            Err(StoreError::Refused(format!("snapshot {snapshot_id} is {status}, not held")))
        }
        Some((source_id, _, kind)) => Ok((source_id, kind)),
    }
}
