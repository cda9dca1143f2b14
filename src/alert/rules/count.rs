//! The count-aberration rules on the daily counts by report date: the short-baseline
//! z-scores `count_z_recent` (C1), `count_z_guarded` (C2) and `count_z_guarded_3day` (C3),
//! and the optional count CUSUM. Days before a source's first data are unknown, not zero: the
//! caller passes the series from the first known day, and a rule whose baseline does not fit
//! in it (or whose baseline mean is under the configured minimum) neither raises nor clears.

use chrono::{Days, NaiveDate};

use super::{above, cases, cell, counted, subject_suffix, whole_or_decimal};
use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::analysis::aberration::{self, C2_GUARD_DAYS, SHORT_BASELINE_DAYS, Standardised};
use crate::analysis::arl;
use crate::config::rules::{CountCusumParams, CountFamily, CountParams, CusumInterval};

/// Input of [`count_aberration`]: daily counts by report date for one jurisdiction, oldest
/// first, from the first day the source has data for, the day to test last.
#[derive(Debug, Clone, PartialEq)]
pub struct CountInput {
    pub source: String,
    /// The jurisdiction (or other stratum); empty for the whole source.
    pub subject: String,
    pub daily_counts: Vec<f64>,
    /// The report date of the last count (the day tested).
    pub last_day: NaiveDate,
}

impl CountInput {
    /// The report date of `counts[index]`.
    fn day(&self, index: usize) -> NaiveDate {
        let back = (self.daily_counts.len() - 1 - index) as u64;
        self.last_day.checked_sub_days(Days::new(back)).unwrap_or(self.last_day)
    }
}

/// Known days each rule needs, the day tested included.
pub fn days_needed(rule: Rule, params: &CountParams) -> usize {
    match rule {
        Rule::CountZRecent => SHORT_BASELINE_DAYS + 1,
        Rule::CountZGuarded => SHORT_BASELINE_DAYS + C2_GUARD_DAYS + 1,
        Rule::CountZGuarded3Day => SHORT_BASELINE_DAYS + C2_GUARD_DAYS + 3,
        _ => params.cusum.map_or(0, |c| c.baseline_days + c.guard_days + 1),
    }
}

/// Days of CUSUM run-in beyond its first complete baseline that the caller passes, so the
/// sum is that of a chart running since then rather than rebuilt from a day or two.
pub const CUSUM_RUN_IN_DAYS: usize = 90;

/// Days of counts the caller should pass (the day tested included): enough for every
/// enabled rule, and the CUSUM's run-in.
pub fn count_history_days(params: &CountParams) -> usize {
    let cusum = params.cusum.map_or(0, |_| days_needed(Rule::CountCusum, params) + CUSUM_RUN_IN_DAYS);
    cusum.max(days_needed(Rule::CountZGuarded3Day, params))
}

/// The enabled count rules on the latest day, one `(rule, outcome)` per rule, in the order
/// C1, C2, C3, CUSUM.
pub fn count_aberration(input: &CountInput, params: &CountParams) -> Vec<(Rule, Outcome)> {
    if input.daily_counts.is_empty() {
        return Vec::new();
    }
    let mut outcomes = Vec::new();
    if params.z_recent {
        outcomes.push((Rule::CountZRecent, standardised_outcome(input, params, Rule::CountZRecent)));
    }
    if params.z_guarded {
        outcomes.push((Rule::CountZGuarded, standardised_outcome(input, params, Rule::CountZGuarded)));
    }
    if params.z_guarded_3day {
        outcomes.push((Rule::CountZGuarded3Day, three_day_outcome(input, params)));
    }
    if let Some(cusum) = &params.cusum {
        outcomes.push((Rule::CountCusum, count_cusum_outcome(input, params, cusum)));
    }
    outcomes
}

/// One outcome for the count episode of one subject (the count rules share one alert; see
/// `Rule::episode`): the strongest signal (highest severity, then the largest statistic
/// relative to its threshold), else clear when any rule decided, else not enough data with
/// every rule's reason. `None` when no count rule is enabled.
pub fn count_episode(outcomes: Vec<(Rule, Outcome)>) -> Option<(Rule, Outcome)> {
    let strength = |s: &Signal| (s.severity, s.observed / s.threshold.max(f64::MIN_POSITIVE));
    let strongest = outcomes
        .iter()
        .filter_map(|(rule, o)| o.signal().map(|s| (*rule, s)))
        .max_by(|a, b| strength(a.1).partial_cmp(&strength(b.1)).unwrap_or(std::cmp::Ordering::Equal));
    if let Some((rule, signal)) = strongest {
        return Some((rule, Outcome::Signal(signal.clone())));
    }
    if let Some((rule, _)) = outcomes.iter().find(|(_, o)| o.is_clear()) {
        return Some((*rule, Outcome::Clear));
    }
    let reasons: Vec<String> = outcomes
        .iter()
        .filter_map(|(rule, o)| match o {
            Outcome::NotEnoughData(why) => Some(format!("{}: {why}", rule.name())),
            _ => None,
        })
        .collect();
    let first = outcomes.first()?.0;
    Some((first, Outcome::NotEnoughData(reasons.join("; "))))
}

