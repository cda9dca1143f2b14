//! Nowcasts: estimates of the eventual count for each recent reference date, from a
//! reporting triangle, with prediction intervals. `hazard` is the reverse-time discrete
//! hazard method (Lawless 1994) with the conjugate negative-binomial predictive of Hohle &
//! an der Heiden (2014); `smooth` lets log incidence vary smoothly over reference dates and
//! the delay distribution change over time; `ensemble` averages their quantiles. All return
//! the same `Nowcast` shape. `suite` scores them on simulated reporting situations.

pub mod ensemble;
pub mod hazard;
pub mod smooth;
pub mod suite;

use crate::model::NowcastMethod;
use chrono::NaiveDate;

/// One reference date of a nowcast. Counts are of cases; intervals are central prediction
/// intervals for the eventual count (what will be known at the maximum delay).
#[derive(Debug, Clone, PartialEq)]
pub struct NowcastRow {
    pub date: NaiveDate,
    /// Days between this reference date and the nowcast's snapshot day.
    pub horizon: usize,
    /// The count known so far.
    pub observed: f64,
    pub median: f64,
    pub mean: f64,
    pub lower50: f64,
    pub upper50: f64,
    pub lower90: f64,
    pub upper90: f64,
    pub lower95: f64,
    pub upper95: f64,
    /// Expected share of the eventual count already known, in (0, 1].
    pub completeness: f64,
}

/// A nowcast of every reference date of a triangle.
#[derive(Debug, Clone, PartialEq)]
pub struct Nowcast {
    pub method: NowcastMethod,
    pub rows: Vec<NowcastRow>,
    /// Things the analyst should know (e.g. too few data for the window); never fatal.
    pub problems: Vec<String>,
}

/// Summarises predictive draws of one reference date into a row, consistently: a model
/// completeness of 1 means every draw is the observed count (median = observed, no width),
/// and the completeness shown is the share of the predictive mean already observed
/// (`observed / mean`), so it is 1 exactly when the interval has no width. Where nothing is
/// observed yet it is the model's expected completeness.
pub fn row_from_draws(
    date: NaiveDate,
    horizon: usize,
    observed: f64,
    completeness: f64,
    draws: &mut [f64],
) -> NowcastRow {
    if completeness >= 1.0 {
        draws.iter_mut().for_each(|d| *d = observed);
    }
    draws.sort_by(|a, b| a.total_cmp(b));
    let mean = if draws.is_empty() { observed } else { draws.iter().sum::<f64>() / draws.len() as f64 };
    let completeness =
        if observed > 0.0 && mean > 0.0 { (observed / mean).min(1.0) } else { completeness.min(1.0) };
    let median = quantile_sorted(draws, 0.5);
    let (lower95, upper95) = central_interval(draws, 0.95, (f64::NEG_INFINITY, f64::INFINITY));
    let (lower90, upper90) = central_interval(draws, 0.90, (lower95, upper95));
    let (lower50, upper50) = central_interval(draws, 0.50, (lower90, upper90));
    NowcastRow {
        date,
        horizon,
        observed,
        median,
        mean,
        lower50,
        upper50,
        lower90,
        upper90,
        lower95,
        upper95,
        completeness,
    }
}

/// The central interval of sorted draws whose coverage is nearest to `level`, within
/// `within` (so that narrower levels nest inside wider ones). It starts from the type-1
/// quantiles at `(1 - level) / 2` and `(1 + level) / 2`, which always cover at least `level`,
/// and gives up the end value (an atom of a count) whose removal brings the coverage nearer
/// to `level`, while one does and the median stays inside. For a count whose predictive
/// puts much mass on a few values (a low count, or a nearly complete date) the type-1 ends
/// cover far more than the level (a 90% interval of `observed + Poisson(0.1)` covers 99.5%),
/// and the intervals are then conservative on average; rounding to the nearest attainable
/// coverage instead makes them right on average (on the discreteness of count predictives,
/// Czado, Gneiting & Held 2009, from memory). For many distinct values the ends move by at
/// most a draw or two.
pub fn central_interval(sorted: &[f64], level: f64, within: (f64, f64)) -> (f64, f64) {
    if sorted.is_empty() {
        return (f64::NAN, f64::NAN);
    }
    let n = sorted.len() as f64;
    let median = quantile_sorted(sorted, 0.5);
    let mut lower = quantile_sorted(sorted, (1.0 - level) / 2.0).max(within.0);
    let mut upper = quantile_sorted(sorted, (1.0 + level) / 2.0).min(within.1);
    // Coverage of [lower, upper] and the draws at each end.
    let below = |x: f64| sorted.partition_point(|d| *d < x);
    let at_or_below = |x: f64| sorted.partition_point(|d| *d <= x);
    let coverage = |lo: f64, hi: f64| (at_or_below(hi) - below(lo)) as f64 / n;
    loop {
        let now = (coverage(lower, upper) - level).abs();
        let raised = sorted.get(at_or_below(lower)).copied().filter(|&x| x <= median);
        let dropped = below(upper).checked_sub(1).map(|i| sorted[i]).filter(|&x| x >= median);
        let mut options: Vec<(f64, f64)> = Vec::new();
        options.extend(raised.map(|lo| (lo, upper)));
        options.extend(dropped.map(|hi| (lower, hi)));
        let best = options
            .into_iter()
            .map(|(lo, hi)| ((coverage(lo, hi) - level).abs(), lo, hi))
            .min_by(|a, b| a.0.total_cmp(&b.0));
        match best {
            Some((gap, lo, hi)) if gap < now => (lower, upper) = (lo, hi),
            _ => return (lower, upper),
        }
    }
}

