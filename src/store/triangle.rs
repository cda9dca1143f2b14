//! The reporting triangle and analysis results in SQL. `record_deltas` turns one applied
//! snapshot's diff (versions opened and closed by it) into net count changes per reference
//! date and stratum, inside the snapshot's own transaction; readers rebuild any triangle as
//! of any day from those deltas. Nowcasts, delay fits and backtests are stored keyed by the
//! snapshot they were computed from.

use std::collections::HashMap;

use chrono::NaiveDate;
use rusqlite::types::ValueRef;
use rusqlite::{Connection, params};

use super::read::stratum_sql;
use super::{Reader, Store, StoreError};
use crate::analysis::backtest::BacktestCell;
use crate::analysis::delay::DelayFit;
use crate::analysis::nowcast::NowcastRow;
pub use crate::config::TriangleSpec;
use crate::model::{Field, SnapshotId, SourceId};

/// A stored nowcast's key: (ref_field, stratum_kind, stratum, method).
pub type NowcastKey = (String, String, String, String);

/// Stratum label of records without a value in the stratum's field.
pub const MISSING_STRATUM: &str = "(missing)";

impl TriangleSpec {
    /// ("all", SQL) plus one (kind, SQL) per stratum field.
    fn kinds(&self) -> Vec<(&'static str, String)> {
        let mut kinds = vec![("all", "''".to_string())];
        kinds.extend(self.strata.iter().map(|f| (f.name(), stratum_sql(*f, &self.age_edges))));
        kinds
    }
}

/// Delay observations read from the store: the two dates, the records' stratum label, and
/// how many records share all three.
#[derive(Debug, Clone, PartialEq)]
pub struct DelayRow {
    pub from: NaiveDate,
    pub to: NaiveDate,
    pub stratum: String,
    pub count: u64,
}

/// Records the triangle deltas of snapshot `snapshot_id` (its versions opened and closed):
/// per reference field, stratum kind, reference date and stratum, the number of versions
/// it opened minus the number it closed, where that is not zero. The versions are read in
/// one pass per side and summed here; the strata are computed by the same SQL expressions
/// as everywhere else. (Eight `GROUP BY` queries over a 1,000,000-row first snapshot took
/// about 12 s; this takes under one.)
pub(super) fn record_deltas(
    conn: &Connection,
    source_id: SourceId,
    snapshot_id: SnapshotId,
    spec: &TriangleSpec,
) -> rusqlite::Result<usize> {
    let kinds = spec.kinds();
    let refs = spec.ref_fields.len();
    if refs == 0 {
        return Ok(0);
    }
    let columns: Vec<String> = spec
        .ref_fields
        .iter()
        .map(|f| f.name().to_string())
        .chain(kinds.iter().map(|(_, sql)| sql.clone()))
        .collect();
    let mut texts = Texts::default();
    // Net change per (reference field, stratum kind), by (reference date, stratum) text ids.
    let mut sums: Vec<HashMap<(u32, u32), i64>> = vec![HashMap::new(); refs * kinds.len()];
    for (sign, side) in [(1i64, "valid_from"), (-1, "valid_to")] {
        let mut stmt = conn.prepare(&format!(
            "SELECT {} FROM case_version WHERE {side} = ?2 AND source_id = ?1",
            columns.join(", ")
        ))?;
        let mut rows = stmt.query((source_id, snapshot_id))?;
        let mut strata = vec![0u32; kinds.len()];
        while let Some(row) = rows.next()? {
            for (k, stratum) in strata.iter_mut().enumerate() {
                *stratum = texts.id(row.get_ref(refs + k)?, refs + k)?;
            }
            for r in 0..refs {
                let date = texts.id(row.get_ref(r)?, r)?;
                if date == Texts::NULL {
                    continue;
                }
                for (k, &stratum) in strata.iter().enumerate() {
                    *sums[r * kinds.len() + k].entry((date, stratum)).or_default() += sign;
                }
            }
        }
    }
    let day: String = conn.query_row(
        "SELECT substr(as_of, 1, 10) FROM snapshot WHERE snapshot_id = ?1",
        [snapshot_id],
        |row| row.get(0),
    )?;
    let mut insert = conn.prepare(
        "INSERT OR REPLACE INTO triangle
             (source_id, ref_field, stratum_kind, stratum, ref_date, snapshot_id, snapshot_day, delta)
         VALUES (?1, ?2, ?3, coalesce(?4, ?5), ?6, ?7, ?8, ?9)",
    )?;
    let mut written = 0;
    for (r, field) in spec.ref_fields.iter().enumerate() {
        for (k, (kind, _)) in kinds.iter().enumerate() {
            // In the order of a GROUP BY (reference date, then stratum with NULL first), so
            // that a stratum literally named like MISSING_STRATUM replaces the NULL one as
            // INSERT OR REPLACE did before.
            let mut groups: Vec<Group<'_>> = sums[r * kinds.len() + k]
                .iter()
                .filter(|(_, sum)| **sum != 0)
                .map(|(&(date, stratum), &sum)| {
                    (texts.text(date).unwrap_or_default(), texts.text(stratum), sum)
                })
                .collect();
            groups.sort_unstable();
            for (date, stratum, sum) in groups {
                let text = |bytes: &[u8]| String::from_utf8_lossy(bytes).into_owned();
                written += insert.execute(params![
                    source_id,
                    field.name(),
                    kind,
                    stratum.map(text),
                    MISSING_STRATUM,
                    text(date),
                    snapshot_id,
                    day,
                    sum
                ])?;
            }
        }
    }
    Ok(written)
}

