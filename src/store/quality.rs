//! Data-quality measures of one applied snapshot (from the previous snapshot's measures and
//! the versions opened and closed since, or one scan of the versions valid at the snapshot;
//! SQL selects the rows and they are summed here, which spares `GROUP BY` its sort) and stored
//! keyed by the snapshot: per canonical field the missing and invalid counts among all
//! current records and among the records the snapshot added or changed, overall and per
//! jurisdiction; the reporting lag of records first seen in the snapshot (median and 90th
//! percentile); and reads of these for `tidemark quality` and the alert rules.

use std::collections::BTreeMap;

use rusqlite::types::ValueRef;
use rusqlite::{Transaction, params};

use super::{Reader, Store, StoreError};
use crate::analysis::quantile::quantile_of_counts;
use crate::model::{Field, SnapshotId, SnapshotStatus, SourceId};

/// The stratum a record without a jurisdiction is counted in.
pub const NO_JURISDICTION: &str = "(missing)";

/// What to measure for a source.
#[derive(Debug, Clone)]
pub struct QualitySpec {
    /// Canonical fields whose missing and invalid shares are measured (the mapped ones).
    pub fields: Vec<Field>,
    /// Reference date of the reporting lag: the first of these fields that is present.
    pub lag_from: Vec<Field>,
}

/// One stored quality row.
#[derive(Debug, Clone, PartialEq)]
pub struct QualityRow {
    pub snapshot_id: SnapshotId,
    pub scope: String,
    pub stratum_kind: String,
    pub stratum: String,
    pub field: String,
    pub records: i64,
    pub missing: i64,
    pub invalid: i64,
    pub share_missing: Option<f64>,
    pub share_invalid: Option<f64>,
}

/// One stored lag row.
#[derive(Debug, Clone, PartialEq)]
pub struct LagRow {
    pub snapshot_id: SnapshotId,
    pub stratum_kind: String,
    pub stratum: String,
    pub ref_fields: String,
    pub new_records: i64,
    pub n: i64,
    pub median_days: Option<f64>,
    pub p90_days: Option<f64>,
}

/// The volume of one snapshot, from the snapshot table.
#[derive(Debug, Clone, PartialEq)]
pub struct VolumeRow {
    pub snapshot_id: SnapshotId,
    pub as_of: String,
    pub status: SnapshotStatus,
    pub rows_total: i64,
    pub rows_accepted: i64,
    pub rows_new: i64,
    pub rows_changed: i64,
    pub rows_removed: i64,
    pub rows_rejected: i64,
}

/// Counts of one (scope, stratum, field) cell before shares are taken.
#[derive(Debug, Clone, Copy, Default)]
struct Counts {
    records: i64,
    nulls: i64,
    invalid: i64,
}

type CellKey = (&'static str, String, Field);

/// Quality cells by key, before they are stored.
type Cells = BTreeMap<CellKey, Counts>;

/// One scan's sums for one jurisdiction (as stored) and "written by the snapshot or not".
#[derive(Debug)]
struct ScanGroup {
    jurisdiction: Option<Vec<u8>>,
    fresh: bool,
    records: i64,
    /// Per measured field: the NULL count and the invalid count.
    per_field: Vec<(i64, i64)>,
}

/// One bin of a stored lag histogram: (as-of day, stratum kind, stratum, lag days, count).
pub type LagBin = (String, String, String, f64, u64);

/// Per (stratum kind, stratum): new records, and the lag histogram of those with a date.
type LagHistograms = BTreeMap<(String, String), (i64, Vec<(f64, u64)>)>;

impl Store {
    /// Computes and stores the quality measures of `snapshot_id` (replacing earlier ones of
    /// the same snapshot) in one transaction. Returns the number of quality rows.
    pub fn write_quality(
        &mut self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        spec: &QualitySpec,
    ) -> Result<usize, StoreError> {
        let tx = self.conn.transaction()?;
        tx.execute("DELETE FROM quality WHERE snapshot_id = ?1", [snapshot_id])?;
        tx.execute("DELETE FROM quality_lag WHERE snapshot_id = ?1", [snapshot_id])?;
        tx.execute("DELETE FROM quality_lag_hist WHERE snapshot_id = ?1", [snapshot_id])?;
        let cells = field_counts(&tx, source_id, snapshot_id, &spec.fields)?;
        let written = insert_quality(&tx, source_id, snapshot_id, &cells)?;
        if !spec.lag_from.is_empty() {
            write_lag(&tx, source_id, snapshot_id, &spec.lag_from)?;
        }
        tx.commit()?;
        Ok(written)
    }
}

/// The SQL expression that is NULL when a field is empty or invalid.
fn value_column(field: Field) -> &'static str {
    match field {
        Field::Age => "age_lo",
        other => other.name(),
    }
}

