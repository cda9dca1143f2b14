//! Read-only listings of the monitoring results that other parts of tidemark write (data
//! quality, alerts), through their documented views. A store without those tables answers
//! `None`, so callers can say "not available" instead of failing.

use chrono::{DateTime, Utc};
use rusqlite::OptionalExtension;

use super::{Reader, StoreError, time_text};
use crate::model::SnapshotId;
use crate::table::Table;

impl Reader {
    /// Whether a table or view exists.
    pub fn has_relation(&self, name: &str) -> Result<bool, StoreError> {
        Ok(self.conn.query_row(
            "SELECT count(*) > 0 FROM sqlite_master WHERE type IN ('table', 'view') AND name = ?1",
            [name],
            |r| r.get(0),
        )?)
    }

    /// Quality measures: from `quality_latest`, or with `as_of` from the snapshot of each
    /// source current then. `None` when the store has no quality tables.
    pub fn quality(
        &self,
        source: Option<&str>,
        as_of: Option<DateTime<Utc>>,
    ) -> Result<Option<Table>, StoreError> {
        if !self.has_relation("quality_latest")? {
            return Ok(None);
        }
        let Some(as_of) = as_of else {
            let sql = "SELECT * FROM quality_latest WHERE ?1 IS NULL OR source = ?1";
            return Ok(Some(self.listing(sql, (source,))?));
        };
        // The same columns as quality_latest, for each source's latest quality rows at as_of.
        let sql =
            "SELECT s.name AS source, q.snapshot_id, n.as_of, q.scope, q.stratum_kind, q.stratum, q.field,
                          q.records, q.missing, q.invalid, q.share_missing, q.share_invalid,
                          n.rows_total, n.rows_new, n.rows_changed, n.rows_removed, n.rows_rejected
                   FROM quality q
                   JOIN snapshot n ON n.snapshot_id = q.snapshot_id
                   JOIN source s ON s.source_id = q.source_id
                   WHERE (?1 IS NULL OR s.name = ?1)
                     AND q.snapshot_id = (SELECT max(l.snapshot_id) FROM quality l
                                          JOIN snapshot m ON m.snapshot_id = l.snapshot_id
                                          WHERE l.source_id = q.source_id AND m.as_of <= ?2)";
        Ok(Some(self.listing(sql, (source, time_text(as_of)))?))
    }

    /// Open alerts: from `alert_open`, or with `as_of` those open at that data time: opened by
    /// a snapshot as of `as_of` or earlier and not resolved by one as of `as_of` or earlier
    /// (alerts of the poll rules, which have no snapshot, by their evaluation times). `None`
    /// when the store has no alert tables.
    pub fn alerts_table(
        &self,
        source: Option<&str>,
        as_of: Option<DateTime<Utc>>,
    ) -> Result<Option<Table>, StoreError> {
        if !self.has_relation("alert_open")? {
            return Ok(None);
        }
        let Some(as_of) = as_of else {
            let sql = "SELECT * FROM alert_open WHERE ?1 IS NULL OR source = ?1";
            return Ok(Some(self.listing(sql, (source,))?));
        };
        // Alerts opened by as_of and not resolved by then (their state column is today's).
        let sql = "SELECT alert_id, rule, source, subject, severity, state, summary, figures, snapshot_id,
                          data_day, opened_as_of, resolved_as_of, opened_at, last_seen_at, acked_at, resolved_at
                   FROM alert
                   WHERE (?1 IS NULL OR source = ?1) AND coalesce(opened_as_of, opened_at) <= ?2
                     AND (resolved_at IS NULL OR coalesce(resolved_as_of, resolved_at) > ?2)
                   ORDER BY alert_id";
        Ok(Some(self.listing(sql, (source, time_text(as_of)))?))
    }

    /// Every row of a parameterised statement as a listing.
    pub(super) fn listing(&self, sql: &str, params: impl rusqlite::Params) -> Result<Table, StoreError> {
        let mut stmt = self.conn.prepare(sql)?;
        let columns: Vec<String> = stmt.column_names().map(|c| c.to_string()).collect();
        let width = columns.len();
        let mut table = Table { columns, rows: Vec::new() };
        let mut rows = stmt.query(params)?;
        while let Some(row) = rows.next()? {
            table
                .rows
                .push((0..width).map(|idx| super::read::cell(row.get_ref(idx))).collect::<Result<_, _>>()?);
        }
        Ok(table)
    }
}

/// One problem of a snapshot (a reject or a field problem), for the lines printed after an
/// ingest. Names the line, field and kind; the reason names columns, never cell values.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ProblemLine {
    pub line: i64,
    pub field: Option<String>,
    pub kind: String,
    pub reason: String,
}

/// One alert with the day of the snapshot that opened it (or of its opening, without one).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct AlertLine {
    pub day: String,
    pub rule: String,
    pub source: String,
    pub subject: String,
    pub severity: String,
    pub state: String,
    pub summary: String,
}

impl Reader {
    /// The first `max` problems of a snapshot by line: rejects and field problems together.
    pub fn problem_lines(&self, snapshot_id: SnapshotId, max: usize) -> Result<Vec<ProblemLine>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT line, field, kind, reason FROM (
                 SELECT line, field, kind, reason FROM reject WHERE snapshot_id = ?1
                 UNION ALL
                 SELECT line, field, kind, reason FROM field_problem WHERE snapshot_id = ?1)
             ORDER BY line LIMIT ?2",
        )?;
        let rows = stmt.query_map(rusqlite::params![snapshot_id, max as i64], |r| {
            Ok(ProblemLine { line: r.get(0)?, field: r.get(1)?, kind: r.get(2)?, reason: r.get(3)? })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Every alert, by the day of the snapshot that opened it, then by id.
    pub fn alert_lines(&self) -> Result<Vec<AlertLine>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT coalesce(substr(n.as_of, 1, 10), substr(a.opened_at, 1, 10)), a.rule, a.source,
                    coalesce(a.subject, ''), a.severity, a.state, a.summary
             FROM alert a LEFT JOIN snapshot n ON n.snapshot_id = a.snapshot_id ORDER BY 1, a.alert_id",
        )?;
        let rows = stmt.query_map([], |r| {
            Ok(AlertLine {
                day: r.get(0)?,
                rule: r.get(1)?,
                source: r.get(2)?,
                subject: r.get(3)?,
                severity: r.get(4)?,
                state: r.get(5)?,
                summary: r.get(6)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The day a snapshot describes (the date of its as-of time); `None` for no such snapshot.
    pub fn snapshot_day(&self, snapshot_id: SnapshotId) -> Result<Option<chrono::NaiveDate>, StoreError> {
        let day: Option<String> = self
            .conn
            .query_row(
                "SELECT substr(as_of, 1, 10) FROM snapshot WHERE snapshot_id = ?1",
                [snapshot_id],
                |r| r.get(0),
            )
            .optional()?;
        day.map(|d| {
            d.parse()
                .map_err(|_| StoreError::Refused(format!("snapshot {snapshot_id} has no valid as-of date")))
        })
        .transpose()
    }
}