/// `NotEnoughData` when the series is shorter than the rule needs.
fn too_short(input: &CountInput, rule: Rule, params: &CountParams) -> Option<Outcome> {
    let (needed, known) = (days_needed(rule, params), input.daily_counts.len());
    (known < needed).then(|| {
        Outcome::NotEnoughData(format!(
            "needs {needed} known days of counts, has {}",
            counted(known as f64, "day", "days")
        ))
    })
}

/// `NotEnoughData` when the baseline mean is under the minimum expected count.
fn too_few_expected(mean: f64, params: &CountParams) -> Option<Outcome> {
    (mean < params.min_expected).then(|| {
        Outcome::NotEnoughData(format!(
            "baseline mean {mean:.2} cases a day, under the minimum expected count {}",
            whole_or_decimal(params.min_expected)
        ))
    })
}

/// C1 or C2 on the last day.
fn standardised_outcome(input: &CountInput, params: &CountParams, rule: Rule) -> Outcome {
    if let Some(short) = too_short(input, rule, params) {
        return short;
    }
    let (counts, t, z) = (&input.daily_counts, input.daily_counts.len() - 1, &params.z);
    let (stat, threshold, lag) = match rule {
        Rule::CountZRecent => (aberration::c1(counts, t, z.floor()), z.recent_threshold, 1),
        _ => (aberration::c2(counts, t, z.floor()), z.guarded_threshold, 1 + C2_GUARD_DAYS),
    };
    let Some(s) = stat else { return Outcome::NotEnoughData("no baseline".into()) };
    if let Some(few) = too_few_expected(s.baseline_mean, params) {
        return few;
    }
    if s.value <= threshold {
        return Outcome::Clear;
    }
    let (from, to) = (input.day(t - lag + 1 - SHORT_BASELINE_DAYS), input.day(t - lag));
    let summary = format!(
        "{}: z = {} against the 7 report days {from} to {to} (mean {:.1}, sd {:.1} cases a day)",
        headline(input, s.observed, params),
        above(s.value, threshold),
        s.baseline_mean,
        s.baseline_sd
    );
    Outcome::Signal(count_signal(input, rule, s.value, threshold, standardised_figures(&s), summary))
}

fn standardised_figures(s: &Standardised) -> Vec<Figure> {
    vec![
        Figure::new("count", s.observed),
        Figure::new("baseline_mean", s.baseline_mean),
        Figure::new("baseline_sd", s.baseline_sd),
    ]
}

/// "labs (North): 12 cases reported on 2026-03-11".
fn headline(input: &CountInput, count: f64, params: &CountParams) -> String {
    format!(
        "{}{}: {} reported on {}",
        input.source,
        subject_suffix(&input.subject),
        cases(count, params.small_cell_max),
        input.last_day
    )
}

/// C3 on the last day: the three days' counts, their guarded excesses and the sum.
fn three_day_outcome(input: &CountInput, params: &CountParams) -> Outcome {
    if let Some(short) = too_short(input, Rule::CountZGuarded3Day, params) {
        return short;
    }
    let (counts, t, z) = (&input.daily_counts, input.daily_counts.len() - 1, &params.z);
    let days: Option<Vec<Standardised>> = (t - 2..=t).map(|i| aberration::c2(counts, i, z.floor())).collect();
    let Some(days) = days else { return Outcome::NotEnoughData("no baseline".into()) };
    let mean = days.iter().map(|s| s.baseline_mean).fold(f64::INFINITY, f64::min);
    if let Some(few) = too_few_expected(mean, params) {
        return few;
    }
    let value: f64 = days.iter().map(|s| (s.value - 1.0).max(0.0)).sum();
    let threshold = z.guarded_3day_threshold;
    if value <= threshold {
        return Outcome::Clear;
    }
    let counts_text: Vec<String> = days.iter().map(|s| cell(s.observed, params.small_cell_max)).collect();
    let total: f64 = days.iter().map(|s| s.observed).sum();
    let last = days[2];
    let summary = format!(
        "{}{}: {} reported on {} to {} ({}); sum of the three days' guarded excesses {} \
         (latest baseline mean {:.1}, sd {:.1} cases a day)",
        input.source,
        subject_suffix(&input.subject),
        cases(total, params.small_cell_max),
        input.day(t - 2),
        input.last_day,
        counts_text.join(", "),
        above(value, threshold),
        last.baseline_mean,
        last.baseline_sd
    );
    let mut figures = vec![Figure::new("three_day_count", total)];
    figures.extend(standardised_figures(&last));
    Outcome::Signal(count_signal(input, Rule::CountZGuarded3Day, value, threshold, figures, summary))
}

