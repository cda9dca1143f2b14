//! Read-only questions the dashboard asks: an overview of the sources, the stored nowcast
//! and delay fit of a snapshot, the onset-to-first-appearance lag of the records each
//! snapshot brought, the share of records missing each field as of each snapshot, and the
//! open alerts when the alert tables exist. Everything is an as-of read of the versioned
//! records or of results keyed by snapshot, so any past page can be redrawn exactly.
//!
//! The lag and missingness series are computed here from the versions with plain as-of SQL
//! (one pass per snapshot for missingness), which is quick for demo- and county-sized stores;
//! a store of millions of records would want them precomputed per snapshot.

use rusqlite::{OptionalExtension, params};

use super::read::cell;
use super::{Reader, StoreError};
use crate::model::{Field, SnapshotId, SourceId};
use crate::table::Table;

/// One line of the dashboard's list of sources.
#[derive(Debug, Clone, PartialEq)]
pub struct SourceOverview {
    pub name: String,
    pub applied_snapshots: i64,
    pub latest_as_of: Option<String>,
    pub current_records: i64,
}

/// The best-ranked stored delay fit of one pair of fields at one snapshot.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredDelayFit {
    pub family: String,
    pub n: i64,
    pub params: [Option<f64>; 2],
    pub mean: Option<f64>,
    pub median: Option<f64>,
    pub median_interval: (Option<f64>, Option<f64>),
    pub p95: Option<f64>,
    pub p95_interval: (Option<f64>, Option<f64>),
    pub identifiable: bool,
}

/// The lag of one record at its first appearance: the snapshot that brought it, that
/// snapshot's day, and days from onset to that day.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FirstSeenLag {
    pub snapshot_id: SnapshotId,
    pub day: chrono::NaiveDate,
    pub lag_days: i64,
}

/// Records valid as of one snapshot and how many of them miss each field of
/// [`MISSINGNESS_FIELDS`].
#[derive(Debug, Clone, PartialEq)]
pub struct SnapshotMissing {
    pub snapshot_id: SnapshotId,
    pub as_of: String,
    pub records: i64,
    pub missing: Vec<i64>,
}

/// The fields whose missingness the dashboard maps, in display order (the case key is never
/// missing, so it is left out).
pub const MISSINGNESS_FIELDS: [Field; 13] = [
    Field::Jurisdiction,
    Field::OnsetDate,
    Field::SpecimenDate,
    Field::ResultDate,
    Field::ReportDate,
    Field::AdmitDate,
    Field::DeathDate,
    Field::Outcome,
    Field::Age,
    Field::Sex,
    Field::Hospitalised,
    Field::Symptoms,
    Field::Conditions,
];