/// One triangle cell of `record_deltas`: reference date, stratum (NULL: none), net change.
type Group<'t> = (&'t [u8], Option<&'t [u8]>, i64);

/// One pair's sums as delay rows, oldest start first: (start text id, end text id) -> count,
/// or with `first_seen` (start text id, first snapshot id) -> count, the snapshot read as its
/// day. Sums whose dates do not parse are left out, as `delay_rows` leaves them out.
fn counted_rows(
    sum: &HashMap<(u32, i64), u64>,
    first_seen: bool,
    texts: &Texts,
    days: &HashMap<i64, NaiveDate>,
) -> Vec<DelayRow> {
    let date = |id: u32| texts.text(id).and_then(|b| std::str::from_utf8(b).ok()?.parse::<NaiveDate>().ok());
    let mut rows: Vec<DelayRow> = sum
        .iter()
        .filter_map(|(&(start, end), &count)| {
            let to = if first_seen { *days.get(&end)? } else { date(u32::try_from(end).ok()?)? };
            Some(DelayRow { from: date(start)?, to, stratum: String::new(), count })
        })
        .collect();
    rows.sort_unstable_by_key(|r| (r.from, r.to));
    rows
}

/// Distinct texts of one `record_deltas` pass, by small ids (0 is NULL), so that summing a
/// version into every triangle allocates nothing.
#[derive(Debug, Default)]
struct Texts {
    ids: HashMap<Box<[u8]>, u32>,
    texts: Vec<Box<[u8]>>,
}

impl Texts {
    const NULL: u32 = 0;

    fn id(&mut self, value: ValueRef<'_>, column: usize) -> rusqlite::Result<u32> {
        let bytes = match value {
            ValueRef::Null => return Ok(Texts::NULL),
            ValueRef::Text(bytes) => bytes,
            // Reference dates and strata are TEXT columns or text expressions.
            other => {
                return Err(rusqlite::Error::InvalidColumnType(column, String::new(), other.data_type()));
            }
        };
        if let Some(&id) = self.ids.get(bytes) {
            return Ok(id);
        }
        self.texts.push(bytes.into());
        let id = self.texts.len() as u32;
        self.ids.insert(bytes.into(), id);
        Ok(id)
    }

    fn text(&self, id: u32) -> Option<&[u8]> {
        (id != Texts::NULL).then(|| &*self.texts[id as usize - 1])
    }
}

