//! Aberration detection on a daily count series: the short-baseline C1, C2 and C3 statistics
//! (Hutwagner et al. 2003, J Urban Health 80(2 Suppl 1):i89; evaluated in Hutwagner et al.
//! 2005, Emerg Infect Dis 11:314, and Fricker et al. 2008, Stat Med 27:3407) and an upper CUSUM for counts with the
//! Poisson reference value of Lucas (1985) or a negative-binomial one. Pure: the series (oldest
//! day first) and the parameters in, one statistic per day out. No IO, no clock; day `t` is an
//! index into the series. A signal is a prompt to investigate, never a confirmed outbreak.
//!
//! Definitions used (day `t`, counts `y`):
//! - C1: `(y_t - mean) / sd` over the baseline `t-7 ..= t-1`;
//! - C2: the same over `t-9 ..= t-3` (a two-day guard band keeps an outbreak's first days out
//!   of its own baseline);
//! - C3: `sum over i in t-2 ..= t of max(0, C2_i - 1)`; C2 at `t-2` has its baseline from
//!   `t-11`, so C3 needs eleven days of history.
//!
//! `sd` is the sample standard deviation (n - 1) floored at [`ShortBaselineParams::min_sd`]; see there.

/// Baseline length (days) of C1, C2 and C3: one week.
pub const SHORT_BASELINE_DAYS: usize = 7;
/// Days between the end of the C2 baseline and the day tested (the guard band).
pub const C2_GUARD_DAYS: usize = 2;

/// Thresholds and the standard-deviation floor of the short-baseline statistics.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShortBaselineParams {
    /// `count_z_recent` (C1) alarms when C1 > this. Default 3 (Hutwagner et al. 2005).
    pub recent_threshold: f64,
    /// `count_z_guarded` (C2) alarms when C2 > this. Default 3 (Hutwagner et al. 2005).
    pub guarded_threshold: f64,
    /// `count_z_guarded_3day` (C3) alarms when C3 > this. Default 2 (Hutwagner et al. 2005;
    /// Fricker et al. 2008).
    pub guarded_3day_threshold: f64,
    /// Smallest standard deviation used, in cases. Default 0.5. A constant baseline (sd 0,
    /// common with small counts) would otherwise make any rise infinite; with 0.5 a constant
    /// baseline needs an excess of more than 1.5 cases to pass C1 > 3, i.e. two cases above a
    /// flat week. Half a case is the finest step that integer counts can resolve; every
    /// non-constant week of counts that varies by more than one case has sd above it, so the
    /// floor only touches flat or nearly flat baselines.
    pub min_sd: f64,
    /// Also floor the sd at the Poisson sd of the baseline mean, `sqrt(mean)`. Default true.
    /// Seven days give a noisy sample sd: with Poisson counts of mean 34 a week's sample sd
    /// is under half the true 5.8 about one week in twenty, and the z-score is then more than
    /// twice as large, so a steady count pages. Counts of cases vary at least as much as
    /// Poisson counts (common practice; over-dispersion only adds), so the floor removes
    /// those false alarms and leaves a real doubling (`z = sqrt(mean)`, above 3 from a mean
    /// of 9) detectable. `false` gives the published statistics exactly.
    pub poisson_floor: bool,
}

impl Default for ShortBaselineParams {
    fn default() -> ShortBaselineParams {
        ShortBaselineParams {
            recent_threshold: 3.0,
            guarded_threshold: 3.0,
            guarded_3day_threshold: 2.0,
            min_sd: 0.5,
            poisson_floor: true,
        }
    }
}

impl ShortBaselineParams {
    /// The sd floor these parameters ask for.
    pub fn floor(&self) -> SdFloor {
        SdFloor { min_sd: self.min_sd, poisson: self.poisson_floor }
    }
}

/// The smallest sd a z-score divides by: `min_sd`, and with `poisson` also `sqrt(mean)`. A
/// bare number is a `min_sd` floor alone (the published statistics).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SdFloor {
    pub min_sd: f64,
    pub poisson: bool,
}