/// Whether a version's `invalid` column (comma-separated field names) lists `field`.
fn lists_field(invalid: &[u8], field: Field) -> bool {
    invalid.split(|b| *b == b',').any(|name| name == field.name().as_bytes())
}

/// Versions current at snapshot `?2` (the whole-scan baseline).
const CURRENT_AT: &str = "valid_from <= ?2 AND (valid_to IS NULL OR valid_to > ?2)";

/// Versions opened after the base snapshot `?3` and current at `?2`: added to the base.
const OPENED_SINCE_BASE: &str =
    "valid_from > ?3 AND valid_from <= ?2 AND (valid_to IS NULL OR valid_to > ?2)";

/// Versions current at the base snapshot `?3` and closed by `?2`: taken from the base.
const CLOSED_SINCE_BASE: &str = "valid_to > ?3 AND valid_to <= ?2 AND valid_from <= ?3";

/// The missing and invalid counts of a snapshot, per cell. Incremental where it can be: the
/// 'current' cells of the source's previous applied snapshot, plus the versions opened
/// since, minus the versions closed since (a re-ingest touches a few thousand versions, not
/// the million current ones). Without a usable base (the first snapshot, a base measured
/// for other fields, or one whose measures were never stored) one grouped scan of the
/// versions current at the snapshot; both ways give the same cells (tests/it/quality.rs).
fn field_counts(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    fields: &[Field],
) -> Result<BTreeMap<CellKey, Counts>, StoreError> {
    if fields.is_empty() {
        return Ok(BTreeMap::new());
    }
    let Some((base_id, mut cells)) = base_counts(tx, source_id, snapshot_id, fields)? else {
        let mut cells = BTreeMap::new();
        add_grouped(tx, (source_id, snapshot_id, SnapshotId(0)), fields, CURRENT_AT, 1, &mut cells)?;
        return Ok(cells);
    };
    let ids = (source_id, snapshot_id, base_id);
    add_grouped(tx, ids, fields, OPENED_SINCE_BASE, 1, &mut cells)?;
    add_grouped(tx, ids, fields, CLOSED_SINCE_BASE, -1, &mut cells)?;
    // A stratum left without records has no row in a whole scan either.
    cells.retain(|_, c| c.records != 0);
    Ok(cells)
}

/// The 'current' cells stored for the source's applied snapshot before `snapshot_id`, if
/// that snapshot was measured for exactly `fields`.
fn base_counts(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    fields: &[Field],
) -> Result<Option<(SnapshotId, Cells)>, StoreError> {
    let base: Option<SnapshotId> = tx.query_row(
        "SELECT max(snapshot_id) FROM snapshot WHERE source_id = ?1 AND status = 'applied' AND snapshot_id < ?2",
        params![source_id, snapshot_id],
        |r| r.get(0),
    )?;
    let Some(base) = base else { return Ok(None) };
    let mut stmt = tx.prepare(
        "SELECT stratum_kind, stratum, field, records, missing, invalid
         FROM quality WHERE snapshot_id = ?1 AND scope = 'current'",
    )?;
    let mut rows = stmt.query([base])?;
    let mut cells: BTreeMap<CellKey, Counts> = BTreeMap::new();
    while let Some(row) = rows.next()? {
        let (kind, stratum, name): (String, String, String) = (row.get(0)?, row.get(1)?, row.get(2)?);
        let Some(field) = Field::parse(&name).filter(|f| fields.contains(f)) else { return Ok(None) };
        let (records, missing, invalid): (i64, i64, i64) = (row.get(3)?, row.get(4)?, row.get(5)?);
        let counts = Counts { records, nulls: missing + invalid, invalid };
        cells.insert(("current", format!("{kind}\u{1f}{stratum}"), field), counts);
    }
    let measured: std::collections::BTreeSet<Field> = cells.keys().map(|(_, _, f)| *f).collect();
    Ok((measured.len() == fields.len()).then_some((base, cells)))
}