impl Store {
    /// Recomputes a source's triangle from its version history (after a config change, or
    /// for a store written before triangles existed), one applied snapshot at a time.
    pub fn rebuild_triangle(
        &mut self,
        source_id: SourceId,
        spec: &TriangleSpec,
    ) -> Result<usize, StoreError> {
        let tx = self.conn.transaction()?;
        tx.execute("DELETE FROM triangle WHERE source_id = ?1", [source_id])?;
        let ids: Vec<SnapshotId> = {
            let mut stmt = tx.prepare(
                "SELECT snapshot_id FROM snapshot WHERE source_id = ?1 AND status = 'applied' ORDER BY snapshot_id",
            )?;
            let rows = stmt.query_map([source_id], |r| r.get(0))?;
            rows.collect::<Result<_, _>>()?
        };
        let mut written = 0;
        for id in ids {
            written += record_deltas(&tx, source_id, id, spec)?;
        }
        tx.commit()?;
        Ok(written)
    }

    /// Stores the nowcasts computed from `snapshot_id` in one transaction, each replacing an
    /// earlier one of the same key `(ref_field, stratum_kind, stratum, method)`.
    pub fn write_nowcasts(
        &mut self,
        snapshot_id: SnapshotId,
        source_id: SourceId,
        nowcasts: &[(NowcastKey, Vec<NowcastRow>)],
    ) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        {
            let mut delete = tx.prepare(
                "DELETE FROM nowcast WHERE snapshot_id = ?1 AND ref_field = ?2 AND stratum_kind = ?3
                 AND stratum = ?4 AND method = ?5",
            )?;
            let mut insert = tx.prepare(
                "INSERT INTO nowcast VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15,
                 ?16, ?17, ?18)",
            )?;
            for ((ref_field, kind, stratum, method), rows) in nowcasts {
                delete.execute(params![snapshot_id, ref_field, kind, stratum, method])?;
                for r in rows {
                    insert.execute(params![
                        snapshot_id,
                        source_id,
                        ref_field,
                        kind,
                        stratum,
                        method,
                        r.date.to_string(),
                        r.horizon as i64,
                        r.observed,
                        r.median,
                        r.mean,
                        r.lower50,
                        r.upper50,
                        r.lower90,
                        r.upper90,
                        r.lower95,
                        r.upper95,
                        r.completeness
                    ])?;
                }
            }
        }
        tx.commit()?;
        Ok(())
    }

    /// Stores the delay fits of one (from, to, stratum kind, stratum) computed at
    /// `snapshot_id`, ranked by AIC in the order given.
    pub fn write_delay_fits(
        &mut self,
        snapshot_id: SnapshotId,
        source_id: SourceId,
        (from, to, kind, stratum): (&str, &str, &str, &str),
        fits: &[DelayFit],
    ) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        tx.execute(
            "DELETE FROM delay_fit WHERE snapshot_id = ?1 AND from_field = ?2 AND to_field = ?3
             AND stratum_kind = ?4 AND stratum = ?5",
            params![snapshot_id, from, to, kind, stratum],
        )?;
        {
            let mut stmt = tx.prepare(
                "INSERT INTO delay_fit (snapshot_id, source_id, from_field, to_field, stratum_kind, stratum,
                     family, n, param1, param2, log_likelihood, aic, rank, mean, mean_lo, mean_hi, median,
                     median_lo, median_hi, p95, p95_lo, p95_hi, identifiable, warnings)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19,
                     ?20, ?21, ?22, ?23, ?24)",
            )?;
            let finite = |x: f64| x.is_finite().then_some(x);
            for (rank, f) in fits.iter().enumerate() {
                let lo =
                    |i: &Option<crate::analysis::delay::Interval>| i.as_ref().and_then(|i| finite(i.lower));
                let hi =
                    |i: &Option<crate::analysis::delay::Interval>| i.as_ref().and_then(|i| finite(i.upper));
                stmt.execute(params![
                    snapshot_id,
                    source_id,
                    from,
                    to,
                    kind,
                    stratum,
                    f.family.name(),
                    f.n as i64,
                    finite(f.params[0]),
                    finite(f.params[1]),
                    finite(f.log_likelihood),
                    finite(f.aic),
                    rank as i64 + 1,
                    finite(f.mean),
                    lo(&f.mean_interval),
                    hi(&f.mean_interval),
                    finite(f.median),
                    lo(&f.median_interval),
                    hi(&f.median_interval),
                    finite(f.p95),
                    lo(&f.p95_interval),
                    hi(&f.p95_interval),
                    f.identifiable,
                    (!f.warnings.is_empty()).then(|| f.warnings.join("; ")),
                ])?;
            }
        }
        tx.commit()?;
        Ok(())
    }

    /// Stores a backtest computed at `snapshot_id`, replacing an earlier one of that field.
    pub fn write_backtest(
        &mut self,
        snapshot_id: SnapshotId,
        source_id: SourceId,
        ref_field: &str,
        cells: &[BacktestCell],
        (from, to, lag): (NaiveDate, NaiveDate, usize),
    ) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        tx.execute(
            "DELETE FROM backtest WHERE snapshot_id = ?1 AND ref_field = ?2",
            params![snapshot_id, ref_field],
        )?;
        {
            let mut stmt = tx.prepare(
                "INSERT INTO backtest (snapshot_id, source_id, ref_field, method, horizon, n, coverage50,
                     coverage90, coverage95, wis, rel_error, from_day, to_day, lag_days)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14)",
            )?;
            for c in cells {
                let rel_error = c.rel_error.is_finite().then_some(c.rel_error);
                stmt.execute(params![
                    snapshot_id,
                    source_id,
                    ref_field,
                    c.method,
                    c.horizon as i64,
                    c.n as i64,
                    c.coverage50,
                    c.coverage90,
                    c.coverage95,
                    c.wis,
                    rel_error,
                    from.to_string(),
                    to.to_string(),
                    lag as i64
                ])?;
            }
        }
        tx.commit()?;
        Ok(())
    }
}

