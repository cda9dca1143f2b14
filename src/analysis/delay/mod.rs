//! Delay distributions in whole days (onset to report, specimen to result, onset to death, or
//! reference date to first appearance in the store): empirical summaries, and parametric fits
//! (gamma, lognormal, Weibull) by maximum likelihood with daily interval censoring and right
//! truncation at each record's horizon, chosen by AIC, with bootstrap intervals and a check
//! that the upper tail is identified at all.
//!
//! Negative delays (the second event dated before the first) are counted and reported and
//! excluded from fits: they are asymptomatic cases or data-entry errors (common practice).
//! See [`summarize`] and [`fit`].

mod dist;
mod fit;
mod likelihood;
#[cfg(test)]
mod simulate;

pub use dist::{Dist, Family, FamilyChoice};
pub use fit::{DelayFit, FitOptions, Interval, fit, fit_all, fit_all_counted, fit_counted};
pub use likelihood::log_likelihood;

/// One record's delay in days and its horizon.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct DelayObs {
    /// Second event date minus first event date, in days.
    pub delay: i64,
    /// The largest delay that could have been observed for this record: the observation date
    /// `T` minus the first event date. `None`: not truncated (the record's outcome is known
    /// whatever its delay).
    pub horizon: Option<i64>,
}

/// Empirical summary of whole-day delays.
#[derive(Debug, Clone, PartialEq)]
pub struct DelaySummary {
    /// Delays summarised: the non-negative ones.
    pub n: usize,
    /// Mean, median and 90th and 95th percentiles of the non-negative delays (NaN when `n` is
    /// zero). Percentiles interpolate linearly between order statistics (the common default of
    /// statistics packages, "type 7").
    pub mean: f64,
    pub median: f64,
    pub p90: f64,
    pub p95: f64,
    /// Share of all delays (negative ones included) that are negative, and that are zero.
    pub share_negative: f64,
    pub share_zero: f64,
    /// Number of negative delays left out of `n` and of every fit.
    pub excluded_negative: usize,
}

/// Summarises `delays`.
///
/// Rule for negative delays: they are counted (`excluded_negative`, `share_negative`) and
/// reported, and left out of the statistics and of the fits, because a result dated before
/// onset is an asymptomatic case or a data-entry error, not a delay (common practice).
pub fn summarize(delays: &[i64]) -> DelaySummary {
    let mut kept: Vec<i64> = delays.iter().copied().filter(|&d| d >= 0).collect();
    kept.sort_unstable();
    let total = delays.len();
    let excluded_negative = total - kept.len();
    let zeros = kept.iter().take_while(|&&d| d == 0).count();
    let share = |count: usize| {
        if total == 0 { f64::NAN } else { count as f64 / total as f64 }
    };
    let mean = if kept.is_empty() {
        f64::NAN
    } else {
        kept.iter().map(|&d| d as f64).sum::<f64>() / kept.len() as f64
    };
    DelaySummary {
        n: kept.len(),
        mean,
        median: percentile(&kept, 0.5),
        p90: percentile(&kept, 0.9),
        p95: percentile(&kept, 0.95),
        share_negative: share(excluded_negative),
        share_zero: share(zeros),
        excluded_negative,
    }
}

/// Linear interpolation between order statistics of sorted `values` ("type 7").
fn percentile(sorted: &[i64], p: f64) -> f64 {
    let n = sorted.len();
    if n == 0 {
        return f64::NAN;
    }
    let h = (n - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(n - 1);
    let frac = h - lo as f64;
    sorted[lo] as f64 + frac * (sorted[hi] - sorted[lo]) as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hand-computed; percentiles as numpy's default linear method would give them.
    #[test]
    fn summary_counts_and_excludes_negative_delays() {
        let s = summarize(&[-2, 0, 0, 1, 2, 3, 4, 5, 10, -1]);
        assert_eq!(s.n, 8);
        assert_eq!(s.excluded_negative, 2);
        assert!((s.share_negative - 0.2).abs() < 1e-12);
        assert!((s.share_zero - 0.2).abs() < 1e-12);
        assert!((s.mean - 25.0 / 8.0).abs() < 1e-12);
        // Sorted kept: 0 0 1 2 3 4 5 10; median at h = 3.5 -> 2.5; p90 at 6.3 -> 6.5;
        // p95 at 6.65 -> 5 + 0.65 * 5 = 8.25.
        let cases = [(s.median, 2.5), (s.p90, 6.5), (s.p95, 8.25)];
        for (got, want) in cases {
            assert!((got - want).abs() < 1e-12, "{got} vs {want}");
        }
    }

    #[test]
    fn empty_and_all_negative_summaries() {
        let empty = summarize(&[]);
        assert_eq!(empty.n, 0);
        assert!(empty.mean.is_nan() && empty.share_negative.is_nan());
        let negative = summarize(&[-3, -1]);
        assert_eq!((negative.n, negative.excluded_negative), (0, 2));
        assert_eq!(negative.share_negative, 1.0);
        assert!(negative.median.is_nan());
    }
}
