//! Data shaping for the dashboard's charts: pure functions from what the store returns to
//! the series a chart draws (days of a curve, nowcast points, histogram bins and a fitted
//! curve, lag percentiles per snapshot, missing shares per field and snapshot). No IO, no
//! SVG, no HTML; every function here has unit tests.

use chrono::NaiveDate;

use crate::analysis::delay::{self, Dist};
use crate::analysis::nowcast::NowcastRow;
use crate::model::SnapshotId;
use crate::store::{CurveRow, FirstSeenLag, SnapshotMissing};

/// Longest stretch of days an epidemic curve shows: the most recent ones.
pub const CURVE_DAYS: usize = 120;

/// Most snapshots in the missingness map and the lag trend: the most recent ones.
pub const SNAPSHOT_COLUMNS: usize = 40;

/// A curve's dated counts (oldest first) and the records without a date.
#[derive(Debug, Clone, PartialEq)]
pub struct DayCounts {
    pub days: Vec<(NaiveDate, i64)>,
    pub undated: i64,
}

/// A nowcast's median and 90% prediction interval on one reference date.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NowcastPoint {
    pub date: NaiveDate,
    pub observed: f64,
    pub median: f64,
    pub lower90: f64,
    pub upper90: f64,
    /// The estimate rests mostly on the model (expected completeness under 10%).
    pub low_information: bool,
}

/// Observed whole-day delays in bins 0, 1, ..., `cap - 1` and a last bin for `cap` or more.
#[derive(Debug, Clone, PartialEq)]
pub struct Histogram {
    pub cap: i64,
    /// `counts[d]` for d in 0..cap; `counts[cap]` holds delays of `cap` days or more.
    pub counts: Vec<u64>,
    pub negative: u64,
}

/// Lag percentiles of the records one snapshot brought.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LagPoint {
    pub snapshot_id: SnapshotId,
    pub day: NaiveDate,
    pub n: usize,
    pub median: f64,
    pub p90: f64,
}

/// The whole-source curve (no strata) of the last `max_days` dated days.
pub fn day_counts(rows: &[CurveRow], max_days: usize) -> DayCounts {
    let whole = rows.iter().filter(|r| r.stratum.is_none());
    let mut days: Vec<(NaiveDate, i64)> =
        whole.clone().filter_map(|r| r.date.map(|d| (d, r.count))).collect();
    days.sort();
    let skip = days.len().saturating_sub(max_days);
    let undated = whole.filter(|r| r.date.is_none()).map(|r| r.count).sum();
    DayCounts { days: days.split_off(skip), undated }
}

/// The nowcast's points on or after `from`, oldest first.
pub fn nowcast_points(rows: &[NowcastRow], from: NaiveDate) -> Vec<NowcastPoint> {
    let mut points: Vec<NowcastPoint> = rows
        .iter()
        .filter(|r| r.date >= from)
        .map(|r| NowcastPoint {
            date: r.date,
            observed: r.observed,
            median: r.median,
            lower90: r.lower90,
            upper90: r.upper90,
            low_information: crate::analysis::scoring::low_information(r),
        })
        .collect();
    points.sort_by_key(|p| p.date);
    points
}

/// An upper end for a count axis: a tenth above the largest value, at least 1.
pub fn axis_max(values: impl IntoIterator<Item = f64>) -> f64 {
    let max = values.into_iter().filter(|v| v.is_finite()).fold(0.0f64, f64::max);
    (max * 1.1).max(1.0)
}

/// Where a histogram stops: the 99th percentile of the non-negative delays, between 7 and
/// 60 days, so one extreme delay does not squash the chart.
pub fn histogram_cap(delays: &[i64]) -> i64 {
    let mut kept: Vec<i64> = delays.iter().copied().filter(|d| *d >= 0).collect();
    if kept.is_empty() {
        return 7;
    }
    kept.sort_unstable();
    let idx = ((kept.len() - 1) as f64 * 0.99).round() as usize;
    (kept[idx] + 1).clamp(7, 60)
}

/// Bins the delays; negative ones are counted apart.
pub fn histogram(delays: &[i64], cap: i64) -> Histogram {
    let mut counts = vec![0u64; cap as usize + 1];
    let mut negative = 0;
    for &d in delays {
        if d < 0 {
            negative += 1;
        } else {
            counts[d.min(cap) as usize] += 1;
        }
    }
    Histogram { cap, counts, negative }
}

