//! Scores of interval forecasts against the value that was later observed: the interval score,
//! the weighted interval score (Bracher, Ray, Gneiting & Reich 2021, PLoS Comput Biol
//! 17:e1008618) and interval coverage. Backtests and the `auto` method choice use these to
//! compare nowcast methods. Pure arithmetic on numbers: this module knows nothing of
//! triangles, snapshots or storage, and must not decide which method wins (callers do).
//! Lower scores are better; a score is in the units of the count being forecast.

use super::nowcast::NowcastRow;

/// The central prediction intervals of a `NowcastRow` as (alpha, lower, upper): the 50%, 90%
/// and 95% intervals have alpha = 0.5, 0.1 and 0.05.
fn row_intervals(row: &NowcastRow) -> [(f64, f64, f64); 3] {
    [(0.5, row.lower50, row.upper50), (0.1, row.lower90, row.upper90), (0.05, row.lower95, row.upper95)]
}

/// Interval score of the central (1 - alpha) interval [lower, upper] for the observed `y`:
/// `(u - l) + (2/alpha)(l - y)1{y < l} + (2/alpha)(y - u)1{y > u}`. The width rewards
/// sharpness, the penalties punish a miss in proportion to its size. `alpha` must be in
/// (0, 1]; otherwise the result is NaN.
pub fn interval_score(lower: f64, upper: f64, alpha: f64, y: f64) -> f64 {
    if alpha.is_nan() || alpha <= 0.0 || alpha > 1.0 {
        return f64::NAN;
    }
    let width = upper - lower;
    let below = (lower - y).max(0.0);
    let above = (y - upper).max(0.0);
    width + (2.0 / alpha) * (below + above)
}

/// Weighted interval score of a median and K central intervals `(alpha, lower, upper)`:
/// `(0.5 |y - m| + sum_k (alpha_k / 2) IS_alpha_k) / (K + 0.5)`. With no intervals it is the
/// absolute error of the median.
pub fn wis(median: f64, intervals: &[(f64, f64, f64)], y: f64) -> f64 {
    let median_term = 0.5 * (y - median).abs();
    let interval_terms: f64 = intervals
        .iter()
        .map(|&(alpha, lower, upper)| alpha / 2.0 * interval_score(lower, upper, alpha, y))
        .sum();
    (median_term + interval_terms) / (intervals.len() as f64 + 0.5)
}

/// Weighted interval score of one nowcast row (its median and 50/90/95% intervals) against
/// the eventual count `y`.
pub fn wis_of_row(row: &NowcastRow, y: f64) -> f64 {
    wis(row.median, &row_intervals(row), y)
}

