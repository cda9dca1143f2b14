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
    let q = |p: f64| quantile_sorted(draws, p);
    let mean = if draws.is_empty() { observed } else { draws.iter().sum::<f64>() / draws.len() as f64 };
    let completeness =
        if observed > 0.0 && mean > 0.0 { (observed / mean).min(1.0) } else { completeness.min(1.0) };
    NowcastRow {
        date,
        horizon,
        observed,
        median: q(0.5),
        mean,
        lower50: q(0.25),
        upper50: q(0.75),
        lower90: q(0.05),
        upper90: q(0.95),
        lower95: q(0.025),
        upper95: q(0.975),
        completeness,
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
    fn type_1_quantiles() {
        let sorted: Vec<f64> = (1..=10).map(f64::from).collect();
        assert_eq!(quantile_sorted(&sorted, 0.5), 5.0);
        assert_eq!(quantile_sorted(&sorted, 0.05), 1.0);
        assert_eq!(quantile_sorted(&sorted, 0.95), 10.0);
        assert_eq!(quantile_sorted(&sorted, 0.25), 3.0);
    }
}