/// Per-day reference values and decision intervals of the count CUSUM, from each day's moving
/// baseline; NaN where the baseline is not complete.
pub fn count_cusum_references(counts: &[f64], params: &CountCusumParams) -> Vec<(f64, f64)> {
    (0..counts.len()).map(|t| cusum_reference(counts, t, params).unwrap_or((f64::NAN, f64::NAN))).collect()
}

/// `(k, h)` of day `t`, or `None` while its baseline is not complete.
fn cusum_reference(counts: &[f64], t: usize, params: &CountCusumParams) -> Option<(f64, f64)> {
    let end = t.checked_sub(params.guard_days + 1)?;
    let start = (end + 1).checked_sub(params.baseline_days)?;
    let baseline = &counts[start..=end];
    let (mean, sd) = aberration::mean_and_sd(baseline);
    let (expected, ratio, uncertainty) = if params.follow_trend {
        let lead = (params.baseline_days as f64 - 1.0) / 2.0 + params.guard_days as f64 + 1.0;
        let fit = aberration::fit_trend(baseline);
        (mean * fit.projection(lead), fit.dispersion, fit.projection_variance(lead))
    } else {
        (mean, if mean > 0.0 { sd * sd / mean } else { 1.0 }, 0.0)
    };
    let mu0 = expected.max(params.min_mean);
    let variance = match params.family {
        CountFamily::Poisson => mu0,
        CountFamily::NegativeBinomial => ratio.max(1.0) * mu0 + uncertainty * mu0 * mu0,
    };
    match params.interval {
        CusumInterval::Calibrated { in_control_arl_days } => {
            let design = arl::design_count_cusum(mu0, variance, params.shift_sds, in_control_arl_days);
            Some((design.reference, design.interval))
        }
        CusumInterval::FixedSds(h_sds) => {
            let sd0 = variance.sqrt();
            let mu1 = mu0 + params.shift_sds * sd0;
            let k = if variance > mu0 * (1.0 + 1e-9) {
                aberration::negative_binomial_reference_value(mu0, mu1, mu0 * mu0 / (variance - mu0))
            } else {
                aberration::poisson_reference_value(mu0, mu1)
            };
            Some((k, h_sds * sd0))
        }
    }
}

/// The CUSUM over the whole known series (the caller passes up to its configured history),
/// so its sum carries over from every earlier day with a complete baseline.
fn count_cusum_outcome(input: &CountInput, params: &CountParams, cusum: &CountCusumParams) -> Outcome {
    if let Some(short) = too_short(input, Rule::CountCusum, params) {
        return short;
    }
    let counts = &input.daily_counts;
    let (references, intervals): (Vec<f64>, Vec<f64>) =
        count_cusum_references(counts, cusum).into_iter().unzip();
    let days = aberration::count_cusum(counts, &references, &intervals);
    let (Some(last), Some(&h)) = (days.last(), intervals.last()) else {
        return Outcome::NotEnoughData("no baseline".into());
    };
    if !last.alarm {
        return Outcome::Clear;
    }
    let summary = format!(
        "{}: count CUSUM {} cases of excess over the reference value {:.1} cases a day \
         ({}-day baseline ending {})",
        headline(input, counts[counts.len() - 1], params),
        above(last.statistic, h),
        last.reference,
        cusum.baseline_days,
        input.day(counts.len() - 2 - cusum.guard_days)
    );
    let figures =
        vec![Figure::new("count", counts[counts.len() - 1]), Figure::new("reference_value", last.reference)];
    Outcome::Signal(count_signal(input, Rule::CountCusum, last.statistic, h, figures, summary))
}

fn count_signal(
    input: &CountInput,
    rule: Rule,
    value: f64,
    threshold: f64,
    figures: Vec<Figure>,
    summary: String,
) -> Signal {
    Signal {
        rule,
        source: input.source.clone(),
        subject: input.subject.clone(),
        severity: if value >= 2.0 * threshold { Severity::Critical } else { Severity::Warning },
        measure: rule.name(),
        observed: value,
        threshold,
        summary,
        figures,
    }
}