impl From<f64> for SdFloor {
    fn from(min_sd: f64) -> SdFloor {
        SdFloor { min_sd, poisson: false }
    }
}

impl SdFloor {
    fn apply(self, mean: f64, sd: f64) -> f64 {
        let poisson = if self.poisson { mean.max(0.0).sqrt() } else { 0.0 };
        sd.max(self.min_sd).max(poisson)
    }
}

/// A standardised excess over a baseline window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Standardised {
    /// `(y - mean) / sd`.
    pub value: f64,
    /// The count tested.
    pub observed: f64,
    pub baseline_mean: f64,
    /// Sample sd of the baseline after the floor.
    pub baseline_sd: f64,
}

/// The three short-baseline statistics of one day; `None` where the history is too short.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShortBaselineDay {
    pub c1: Option<Standardised>,
    pub c2: Option<Standardised>,
    pub c3: Option<f64>,
}

/// C1 of day `t`: baseline `t-7 ..= t-1`. `None` when `t < 7` or `t` is past the series.
pub fn c1(counts: &[f64], t: usize, floor: impl Into<SdFloor>) -> Option<Standardised> {
    standardised(counts, t, 1, floor.into())
}

/// C2 of day `t`: baseline `t-9 ..= t-3`. `None` when `t < 9` or `t` is past the series.
pub fn c2(counts: &[f64], t: usize, floor: impl Into<SdFloor>) -> Option<Standardised> {
    standardised(counts, t, 1 + C2_GUARD_DAYS, floor.into())
}

/// C3 of day `t`: the sum of `max(0, C2_i - 1)` over `i = t-2, t-1, t`. `None` unless C2 is
/// defined on all three days (`t >= 11`).
///
/// Reference check (docs/validation.md, 1-based days): on day 12 the days entering C3 are
/// days 10, 11 and 12 with C2 = -1.5407, 6.8274 and 3.4931; day 10 contributes 0, so
/// C3 = 5.8274 + 2.4931 = 8.3205.
pub fn c3(counts: &[f64], t: usize, floor: impl Into<SdFloor>) -> Option<f64> {
    let first = t.checked_sub(2)?;
    let floor = floor.into();
    (first..=t).map(|i| c2(counts, i, floor).map(|s| (s.value - 1.0).max(0.0))).sum()
}

/// The short-baseline statistics of every day of the series.
pub fn short_baseline_statistics(counts: &[f64], min_sd: f64) -> Vec<ShortBaselineDay> {
    (0..counts.len())
        .map(|t| ShortBaselineDay {
            c1: c1(counts, t, min_sd),
            c2: c2(counts, t, min_sd),
            c3: c3(counts, t, min_sd),
        })
        .collect()
}

/// Mean and sample sd (n - 1) of the values; sd is NaN for fewer than two values.
pub fn mean_and_sd(values: &[f64]) -> (f64, f64) {
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let squares: f64 = values.iter().map(|v| (v - mean).powi(2)).sum();
    (mean, (squares / (n - 1.0)).sqrt())
}

/// `(y_t - mean) / floored sd` over the 7 days ending `lag` days before `t`.
fn standardised(counts: &[f64], t: usize, lag: usize, floor: SdFloor) -> Option<Standardised> {
    let observed = *counts.get(t)?;
    let end = t.checked_sub(lag)?;
    let start = (end + 1).checked_sub(SHORT_BASELINE_DAYS)?;
    let (baseline_mean, sd) = mean_and_sd(&counts[start..=end]);
    let baseline_sd = floor.apply(baseline_mean, sd);
    Some(Standardised {
        value: (observed - baseline_mean) / baseline_sd,
        observed,
        baseline_mean,
        baseline_sd,
    })
}