/// The fitted distribution's expected count in each bin of `hist` for as many delays as the
/// histogram holds (the last bin takes the whole upper tail).
pub fn fitted_counts(dist: &Dist, hist: &Histogram) -> Vec<f64> {
    let n: u64 = hist.counts.iter().sum();
    let mut expected: Vec<f64> = (0..hist.cap).map(|d| n as f64 * dist.daily_pmf(d)).collect();
    expected.push(n as f64 * (1.0 - dist.daily_cdf(hist.cap - 1)).max(0.0));
    expected
}

/// Median and 90th percentile of the non-negative lags of each snapshot's new records, for
/// the last `max_points` snapshots that brought any (oldest first).
pub fn lag_trend(lags: &[FirstSeenLag], max_points: usize) -> Vec<LagPoint> {
    let mut groups: std::collections::BTreeMap<(SnapshotId, NaiveDate), Vec<i64>> = Default::default();
    for lag in lags {
        groups.entry((lag.snapshot_id, lag.day)).or_default().push(lag.lag_days);
    }
    let mut points: Vec<LagPoint> = groups
        .into_iter()
        .filter_map(|((snapshot_id, day), values)| {
            let summary = delay::summarize(&values);
            (summary.n > 0).then_some(LagPoint {
                snapshot_id,
                day,
                n: summary.n,
                median: summary.median,
                p90: summary.p90,
            })
        })
        .collect();
    let skip = points.len().saturating_sub(max_points);
    points.split_off(skip)
}

/// The last `max` of `snapshots` (ids, oldest first) up to and including `selected`.
pub fn snapshot_window(snapshots: &[SnapshotId], selected: SnapshotId, max: usize) -> Vec<SnapshotId> {
    let upto: Vec<SnapshotId> = snapshots.iter().copied().filter(|id| *id <= selected).collect();
    let skip = upto.len().saturating_sub(max);
    upto[skip..].to_vec()
}

/// Share of records missing each field, per snapshot: `shares[snapshot][field]`, `None`
/// when the snapshot had no records.
pub fn missing_shares(rows: &[SnapshotMissing]) -> Vec<Vec<Option<f64>>> {
    rows.iter()
        .map(|row| {
            row.missing.iter().map(|&m| (row.records > 0).then(|| m as f64 / row.records as f64)).collect()
        })
        .collect()
}

