//! Seeded simulation of reporting triangles with known truth, for testing and backtesting
//! nowcasts. Each reference day draws its eventual count (Poisson, or negative binomial when a
//! dispersion is given) around an expected incidence curve, then spreads the cases over
//! reporting delays 0..=D with a multinomial draw from a delay pmf, which may switch to
//! another pmf from a given reference day (a delay shift). The triangle holds what would be
//! known on each snapshot day; the returned truth is the eventual count of each reference day
//! (everything reported by delay D). Deterministic for a seed; no IO, no clock.

use chrono::{Datelike, Days, NaiveDate};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Binomial, Distribution, Gamma, Poisson};
use statrs::distribution::{ContinuousCDF, Gamma as GammaDist};

use super::triangle::Triangle;

/// Reference date of row 0 of every simulated triangle.
pub const SIMULATION_START: NaiveDate = match NaiveDate::from_ymd_opt(2026, 1, 1) {
    Some(date) => date,
    None => panic!("invalid simulation start"),
};

/// A simulated surveillance series with known truth.
#[derive(Debug, Clone, PartialEq)]
pub struct Scenario {
    /// Number of reference days (and snapshot days: the last snapshot is on the last day).
    pub days: usize,
    /// Maximum delay D: a case is always reported within D days.
    pub max_delay: usize,
    /// Expected eventual count by reference day (`days` values; missing values count as 0).
    pub incidence: Vec<f64>,
    /// Delay pmf over 0..=max_delay before the shift (normalised on use).
    pub delay_before: Vec<f64>,
    /// Delay pmf over 0..=max_delay from `shift_day` on (normalised on use).
    pub delay_after: Vec<f64>,
    /// Reference day from which `delay_after` applies; `None`: `delay_before` throughout.
    pub shift_day: Option<usize>,
    /// Negative-binomial size k of the daily counts (variance mu + mu^2 / k); `None`: Poisson.
    pub dispersion: Option<f64>,
    /// When reports can be made (weekends, holidays); `None`: every day alike.
    pub calendar: Option<ReportCalendar>,
}

/// The reporting calendar: a case due to be reported on a day is reported then with that
/// day's probability, and otherwise carried to the next day (a weekend lull and a catch-up
/// on the first working day). Cases never go past the maximum delay.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportCalendar {
    /// Probability of reporting on each weekday, Monday first.
    pub weekday: [f64; 7],
    /// Days (as offsets from the first reference day) on which nothing is reported.
    pub closed: Vec<usize>,
}

impl ReportCalendar {
    /// Probability that a case due on day `day` (offset from the first reference day) is
    /// reported that day.
    pub fn share(&self, day: usize) -> f64 {
        if self.closed.contains(&day) {
            return 0.0;
        }
        let date = SIMULATION_START + Days::new(day as u64);
        self.weekday[date.weekday().num_days_from_monday() as usize].clamp(0.0, 1.0)
    }
}

impl Scenario {
    /// A scenario whose delay distribution never changes, with Poisson counts.
    pub fn constant_delay(incidence: Vec<f64>, max_delay: usize, delay: Vec<f64>) -> Scenario {
        Scenario {
            days: incidence.len(),
            max_delay,
            incidence,
            delay_before: delay.clone(),
            delay_after: delay,
            shift_day: None,
            dispersion: None,
            calendar: None,
        }
    }

    /// A scenario whose delay pmf switches from `before` to `after` at reference day
    /// `shift_day`, with Poisson counts.
    pub fn delay_shift(
        incidence: Vec<f64>,
        max_delay: usize,
        before: Vec<f64>,
        after: Vec<f64>,
        shift_day: usize,
    ) -> Scenario {
        Scenario {
            days: incidence.len(),
            max_delay,
            incidence,
            delay_before: before,
            delay_after: after,
            shift_day: Some(shift_day),
            dispersion: None,
            calendar: None,
        }
    }

    /// The delay pmf that applies to reference day `t`, normalised over 0..=max_delay.
    pub fn delay_pmf(&self, t: usize) -> Vec<f64> {
        let shifted = self.shift_day.is_some_and(|s| t >= s);
        normalised_pmf(if shifted { &self.delay_after } else { &self.delay_before }, self.max_delay)
    }
}

