//! Nowcast scores in SQL: the stored nowcasts whose truth has matured by a snapshot (with
//! that truth, read from the triangle as known then), the scored rows, and the rolling
//! scores that drive `auto` (only those matured by the snapshot asked about). The scoring
//! itself is `analysis::scoring`.

use chrono::NaiveDate;
use rusqlite::params;

use super::triangle::nowcast_row;
use super::{Reader, Store, StoreError};
use crate::analysis::nowcast::NowcastRow;
use crate::analysis::scoring::{self, AUTO_HORIZONS, AutoChoice, MethodScore, RowScore};
use crate::model::{NowcastMethod, SnapshotId, SourceId};
use crate::table::Table;

/// Which nowcast series: reference field, stratum kind (`all` for the whole source), stratum.
pub type SeriesKey<'a> = (&'a str, &'a str, &'a str);

/// A stored nowcast row whose truth has matured, with that truth.
#[derive(Debug, Clone, PartialEq)]
pub struct MaturedNowcast {
    pub ref_field: String,
    pub stratum_kind: String,
    pub stratum: String,
    pub method: NowcastMethod,
    pub forecast_snapshot_id: SnapshotId,
    pub forecast_day: NaiveDate,
    pub row: NowcastRow,
    /// The count known at the scoring snapshot (at most the maximum delay after the date).
    pub truth: f64,
}

/// Forecast days further back than this (before the lag) are never scored late: a store
/// that missed them does not rescan its whole history.
const LATE_SCORING_DAYS: i64 = 60;