/// Lucas (1985) reference value of a Poisson CUSUM tuned to detect a rise of the mean from
/// `mu0` to `mu1`: `k = (mu1 - mu0) / (ln mu1 - ln mu0)`. Accumulating `x - k` is the
/// log-likelihood ratio divided by `ln(mu1 / mu0)`, so the decision interval `h` is in cases.
pub fn poisson_reference_value(mu0: f64, mu1: f64) -> f64 {
    (mu1 - mu0) / (mu1.ln() - mu0.ln())
}

/// Reference value of a negative-binomial CUSUM with fixed size `r` (variance
/// `mu + mu^2 / r`) for a rise of the mean from `mu0` to `mu1`.
///
/// With `p = r / (r + mu)`, the log-likelihood ratio of one count `x` is
/// `x ln(mu1 (r + mu0) / (mu0 (r + mu1))) - r ln((r + mu1) / (r + mu0))` (the binomial
/// coefficient cancels). Dividing by the slope `a = ln(mu1 (r + mu0) / (mu0 (r + mu1)))` gives
/// `x - k` with `k = r ln((r + mu1) / (r + mu0)) / a`, so `h` stays in cases as for the
/// Poisson CUSUM. As `r -> infinity` this tends to the Poisson value.
pub fn negative_binomial_reference_value(mu0: f64, mu1: f64, size: f64) -> f64 {
    size * ((size + mu1) / (size + mu0)).ln() / nb_slope(mu0, mu1, size)
}

/// The slope `a` of the negative-binomial log-likelihood ratio in `x`.
fn nb_slope(mu0: f64, mu1: f64, size: f64) -> f64 {
    (mu1 * (size + mu0) / (mu0 * (size + mu1))).ln()
}

/// Largest factor by which [`TrendFit::projection`] moves a baseline mean (a doubling: growth
/// of about 4% a day over the 16.5 days from a 28-day baseline's centre to the day tested).
pub const MAX_PROJECTION: f64 = 2.0;
/// Largest sampling variance of a projection's log used to widen a chart (a relative sd of
/// 50%); a baseline too sparse to say more is already at the chart's minimum mean.
pub const MAX_PROJECTION_VARIANCE: f64 = 0.25;

/// A baseline's log-linear growth and its scatter about it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrendFit {
    /// Growth of the expected count per day (natural log scale).
    pub growth: f64,
    /// Variance of the counts about the fitted trend over its mean (1 for Poisson scatter).
    pub dispersion: f64,
    /// Sampling variance of `growth`.
    pub growth_variance: f64,
    /// Sampling variance of the log of the baseline mean.
    pub level_variance: f64,
}

impl TrendFit {
    /// The factor carrying the baseline's mean `lead` days past the baseline's centre, within
    /// [`MAX_PROJECTION`] either way: a baseline that starts with a run of zeros (a new feed)
    /// must not project an explosion that would hide a real rise.
    pub fn projection(&self, lead: f64) -> f64 {
        (self.growth * lead).exp().clamp(1.0 / MAX_PROJECTION, MAX_PROJECTION)
    }

    /// Sampling variance of the log of the projected mean `lead` days past the centre, at
    /// most [`MAX_PROJECTION_VARIANCE`].
    pub fn projection_variance(&self, lead: f64) -> f64 {
        (lead * lead * self.growth_variance + self.level_variance).min(MAX_PROJECTION_VARIANCE)
    }
}

