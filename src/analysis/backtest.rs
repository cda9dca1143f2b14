//! Backtesting nowcasts: nowcast each past snapshot day with only the data known then, and
//! score it against the count known `lag` days later. Scores by horizon (days back from the
//! snapshot day): coverage of the 50/90/95% intervals, weighted interval score (Bracher et
//! al. 2021) and mean relative error of the median. The naive forecast "the count observed
//! so far" is scored alongside as a point forecast (its WIS is its absolute error).

use std::collections::BTreeMap;

use chrono::NaiveDate;

use super::nowcast::{Nowcast, NowcastRow};
use super::score::{covered, wis_of_row};
use super::triangle::Triangle;

/// Name of the naive method in backtest results.
pub const NAIVE: &str = "naive";

/// Scores of one method at one horizon.
#[derive(Debug, Clone, PartialEq)]
pub struct BacktestCell {
    pub method: String,
    pub horizon: usize,
    pub n: usize,
    pub coverage50: f64,
    pub coverage90: f64,
    pub coverage95: f64,
    pub wis: f64,
    /// Mean of (median - truth) / truth over cells with a positive truth.
    pub rel_error: f64,
}

/// The truth for reference row t of a nowcast made on `day`: the count known `lag` days
/// later (at most the maximum delay), if the latest triangle reaches that far.
pub fn truth(latest: &Triangle, t: usize, day: NaiveDate, lag: usize) -> Option<f64> {
    let reference = latest.date(t);
    let delay = ((day - reference).num_days() + lag as i64).max(0) as usize;
    let delay = delay.min(latest.max_delay);
    latest.cumulative.get(t)?.get(delay).copied()
}

/// The naive nowcast row: the observed count as median and every interval bound.
pub fn naive_row(row: &NowcastRow) -> NowcastRow {
    let x = row.observed;
    NowcastRow {
        median: x,
        mean: x,
        lower50: x,
        upper50: x,
        lower90: x,
        upper90: x,
        lower95: x,
        upper95: x,
        completeness: 1.0,
        ..row.clone()
    }
}

#[derive(Default)]
struct Tally {
    n: usize,
    in50: usize,
    in90: usize,
    in95: usize,
    wis: f64,
    rel: f64,
    rel_n: usize,
}

impl Tally {
    fn add(&mut self, row: &NowcastRow, y: f64) {
        self.n += 1;
        self.in50 += covered(row.lower50, row.upper50, y) as usize;
        self.in90 += covered(row.lower90, row.upper90, y) as usize;
        self.in95 += covered(row.lower95, row.upper95, y) as usize;
        self.wis += wis_of_row(row, y);
        if y > 0.0 {
            self.rel += (row.median - y) / y;
            self.rel_n += 1;
        }
    }

    fn cell(&self, method: &str, horizon: usize) -> BacktestCell {
        let share = |k: usize| k as f64 / self.n.max(1) as f64;
        BacktestCell {
            method: method.to_string(),
            horizon,
            n: self.n,
            coverage50: share(self.in50),
            coverage90: share(self.in90),
            coverage95: share(self.in95),
            wis: self.wis / self.n.max(1) as f64,
            rel_error: if self.rel_n > 0 { self.rel / self.rel_n as f64 } else { f64::NAN },
        }
    }
}

/// Scores nowcasts made on past days. `nowcasts` are (snapshot day, nowcast made then);
/// rows beyond `max_horizon`, or whose truth is not yet known, are left out. The naive
/// forecast is scored once on every cell that any method was scored on.
pub fn score(
    nowcasts: &[(NaiveDate, Nowcast)],
    latest: &Triangle,
    lag: usize,
    max_horizon: usize,
) -> Vec<BacktestCell> {
    let mut tallies: BTreeMap<(String, usize), Tally> = BTreeMap::new();
    let mut naive_done = std::collections::BTreeSet::new();
    for (day, nowcast) in nowcasts {
        for row in nowcast.rows.iter().filter(|r| r.horizon <= max_horizon) {
            let t = (row.date - latest.first_date).num_days();
            let Some(y) = usize::try_from(t).ok().and_then(|t| truth(latest, t, *day, lag)) else { continue };
            tallies.entry((nowcast.method.to_string(), row.horizon)).or_default().add(row, y);
            if naive_done.insert((*day, row.date)) {
                tallies.entry((NAIVE.to_string(), row.horizon)).or_default().add(&naive_row(row), y);
            }
        }
    }
    tallies.into_iter().map(|((method, horizon), tally)| tally.cell(&method, horizon)).collect()
}

/// Mean WIS of a method over horizons `0..=max_horizon` (equal weight per horizon).
pub fn mean_wis(cells: &[BacktestCell], method: &str, max_horizon: usize) -> Option<f64> {
    let values: Vec<f64> = cells
        .iter()
        .filter(|c| c.method == method && c.horizon <= max_horizon && c.n > 0)
        .map(|c| c.wis)
        .collect();
    (!values.is_empty()).then(|| values.iter().sum::<f64>() / values.len() as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::Days;

    fn row(date: NaiveDate, horizon: usize, observed: f64, band: (f64, f64)) -> NowcastRow {
        NowcastRow {
            date,
            horizon,
            observed,
            median: (band.0 + band.1) / 2.0,
            mean: (band.0 + band.1) / 2.0,
            lower50: band.0,
            upper50: band.1,
            lower90: band.0,
            upper90: band.1,
            lower95: band.0,
            upper95: band.1,
            completeness: 0.5,
        }
    }

    #[test]
    fn scores_against_the_count_known_later() {
        let start = NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
        // Two reference days whose count ends at 10 and 20 (known at delay 2).
        let finals = [[4.0, 8.0, 10.0], [5.0, 15.0, 20.0]];
        let latest = Triangle::from_fn(start, start + Days::new(5), 2, |t, d| finals[t.min(1)][d]);
        let day = start + Days::new(1);
        let nowcast = Nowcast {
            method: crate::model::NowcastMethod::Hazard,
            rows: vec![row(start, 1, 8.0, (9.0, 11.0)), row(start + Days::new(1), 0, 5.0, (10.0, 12.0))],
            problems: vec![],
        };
        let cells = score(&[(day, nowcast)], &latest, 2, 7);
        let hazard_h0 = cells.iter().find(|c| c.method == "hazard" && c.horizon == 0).unwrap();
        assert_eq!((hazard_h0.n, hazard_h0.coverage90), (1, 0.0), "20 is outside [10, 12]");
        let hazard_h1 = cells.iter().find(|c| c.method == "hazard" && c.horizon == 1).unwrap();
        assert_eq!(hazard_h1.coverage90, 1.0, "10 is inside [9, 11]");
        let naive_h0 = cells.iter().find(|c| c.method == NAIVE && c.horizon == 0).unwrap();
        // A point forecast's WIS is its absolute error (Bracher et al. 2021, K intervals of
        // zero width): |20 - 5| = 15.
        assert!((naive_h0.wis - 15.0).abs() < 1e-12);
        assert!((naive_h0.rel_error + 0.75).abs() < 1e-12);
    }
}