impl Reader {
    /// The source's stored nowcasts made at least `lag` days before `snapshot_id`'s day and
    /// not scored yet, with the count known at `snapshot_id` for each (taken at most
    /// `max_delay` days after the reference date, as the nowcast's target is).
    pub fn matured_nowcasts(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        lag: usize,
        max_delay: usize,
    ) -> Result<Vec<MaturedNowcast>, StoreError> {
        let Some(day) = self.snapshot_day(snapshot_id)? else { return Ok(Vec::new()) };
        let newest = day - chrono::Days::new(lag as u64);
        let oldest = newest - chrono::Days::new(LATE_SCORING_DAYS as u64);
        let mut stmt = self.conn.prepare(
            "SELECT w.ref_field, w.stratum_kind, w.stratum, w.method, w.snapshot_id, substr(f.as_of, 1, 10),
                    w.ref_date, w.horizon, w.observed, w.median, w.mean, w.lower50, w.upper50, w.lower90,
                    w.upper90, w.lower95, w.upper95, w.completeness,
                    (SELECT coalesce(sum(t.delta), 0) FROM triangle t
                     WHERE t.source_id = w.source_id AND t.ref_field = w.ref_field
                       AND t.stratum_kind = w.stratum_kind AND t.stratum = w.stratum
                       AND t.ref_date = w.ref_date AND t.snapshot_id <= ?2
                       AND t.snapshot_day <= min(?3, date(w.ref_date, '+' || ?6 || ' days')))
             FROM snapshot f
             JOIN nowcast w ON w.snapshot_id = f.snapshot_id
             WHERE f.source_id = ?1 AND f.status = 'applied' AND f.snapshot_id < ?2
               AND substr(f.as_of, 1, 10) BETWEEN ?4 AND ?5
               AND NOT EXISTS (
                   SELECT 1 FROM nowcast_score c
                   WHERE c.source_id = w.source_id AND c.ref_field = w.ref_field
                     AND c.stratum_kind = w.stratum_kind AND c.stratum = w.stratum AND c.method = w.method
                     AND c.forecast_snapshot_id = w.snapshot_id AND c.ref_date = w.ref_date)",
        )?;
        let rows = stmt.query_map(
            params![
                source_id,
                snapshot_id,
                day.to_string(),
                oldest.to_string(),
                newest.to_string(),
                max_delay as i64
            ],
            |r| {
                Ok(MaturedNowcast {
                    ref_field: r.get(0)?,
                    stratum_kind: r.get(1)?,
                    stratum: r.get(2)?,
                    method: r.get(3)?,
                    forecast_snapshot_id: r.get(4)?,
                    forecast_day: r.get::<_, String>(5)?.parse().unwrap_or_default(),
                    row: nowcast_row(r, 6)?,
                    truth: r.get::<_, f64>(18)?,
                })
            },
        )?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The rolling scores of every method of one series as of `as_of`: the rows scored by
    /// that snapshot (no look-ahead), horizons 0..=`AUTO_HORIZONS`, over the last `window`
    /// forecast days among them.
    pub fn rolling_scores(
        &self,
        source_id: SourceId,
        series: SeriesKey<'_>,
        as_of: SnapshotId,
        window: usize,
    ) -> Result<Vec<MethodScore>, StoreError> {
        let (ref_field, kind, stratum) = series;
        let mut stmt = self.conn.prepare(
            "WITH matured AS (
                 SELECT * FROM nowcast_score
                 WHERE source_id = ?1 AND ref_field = ?2 AND stratum_kind = ?3 AND stratum = ?4
                   AND horizon <= ?5 AND scored_snapshot_id <= ?6),
             recent AS (
                 SELECT * FROM matured
                 WHERE forecast_day > date((SELECT max(forecast_day) FROM matured), '-' || ?7 || ' days'))
             SELECT method, count(*), count(DISTINCT forecast_day), avg(in50), avg(in90), avg(wis), avg(naive_wis)
             FROM recent GROUP BY method ORDER BY method",
        )?;
        let rows = stmt.query_map(
            params![source_id, ref_field, kind, stratum, AUTO_HORIZONS as i64, as_of, window as i64],
            |r| {
                Ok(MethodScore {
                    method: r.get(0)?,
                    cells: r.get::<_, i64>(1)? as usize,
                    forecast_days: r.get::<_, i64>(2)? as usize,
                    coverage50: r.get(3)?,
                    coverage90: r.get(4)?,
                    wis: r.get(5)?,
                    naive_wis: r.get(6)?,
                })
            },
        )?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// The methods with a stored nowcast of one series at a snapshot.
    pub fn stored_methods(
        &self,
        snapshot_id: SnapshotId,
        series: SeriesKey<'_>,
    ) -> Result<Vec<NowcastMethod>, StoreError> {
        let (ref_field, kind, stratum) = series;
        let mut stmt = self.conn.prepare(
            "SELECT DISTINCT method FROM nowcast
             WHERE snapshot_id = ?1 AND ref_field = ?2 AND stratum_kind = ?3 AND stratum = ?4",
        )?;
        let rows = stmt.query_map(params![snapshot_id, ref_field, kind, stratum], |r| r.get(0))?;
        let mut methods: Vec<NowcastMethod> = rows.collect::<Result<_, _>>()?;
        methods.sort();
        Ok(methods)
    }

    /// What `auto` uses for one series as of a snapshot, from the scores matured by then.
    /// `configured` are the methods a nowcast could be computed with when none is stored.
    pub fn auto_method(
        &self,
        source_id: SourceId,
        snapshot_id: SnapshotId,
        series: SeriesKey<'_>,
        window: usize,
        configured: &[NowcastMethod],
    ) -> Result<AutoChoice, StoreError> {
        let mut stored = self.stored_methods(snapshot_id, series)?;
        if stored.is_empty() {
            stored = configured.to_vec();
        }
        let scores = self.rolling_scores(source_id, series, snapshot_id, window)?;
        Ok(scoring::choose(&scores, &stored))
    }

    /// The rolling scores of every series of a source as of a snapshot, per method and
    /// horizon (0..=`max_horizon`), over the last `window` matured forecast days.
    pub fn score_table(
        &self,
        source_id: SourceId,
        ref_field: &str,
        as_of: SnapshotId,
        window: usize,
        max_horizon: usize,
    ) -> Result<Table, StoreError> {
        let sql = "WITH matured AS (
                       SELECT * FROM nowcast_score
                       WHERE source_id = ?1 AND ref_field = ?2 AND scored_snapshot_id <= ?3 AND horizon <= ?5),
                   recent AS (
                       SELECT * FROM matured
                       WHERE forecast_day > date((SELECT max(forecast_day) FROM matured), '-' || ?4 || ' days'))
                   SELECT ref_field, stratum_kind, stratum, method, horizon, count(*) AS n,
                          min(forecast_day) AS from_day, max(forecast_day) AS to_day,
                          round(avg(in50), 3) AS coverage50, round(avg(in90), 3) AS coverage90,
                          round(avg(in95), 3) AS coverage95, round(avg(wis), 3) AS wis,
                          round(avg(naive_wis), 3) AS naive_wis,
                          round(avg(wis) / nullif(avg(naive_wis), 0), 3) AS wis_vs_naive,
                          round(avg(median_error), 3) AS median_error
                   FROM recent
                   GROUP BY stratum_kind, stratum, method, horizon
                   ORDER BY stratum_kind <> 'all', stratum_kind, stratum, method, horizon";
        self.listing(sql, params![source_id, ref_field, as_of, window as i64, max_horizon as i64])
    }
}

impl Store {
    /// Stores the scores of matured nowcasts, scored at `scored` (a snapshot and its day).
    /// A row already scored stays as it was (scores are never rewritten).
    pub fn write_scores(
        &mut self,
        source_id: SourceId,
        scored: (SnapshotId, NaiveDate),
        rows: &[(MaturedNowcast, RowScore)],
    ) -> Result<usize, StoreError> {
        let tx = self.conn.transaction()?;
        let mut written = 0;
        {
            let mut insert = tx.prepare(
                "INSERT OR IGNORE INTO nowcast_score VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11,
                 ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20, ?21)",
            )?;
            for (m, s) in rows {
                written += insert.execute(params![
                    source_id,
                    m.ref_field,
                    m.stratum_kind,
                    m.stratum,
                    m.method,
                    m.forecast_snapshot_id,
                    m.forecast_day.to_string(),
                    m.row.date.to_string(),
                    m.row.horizon as i64,
                    scored.0,
                    scored.1.to_string(),
                    m.truth,
                    m.row.observed,
                    m.row.median,
                    m.row.completeness,
                    s.in50,
                    s.in90,
                    s.in95,
                    s.wis,
                    s.naive_wis,
                    s.median_error,
                ])?;
            }
        }
        tx.commit()?;
        Ok(written)
    }
}