/// Fits a baseline's log-linear growth and the scatter of its counts about it.
///
/// Growth per day is `ln(later half's sum / earlier half's sum)` over the distance between
/// the halves' centres (half the baseline; with a 28-day baseline each half holds two whole
/// weeks, so a weekday pattern cancels). Its sampling variance is about `(1/S1 + 1/S2)`
/// times the variance-to-mean ratio, for halves summing to `S1` and `S2` (the delta method,
/// common practice); the caller adds the projection's uncertainty to the count variance so
/// a noisy growth estimate widens the chart rather than paging. The dispersion is the mean
/// squared residual about the fitted line (`n - 2` degrees of freedom) over the mean, so a
/// steady fall is not mistaken for noisy counts.
pub fn fit_trend(baseline: &[f64]) -> TrendFit {
    let n = baseline.len();
    let half = n / 2;
    let (mean, sd) = mean_and_sd(baseline);
    if half < 2 || mean <= 0.0 {
        return TrendFit { growth: 0.0, dispersion: 1.0, growth_variance: 0.0, level_variance: 0.0 };
    }
    let (earlier, later) = (&baseline[..half], &baseline[n - half..]);
    let (s1, s2) = (earlier.iter().sum::<f64>() + 0.5, later.iter().sum::<f64>() + 0.5);
    let steps = (n - half) as f64;
    let growth = (s2 / s1).ln() / steps;
    let centre = (n as f64 - 1.0) / 2.0;
    let squares: f64 = baseline
        .iter()
        .enumerate()
        .map(|(i, &y)| (y - mean * (growth * (i as f64 - centre)).exp()).powi(2))
        .sum();
    let dispersion = squares / (n as f64 - 2.0) / mean;
    let ratio = (sd * sd / mean).max(1.0);
    TrendFit {
        growth,
        dispersion,
        growth_variance: (1.0 / s1 + 1.0 / s2) * ratio / (steps * steps),
        level_variance: dispersion.max(1.0) / (n as f64 * mean),
    }
}

/// One day of an upper count CUSUM.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CountCusumDay {
    /// `S_t = max(0, S_{t-1} + y_t - k_t)`, before any reset.
    pub statistic: f64,
    pub reference: f64,
    /// `S_t > h_t`; the statistic restarts from 0 on the next day.
    pub alarm: bool,
}