impl Reader {
    /// `(reference date, snapshot day, net change)` of one triangle, for reference dates from
    /// `from_ref` and the snapshots up to `until_snapshot` (the triangle as known then).
    pub fn triangle_deltas(
        &self,
        source_id: SourceId,
        ref_field: Field,
        kind: &str,
        stratum: &str,
        from_ref: NaiveDate,
        until_snapshot: SnapshotId,
    ) -> Result<Vec<(NaiveDate, NaiveDate, f64)>, StoreError> {
        let mut stmt = self.conn.prepare_cached(
            "SELECT ref_date, snapshot_day, sum(delta) FROM triangle
             WHERE source_id = ?1 AND ref_field = ?2 AND stratum_kind = ?3 AND stratum = ?4
               AND ref_date >= ?5 AND snapshot_id <= ?6
             GROUP BY ref_date, snapshot_day",
        )?;
        let rows = stmt.query_map(
            params![source_id, ref_field.name(), kind, stratum, from_ref.to_string(), until_snapshot],
            |r| Ok((r.get::<_, String>(0)?, r.get::<_, String>(1)?, r.get::<_, f64>(2)?)),
        )?;
        let mut out = Vec::new();
        for row in rows {
            let (reference, day, delta) = row?;
            if let (Ok(reference), Ok(day)) = (reference.parse(), day.parse()) {
                out.push((reference, day, delta));
            }
        }
        Ok(out)
    }

