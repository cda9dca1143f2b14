//! Seeded simulation of daily monitoring series with injected shifts, and the tally of how a
//! detector did on them: detection rate, false alarms per 100 in-control days, days to
//! detection. Used by the detector benchmark and by tests with known truth. Pure: a seed in,
//! series out; no IO, no clock.

use rand::Rng;
use rand_distr::{Binomial, Distribution, Gamma, Poisson};

/// A daily series that is in control until `start` and shifted from `start` for `length`
/// days (`usize::MAX`: to the end).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Injection {
    pub start: usize,
    pub length: usize,
}

impl Injection {
    /// Whether day `day` is shifted.
    pub fn active(&self, day: usize) -> bool {
        day >= self.start && day - self.start < self.length
    }
}

/// Daily counts with mean `mean`, multiplied by `multiplier` on injected days; Poisson, or
/// negative binomial of size `dispersion` (variance `mu + mu^2 / size`) as a gamma-Poisson
/// mixture.
pub fn counts(
    rng: &mut impl Rng,
    days: usize,
    mean: f64,
    dispersion: Option<f64>,
    injection: Injection,
    multiplier: f64,
) -> Vec<f64> {
    (0..days)
        .map(|day| {
            let mu = if injection.active(day) { mean * multiplier } else { mean };
            let rate = match dispersion {
                Some(size) => Gamma::new(size, mu / size).expect("valid gamma").sample(rng),
                None => mu,
            };
            poisson(rng, rate)
        })
        .collect()
}

/// Reporting lags (days) of `records` records a day: Poisson with mean `mean_lag`, plus
/// `shift_days` on injected days.
pub fn daily_lags(
    rng: &mut impl Rng,
    days: usize,
    records: usize,
    mean_lag: f64,
    injection: Injection,
    shift_days: f64,
) -> Vec<Vec<f64>> {
    (0..days)
        .map(|day| {
            let extra = if injection.active(day) { shift_days } else { 0.0 };
            (0..records).map(|_| poisson(rng, mean_lag) + extra).collect()
        })
        .collect()
}

/// Missing values among `records` records a day: binomial with probability `share`, plus
/// `step` on injected days.
pub fn daily_missing(
    rng: &mut impl Rng,
    days: usize,
    records: u64,
    share: f64,
    injection: Injection,
    step: f64,
) -> Vec<u64> {
    (0..days)
        .map(|day| {
            let p = if injection.active(day) { share + step } else { share };
            Binomial::new(records, p.clamp(0.0, 1.0)).expect("valid binomial").sample(rng)
        })
        .collect()
}

fn poisson(rng: &mut impl Rng, rate: f64) -> f64 {
    if rate <= 0.0 { 0.0 } else { Poisson::new(rate).expect("valid poisson").sample(rng) }
}

/// How one detector did on one simulated series.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RunResult {
    /// Alarms on evaluated days before the injection.
    pub false_alarms: usize,
    /// Evaluated days before the injection.
    pub in_control_days: usize,
    /// Days from the injection to the first alarm within the detection window (0: on the
    /// first shifted day); `None` when missed or when there was no injection.
    pub delay: Option<usize>,
}

/// Tallies one series' alarms: days `evaluate_from..` are evaluated; days before
/// `injection.start` are in control; an alarm on days `start .. start + window` detects.
pub fn tally(
    alarms: &[bool],
    evaluate_from: usize,
    injection: Option<Injection>,
    window: usize,
) -> RunResult {
    let start = injection.map_or(alarms.len(), |i| i.start.min(alarms.len()));
    let from = evaluate_from.min(start);
    let false_alarms = alarms[from..start].iter().filter(|&&a| a).count();
    let delay = injection.and_then(|_| alarms[start..].iter().take(window).position(|&a| a));
    RunResult { false_alarms, in_control_days: start - from, delay }
}

/// A detector's performance over many series.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Performance {
    /// Share of series with an injection that were detected within the window.
    pub detection_rate: f64,
    pub false_alarms_per_100_days: f64,
    /// Median over detected series of the days to detection; NaN when none was detected.
    pub median_delay: f64,
    pub runs: usize,
}

/// Sums a detector's results over series.
pub fn performance(results: &[RunResult]) -> Performance {
    let false_alarms: usize = results.iter().map(|r| r.false_alarms).sum();
    let days: usize = results.iter().map(|r| r.in_control_days).sum();
    let mut delays: Vec<f64> = results.iter().filter_map(|r| r.delay.map(|d| d as f64)).collect();
    delays.sort_by(f64::total_cmp);
    let median_delay = match delays.len() {
        0 => f64::NAN,
        n if n % 2 == 1 => delays[n / 2],
        n => (delays[n / 2 - 1] + delays[n / 2]) / 2.0,
    };
    Performance {
        detection_rate: delays.len() as f64 / results.len().max(1) as f64,
        false_alarms_per_100_days: if days == 0 {
            f64::NAN
        } else {
            100.0 * false_alarms as f64 / days as f64
        },
        median_delay,
        runs: results.len(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand::rngs::StdRng;

    #[test]
    fn injection_and_tally() {
        let injection = Injection { start: 5, length: 3 };
        assert!(!injection.active(4) && injection.active(5) && injection.active(7) && !injection.active(8));
        let alarms = [true, false, true, false, false, false, false, true, false];
        let result = tally(&alarms, 1, Some(injection), 3);
        assert_eq!(result, RunResult { false_alarms: 1, in_control_days: 4, delay: Some(2) });
        assert_eq!(tally(&alarms, 1, Some(injection), 2).delay, None);
        let p = performance(&[result, RunResult { false_alarms: 0, in_control_days: 4, delay: Some(0) }]);
        assert_eq!((p.detection_rate, p.false_alarms_per_100_days, p.median_delay), (1.0, 12.5, 1.0));
    }

    /// Known truth: the simulated means match the asked ones (Poisson and NB variance too).
    #[test]
    fn simulated_series_have_the_asked_moments() {
        let mut rng = StdRng::seed_from_u64(3);
        let never = Injection { start: usize::MAX, length: 0 };
        let nb = counts(&mut rng, 20_000, 10.0, Some(5.0), never, 1.0);
        let (mean, sd) = crate::analysis::aberration::mean_and_sd(&nb);
        // NB variance 10 + 100 / 5 = 30; se of the mean about 0.04.
        assert!((mean - 10.0).abs() < 0.2 && (sd * sd - 30.0).abs() < 2.0, "{mean} {sd}");
        let doubled =
            counts(&mut rng, 4_000, 10.0, None, Injection { start: 2_000, length: usize::MAX }, 2.0);
        let late: f64 = doubled[2_000..].iter().sum::<f64>() / 2_000.0;
        assert!((late - 20.0).abs() < 0.5);
        let missing = daily_missing(&mut rng, 1_000, 100, 0.1, Injection { start: 500, length: 500 }, 0.2);
        let share_after: f64 = missing[500..].iter().sum::<u64>() as f64 / 50_000.0;
        assert!((share_after - 0.3).abs() < 0.01);
        let lags = daily_lags(&mut rng, 2, 5_000, 4.0, Injection { start: 1, length: 1 }, 3.0);
        let mean_after = lags[1].iter().sum::<f64>() / 5_000.0;
        assert!((mean_after - 7.0).abs() < 0.15);
    }
}
