//! Read-only questions of the store: snapshots, the history of one record, the line list and
//! epidemic curve as of any snapshot (analysts' SQL is `store::sql`). Every connection here is opened
//! read-only with `query_only`, so no read can change the store.

use std::collections::BTreeMap;
use std::path::Path;

use chrono::{DateTime, NaiveDate, Utc};
use rusqlite::types::ValueRef;
use rusqlite::{Connection, OptionalExtension, Row, params};

use super::{StoreError, open_reader, parse_time, time_text};
use crate::model::{AgeRange, CaseRecord, Field, SnapshotId, SnapshotStatus, SourceId};
use crate::table::Cell;

pub use crate::config::AGE_BAND_EDGES;

/// A read-only connection.
#[derive(Debug)]
pub struct Reader {
    pub(super) conn: Connection,
}

/// One row of `tidemark snapshots`.
#[derive(Debug, Clone, PartialEq)]
pub struct SnapshotRow {
    pub snapshot_id: SnapshotId,
    pub source: String,
    pub seq: i64,
    pub as_of: String,
    pub status: SnapshotStatus,
    pub rows_total: i64,
    pub rows_accepted: i64,
    pub rows_rejected: i64,
    pub rows_new: i64,
    pub rows_changed: i64,
    pub rows_removed: i64,
    pub note: Option<String>,
}

/// One version of a record, for `tidemark history`.
#[derive(Debug, Clone, PartialEq)]
pub struct VersionRow {
    pub version_id: i64,
    pub valid_from: SnapshotId,
    pub valid_to: Option<SnapshotId>,
    pub from_as_of: String,
    pub record: CaseRecord,
}

/// A count for one day (and stratum) of an epidemic curve; `date` is `None` for records
/// without a value in the curve's date field.
#[derive(Debug, Clone, PartialEq)]
pub struct CurveRow {
    pub date: Option<NaiveDate>,
    pub stratum: Option<String>,
    pub count: i64,
}

const RECORD_COLUMNS: &str = "case_key, jurisdiction, onset_date, specimen_date, result_date, report_date, \
     admit_date, death_date, outcome, age_lo, age_hi, sex, hospitalised, symptoms, conditions, invalid, extra_json";

impl Reader {
    pub fn open(path: &Path) -> Result<Reader, StoreError> {
        Ok(Reader { conn: open_reader(path)? })
    }

    pub fn source_id(&self, name: &str) -> Result<Option<SourceId>, StoreError> {
        Ok(self
            .conn
            .query_row("SELECT source_id FROM source WHERE name = ?1", [name], |r| r.get(0))
            .optional()?)
    }

    /// The applied snapshot that was current at `time` (the latest one when `None`).
    pub fn snapshot_as_of(
        &self,
        source_id: SourceId,
        time: Option<DateTime<Utc>>,
    ) -> Result<Option<SnapshotId>, StoreError> {
        let time = time.map(time_text).unwrap_or_else(|| "9999".into());
        Ok(self
            .conn
            .query_row(
                "SELECT max(snapshot_id) FROM snapshot
                 WHERE source_id = ?1 AND status = 'applied' AND as_of <= ?2",
                (source_id, time),
                |r| r.get(0),
            )
            .optional()?
            .flatten())
    }