    /// The strata of one kind that have any count in a source's triangle.
    pub fn triangle_strata(
        &self,
        source_id: SourceId,
        ref_field: Field,
        kind: &str,
    ) -> Result<Vec<String>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT DISTINCT stratum FROM triangle WHERE source_id = ?1 AND ref_field = ?2 AND stratum_kind = ?3
             ORDER BY stratum",
        )?;
        let rows = stmt.query_map(params![source_id, ref_field.name(), kind], |r| r.get(0))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// Whether a source has triangle rows at all.
    pub fn has_triangle(&self, source_id: SourceId) -> Result<bool, StoreError> {
        Ok(self.conn.query_row(
            "SELECT EXISTS (SELECT 1 FROM triangle WHERE source_id = ?1)",
            [source_id],
            |r| r.get(0),
        )?)
    }

    /// Delay observations from the records valid at `snapshot_id`, counted per distinct
    /// (start, end, stratum): both dates present. `to = None` means the day each record
    /// first appeared in the store.
    pub fn delay_rows(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        from: Field,
        to: Option<Field>,
        stratum: Option<Field>,
        age_edges: &[u32],
    ) -> Result<Vec<DelayRow>, StoreError> {
        let stratum_sql = stratum.map(|f| stratum_sql(f, age_edges)).unwrap_or_else(|| "''".into());
        let from_sql = from.name();
        // The day a record first appeared is its first version's snapshot day:
        // `coalesce(first_seen, valid_from)` (migration 0006). Records are counted per
        // (start, end, stratum) in SQL: a million records come back as a few thousand rows.
        let (end_key, end_day) = match to {
            Some(field) => (format!("v.{}", field.name()), "g.end_key".to_string()),
            None => (
                "coalesce(v.first_seen, v.valid_from)".to_string(),
                "(SELECT substr(n.as_of, 1, 10) FROM snapshot n WHERE n.snapshot_id = g.end_key)".to_string(),
            ),
        };
        let mut stmt = self.conn.prepare(&format!(
            "SELECT g.start_day, {end_day}, g.stratum, g.n FROM (
                 SELECT w.start_day, w.end_key, w.stratum, count(*) AS n FROM (
                     SELECT v.{from_sql} AS start_day, v.valid_to, {end_key} AS end_key,
                            coalesce({stratum_sql}, '{MISSING_STRATUM}') AS stratum
                     FROM case_version v
                     WHERE v.source_id = ?1 AND v.valid_from <= ?2
                 ) w
                 WHERE (w.valid_to IS NULL OR w.valid_to > ?2) AND w.start_day IS NOT NULL
                   AND w.end_key IS NOT NULL
                 GROUP BY 1, 2, 3
             ) g"
        ))?;
        let rows = stmt.query_map((source_id, snapshot_id), |r| {
            Ok((
                r.get::<_, String>(0)?,
                r.get::<_, Option<String>>(1)?,
                r.get::<_, String>(2)?,
                r.get::<_, i64>(3)?,
            ))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let (from, to, stratum, count) = row?;
            if let (Ok(from), Some(Ok(to))) = (from.parse(), to.map(|t| t.parse())) {
                out.push(DelayRow { from, to, stratum, count: count as u64 });
            }
        }
        Ok(out)
    }

    /// Whole-source delay counts of several (start field, end) pairs from one scan of the
    /// records valid at `snapshot_id`: for each pair, the same rows `delay_rows` gives
    /// without a stratum. One pass instead of one per pair; the counts are summed here
    /// rather than by `GROUP BY`, which sorts every record.
    pub fn delay_rows_of_pairs(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        pairs: &[(Field, Option<Field>)],
    ) -> Result<Vec<Vec<DelayRow>>, StoreError> {
        if pairs.is_empty() {
            return Ok(Vec::new());
        }
        let mut columns: Vec<Field> = Vec::new();
        let mut column_of = |field: Field| match columns.iter().position(|c| *c == field) {
            Some(at) => at,
            None => {
                columns.push(field);
                columns.len() - 1
            }
        };
        // Per pair: the start column and the end column (None: first seen, the last column).
        let plan: Vec<(usize, Option<usize>)> =
            pairs.iter().map(|(from, to)| (column_of(*from), to.map(&mut column_of))).collect();
        let first_seen = plan.iter().any(|(_, end)| end.is_none());
        let names: Vec<String> = columns.iter().map(|f| format!("v.{}", f.name())).collect();
        let first = if first_seen { ", coalesce(v.first_seen, v.valid_from)" } else { "" };
        let mut stmt = self.conn.prepare(&format!(
            "SELECT * FROM (
                 SELECT v.valid_to, {}{first} FROM case_version v WHERE v.source_id = ?1 AND v.valid_from <= ?2
             ) WHERE valid_to IS NULL OR valid_to > ?2",
            names.join(", ")
        ))?;
        let mut texts = Texts::default();
        // Per pair: (start text id, end text id or first snapshot id) -> records.
        let mut sums: Vec<HashMap<(u32, i64), u64>> = vec![HashMap::new(); pairs.len()];
        let mut rows = stmt.query((source_id, snapshot_id))?;
        let mut ids = vec![0u32; columns.len()];
        while let Some(row) = rows.next()? {
            for (c, id) in ids.iter_mut().enumerate() {
                *id = texts.id(row.get_ref(1 + c)?, 1 + c)?;
            }
            let first = if first_seen { row.get::<_, i64>(1 + columns.len())? } else { 0 };
            for ((start, end), sum) in plan.iter().zip(sums.iter_mut()) {
                let end = match end {
                    Some(c) => i64::from(ids[*c]),
                    None => first,
                };
                if ids[*start] != Texts::NULL && end != 0 {
                    *sum.entry((ids[*start], end)).or_default() += 1;
                }
            }
        }
        let days = if first_seen { self.snapshot_days(source_id)? } else { HashMap::new() };
        Ok(plan
            .iter()
            .zip(sums)
            .map(|((_, end), sum)| counted_rows(&sum, end.is_none(), &texts, &days))
            .collect())
    }

    /// The as-of day of every snapshot of a source, by id.
    fn snapshot_days(&self, source_id: SourceId) -> Result<HashMap<i64, NaiveDate>, StoreError> {
        let mut stmt = self
            .conn
            .prepare("SELECT snapshot_id, substr(as_of, 1, 10) FROM snapshot WHERE source_id = ?1")?;
        let rows = stmt.query_map([source_id], |r| Ok((r.get::<_, i64>(0)?, r.get::<_, String>(1)?)))?;
        let mut days = HashMap::new();
        for row in rows {
            let (id, day) = row?;
            if let Ok(day) = day.parse() {
                days.insert(id, day);
            }
        }
        Ok(days)
    }

    /// A stored nowcast.
    pub fn nowcast(
        &self,
        snapshot_id: SnapshotId,
        key: (&str, &str, &str, &str),
    ) -> Result<Vec<NowcastRow>, StoreError> {
        let (ref_field, kind, stratum, method) = key;
        let mut stmt = self.conn.prepare(
            "SELECT ref_date, horizon, observed, median, mean, lower50, upper50, lower90, upper90, lower95,
                    upper95, completeness
             FROM nowcast WHERE snapshot_id = ?1 AND ref_field = ?2 AND stratum_kind = ?3 AND stratum = ?4
               AND method = ?5 ORDER BY ref_date",
        )?;
        let rows =
            stmt.query_map(params![snapshot_id, ref_field, kind, stratum, method], |r| nowcast_row(r, 0))?;
        Ok(rows.collect::<Result<_, _>>()?)
    }
}

