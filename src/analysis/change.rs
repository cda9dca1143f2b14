//! Change detection on a series of measurements with a known in-control mean and sd: the
//! two-sided standardised tabular CUSUM, the EWMA chart with exact time-varying limits
//! (Lucas & Saccucci 1990), the p-chart for proportions and the pooled two-proportion z test.
//! Pure: values and parameters in, statistics and alarms out; no IO, no clock, no randomness
//! (the simulation checks below bring their own seeded generators).

use statrs::function::erf::erfc;

/// Which side of the in-control mean a chart signalled on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Side {
    Upper,
    Lower,
}

/// Reference value `k` and decision interval `h` of a standardised CUSUM, both in sd units.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CusumParams {
    /// Default 0.5: tuned to a shift of one sd (k is half the shift to detect).
    pub k: f64,
    /// Default 5: in-control ARL about 465 for the two-sided chart with k = 0.5 (Montgomery).
    pub h: f64,
}

impl Default for CusumParams {
    fn default() -> CusumParams {
        CusumParams { k: 0.5, h: 5.0 }
    }
}

/// The running sums of a two-sided tabular CUSUM on standardised values.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct CusumState {
    /// `C+_t = max(0, C+_{t-1} + z_t - k)`.
    pub upper: f64,
    /// `C-_t = max(0, C-_{t-1} - z_t - k)`.
    pub lower: f64,
}

impl CusumState {
    /// Adds one standardised value and returns the side that exceeded `h`, if any (upper
    /// first). The sums are not reset here; [`cusum`] resets after an alarm.
    pub fn step(&mut self, z: f64, params: &CusumParams) -> Option<Side> {
        self.upper = (self.upper + z - params.k).max(0.0);
        self.lower = (self.lower - z - params.k).max(0.0);
        if self.upper > params.h {
            Some(Side::Upper)
        } else if self.lower > params.h {
            Some(Side::Lower)
        } else {
            None
        }
    }
}

/// One step of a CUSUM run.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CusumStep {
    pub upper: f64,
    pub lower: f64,
    pub alarm: Option<Side>,
}

/// The two-sided CUSUM of `values` standardised by `mean` and `sd`; both sums restart from 0
/// after an alarm. NaN values are skipped (the sums carry over).
pub fn cusum(values: &[f64], mean: f64, sd: f64, params: &CusumParams) -> Vec<CusumStep> {
    let mut state = CusumState::default();
    values
        .iter()
        .map(|&x| {
            let alarm = if x.is_nan() { None } else { state.step((x - mean) / sd, params) };
            let step = CusumStep { upper: state.upper, lower: state.lower, alarm };
            if alarm.is_some() {
                state = CusumState::default();
            }
            step
        })
        .collect()
}

/// Smoothing weight `lambda` and limit width `L` (in sd of the EWMA) of an EWMA chart.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EwmaParams {
    /// Default 0.2, within the usual 0.05..0.25 (Montgomery); small shifts of about one sd.
    pub lambda: f64,
    /// Default 3 (Lucas & Saccucci 1990; in-control ARL about 500 with lambda 0.2).
    pub width: f64,
    /// Exact time-varying limits (default) or the asymptotic ones.
    pub limits: EwmaLimits,
}

impl Default for EwmaParams {
    fn default() -> EwmaParams {
        EwmaParams { lambda: 0.2, width: 3.0, limits: EwmaLimits::Exact }
    }
}

/// Which variance the EWMA limits use.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum EwmaLimits {
    /// `Var z_t = sigma^2 (lambda / (2 - lambda)) (1 - (1 - lambda)^(2t))`: narrower at the start,
    /// so an early shift signals sooner.
    Exact,
    /// The limit of that variance as `t -> infinity`, as in the published ARL tables.
    Asymptotic,
}

/// One step of an EWMA chart.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EwmaStep {
    /// `z_t = lambda x_t + (1 - lambda) z_{t-1}`, `z_0 = mean`.
    pub z: f64,
    pub lower: f64,
    pub upper: f64,
    pub alarm: Option<Side>,
}

/// The sd of the EWMA at step `t` (1-based) for observations of sd `sigma`.
pub fn ewma_sd(sigma: f64, lambda: f64, t: usize, limits: EwmaLimits) -> f64 {
    let asymptotic = lambda / (2.0 - lambda);
    let factor = match limits {
        EwmaLimits::Exact => asymptotic * (1.0 - (1.0 - lambda).powi(2 * t as i32)),
        EwmaLimits::Asymptotic => asymptotic,
    };
    sigma * factor.sqrt()
}