/// One scan of the versions that `filter` selects (`?1` source, `?2` snapshot, `?3` base
/// snapshot): per jurisdiction and "written by this snapshot or not", the number of
/// versions and per field the NULL and invalid counts, added with `sign` into the 'current'
/// cells (and, for versions the snapshot wrote, the 'new_changed' ones), overall and per
/// jurisdiction. The rows are summed here rather than by `GROUP BY`, which would sort a
/// million rows on a first snapshot only to produce a few dozen groups.
fn add_grouped(
    tx: &Transaction<'_>,
    (source_id, snapshot_id, base_id): (SourceId, SnapshotId, SnapshotId),
    fields: &[Field],
    filter: &str,
    sign: i64,
    cells: &mut BTreeMap<CellKey, Counts>,
) -> Result<(), StoreError> {
    let sql = format!(
        "SELECT {} FROM case_version WHERE source_id = ?1 AND {filter}",
        scan_columns(fields).join(", ")
    );
    let mut stmt = tx.prepare(&sql)?;
    let mut rows = if stmt.parameter_count() == 3 {
        stmt.query(params![source_id, snapshot_id, base_id])?
    } else {
        stmt.query(params![source_id, snapshot_id])?
    };
    let mut groups: Vec<ScanGroup> = Vec::new();
    while let Some(row) = rows.next()? {
        let jurisdiction = match row.get_ref(0)? {
            ValueRef::Text(text) => Some(text),
            _ => None,
        };
        let fresh: bool = row.get(1)?;
        let invalid = match row.get_ref(2)? {
            ValueRef::Text(text) => text,
            _ => &[],
        };
        // A linear search: a source has a few dozen jurisdictions at most, and this spares
        // a million key allocations.
        let found = groups.iter().position(|g| g.fresh == fresh && g.jurisdiction.as_deref() == jurisdiction);
        let at = found.unwrap_or_else(|| {
            groups.push(ScanGroup {
                jurisdiction: jurisdiction.map(<[u8]>::to_vec),
                fresh,
                records: 0,
                per_field: vec![(0, 0); fields.len()],
            });
            groups.len() - 1
        });
        let group = &mut groups[at];
        group.records += 1;
        for (idx, field) in fields.iter().enumerate() {
            let null: bool = row.get(3 + idx)?;
            group.per_field[idx].0 += i64::from(null);
            group.per_field[idx].1 += i64::from(!invalid.is_empty() && lists_field(invalid, *field));
        }
    }
    for ScanGroup { jurisdiction, fresh, records, per_field } in groups {
        let jurisdiction = jurisdiction
            .map(|bytes| String::from_utf8_lossy(&bytes).into_owned())
            .unwrap_or_else(|| NO_JURISDICTION.to_string());
        let scopes: &[&'static str] = if fresh { &["current", "new_changed"] } else { &["current"] };
        for (field, (nulls, invalid)) in fields.iter().zip(per_field) {
            for scope in scopes {
                for stratum in [("all", ""), ("jurisdiction", jurisdiction.as_str())] {
                    let key = (*scope, format!("{}\u{1f}{}", stratum.0, stratum.1), *field);
                    let cell = cells.entry(key).or_default();
                    cell.records += sign * records;
                    cell.nulls += sign * nulls;
                    cell.invalid += sign * invalid;
                }
            }
        }
    }
    Ok(())
}

/// The columns `add_grouped` reads: jurisdiction, "written by the snapshot", `invalid`, then
/// one "is NULL" per measured field (none when the source maps no fields).
fn scan_columns(fields: &[Field]) -> Vec<String> {
    let fixed = ["jurisdiction", "valid_from = ?2", "invalid"].map(String::from);
    let nulls = fields.iter().map(|f| format!("{} IS NULL", value_column(*f)));
    fixed.into_iter().chain(nulls).collect()
}

fn insert_quality(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    cells: &BTreeMap<CellKey, Counts>,
) -> Result<usize, StoreError> {
    let mut insert = tx.prepare(
        "INSERT INTO quality (snapshot_id, source_id, scope, stratum_kind, stratum, field, records,
             missing, invalid, share_missing, share_invalid)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
    )?;
    for ((scope, stratum, field), c) in cells {
        let (kind, stratum) = stratum.split_once('\u{1f}').unwrap_or(("all", ""));
        let missing = c.nulls - c.invalid;
        let share = |n: i64| (c.records > 0).then(|| n as f64 / c.records as f64);
        insert.execute(params![
            snapshot_id,
            source_id,
            scope,
            kind,
            stratum,
            field.name(),
            c.records,
            missing,
            c.invalid,
            share(missing),
            share(c.invalid)
        ])?;
    }
    Ok(cells.len())
}