/// Draws one reporting triangle and the true eventual counts from a scenario. The triangle's
/// row 0 is `SIMULATION_START` and its last snapshot day is the last reference day.
pub fn simulate(s: &Scenario, seed: u64) -> (Triangle, Vec<f64>) {
    let mut rng = StdRng::seed_from_u64(seed);
    let increments: Vec<Vec<u64>> = (0..s.days)
        .map(|t| {
            let mean = s.incidence.get(t).copied().unwrap_or(0.0);
            let total = draw_count(&mut rng, mean, s.dispersion);
            let due = draw_multinomial(&mut rng, total, &s.delay_pmf(t));
            match &s.calendar {
                Some(calendar) => postpone(&mut rng, due, |d| calendar.share(t + d)),
                None => due,
            }
        })
        .collect();
    let truth = increments.iter().map(|row| row.iter().sum::<u64>() as f64).collect();
    let cumulative: Vec<Vec<f64>> = increments
        .iter()
        .map(|row| {
            row.iter()
                .scan(0u64, |sum, &n| {
                    *sum += n;
                    Some(*sum as f64)
                })
                .collect()
        })
        .collect();
    let last_day = simulated_last_day(s.days);
    let triangle = Triangle::from_fn(SIMULATION_START, last_day, s.max_delay, |t, d| cumulative[t][d]);
    (triangle, truth)
}

/// The last snapshot day of a simulation with `days` reference days (the day before the
/// start when there are none, which gives an empty triangle).
fn simulated_last_day(days: usize) -> NaiveDate {
    match days.checked_sub(1) {
        Some(last) => SIMULATION_START + Days::new(last as u64),
        None => SIMULATION_START - Days::new(1),
    }
}

/// An eventual count with mean `mean`: Poisson, or negative binomial (a gamma-Poisson
/// mixture) with size `dispersion`.
fn draw_count(rng: &mut impl Rng, mean: f64, dispersion: Option<f64>) -> u64 {
    if !(mean.is_finite() && mean > 0.0) {
        return 0;
    }
    let rate = match dispersion {
        Some(size) if size.is_finite() && size > 0.0 => match Gamma::new(size, mean / size) {
            Ok(gamma) => gamma.sample(rng),
            Err(_) => mean,
        },
        _ => mean,
    };
    match Poisson::new(rate.min(Poisson::<f64>::MAX_LAMBDA)) {
        Ok(poisson) => poisson.sample(rng) as u64,
        Err(_) => 0,
    }
}

/// Spreads `total` cases over delays 0..pmf.len() by sequential binomial draws.
fn draw_multinomial(rng: &mut impl Rng, total: u64, pmf: &[f64]) -> Vec<u64> {
    let mut remaining = total;
    let mut mass_left = 1.0;
    let mut counts = vec![0; pmf.len()];
    for (d, &p) in pmf.iter().enumerate() {
        if remaining == 0 {
            break;
        }
        let share =
            if d + 1 == pmf.len() || mass_left <= 0.0 { 1.0 } else { (p / mass_left).clamp(0.0, 1.0) };
        let drawn = Binomial::new(remaining, share).map(|b| b.sample(rng)).unwrap_or(remaining);
        counts[d] = drawn;
        remaining -= drawn;
        mass_left -= p;
    }
    counts
}

/// Cases due at each delay, after carrying those not reported on their due day to the next
/// day (`share(d)`: the probability of reporting at delay d); the last delay keeps them all.
fn postpone(rng: &mut impl Rng, mut due: Vec<u64>, share: impl Fn(usize) -> f64) -> Vec<u64> {
    let last = due.len().saturating_sub(1);
    for d in 0..last {
        let reported = Binomial::new(due[d], share(d)).map(|b| b.sample(rng)).unwrap_or(due[d]);
        due[d + 1] += due[d] - reported;
        due[d] = reported;
    }
    due
}

/// A pmf cut or padded to 0..=max_delay and normalised; negative or non-finite weights count
/// as zero, and an all-zero pmf becomes "everything reported on day 0".
pub fn normalised_pmf(pmf: &[f64], max_delay: usize) -> Vec<f64> {
    let mut out: Vec<f64> = (0..=max_delay)
        .map(|d| pmf.get(d).copied().filter(|p| p.is_finite() && *p > 0.0).unwrap_or(0.0))
        .collect();
    let total: f64 = out.iter().sum();
    if total > 0.0 {
        out.iter_mut().for_each(|p| *p /= total);
    } else {
        out[0] = 1.0;
    }
    out
}

/// A discretised gamma delay pmf over 0..=max_delay with the given mean and coefficient of
/// variation: `P(d) = F(d + 1) - F(d)` (the delay in whole days, rounded down), conditioned on
/// `d <= max_delay`.
pub fn discretised_gamma(mean: f64, cv: f64, max_delay: usize) -> Vec<f64> {
    let shape = 1.0 / (cv * cv);
    let Ok(gamma) = GammaDist::new(shape, shape / mean) else {
        return normalised_pmf(&[], max_delay);
    };
    let pmf: Vec<f64> = (0..=max_delay).map(|d| gamma.cdf(d as f64 + 1.0) - gamma.cdf(d as f64)).collect();
    normalised_pmf(&pmf, max_delay)
}