/// The EWMA chart of `values` with in-control `mean` and `sd`, starting at `z_0 = mean`.
/// NaN values are skipped (z carries over). No reset after an alarm: the chart shows how
/// long the shift lasts.
pub fn ewma(values: &[f64], mean: f64, sd: f64, params: &EwmaParams) -> Vec<EwmaStep> {
    let mut z = mean;
    let mut t = 0;
    values
        .iter()
        .map(|&x| {
            if !x.is_nan() {
                t += 1;
                z = params.lambda * x + (1.0 - params.lambda) * z;
            }
            let half_width = params.width * ewma_sd(sd, params.lambda, t.max(1), params.limits);
            let (lower, upper) = (mean - half_width, mean + half_width);
            let alarm = if z > upper {
                Some(Side::Upper)
            } else if z < lower {
                Some(Side::Lower)
            } else {
                None
            };
            EwmaStep { z, lower, upper, alarm }
        })
        .collect()
}

/// Index of the first step that alarmed, if any.
pub fn first_alarm<T>(steps: &[T], alarm: impl Fn(&T) -> bool) -> Option<usize> {
    steps.iter().position(alarm)
}

/// Control limits of a p-chart, `pbar +- sigmas sqrt(pbar (1 - pbar) / n)`, clipped to [0, 1].
pub fn p_chart_limits(pbar: f64, n: f64, sigmas: f64) -> (f64, f64) {
    let half_width = sigmas * (pbar * (1.0 - pbar) / n).sqrt();
    ((pbar - half_width).max(0.0), (pbar + half_width).min(1.0))
}

/// A pooled two-proportion z test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TwoProportion {
    /// `(p2 - p1) / sqrt(p (1 - p) (1/n1 + 1/n2))` with the pooled `p`; positive when the second
    /// proportion is larger.
    pub z: f64,
    /// Two-sided p-value from the normal distribution; NaN when undefined.
    pub p_value: f64,
}