/// Heat-map colour of a missing share: white (nothing missing) to dark purple (all
/// missing); grey when there was nothing to count.
pub fn heat_color(share: Option<f64>) -> (u8, u8, u8) {
    let Some(share) = share else { return (200, 200, 200) };
    let t = share.clamp(0.0, 1.0);
    let mix = |from: f64, to: f64| (from + (to - from) * t).round() as u8;
    (mix(255.0, 63.0), mix(255.0, 0.0), mix(255.0, 125.0))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::delay::Family;

    fn date(day: u32) -> NaiveDate {
        NaiveDate::from_ymd_opt(2026, 3, day).unwrap()
    }

    fn row(day: Option<u32>, stratum: Option<&str>, count: i64) -> CurveRow {
        CurveRow { date: day.map(date), stratum: stratum.map(str::to_string), count }
    }

    #[test]
    fn day_counts_keep_the_last_days_and_count_undated_records() {
        let rows = [row(Some(1), None, 2), row(Some(2), None, 0), row(Some(3), None, 5), row(None, None, 4)];
        let counts = day_counts(&rows, 2);
        assert_eq!(counts.days, vec![(date(2), 0), (date(3), 5)]);
        assert_eq!(counts.undated, 4);
        // Stratified rows are not the whole-source curve.
        assert_eq!(day_counts(&[row(Some(1), Some("a"), 3)], 10).days, vec![]);
    }

    #[test]
    fn nowcast_points_start_at_the_first_day_shown() {
        let nowcast_row = |day: u32, median: f64| NowcastRow {
            date: date(day),
            horizon: 0,
            observed: 1.0,
            median,
            mean: median,
            lower50: median,
            upper50: median,
            lower90: median - 1.0,
            upper90: median + 2.0,
            lower95: median - 1.0,
            upper95: median + 2.0,
            completeness: 0.5,
        };
        let points =
            nowcast_points(&[nowcast_row(5, 9.0), nowcast_row(2, 4.0), nowcast_row(1, 3.0)], date(2));
        assert_eq!(points.iter().map(|p| p.date).collect::<Vec<_>>(), vec![date(2), date(5)]);
        assert_eq!((points[1].lower90, points[1].median, points[1].upper90), (8.0, 9.0, 11.0));
    }

    #[test]
    fn axis_max_leaves_headroom_and_is_never_zero() {
        assert_eq!(axis_max([0.0, f64::NAN]), 1.0);
        assert!((axis_max([10.0, 4.0]) - 11.0).abs() < 1e-9);
    }

    #[test]
    fn histogram_bins_delays_with_an_overflow_bin_and_counts_negatives_apart() {
        let hist = histogram(&[-2, 0, 0, 1, 3, 9, 30], 4);
        assert_eq!(hist.counts, vec![2, 1, 0, 1, 2]);
        assert_eq!(hist.negative, 1);
        assert_eq!(histogram_cap(&[]), 7);
        assert_eq!(histogram_cap(&[1, 2, 3]), 7);
        let long: Vec<i64> = (0..200).collect();
        assert_eq!(histogram_cap(&long), 60);
        let mid: Vec<i64> = (0..=20).collect();
        assert_eq!(histogram_cap(&mid), 21);
    }

    #[test]
    fn fitted_counts_sum_to_the_histogram_total() {
        // Gamma with shape 2 and rate 0.5 (mean 4 days): expected counts per bin, with the
        // upper tail in the last bin, must add up to the observations.
        let dist = Dist::new(Family::Gamma, [2.0, 0.5]).unwrap();
        let hist = histogram(&[0, 1, 2, 3, 4, 5, 6, 12, 20, 3], 10);
        let expected = fitted_counts(&dist, &hist);
        assert_eq!(expected.len(), hist.counts.len());
        let total: f64 = expected.iter().sum();
        assert!((total - 10.0).abs() < 1e-6, "total {total}");
        // The mode of a gamma(2, 0.5) is at 2 days, so bins 1-3 beat bin 0 and bin 9.
        assert!(expected[2] > expected[0] && expected[2] > expected[9]);
    }

    #[test]
    fn lag_trend_groups_by_snapshot_and_keeps_the_last_ones() {
        let lag = |snapshot_id: i64, day: u32, lag_days: i64| FirstSeenLag {
            snapshot_id: SnapshotId(snapshot_id),
            day: date(day),
            lag_days,
        };
        let lags = [lag(1, 1, 2), lag(1, 1, 4), lag(1, 1, -1), lag(2, 2, 10), lag(3, 3, -5)];
        let trend = lag_trend(&lags, 10);
        // Snapshot 3 brought only a negative lag: no point.
        assert_eq!(trend.len(), 2);
        assert_eq!((trend[0].snapshot_id, trend[0].n, trend[0].median), (SnapshotId(1), 2, 3.0));
        assert!((trend[0].p90 - 3.8).abs() < 1e-9, "type-7 p90 of [2, 4]");
        assert_eq!(lag_trend(&lags, 1).iter().map(|p| p.snapshot_id.0).collect::<Vec<_>>(), vec![2]);
    }

    #[test]
    fn snapshot_window_ends_at_the_selected_snapshot() {
        let window = |ids: &[i64], selected: i64, max: usize| -> Vec<i64> {
            let ids: Vec<SnapshotId> = ids.iter().map(|&id| SnapshotId(id)).collect();
            snapshot_window(&ids, SnapshotId(selected), max).into_iter().map(|id| id.0).collect()
        };
        assert_eq!(window(&[1, 3, 5, 7, 9], 7, 2), vec![5, 7]);
        assert_eq!(window(&[1, 3], 9, 5), vec![1, 3]);
        assert_eq!(window(&[4, 5], 2, 5), Vec::<i64>::new());
    }

    #[test]
    fn missing_shares_and_their_colours() {
        let rows = [
            SnapshotMissing {
                snapshot_id: SnapshotId(1),
                as_of: "a".into(),
                records: 4,
                missing: vec![0, 1, 4],
            },
            SnapshotMissing {
                snapshot_id: SnapshotId(2),
                as_of: "b".into(),
                records: 0,
                missing: vec![0, 0, 0],
            },
        ];
        let shares = missing_shares(&rows);
        assert_eq!(shares[0], vec![Some(0.0), Some(0.25), Some(1.0)]);
        assert_eq!(shares[1], vec![None, None, None]);
        assert_eq!(heat_color(Some(0.0)), (255, 255, 255));
        assert_eq!(heat_color(Some(1.0)), (63, 0, 125));
        assert_eq!(heat_color(None), (200, 200, 200));
    }
}
