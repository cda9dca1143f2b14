//! The count-aberration rules: EARS C1, C2, C3 and the optional count CUSUM on the daily counts
//! by report date.

use super::subject_suffix;
use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::analysis::aberration;
use crate::config::rules::{CountCusumParams, CountFamily, CountParams};

/// Input of [`count_aberration`]: daily counts by report date for one jurisdiction, oldest
/// first, the day to test last.
#[derive(Debug, Clone, PartialEq)]
pub struct CountInput {
    pub source: String,
    /// The jurisdiction (or other stratum); empty for the whole source.
    pub subject: String,
    pub daily_counts: Vec<f64>,
}

/// The enabled count rules on the latest day, one `(rule, outcome)` per rule, in the order
/// C1, C2, C3, CUSUM.
pub fn count_aberration(input: &CountInput, params: &CountParams) -> Vec<(Rule, Outcome)> {
    let counts = &input.daily_counts;
    let Some(t) = counts.len().checked_sub(1) else {
        return Vec::new();
    };
    let ears = &params.ears;
    let mut outcomes = Vec::new();
    let standard = |rule, stat: Option<aberration::Standardised>, threshold| {
        let outcome = match stat {
            None => not_enough_days(counts.len()),
            Some(s) if s.value > threshold => Outcome::Signal(count_signal(
                input,
                rule,
                s.value,
                threshold,
                vec![
                    Figure::new("count", s.observed),
                    Figure::new("baseline_mean", s.baseline_mean),
                    Figure::new("baseline_sd", s.baseline_sd),
                ],
            )),
            Some(_) => Outcome::Clear,
        };
        (rule, outcome)
    };
    if params.c1 {
        outcomes.push(standard(Rule::EarsC1, aberration::c1(counts, t, ears.min_sd), ears.c1_threshold));
    }
    if params.c2 {
        outcomes.push(standard(Rule::EarsC2, aberration::c2(counts, t, ears.min_sd), ears.c2_threshold));
    }
    if params.c3 {
        let outcome = match aberration::c3(counts, t, ears.min_sd) {
            None => not_enough_days(counts.len()),
            Some(value) if value > ears.c3_threshold => Outcome::Signal(count_signal(
                input,
                Rule::EarsC3,
                value,
                ears.c3_threshold,
                vec![Figure::new("count", counts[t])],
            )),
            Some(_) => Outcome::Clear,
        };
        outcomes.push((Rule::EarsC3, outcome));
    }
    if let Some(cusum) = &params.cusum {
        outcomes.push((Rule::CountCusum, count_cusum_outcome(input, cusum)));
    }
    outcomes
}

/// Per-day reference values and decision intervals of the count CUSUM, from each day's moving
/// baseline; NaN where the baseline is not complete.
pub fn count_cusum_references(counts: &[f64], params: &CountCusumParams) -> Vec<(f64, f64)> {
    (0..counts.len())
        .map(|t| {
            let Some(end) = t.checked_sub(params.guard_days + 1) else {
                return (f64::NAN, f64::NAN);
            };
            let Some(start) = (end + 1).checked_sub(params.baseline_days) else {
                return (f64::NAN, f64::NAN);
            };
            let (mean, sd) = aberration::mean_and_sd(&counts[start..=end]);
            let mu0 = mean.max(params.min_mean);
            let variance = match params.family {
                CountFamily::Poisson => mu0,
                CountFamily::NegativeBinomial => (sd * sd).max(mu0),
            };
            let sd0 = variance.sqrt();
            let mu1 = mu0 + params.shift_sds * sd0;
            let k = if variance > mu0 * (1.0 + 1e-9) {
                let size = mu0 * mu0 / (variance - mu0);
                aberration::negative_binomial_reference_value(mu0, mu1, size)
            } else {
                aberration::poisson_reference_value(mu0, mu1)
            };
            (k, params.h_sds * sd0)
        })
        .collect()
}

fn count_cusum_outcome(input: &CountInput, params: &CountCusumParams) -> Outcome {
    let counts = &input.daily_counts;
    let (references, intervals): (Vec<f64>, Vec<f64>) =
        count_cusum_references(counts, params).into_iter().unzip();
    let days = aberration::count_cusum(counts, &references, &intervals);
    let (Some(last), Some(&h)) = (days.last(), intervals.last()) else {
        return not_enough_days(counts.len());
    };
    if h.is_nan() {
        return not_enough_days(counts.len());
    }
    if !last.alarm {
        return Outcome::Clear;
    }
    Outcome::Signal(count_signal(
        input,
        Rule::CountCusum,
        last.statistic,
        h,
        vec![Figure::new("count", counts[counts.len() - 1]), Figure::new("reference_value", last.reference)],
    ))
}

fn not_enough_days(days: usize) -> Outcome {
    Outcome::NotEnoughData(format!("{days} days of counts"))
}

fn count_signal(input: &CountInput, rule: Rule, value: f64, threshold: f64, figures: Vec<Figure>) -> Signal {
    let count = figures.first().map_or(f64::NAN, |f| f.value);
    Signal {
        rule,
        source: input.source.clone(),
        subject: input.subject.clone(),
        severity: if value >= 2.0 * threshold { Severity::Critical } else { Severity::Warning },
        measure: rule.name(),
        observed: value,
        threshold,
        summary: format!(
            "{}{}: {} cases on the latest report day, {} = {:.2} above its threshold {:.2}",
            input.source,
            subject_suffix(&input.subject),
            count,
            rule.name(),
            value,
            threshold
        ),
        figures,
    }
}