/// Lag histogram of the records first seen in the snapshot (written by it, with no earlier
/// version), grouped by jurisdiction and lag in days; quantiles are taken from the counts.
fn write_lag(
    tx: &Transaction<'_>,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    lag_from: &[Field],
) -> Result<(), StoreError> {
    let names: Vec<String> = lag_from.iter().map(|f| format!("c.{}", f.name())).collect();
    // coalesce() needs two arguments; one field is just the column.
    let reference =
        if names.len() == 1 { names[0].clone() } else { format!("coalesce({})", names.join(", ")) };
    // A version is its record's first when it has no `first_seen` (migration 0006).
    let sql = format!(
        "SELECT coalesce(c.jurisdiction, '{NO_JURISDICTION}'),
                CAST(julianday(substr(n.as_of, 1, 10)) - julianday({reference}) AS INTEGER)
         FROM case_version c JOIN snapshot n ON n.snapshot_id = c.valid_from
         WHERE c.valid_from = ?2 AND c.source_id = ?1 AND c.first_seen IS NULL"
    );
    // Summed here rather than by `GROUP BY` (which sorts every row): (jurisdiction, lag) -> n.
    let mut counts: BTreeMap<(String, Option<i64>), i64> = BTreeMap::new();
    {
        let mut stmt = tx.prepare(&sql)?;
        let mut rows = stmt.query(params![source_id, snapshot_id])?;
        while let Some(row) = rows.next()? {
            *counts.entry((row.get(0)?, row.get(1)?)).or_default() += 1;
        }
    }
    let mut histograms: LagHistograms = BTreeMap::new();
    for ((jurisdiction, lag), count) in counts {
        for key in [("all".to_string(), String::new()), ("jurisdiction".to_string(), jurisdiction.clone())] {
            let entry = histograms.entry(key).or_default();
            entry.0 += count;
            if let Some(lag) = lag {
                entry.1.push((lag as f64, count as u64));
            }
        }
    }
    let ref_fields = lag_from.iter().map(|f| f.name()).collect::<Vec<_>>().join(",");
    let mut insert = tx.prepare(
        "INSERT INTO quality_lag (snapshot_id, source_id, stratum_kind, stratum, ref_fields, new_records, n,
             median_days, p90_days)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9)",
    )?;
    let mut insert_bin = tx.prepare(
        // The whole-source histogram gathers the same lag from every jurisdiction: add up.
        "INSERT INTO quality_lag_hist (snapshot_id, source_id, stratum_kind, stratum, lag_days, n)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6)
         ON CONFLICT (snapshot_id, stratum_kind, stratum, lag_days) DO UPDATE SET n = n + excluded.n",
    )?;
    for ((kind, stratum), (new_records, hist)) in &histograms {
        for (lag, count) in hist {
            insert_bin.execute(params![snapshot_id, source_id, kind, stratum, *lag as i64, *count as i64])?;
        }
        let n: u64 = hist.iter().map(|(_, c)| c).sum();
        insert.execute(params![
            snapshot_id,
            source_id,
            kind,
            stratum,
            ref_fields,
            new_records,
            n as i64,
            quantile_of_counts(hist, 0.5),
            quantile_of_counts(hist, 0.9)
        ])?;
    }
    Ok(())
}