/// A nowcast row from the twelve columns `ref_date, horizon, observed, median, mean, lower50,
/// upper50, lower90, upper90, lower95, upper95, completeness` starting at column `at`.
pub(super) fn nowcast_row(r: &rusqlite::Row<'_>, at: usize) -> rusqlite::Result<NowcastRow> {
    Ok(NowcastRow {
        date: r.get::<_, String>(at)?.parse().unwrap_or_default(),
        horizon: r.get::<_, i64>(at + 1)? as usize,
        observed: r.get(at + 2)?,
        median: r.get(at + 3)?,
        mean: r.get(at + 4)?,
        lower50: r.get(at + 5)?,
        upper50: r.get(at + 6)?,
        lower90: r.get(at + 7)?,
        upper90: r.get(at + 8)?,
        lower95: r.get(at + 9)?,
        upper95: r.get(at + 10)?,
        completeness: r.get(at + 11)?,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The formulation `record_deltas` replaced: one GROUP BY query per reference field and
    /// stratum kind. The test oracle.
    fn record_deltas_grouped(
        conn: &Connection,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        spec: &TriangleSpec,
    ) -> usize {
        let mut written = 0;
        for field in &spec.ref_fields {
            let column = field.name();
            for (kind, stratum) in spec.kinds() {
                written += conn
                    .execute(
                        &format!(
                            "INSERT OR REPLACE INTO triangle
                                 (source_id, ref_field, stratum_kind, stratum, ref_date, snapshot_id, snapshot_day, delta)
                             SELECT ?1, '{column}', '{kind}', coalesce(stratum, '{MISSING_STRATUM}'), ref, ?2,
                                    (SELECT substr(as_of, 1, 10) FROM snapshot WHERE snapshot_id = ?2), sum(sign)
                             FROM (SELECT {column} AS ref, {stratum} AS stratum, 1 AS sign FROM case_version
                                   WHERE valid_from = ?2 AND source_id = ?1 AND {column} IS NOT NULL
                                   UNION ALL
                                   SELECT {column}, {stratum}, -1 FROM case_version
                                   WHERE valid_to = ?2 AND source_id = ?1 AND {column} IS NOT NULL)
                             GROUP BY ref, stratum HAVING sum(sign) <> 0"
                        ),
                        (source_id, snapshot_id),
                    )
                    .unwrap();
            }
        }
        written
    }

    fn triangle(conn: &Connection) -> Vec<(String, String, String, String, i64, i64)> {
        let mut stmt = conn
            .prepare(
                "SELECT ref_field, stratum_kind, stratum, ref_date, snapshot_id, delta FROM triangle
                 ORDER BY 1, 2, 3, 4, 5",
            )
            .unwrap();
        let rows = stmt
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?, r.get(5)?)))
            .unwrap();
        rows.collect::<Result<_, _>>().unwrap()
    }

    #[test]
    fn one_pass_deltas_equal_the_grouped_queries() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(&dir.path().join("t.db")).unwrap();
        let conn = &store.conn;
        conn.execute_batch(
            "BEGIN;
             INSERT INTO source (source_id, name, kind, config_hash) VALUES (1, 'a', 'folder', ''), (2, 'b', 'folder', '');
             INSERT INTO snapshot (snapshot_id, source_id, seq, as_of, received_at, origin, sha256, bytes, extract_kind, status)
             VALUES (1, 1, 1, '2026-03-01T23:59:59Z', '', '', 'x', 0, 'full', 'applied'),
                    (2, 1, 2, '2026-03-02T23:59:59Z', '', '', 'y', 0, 'full', 'applied'),
                    (3, 2, 1, '2026-03-02T23:59:59Z', '', '', 'z', 0, 'full', 'applied');",
        )
        .unwrap();
        let juris = [Some("North"), Some("South"), None, Some(MISSING_STRATUM), Some("")];
        let sexes = [Some("female"), Some("male"), None];
        let mut insert = conn
            .prepare(
                "INSERT INTO case_version (source_id, case_key, valid_from, valid_to, row_hash, onset_date,
                     report_date, jurisdiction, sex, age_lo)
                 VALUES (?1, ?2, ?3, ?4, 0, ?5, ?6, ?7, ?8, ?9)",
            )
            .unwrap();
        for n in 0..600i64 {
            let (source, from, to) = match n % 6 {
                0 => (1, 1, Some(2)),
                1 | 2 => (1, 2, None),
                3 => (1, 1, None),
                4 => (2, 3, None),
                _ => (1, 2, None),
            };
            let onset = (n % 7 != 0).then(|| format!("2026-02-{:02}", 1 + n % 27));
            let report = (n % 11 != 0).then(|| format!("2026-02-{:02}", 2 + n % 26));
            let age = (n % 5 != 0).then_some((n * 7 % 97) as f64);
            insert
                .execute(params![
                    source,
                    format!("K{n}"),
                    from,
                    to,
                    onset,
                    report,
                    juris[n as usize % juris.len()],
                    sexes[n as usize % sexes.len()],
                    age
                ])
                .unwrap();
        }
        drop(insert);
        conn.execute_batch("COMMIT").unwrap();
        let spec = TriangleSpec {
            ref_fields: vec![Field::OnsetDate, Field::ReportDate],
            strata: vec![Field::Jurisdiction, Field::Age, Field::Sex],
            age_edges: crate::config::AGE_BAND_EDGES.to_vec(),
        };
        let mut expected = Vec::new();
        let mut got = Vec::new();
        for snapshot in [1, 2, 3] {
            let source = if snapshot == 3 { 2 } else { 1 };
            conn.execute("DELETE FROM triangle", []).unwrap();
            let n_expected = record_deltas_grouped(conn, SourceId(source), SnapshotId(snapshot), &spec);
            expected.push((n_expected, triangle(conn)));
            conn.execute("DELETE FROM triangle", []).unwrap();
            let n_got = record_deltas(conn, SourceId(source), SnapshotId(snapshot), &spec).unwrap();
            got.push((n_got, triangle(conn)));
        }
        assert!(expected.iter().all(|(n, rows)| *n > 0 && !rows.is_empty()));
        assert_eq!(got, expected);
    }
}