/// Compares `x1 / n1` with `x2 / n2`. A pooled proportion of 0 or 1 gives z = 0, p = 1.
pub fn two_proportion_z(x1: f64, n1: f64, x2: f64, n2: f64) -> TwoProportion {
    if n1 <= 0.0 || n2 <= 0.0 {
        return TwoProportion { z: f64::NAN, p_value: f64::NAN };
    }
    let pooled = (x1 + x2) / (n1 + n2);
    let se = (pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n2)).sqrt();
    if se == 0.0 {
        return TwoProportion { z: 0.0, p_value: 1.0 };
    }
    let z = (x2 / n2 - x1 / n1) / se;
    TwoProportion { z, p_value: erfc(z.abs() / std::f64::consts::SQRT_2) }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand::rngs::StdRng;
    use rand_distr::{Distribution, StandardNormal};

    fn close(got: f64, want: f64, tolerance: f64) -> bool {
        (got - want).abs() < tolerance
    }

    /// Run lengths until the first alarm of a chart fed N(shift, 1) values, capped at `cap`.
    fn run_lengths(
        runs: usize,
        seed: u64,
        shift: f64,
        mut chart: impl FnMut(&mut dyn FnMut() -> f64) -> usize,
    ) -> Vec<f64> {
        let mut rng = StdRng::seed_from_u64(seed);
        (0..runs)
            .map(|_| {
                let mut draw =
                    || shift + <StandardNormal as Distribution<f64>>::sample(&StandardNormal, &mut rng);
                chart(&mut draw) as f64
            })
            .collect()
    }

    /// Mean and its Monte Carlo standard error.
    fn mean_and_se(values: &[f64]) -> (f64, f64) {
        let (mean, sd) = crate::analysis::aberration::mean_and_sd(values);
        (mean, sd / (values.len() as f64).sqrt())
    }

    fn cusum_run(params: CusumParams) -> impl FnMut(&mut dyn FnMut() -> f64) -> usize {
        move |draw| {
            let mut state = CusumState::default();
            (1..).find(|_| state.step(draw(), &params).is_some()).unwrap()
        }
    }

    fn ewma_run(params: EwmaParams) -> impl FnMut(&mut dyn FnMut() -> f64) -> usize {
        move |draw| {
            let mut z = 0.0;
            (1..)
                .find(|&t| {
                    z = params.lambda * draw() + (1.0 - params.lambda) * z;
                    z.abs() > params.width * ewma_sd(1.0, params.lambda, t, params.limits)
                })
                .unwrap()
        }
    }

    /// Checks a simulated ARL against a reference within 4 Monte Carlo standard errors plus
    /// the rounding of the published value (`rounding`).
    fn assert_arl(lengths: &[f64], want: f64, rounding: f64) {
        let (arl, se) = mean_and_se(lengths);
        assert!((arl - want).abs() < 4.0 * se + rounding, "ARL {arl:.2} (se {se:.2}) vs {want}");
    }

    /// Montgomery and Runger's table (docs/validation.md): two-sided tabular CUSUM, k = 0.5,
    /// in-control ARL 168 (h = 4) and 465 (h = 5). A run length is close to geometric, so its
    /// sd is about the ARL and the standard error of the mean of n runs is ARL / sqrt(n):
    /// 8,000 runs give about 1.2% (2 for h = 4, 5 for h = 5); the bound is 4 se plus the
    /// rounding of the table.
    #[test]
    fn cusum_in_control_arl_matches_the_table() {
        let h4 = run_lengths(8_000, 11, 0.0, cusum_run(CusumParams { k: 0.5, h: 4.0 }));
        assert_arl(&h4, 168.0, 0.5);
        let h5 = run_lengths(6_000, 12, 0.0, cusum_run(CusumParams { k: 0.5, h: 5.0 }));
        assert_arl(&h5, 465.0, 0.5);
    }

    /// Same table: a one-sd shift is detected after 8.38 (h = 4) and 10.4 (h = 5) on average.
    #[test]
    fn cusum_shift_arl_matches_the_table() {
        let h4 = run_lengths(20_000, 13, 1.0, cusum_run(CusumParams { k: 0.5, h: 4.0 }));
        assert_arl(&h4, 8.38, 0.005);
        let h5 = run_lengths(20_000, 14, 1.0, cusum_run(CusumParams { k: 0.5, h: 5.0 }));
        assert_arl(&h5, 10.4, 0.05);
    }

    /// EWMA lambda = 0.25, L = 3, asymptotic limits: one-sd shift ARL 11.154267 (published,
    /// docs/validation.md), in-control ARL 502.9 (Brook & Evans Markov chain with 201 states,
    /// computed for this check; Lucas & Saccucci's table has 500 for L = 2.998, from memory).
    #[test]
    fn ewma_arl_matches_published_values() {
        let asymptotic = EwmaParams { lambda: 0.25, width: 3.0, limits: EwmaLimits::Asymptotic };
        let shifted = run_lengths(20_000, 21, 1.0, ewma_run(asymptotic));
        assert_arl(&shifted, 11.154267, 0.0);
        let in_control = run_lengths(5_000, 22, 0.0, ewma_run(asymptotic));
        assert_arl(&in_control, 502.9, 1.0);
        // Exact limits are narrower at the start, so a shift present from the start is caught
        // sooner on average (Lucas & Saccucci 1990).
        let exact =
            run_lengths(20_000, 21, 1.0, ewma_run(EwmaParams { limits: EwmaLimits::Exact, ..asymptotic }));
        assert!(mean_and_se(&exact).0 < mean_and_se(&shifted).0 - 0.2);
    }

    /// docs/validation.md: mu0 = 10, sigma = 1, lambda = 0.2, L = 3, exact limits; the first
    /// signal is at t = 8.
    #[test]
    fn ewma_reference_series_signals_at_t8() {
        let x = [10.5, 9.2, 10.1, 11.0, 10.8, 11.6, 12.1, 11.9];
        let steps = ewma(&x, 10.0, 1.0, &EwmaParams::default());
        assert_eq!(first_alarm(&steps, |s| s.alarm.is_some()), Some(7));
        assert_eq!(steps[7].alarm, Some(Side::Upper));
        // z_1 = 0.2 * 10.5 + 0.8 * 10 = 10.1; limit at t = 1 is 3 * 0.2 = 0.6.
        assert!(close(steps[0].z, 10.1, 1e-12) && close(steps[0].upper, 10.6, 1e-12));
    }

    #[test]
    fn cusum_restarts_after_an_alarm_and_skips_nan() {
        let params = CusumParams { k: 0.5, h: 2.0 };
        let steps = cusum(&[12.0, 12.0, f64::NAN, 8.0, 5.0], 10.0, 1.0, &params);
        // z = 2, 2: C+ = 1.5, 3.0 (alarm, restart); NaN keeps 0; z = -2: C- = 1.5; z = -5: 6.0.
        let alarms: Vec<Option<Side>> = steps.iter().map(|s| s.alarm).collect();
        assert_eq!(alarms, vec![None, Some(Side::Upper), None, None, Some(Side::Lower)]);
        assert_eq!((steps[2].upper, steps[3].lower), (0.0, 1.5));
    }

    /// Textbook p-chart example (docs/validation.md): pbar = 0.16, n = 200 -> 0.0822..0.2378.
    #[test]
    fn p_chart_limits_match_the_textbook() {
        let (lower, upper) = p_chart_limits(0.16, 200.0, 3.0);
        assert!(close(lower, 0.0822, 5e-5) && close(upper, 0.2378, 5e-5), "{lower} {upper}");
        assert_eq!(p_chart_limits(0.01, 10.0, 3.0).0, 0.0);
    }

    /// docs/validation.md: 30/200 vs 50/200 -> z = 2.5, two-sided p = 0.0124193 (scipy).
    #[test]
    fn two_proportion_z_matches_scipy() {
        let test = two_proportion_z(30.0, 200.0, 50.0, 200.0);
        assert!(close(test.z, 2.5, 1e-12) && close(test.p_value, 0.0124193, 1e-7), "{test:?}");
        assert_eq!(two_proportion_z(0.0, 10.0, 0.0, 10.0).p_value, 1.0);
        assert!(two_proportion_z(1.0, 0.0, 1.0, 5.0).z.is_nan());
    }
}