impl Reader {
    /// The latest snapshot of a source that has quality rows.
    pub fn latest_quality_snapshot(&self, source_id: SourceId) -> Result<Option<SnapshotId>, StoreError> {
        Ok(self.conn.query_row(
            "SELECT max(snapshot_id) FROM quality WHERE source_id = ?1",
            [source_id],
            |r| r.get(0),
        )?)
    }

    /// Quality rows of one snapshot, in a stable order.
    pub fn quality_rows(&self, snapshot_id: SnapshotId) -> Result<Vec<QualityRow>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT snapshot_id, scope, stratum_kind, stratum, field, records, missing, invalid,
                    share_missing, share_invalid
             FROM quality WHERE snapshot_id = ?1
             ORDER BY scope, stratum_kind, stratum, field",
        )?;
        let rows = stmt.query_map([snapshot_id], quality_row)?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Quality rows of one (scope, stratum kind) over the applied snapshots up to and
    /// including `upto`, oldest first.
    pub fn quality_history(
        &self,
        source_id: SourceId,
        upto: SnapshotId,
        scope: &str,
        stratum_kind: &str,
    ) -> Result<Vec<QualityRow>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT snapshot_id, scope, stratum_kind, stratum, field, records, missing, invalid,
                    share_missing, share_invalid
             FROM quality WHERE source_id = ?1 AND snapshot_id <= ?2 AND scope = ?3 AND stratum_kind = ?4
             ORDER BY snapshot_id, stratum, field",
        )?;
        let rows = stmt.query_map(params![source_id, upto, scope, stratum_kind], quality_row)?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Lag rows of one snapshot, or (with `history`) of every snapshot up to it, oldest first.
    pub fn lag_rows(
        &self,
        source_id: SourceId,
        upto: SnapshotId,
        history: bool,
    ) -> Result<Vec<LagRow>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT snapshot_id, stratum_kind, stratum, ref_fields, new_records, n, median_days, p90_days
             FROM quality_lag
             WHERE source_id = ?1 AND (snapshot_id = ?2 OR (?3 AND snapshot_id < ?2))
             ORDER BY snapshot_id, stratum_kind, stratum",
        )?;
        let rows = stmt.query_map(params![source_id, upto, history], |r| {
            Ok(LagRow {
                snapshot_id: r.get(0)?,
                stratum_kind: r.get(1)?,
                stratum: r.get(2)?,
                ref_fields: r.get(3)?,
                new_records: r.get(4)?,
                n: r.get(5)?,
                median_days: r.get(6)?,
                p90_days: r.get(7)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// New records per stratum (not the whole-source rows) of the given snapshots of a
    /// source: `(snapshot, stratum, new records)`, the largest over the lag rows' reference
    /// fields. Reads only those snapshots' rows.
    pub fn stratum_new_records(
        &self,
        source_id: SourceId,
        snapshots: &[SnapshotId],
    ) -> Result<Vec<(SnapshotId, String, i64)>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT snapshot_id, stratum, max(new_records) FROM quality_lag
             WHERE source_id = ?1 AND snapshot_id = ?2 AND stratum_kind <> 'all'
             GROUP BY snapshot_id, stratum",
        )?;
        let mut rows = Vec::new();
        for snapshot_id in snapshots {
            let found =
                stmt.query_map(params![source_id, snapshot_id], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?;
            for row in found {
                rows.push(row?);
            }
        }
        Ok(rows)
    }

    /// Volume of every snapshot of a source (any status) up to and including `upto`,
    /// oldest first.
    pub fn volumes(&self, source_id: SourceId, upto: SnapshotId) -> Result<Vec<VolumeRow>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT snapshot_id, as_of, status, rows_total, rows_accepted, rows_new, rows_changed, rows_removed,
                    rows_rejected
             FROM snapshot WHERE source_id = ?1 AND snapshot_id <= ?2 ORDER BY snapshot_id",
        )?;
        let rows = stmt.query_map(params![source_id, upto], |r| {
            Ok(VolumeRow {
                snapshot_id: r.get(0)?,
                as_of: r.get(1)?,
                status: r.get(2)?,
                rows_total: r.get(3)?,
                rows_accepted: r.get(4)?,
                rows_new: r.get(5)?,
                rows_changed: r.get(6)?,
                rows_removed: r.get(7)?,
                rows_rejected: r.get(8)?,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }
}

impl Reader {
    /// Lag histograms of the snapshots of a source whose as-of day is on or after `from_day`
    /// (ISO date) up to snapshot `upto`: (as-of day, stratum kind, stratum, lag days, count).
    pub fn lag_histograms(
        &self,
        source_id: SourceId,
        upto: SnapshotId,
        from_day: &str,
    ) -> Result<Vec<LagBin>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT substr(n.as_of, 1, 10), h.stratum_kind, h.stratum, h.lag_days, h.n
             FROM quality_lag_hist h JOIN snapshot n ON n.snapshot_id = h.snapshot_id
             WHERE h.source_id = ?1 AND h.snapshot_id <= ?2 AND substr(n.as_of, 1, 10) >= ?3
             ORDER BY 1",
        )?;
        let rows = stmt.query_map(params![source_id, upto, from_day], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get::<_, i64>(3)? as f64, r.get::<_, i64>(4)? as u64))
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The earliest report date known at snapshot `upto`: days before it are unknown to the
    /// count rules, not days without cases. `None` before the source has any.
    pub fn first_report_day(
        &self,
        source_id: SourceId,
        upto: SnapshotId,
    ) -> Result<Option<String>, StoreError> {
        Ok(self.conn.query_row(
            "SELECT min(ref_date) FROM triangle
             WHERE source_id = ?1 AND ref_field = 'report_date' AND stratum_kind = 'all' AND snapshot_id <= ?2",
            params![source_id, upto],
            |r| r.get(0),
        )?)
    }

    /// Daily counts by report date as known at snapshot `upto`, from the reporting triangle:
    /// (stratum kind, stratum, report date, count) for dates on or after `from_day`.
    pub fn report_counts(
        &self,
        source_id: SourceId,
        upto: SnapshotId,
        from_day: &str,
    ) -> Result<Vec<(String, String, String, i64)>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT stratum_kind, stratum, ref_date, sum(delta) FROM triangle
             WHERE source_id = ?1 AND ref_field = 'report_date' AND stratum_kind IN ('all', 'jurisdiction')
               AND snapshot_id <= ?2 AND ref_date >= ?3
             GROUP BY 1, 2, 3 ORDER BY 1, 2, 3",
        )?;
        let rows = stmt.query_map(params![source_id, upto, from_day], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }
}

fn quality_row(r: &rusqlite::Row<'_>) -> rusqlite::Result<QualityRow> {
    Ok(QualityRow {
        snapshot_id: r.get(0)?,
        scope: r.get(1)?,
        stratum_kind: r.get(2)?,
        stratum: r.get(3)?,
        field: r.get(4)?,
        records: r.get(5)?,
        missing: r.get(6)?,
        invalid: r.get(7)?,
        share_missing: r.get(8)?,
        share_invalid: r.get(9)?,
    })
}