impl Reader {
    /// Every source with its applied snapshots, the latest as-of time and current records.
    pub fn source_overview(&self) -> Result<Vec<SourceOverview>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT s.name,
                    (SELECT count(*) FROM snapshot n WHERE n.source_id = s.source_id AND n.status = 'applied'),
                    (SELECT max(as_of) FROM snapshot n WHERE n.source_id = s.source_id AND n.status = 'applied'),
                    (SELECT count(*) FROM case_version v WHERE v.source_id = s.source_id AND v.valid_to IS NULL)
             FROM source s ORDER BY s.name",
        )?;
        let rows = stmt.query_map([], |r| {
            Ok(SourceOverview {
                name: r.get(0)?,
                applied_snapshots: r.get(1)?,
                latest_as_of: r.get(2)?,
                current_records: r.get(3)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The rank-1 (lowest AIC) whole-source fit of the delay `from -> to` at `snapshot_id`.
    pub fn best_delay_fit(
        &self,
        snapshot_id: SnapshotId,
        from: &str,
        to: &str,
    ) -> Result<Option<StoredDelayFit>, StoreError> {
        Ok(self
            .conn
            .query_row(
                "SELECT family, n, param1, param2, mean, median, median_lo, median_hi, p95, p95_lo, p95_hi,
                        identifiable
                 FROM delay_fit WHERE snapshot_id = ?1 AND from_field = ?2 AND to_field = ?3
                   AND stratum_kind = 'all' AND stratum = '' ORDER BY rank LIMIT 1",
                params![snapshot_id, from, to],
                |r| {
                    Ok(StoredDelayFit {
                        family: r.get(0)?,
                        n: r.get(1)?,
                        params: [r.get(2)?, r.get(3)?],
                        mean: r.get(4)?,
                        median: r.get(5)?,
                        median_interval: (r.get(6)?, r.get(7)?),
                        p95: r.get(8)?,
                        p95_interval: (r.get(9)?, r.get(10)?),
                        identifiable: r.get(11)?,
                    })
                },
            )
            .optional()?)
    }

    /// For every record that first appeared in an applied snapshot up to `until_snapshot` and
    /// had an onset date then: the days from onset to that snapshot's day.
    pub fn first_seen_lags(
        &self,
        source_id: SourceId,
        until_snapshot: SnapshotId,
    ) -> Result<Vec<FirstSeenLag>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT v.valid_from, substr(n.as_of, 1, 10), v.onset_date
             FROM case_version v JOIN snapshot n ON n.snapshot_id = v.valid_from
             WHERE v.source_id = ?1 AND v.valid_from <= ?2 AND v.onset_date IS NOT NULL
               AND v.first_seen IS NULL
             ORDER BY v.valid_from",
        )?;
        let rows = stmt.query_map(params![source_id, until_snapshot], |r| {
            Ok((r.get::<_, i64>(0)?, r.get::<_, String>(1)?, r.get::<_, String>(2)?))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let (snapshot_id, day, onset) = row?;
            let (Ok(day), Ok(onset)) = (day.parse::<chrono::NaiveDate>(), onset.parse::<chrono::NaiveDate>())
            else {
                continue;
            };
            out.push(FirstSeenLag {
                snapshot_id: SnapshotId(snapshot_id),
                day,
                lag_days: (day - onset).num_days(),
            });
        }
        Ok(out)
    }

    /// Missing values per field among the records valid as of each of `snapshots`.
    pub fn missingness(
        &self,
        source_id: SourceId,
        snapshots: &[SnapshotId],
    ) -> Result<Vec<SnapshotMissing>, StoreError> {
        let counts: Vec<String> =
            MISSINGNESS_FIELDS.iter().map(|f| format!("count(*) - count({})", missing_column(*f))).collect();
        let mut stmt = self.conn.prepare(&format!(
            "SELECT (SELECT as_of FROM snapshot WHERE snapshot_id = ?2), count(*), {}
             FROM case_version
             WHERE source_id = ?1 AND valid_from <= ?2 AND (valid_to IS NULL OR valid_to > ?2)",
            counts.join(", ")
        ))?;
        let mut out = Vec::new();
        for &snapshot_id in snapshots {
            let row = stmt.query_row(params![source_id, snapshot_id], |r| {
                let mut missing = Vec::with_capacity(MISSINGNESS_FIELDS.len());
                for idx in 0..MISSINGNESS_FIELDS.len() {
                    missing.push(r.get::<_, i64>(2 + idx)?);
                }
                Ok(SnapshotMissing {
                    snapshot_id,
                    as_of: r.get::<_, Option<String>>(0)?.unwrap_or_default(),
                    records: r.get(1)?,
                    missing,
                })
            })?;
            out.push(row);
        }
        Ok(out)
    }

    /// The alerts of a source that are not resolved (newest first), aggregates only: `None`
    /// when this store has no alert tables (schema before version 4).
    pub fn open_alerts(&self, source: &str, limit: usize) -> Result<Option<Table>, StoreError> {
        if !self.has_relation("alert_open")? {
            return Ok(None);
        }
        let mut stmt = self.conn.prepare(
            "SELECT alert_id, rule, subject, severity, state, summary, opened_at, last_seen_at, times_seen
             FROM alert_open WHERE source = ?1 ORDER BY opened_at DESC, alert_id DESC LIMIT ?2",
        )?;
        let columns: Vec<String> = stmt.column_names().map(|c| c.to_string()).collect();
        let width = columns.len();
        let mut table = Table { columns, rows: Vec::new() };
        let mut rows = stmt.query(params![source, limit as i64])?;
        while let Some(row) = rows.next()? {
            table.rows.push((0..width).map(|idx| cell(row.get_ref(idx))).collect::<Result<_, _>>()?);
        }
        Ok(Some(table))
    }
}

/// The column (or expression) that is NULL when a field is missing: ages are an interval.
fn missing_column(field: Field) -> &'static str {
    match field {
        Field::Age => "age_lo",
        other => other.name(),
    }
}