    /// Applied snapshots of a source, oldest first: (snapshot id, as-of time).
    pub fn applied_snapshots(
        &self,
        source_id: SourceId,
    ) -> Result<Vec<(SnapshotId, DateTime<Utc>)>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT snapshot_id, as_of FROM snapshot WHERE source_id = ?1 AND status = 'applied'
             ORDER BY snapshot_id",
        )?;
        let rows = stmt.query_map([source_id], |r| Ok((r.get(0)?, r.get::<_, String>(1)?)))?;
        let mut out = Vec::new();
        for row in rows {
            let (id, as_of) = row?;
            out.push((id, parse_time(&as_of).unwrap_or_default()));
        }
        Ok(out)
    }

    pub fn snapshots(&self, source: Option<&str>) -> Result<Vec<SnapshotRow>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT n.snapshot_id, s.name, n.seq, n.as_of, n.status, n.rows_total, n.rows_accepted,
                    n.rows_rejected, n.rows_new, n.rows_changed, n.rows_removed, n.note
             FROM snapshot n JOIN source s USING (source_id)
             WHERE ?1 IS NULL OR s.name = ?1
             ORDER BY n.snapshot_id",
        )?;
        let rows = stmt.query_map([source], |r| {
            Ok(SnapshotRow {
                snapshot_id: r.get(0)?,
                source: r.get(1)?,
                seq: r.get(2)?,
                as_of: r.get(3)?,
                status: r.get(4)?,
                rows_total: r.get(5)?,
                rows_accepted: r.get(6)?,
                rows_rejected: r.get(7)?,
                rows_new: r.get(8)?,
                rows_changed: r.get(9)?,
                rows_removed: r.get(10)?,
                note: r.get(11)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Every version of one record, oldest first.
    pub fn history(&self, source_id: SourceId, case_key: &str) -> Result<Vec<VersionRow>, StoreError> {
        let mut stmt = self.conn.prepare(&format!(
            "SELECT v.version_id, v.valid_from, v.valid_to, n.as_of, {RECORD_COLUMNS}
             FROM case_version v JOIN snapshot n ON n.snapshot_id = v.valid_from
             WHERE v.source_id = ?1 AND v.case_key = ?2 ORDER BY v.valid_from"
        ))?;
        let rows = stmt.query_map(params![source_id, case_key], |r| {
            Ok(VersionRow {
                version_id: r.get(0)?,
                valid_from: r.get(1)?,
                valid_to: r.get(2)?,
                from_as_of: r.get(3)?,
                record: record_from(r, 4)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The line list of a source as it stood at snapshot `snapshot_id`, ordered by key.
    pub fn line_list(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
    ) -> Result<Vec<CaseRecord>, StoreError> {
        let mut stmt = self.conn.prepare(&format!(
            "SELECT {RECORD_COLUMNS} FROM case_version
             WHERE source_id = ?1 AND valid_from <= ?2 AND (valid_to IS NULL OR valid_to > ?2)
             ORDER BY case_key"
        ))?;
        let rows = stmt.query_map((source_id, snapshot_id), |r| record_from(r, 0))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Counts per day of a date field from the versions valid at `snapshot_id`, optionally by
    /// stratum. Days between the first and last date with no records are filled with zero.
    pub fn curve(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        by: Field,
        stratify: Option<Field>,
    ) -> Result<Vec<CurveRow>, StoreError> {
        let date_column = by.name();
        let stratum = stratify.map(|f| stratum_sql(f, &AGE_BAND_EDGES)).unwrap_or_else(|| "NULL".into());
        let mut stmt = self.conn.prepare(&format!(
            "SELECT {date_column}, {stratum} AS stratum, count(*) FROM case_version
             WHERE source_id = ?1 AND valid_from <= ?2 AND (valid_to IS NULL OR valid_to > ?2)
             GROUP BY 1, 2 ORDER BY 1, 2"
        ))?;
        let rows = stmt.query_map((source_id, snapshot_id), |r| {
            Ok((r.get::<_, Option<String>>(0)?, r.get::<_, Option<String>>(1)?, r.get::<_, i64>(2)?))
        })?;
        let mut counts: BTreeMap<(Option<NaiveDate>, Option<String>), i64> = BTreeMap::new();
        let mut strata = std::collections::BTreeSet::new();
        for row in rows {
            let (date, stratum, count) = row?;
            let date = date.and_then(|d| d.parse::<NaiveDate>().ok());
            strata.insert(stratum.clone());
            *counts.entry((date, stratum)).or_default() += count;
        }
        Ok(fill_days(counts, &strata))
    }

    /// Rejected rows of a source by kind: (kind, rows).
    pub fn reject_kinds(&self, source_id: SourceId) -> Result<Vec<(String, i64)>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT r.kind, count(*) FROM reject r JOIN snapshot n USING (snapshot_id)
             WHERE n.source_id = ?1 GROUP BY r.kind ORDER BY count(*) DESC, r.kind",
        )?;
        let rows = stmt.query_map([source_id], |r| Ok((r.get(0)?, r.get(1)?)))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Counts of versions and current records of a source.
    pub fn version_counts(&self, source_id: SourceId) -> Result<(i64, i64), StoreError> {
        Ok(self.conn.query_row(
            "SELECT count(*), count(*) FILTER (WHERE valid_to IS NULL) FROM case_version WHERE source_id = ?1",
            [source_id],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )?)
    }
}

pub(super) fn cell(value: rusqlite::Result<ValueRef<'_>>) -> rusqlite::Result<Cell> {
    Ok(match value? {
        ValueRef::Null => Cell::Null,
        ValueRef::Integer(n) => Cell::Int(n),
        ValueRef::Real(x) => Cell::Real(x),
        ValueRef::Text(t) => Cell::Text(String::from_utf8_lossy(t).into_owned()),
        ValueRef::Blob(b) => Cell::Text(format!("<{} bytes>", b.len())),
    })
}

/// SQL for a stratum label of a case_version row; ages fall in the band of their interval's
/// lower bound.
pub(super) fn stratum_sql(field: Field, age_edges: &[u32]) -> String {
    match field {
        Field::Age => {
            let mut sql = String::from("CASE WHEN age_lo IS NULL THEN NULL");
            for pair in age_edges.windows(2) {
                sql.push_str(&format!(" WHEN age_lo < {} THEN '{}-{}'", pair[1], pair[0], pair[1] - 1));
            }
            sql.push_str(&format!(" ELSE '{}+' END", age_edges.last().copied().unwrap_or(0)));
            sql
        }
        Field::Hospitalised => "CASE hospitalised WHEN 1 THEN 'yes' WHEN 0 THEN 'no' END".into(),
        other => other.name().to_string(),
    }
}

fn fill_days(
    counts: BTreeMap<(Option<NaiveDate>, Option<String>), i64>,
    strata: &std::collections::BTreeSet<Option<String>>,
) -> Vec<CurveRow> {
    let dates: Vec<NaiveDate> = counts.keys().filter_map(|(d, _)| *d).collect();
    let mut out = Vec::new();
    if let (Some(first), Some(last)) = (dates.iter().min(), dates.iter().max()) {
        let mut day = *first;
        loop {
            for stratum in strata {
                let count = counts.get(&(Some(day), stratum.clone())).copied().unwrap_or(0);
                out.push(CurveRow { date: Some(day), stratum: stratum.clone(), count });
            }
            match day.succ_opt() {
                Some(next) if next <= *last => day = next,
                _ => break,
            }
        }
    }
    for stratum in strata {
        if let Some(count) = counts.get(&(None, stratum.clone())) {
            out.push(CurveRow { date: None, stratum: stratum.clone(), count: *count });
        }
    }
    out
}

fn record_from(r: &Row<'_>, at: usize) -> rusqlite::Result<CaseRecord> {
    let text = |idx: usize| r.get::<_, Option<String>>(at + idx);
    let date =
        |idx: usize| -> rusqlite::Result<Option<NaiveDate>> { Ok(text(idx)?.and_then(|d| d.parse().ok())) };
    let list = |idx: usize| -> rusqlite::Result<Option<Vec<String>>> {
        Ok(text(idx)?.and_then(|t| serde_json::from_str(&t).ok()))
    };
    let age = match (r.get::<_, Option<f64>>(at + 9)?, r.get::<_, Option<f64>>(at + 10)?) {
        (Some(lo), Some(hi)) => Some(AgeRange { lo, hi }),
        _ => None,
    };
    Ok(CaseRecord {
        case_key: r.get(at)?,
        jurisdiction: text(1)?,
        dates: [date(2)?, date(3)?, date(4)?, date(5)?, date(6)?, date(7)?],
        outcome: text(8)?,
        age,
        sex: text(11)?,
        hospitalised: r.get(at + 12)?,
        symptoms: list(13)?,
        conditions: list(14)?,
        invalid: text(15)?.map(|t| t.split(',').filter_map(Field::parse).collect()).unwrap_or_default(),
        extra: text(16)?.and_then(|t| serde_json::from_str(&t).ok()).unwrap_or_default(),
    })
}