/// The mean of a pmf over 0..pmf.len().
pub fn pmf_mean(pmf: &[f64]) -> f64 {
    pmf.iter().enumerate().map(|(d, p)| d as f64 * p).sum::<f64>() / pmf.iter().sum::<f64>()
}

/// A rising-and-falling expected incidence curve over `days` reference days: `baseline` plus
/// a bump of height `peak - baseline` at `peak_day`, Gaussian-shaped with width `rise` days
/// before the peak and `fall` days after it.
pub fn epidemic_curve(
    days: usize,
    baseline: f64,
    peak: f64,
    peak_day: f64,
    rise: f64,
    fall: f64,
) -> Vec<f64> {
    (0..days)
        .map(|t| {
            let offset = t as f64 - peak_day;
            let width = if offset < 0.0 { rise } else { fall };
            baseline + (peak - baseline) * (-0.5 * (offset / width.max(1e-9)).powi(2)).exp()
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn discretised_gamma_has_the_requested_mean() {
        // Check: the mean of a gamma(k, rate b) is k / b (textbook); rounding delays down to
        // whole days lowers it by about half a day (practice).
        let pmf = discretised_gamma(5.0, 0.5, 60);
        assert!((pmf.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!((pmf_mean(&pmf) - 4.5).abs() < 0.05, "mean {}", pmf_mean(&pmf));
    }

    #[test]
    fn simulation_is_seeded_and_consistent() {
        let incidence = epidemic_curve(40, 5.0, 80.0, 25.0, 8.0, 10.0);
        let s = Scenario::delay_shift(
            incidence,
            10,
            discretised_gamma(2.0, 0.6, 10),
            discretised_gamma(6.0, 0.6, 10),
            30,
        );
        let (tri, truth) = simulate(&s, 7);
        let (again, truth_again) = simulate(&s, 7);
        assert_eq!((tri.clone(), truth.clone()), (again, truth_again));
        assert_eq!(tri.rows(), 40);
        assert_eq!(tri.date(0), SIMULATION_START);
        for (t, &eventual) in truth.iter().enumerate() {
            // Complete rows show the whole truth; others at most the truth, never decreasing.
            assert!(tri.cumulative[t].windows(2).all(|w| w[0] <= w[1]));
            if tri.observed_delay(t) == 10 {
                assert_eq!(tri.latest(t), eventual);
            } else {
                assert!(tri.latest(t) <= eventual);
            }
        }
    }

    #[test]
    fn counts_follow_the_expected_incidence() {
        // Check (simulation with known truth): the sample mean of Poisson and negative-binomial
        // draws with mean 50 is within 4 standard errors of 50 over 400 days.
        for dispersion in [None, Some(5.0)] {
            let s = Scenario {
                dispersion,
                ..Scenario::constant_delay(vec![50.0; 400], 3, vec![0.4, 0.3, 0.2, 0.1])
            };
            let (_, truth) = simulate(&s, 11);
            let mean = truth.iter().sum::<f64>() / 400.0;
            let variance = 50.0 + dispersion.map_or(0.0, |k| 2500.0 / k);
            assert!((mean - 50.0).abs() < 4.0 * (variance / 400.0).sqrt(), "{dispersion:?}: mean {mean}");
        }
    }

    #[test]
    fn a_closed_day_carries_its_reports_to_the_next_day() {
        // Check (construction): with day 3 closed and weekends at 0, nothing is reported on
        // those days and no case is lost.
        let mut s = Scenario::constant_delay(vec![40.0; 20], 6, vec![0.3, 0.3, 0.2, 0.1, 0.1]);
        s.calendar = Some(ReportCalendar { weekday: [1.0, 1.0, 1.0, 1.0, 1.0, 0.0, 0.0], closed: vec![3] });
        let (tri, truth) = simulate(&s, 5);
        let increments = tri.increments().n;
        for (t, row) in increments.iter().enumerate() {
            for (d, &n) in row.iter().enumerate().take(6) {
                if s.calendar.as_ref().unwrap().share(t + d) == 0.0 {
                    assert_eq!(n, 0.0, "reference day {t}, delay {d}");
                }
            }
        }
        for (t, &eventual) in truth.iter().enumerate().take(14) {
            assert_eq!(tri.latest(t), eventual, "reference day {t}");
        }
    }

    #[test]
    fn empty_and_zero_scenarios() {
        let (tri, truth) = simulate(&Scenario::constant_delay(vec![], 5, vec![1.0]), 1);
        assert_eq!((tri.rows(), truth.len()), (0, 0));
        let (tri, truth) = simulate(&Scenario::constant_delay(vec![0.0; 6], 5, vec![]), 1);
        assert_eq!(tri.rows(), 6);
        assert!(truth.iter().all(|&n| n == 0.0));
    }
}