/// Upper CUSUM of counts with a reference value and a decision interval per day
/// (`references[t]` and `intervals[t]` for `counts[t]`, `h` in cases). A NaN count, reference
/// or interval skips the day (the statistic carries over, no alarm). After an alarm the sum
/// restarts from 0 so that a lasting rise signals again.
pub fn count_cusum(counts: &[f64], references: &[f64], intervals: &[f64]) -> Vec<CountCusumDay> {
    let mut sum = 0.0;
    counts
        .iter()
        .zip(references)
        .zip(intervals)
        .map(|((&y, &k), &h)| {
            let usable = !(y.is_nan() || k.is_nan() || h.is_nan());
            if usable {
                sum = (sum + y - k).max(0.0);
            }
            let day = CountCusumDay { statistic: sum, reference: k, alarm: usable && sum > h };
            if day.alarm {
                sum = 0.0;
            }
            day
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use statrs::distribution::{Discrete, NegativeBinomial, Poisson};

    /// docs/validation.md "Aberration and change detection", days 1..14.
    const SERIES: [f64; 14] = [4., 6., 5., 7., 5., 6., 7., 5., 6., 4., 12., 9., 15., 8.];

    fn close(got: f64, want: f64, tolerance: f64) -> bool {
        (got - want).abs() < tolerance
    }

    /// Day numbers in docs/validation.md are 1-based; the series index is day - 1.
    fn day(n: usize) -> usize {
        n - 1
    }

    /// C1/C2/C3 values from docs/validation.md (Hutwagner et al. 2005 definitions, sample sd),
    /// to the four decimals published there.
    #[test]
    fn short_baseline_statistics_match_the_reference_series() {
        let p = ShortBaselineParams::default();
        let cases = [
            (c1(&SERIES, day(11), p.min_sd).unwrap().value, 5.6491),
            (c2(&SERIES, day(11), p.min_sd).unwrap().value, 6.8274),
            (c2(&SERIES, day(12), p.min_sd).unwrap().value, 3.4931),
            (c3(&SERIES, day(12), p.min_sd).unwrap(), 8.3205),
            (c1(&SERIES, day(13), p.min_sd).unwrap().value, 2.9542),
            (c2(&SERIES, day(13), p.min_sd).unwrap().value, 8.3452),
        ];
        for (got, want) in cases {
            assert!(close(got, want, 5e-5), "{got} vs {want}");
        }
        // Day 13: C1 = 2.9542 is below 3, no alarm, while C2 alarms.
        assert!(c1(&SERIES, day(13), p.min_sd).unwrap().value <= p.recent_threshold);
        assert!(c2(&SERIES, day(13), p.min_sd).unwrap().value > p.guarded_threshold);
    }

    /// C3 on day 12 is exactly the sum over days 10, 11, 12 of max(0, C2 - 1).
    #[test]
    fn c3_sums_days_t_minus_2_to_t() {
        let by_hand: f64 =
            [10, 11, 12].iter().map(|&d| (c2(&SERIES, day(d), 0.5).unwrap().value - 1.0).max(0.0)).sum();
        assert_eq!(c3(&SERIES, day(12), 0.5), Some(by_hand));
        assert!(c2(&SERIES, day(10), 0.5).unwrap().value < 1.0);
    }

    #[test]
    fn short_history_gives_none() {
        assert!(c1(&SERIES, 6, 0.5).is_none() && c1(&SERIES, 7, 0.5).is_some());
        assert!(c2(&SERIES, 8, 0.5).is_none() && c2(&SERIES, 9, 0.5).is_some());
        assert!(c3(&SERIES, 10, 0.5).is_none() && c3(&SERIES, 11, 0.5).is_some());
        assert!(c1(&SERIES, 14, 0.5).is_none());
        let all = short_baseline_statistics(&SERIES, 0.5);
        assert_eq!(all.len(), 14);
        assert_eq!(all[day(12)].c3, c3(&SERIES, day(12), 0.5));
    }

    /// A flat baseline uses the floor: 3 cases over a flat 1 is (3 - 1) / 0.5 = 4.
    #[test]
    fn flat_baseline_uses_the_sd_floor() {
        let counts = [1., 1., 1., 1., 1., 1., 1., 3.];
        let s = c1(&counts, 7, 0.5).unwrap();
        assert_eq!((s.baseline_mean, s.baseline_sd, s.value), (1.0, 0.5, 4.0));
        let two = c1(&[1., 1., 1., 1., 1., 1., 1., 2.], 7, 0.5).unwrap();
        assert!(two.value <= 3.0);
    }

    /// Known truth for C1 on normal data: with Y and the 7 baseline values iid N(mu, s^2),
    /// `(Y - mean) / sd` is `sqrt(8/7)` times a Student t with 6 degrees of freedom, so the
    /// in-control false-alarm rate of C1 > 3 is `P(t_6 > 3 / sqrt(8/7)) = 0.0155` (statrs t
    /// cdf). 40,000 independent windows give a standard error of 0.0006; the bound is 4 se.
    /// The sd floor (0.5) never binds here (s = 4).
    #[test]
    fn c1_in_control_false_alarm_rate_matches_student_t() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        use statrs::distribution::{ContinuousCDF, StudentsT};
        let expected = 1.0 - StudentsT::new(0.0, 1.0, 6.0).unwrap().cdf(3.0 / (8.0f64 / 7.0).sqrt());
        assert!(close(expected, 0.0155, 5e-4), "{expected}");
        let mut rng = rand::rngs::StdRng::seed_from_u64(7);
        let normal = Normal::new(20.0, 4.0).unwrap();
        let trials = 40_000;
        let alarms = (0..trials)
            .filter(|_| {
                let window: Vec<f64> = (0..8).map(|_| normal.sample(&mut rng)).collect();
                c1(&window, 7, 0.5).unwrap().value > 3.0
            })
            .count();
        let rate = alarms as f64 / trials as f64;
        let se = (expected * (1.0 - expected) / trials as f64).sqrt();
        assert!((rate - expected).abs() < 4.0 * se, "{rate} vs {expected}");
    }

    /// docs/validation.md: Lucas (1985) k for 4 -> 8 is 5.770780 (scipy).
    #[test]
    fn poisson_reference_value_matches_lucas() {
        assert!(close(poisson_reference_value(4.0, 8.0), 5.770780, 1e-6));
    }

    /// The negative-binomial increment `a (x - k)` must equal the log-likelihood ratio computed
    /// from statrs's negative-binomial pmf (an independent implementation), for every x; and
    /// for a huge size k tends to the Poisson value. Hand value for 4 -> 8, r = 4:
    /// k = 4 ln(12/8) / ln(64/48) = 5.637683.
    #[test]
    fn negative_binomial_reference_value_is_the_likelihood_ratio() {
        let (mu0, mu1, r) = (4.0, 8.0, 4.0);
        let k = negative_binomial_reference_value(mu0, mu1, r);
        assert!(close(k, 4.0 * 1.5f64.ln() / (64.0f64 / 48.0).ln(), 1e-12));
        assert!(close(k, 5.637683, 1e-6));
        let h0 = NegativeBinomial::new(r, r / (r + mu0)).unwrap();
        let h1 = NegativeBinomial::new(r, r / (r + mu1)).unwrap();
        for x in 0..40u64 {
            let llr = h1.ln_pmf(x) - h0.ln_pmf(x);
            let ours = nb_slope(mu0, mu1, r) * (x as f64 - k);
            assert!(close(llr, ours, 1e-9), "x={x}: {llr} vs {ours}");
        }
        let (p0, p1) = (Poisson::new(mu0).unwrap(), Poisson::new(mu1).unwrap());
        let poisson_llr = p1.ln_pmf(9) - p0.ln_pmf(9);
        assert!(close(poisson_llr, (mu1 / mu0).ln() * (9.0 - poisson_reference_value(mu0, mu1)), 1e-9));
        assert!(close(negative_binomial_reference_value(mu0, mu1, 1e9), 5.770780, 1e-5));
    }

    #[test]
    fn count_cusum_accumulates_and_restarts() {
        let k = vec![5.0; 6];
        let days = count_cusum(&[5., 8., 9., 4., 9., 3.], &k, &[6.0; 6]);
        let sums: Vec<f64> = days.iter().map(|d| d.statistic).collect();
        // 0, 3, 3+4=7 (alarm, restart), 0, 4, 2.
        assert_eq!(sums, vec![0.0, 3.0, 7.0, 0.0, 4.0, 2.0]);
        let alarms: Vec<bool> = days.iter().map(|d| d.alarm).collect();
        assert_eq!(alarms, vec![false, false, true, false, false, false]);
        let skipped = count_cusum(&[9.0, 9.0], &[f64::NAN, 5.0], &[6.0; 2]);
        assert_eq!(skipped[0].statistic, 0.0);
        assert_eq!(skipped[1].statistic, 4.0);
    }

    /// Known truth: counts growing 3% a day (Poisson draws) give a growth estimate near 0.03
    /// and Poisson scatter about the line; a baseline of zeros that then fills in does not
    /// project more than a doubling.
    #[test]
    fn trend_fit_recovers_a_known_growth() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Poisson};
        let mut rng = rand::rngs::StdRng::seed_from_u64(8);
        let (mut growth, mut dispersion) = (0.0, 0.0);
        for _ in 0..200 {
            let baseline: Vec<f64> = (0..28)
                .map(|day| Poisson::new(30.0 * (0.03 * day as f64).exp()).unwrap().sample(&mut rng))
                .collect();
            let fit = fit_trend(&baseline);
            growth += fit.growth / 200.0;
            dispersion += fit.dispersion / 200.0;
        }
        assert!((growth - 0.03).abs() < 0.002, "growth {growth}");
        assert!((dispersion - 1.0).abs() < 0.15, "dispersion {dispersion}");
        let filling_in: Vec<f64> = (0..28).map(|day| if day < 20 { 0.0 } else { 9.0 }).collect();
        let fit = fit_trend(&filling_in);
        assert!(close(fit.projection(16.5), MAX_PROJECTION, 1e-12));
        assert!(fit.projection_variance(16.5) <= MAX_PROJECTION_VARIANCE);
    }
}