/// Whether `y` lies in the closed interval [lower, upper].
pub fn covered(lower: f64, upper: f64, y: f64) -> bool {
    lower <= y && y <= upper
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::NaiveDate;

    const EXACT: f64 = 1e-12;

    /// The quantile (pinball) loss of quantile `value` at level `tau` for `y`.
    fn pinball(value: f64, tau: f64, y: f64) -> f64 {
        let indicator = if y < value { 1.0 } else { 0.0 };
        (indicator - tau) * (value - y)
    }

    #[test]
    fn interval_scores() {
        // (lower, upper, alpha, y, expected, source)
        let cases = [
            // docs/validation.md: Bracher et al. 2021 scoring example (scipy): IS_0.5 = 12.
            (8.0, 12.0, 0.5, 14.0, 12.0),
            // docs/validation.md: Bracher et al. 2021 scoring example (scipy): IS_0.1 = 11.
            (5.0, 16.0, 0.1, 14.0, 11.0),
            // By hand from the docs/validation.md formula: y inside, score = width 4.
            (8.0, 12.0, 0.5, 10.0, 4.0),
            // By hand from the formula: y below, 4 + (2/0.5)(8 - 6) = 12.
            (8.0, 12.0, 0.5, 6.0, 12.0),
            // By hand from the formula: y on the bound counts as inside.
            (5.0, 16.0, 0.1, 16.0, 11.0),
        ];
        for (lower, upper, alpha, y, expected) in cases {
            let got = interval_score(lower, upper, alpha, y);
            assert!(
                (got - expected).abs() < EXACT,
                "IS_{alpha}([{lower}, {upper}]; {y}) = {got}, want {expected}"
            );
        }
    }

    #[test]
    fn invalid_alpha_gives_nan() {
        for alpha in [0.0, -0.1, 1.5, f64::NAN] {
            assert!(interval_score(1.0, 2.0, alpha, 1.5).is_nan(), "alpha {alpha}");
        }
    }

    #[test]
    fn weighted_interval_score_of_the_reference_example() {
        // docs/validation.md: Bracher et al. 2021 scoring example (scipy): WIS = 2.22.
        // The exact formula gives (0.5*4 + 0.25*12 + 0.05*11) / 2.5 = 5.55 / 2.5 = 2.22
        // exactly (not 2.2222...), so the check is to 1e-12.
        let got = wis(10.0, &[(0.5, 8.0, 12.0), (0.1, 5.0, 16.0)], 14.0);
        assert!((got - 2.22).abs() < EXACT, "WIS = {got}");
    }

    #[test]
    fn weighted_interval_score_without_intervals_is_absolute_error() {
        // By hand from the docs/validation.md formula with K = 0: (0.5 |y - m|) / 0.5.
        assert!((wis(10.0, &[], 14.0) - 4.0).abs() < EXACT);
    }

    #[test]
    fn interval_score_equals_scaled_quantile_losses() {
        // Bracher et al. 2021, section 2: IS_alpha = (2/alpha) (QS_{alpha/2}(l) + QS_{1-alpha/2}(u)),
        // with QS the pinball loss; an identity, checked on a grid.
        for (lower, upper) in [(5.0, 16.0), (8.0, 12.0), (0.0, 0.0)] {
            for alpha in [0.05, 0.1, 0.5, 1.0] {
                for y in [-3.0, 0.0, 7.5, 12.0, 20.0] {
                    let by_quantiles = (2.0 / alpha)
                        * (pinball(lower, alpha / 2.0, y) + pinball(upper, 1.0 - alpha / 2.0, y));
                    let got = interval_score(lower, upper, alpha, y);
                    assert!((got - by_quantiles).abs() < 1e-9, "[{lower}, {upper}] alpha {alpha} y {y}");
                }
            }
        }
    }

    #[test]
    fn row_score_uses_the_50_90_95_intervals() {
        let row = NowcastRow {
            date: NaiveDate::from_ymd_opt(2026, 3, 1).unwrap(),
            horizon: 0,
            observed: 7.0,
            median: 10.0,
            mean: 10.5,
            lower50: 8.0,
            upper50: 12.0,
            lower90: 5.0,
            upper90: 16.0,
            lower95: 4.0,
            upper95: 18.0,
            completeness: 0.7,
        };
        // By hand from the docs/validation.md formula: IS_0.05([4, 18]; 14) = 14, so
        // WIS = (2 + 3 + 0.55 + 0.025*14) / 3.5 = 5.9 / 3.5.
        let expected = 5.9 / 3.5;
        let got = wis_of_row(&row, 14.0);
        assert!((got - expected).abs() < EXACT, "WIS = {got}, want {expected}");
    }

    #[test]
    fn coverage_is_closed() {
        // (lower, upper, y, covered): by definition of a closed interval.
        let cases =
            [(1.0, 3.0, 1.0, true), (1.0, 3.0, 3.0, true), (1.0, 3.0, 2.0, true), (1.0, 3.0, 0.5, false)];
        for (lower, upper, y, expected) in cases {
            assert_eq!(covered(lower, upper, y), expected, "[{lower}, {upper}] {y}");
        }
        assert!(!covered(1.0, 3.0, f64::NAN));
    }
}