/// Quantile of sorted draws: the smallest draw with at least `p` of the draws at or below it
/// (the inverse empirical CDF, type 1), so integer draws give integer quantiles.
pub fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let rank = (p * sorted.len() as f64).ceil() as usize;
    sorted[rank.clamp(1, sorted.len()) - 1]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn completeness_agrees_with_the_interval() {
        let date = NaiveDate::from_ymd_opt(2026, 3, 1).unwrap();
        // A complete row: whatever the draws, median = observed and no width.
        let complete = row_from_draws(date, 0, 40.0, 1.0, &mut [40.0, 41.0, 45.0]);
        assert_eq!(
            (complete.median, complete.lower95, complete.upper95, complete.completeness),
            (40.0, 40.0, 40.0, 1.0)
        );
        // Draws above the observed count: completeness under 1, the share of the mean known.
        let open = row_from_draws(date, 0, 40.0, 1.0 - 1e-9, &mut [40.0, 42.0, 44.0, 46.0]);
        assert!((open.completeness - 40.0 / 43.0).abs() < 1e-12, "{open:?}");
        assert!(open.upper95 > open.lower95);
        // Nothing observed: the model's completeness.
        assert_eq!(row_from_draws(date, 0, 0.0, 0.05, &mut [0.0, 3.0]).completeness, 0.05);
    }

    #[test]
    fn count_intervals_round_to_the_nearest_coverage() {
        // Check (by hand): a count that is 10 with probability 0.905, 11 with 0.080 and
        // 12 with 0.015. The type-1 90% interval [10, 11] covers 0.985; [10, 10] covers
        // 0.905, nearer 0.90. The 95% interval keeps 11 (0.985 is 0.035 from 0.95, 0.905
        // is 0.045 from it), and the 50% interval is [10, 10].
        let mut draws: Vec<f64> = [(10.0, 905), (11.0, 80), (12.0, 15)]
            .into_iter()
            .flat_map(|(value, n)| std::iter::repeat_n(value, n))
            .collect();
        assert_eq!(central_interval(&draws, 0.90, (f64::NEG_INFINITY, f64::INFINITY)), (10.0, 10.0));
        let row = row_from_draws(NaiveDate::from_ymd_opt(2026, 3, 1).unwrap(), 3, 10.0, 0.99, &mut draws);
        assert_eq!((row.lower90, row.upper90, row.lower50, row.upper50), (10.0, 10.0, 10.0, 10.0));
        assert_eq!((row.lower95, row.upper95), (10.0, 11.0));
        // Many distinct values: a draw's worth of change at most (the type-1 [50, 950]
        // covers 0.901 of the draws, [51, 950] exactly 0.900).
        let spread: Vec<f64> = (1..=1000).map(f64::from).collect();
        assert_eq!(central_interval(&spread, 0.90, (f64::NEG_INFINITY, f64::INFINITY)), (51.0, 950.0));
    }

    #[test]
    fn type_1_quantiles() {
        let sorted: Vec<f64> = (1..=10).map(f64::from).collect();
        assert_eq!(quantile_sorted(&sorted, 0.5), 5.0);
        assert_eq!(quantile_sorted(&sorted, 0.05), 1.0);
        assert_eq!(quantile_sorted(&sorted, 0.95), 10.0);
        assert_eq!(quantile_sorted(&sorted, 0.25), 3.0);
    }
}
