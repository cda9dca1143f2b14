//! The alert rules: measured aggregates in, an [`Outcome`] out. One input type and one
//! parameter type per rule, plain numbers and vectors so the caller can fill them from SQL;
//! each default is documented with its reason. Pure: no IO, no clock (the current time is an
//! argument), no store types. Summaries carry aggregates only, never a patient-level value.
//!
//! Severity mapping (see [`Severity`]):
//! - `missingness_jump`: warning; critical when the latest share is at least 0.95 and rose by
//!   at least 0.5 (the field has all but vanished).
//! - `lag_jump`: warning; critical when the recent median lag is at least twice the baseline
//!   median and at least 2 days more.
//! - `held_snapshot`: always critical (the day's data did not arrive whole).
//! - `volume_drop`: warning; critical when no new records arrived at all.
//! - `stale_source`: warning; critical after twice `expect_every`.
//! - `failing_polls`: warning; critical after twice the allowed failures.
//! - `ears_c1`, `ears_c2`, `ears_c3`, `count_cusum`: warning; critical when the statistic is at
//!   least twice its threshold.

use std::time::Duration;

use chrono::{DateTime, Utc};

use super::{Figure, Outcome, Rule, Severity, Signal};
use crate::analysis::aberration::{self, EarsParams};
use crate::analysis::change::{self, EwmaParams, Side};
use crate::analysis::mannwhitney;

// ---------------------------------------------------------------------------------------------
// missingness jump

/// Parameters of the missingness-jump rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MissingnessParams {
    /// Number of previous snapshots pooled into the baseline share. Default 7: about a week of
    /// daily extracts, long enough to steady the share, short enough to follow a slow drift.
    pub baseline_snapshots: usize,
    /// Smallest absolute rise of the missing share that can alarm. Default 0.10 (10 percentage
    /// points, the figure): a huge extract makes a rise of 0.5 points "significant" on
    /// the p-chart but nobody should be woken for it.
    pub min_effect: f64,
    /// Smallest number of new or changed records in the latest snapshot, and of records in the
    /// pooled baseline, for the rule to be evaluated. Default 30: below it the p-chart's normal
    /// approximation is poor and one record moves the share by more than 3 points.
    pub min_records: u64,
    /// Width of the p-chart's upper limit in standard errors. Default 3 (Shewhart).
    pub sigmas: f64,
}

impl Default for MissingnessParams {
    fn default() -> MissingnessParams {
        MissingnessParams { baseline_snapshots: 7, min_effect: 0.10, min_records: 30, sigmas: 3.0 }
    }
}

/// Missing values of one field among a snapshot's new or changed records.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct MissingCount {
    pub missing: u64,
    pub records: u64,
}

/// Input of [`missingness_jump`] for one field (optionally within one jurisdiction).
#[derive(Debug, Clone, PartialEq)]
pub struct MissingnessInput {
    pub source: String,
    /// The field (or `field/jurisdiction`), used as the signal's subject.
    pub subject: String,
    /// The latest snapshot's new or changed records.
    pub latest: MissingCount,
    /// Previous snapshots, oldest first; the last `baseline_snapshots` are used.
    pub baseline: Vec<MissingCount>,
}

/// p-chart of the missing share: alarms when the latest share is above
/// `pbar + sigmas sqrt(pbar (1 - pbar) / n)` (pooled baseline share `pbar`, latest record
/// count `n`) and at least `min_effect` above `pbar`, with at least `min_records` records.
pub fn missingness_jump(input: &MissingnessInput, params: &MissingnessParams) -> Outcome {
    let recent = tail(&input.baseline, params.baseline_snapshots);
    let base_missing: u64 = recent.iter().map(|c| c.missing).sum();
    let base_records: u64 = recent.iter().map(|c| c.records).sum();
    if input.latest.records < params.min_records || base_records < params.min_records {
        return Outcome::NotEnoughData(format!(
            "{} records in the snapshot and {} in the baseline; {} needed",
            input.latest.records, base_records, params.min_records
        ));
    }
    let pbar = base_missing as f64 / base_records as f64;
    let share = input.latest.missing as f64 / input.latest.records as f64;
    let (_, upper) = change::p_chart_limits(pbar, input.latest.records as f64, params.sigmas);
    let threshold = upper.max(pbar + params.min_effect);
    if share <= upper || share - pbar < params.min_effect {
        return Outcome::Clear;
    }
    let severity = if share >= 0.95 && share - pbar >= 0.5 { Severity::Critical } else { Severity::Warning };
    Outcome::Signal(Signal {
        rule: Rule::MissingnessJump,
        source: input.source.clone(),
        subject: input.subject.clone(),
        severity,
        measure: "missing_share",
        observed: share,
        threshold,
        figures: vec![
            Figure::new("baseline_share", pbar),
            Figure::new("p_chart_upper", upper),
            Figure::new("records", input.latest.records as f64),
            Figure::new("baseline_records", base_records as f64),
            Figure::new("baseline_snapshots", recent.len() as f64),
        ],
        summary: format!(
            "{}: {} missing in {:.1}% of {} new or changed records, baseline {:.1}% over {} snapshots",
            input.source,
            input.subject,
            100.0 * share,
            input.latest.records,
            100.0 * pbar,
            recent.len()
        ),
    })
}

// ---------------------------------------------------------------------------------------------
// lag jump

/// Parameters of the lag-jump rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LagParams {
    /// EWMA on the daily median lag. Default lambda 0.2, L 3, exact limits: sensitive to a
    /// lasting shift of about one day-to-day sd within a week, in-control ARL near 500 days.
    pub ewma: EwmaParams,
    /// Days of the baseline window before the recent window. Default 28: four weeks, so
    /// weekday effects average out.
    pub baseline_days: usize,
    /// Days of the recent window (ending on the latest day). Default 7.
    pub recent_days: usize,
    /// Baseline days with at least one record needed to estimate the in-control mean and sd.
    /// Default 14.
    pub min_baseline_days: usize,
    /// Records needed in each window for the Mann-Whitney confirmation. Default 20.
    pub min_records: usize,
    /// Mann-Whitney two-sided p-value below which the rise is confirmed. Default 0.01: the
    /// EWMA already selected the window, so the confirmation is kept strict.
    pub alpha: f64,
    /// Smallest rise (days) of the recent pooled median lag over the baseline's that can alarm.
    /// Default 1 day: lags are counted in whole days, so a smaller rise is within rounding.
    pub min_effect_days: f64,
    /// Floor of the sd of the daily medians (days). Default 0.5: daily medians of whole days
    /// can be constant for weeks; half a day is the finest step they resolve.
    pub min_sd_days: f64,
}

impl Default for LagParams {
    fn default() -> LagParams {
        LagParams {
            ewma: EwmaParams::default(),
            baseline_days: 28,
            recent_days: 7,
            min_baseline_days: 14,
            min_records: 20,
            alpha: 0.01,
            min_effect_days: 1.0,
            min_sd_days: 0.5,
        }
    }
}

/// Input of [`lag_jump`]: reporting lags (reference date to first appearance, in days) of the
/// records first reported on each day, oldest day first, the latest day last. A day without
/// records is an empty vector.
#[derive(Debug, Clone, PartialEq)]
pub struct LagInput {
    pub source: String,
    /// A jurisdiction, or empty for the whole source.
    pub subject: String,
    pub daily_lags: Vec<Vec<f64>>,
}

/// EWMA of the daily median lag over the recent window, started at the baseline mean of the
/// daily medians with their sd; alarms when the EWMA is above its upper limit on the latest
/// day, the recent lags are larger than the baseline lags by Mann-Whitney (p < alpha), and the
/// pooled median rose by at least `min_effect_days`.
pub fn lag_jump(input: &LagInput, params: &LagParams) -> Outcome {
    let days = &input.daily_lags;
    let recent_start = days.len().saturating_sub(params.recent_days);
    let baseline_start = recent_start.saturating_sub(params.baseline_days);
    let (baseline, recent) = (&days[baseline_start..recent_start], &days[recent_start..]);
    let baseline_medians: Vec<f64> = baseline.iter().filter_map(|d| median(d)).collect();
    let baseline_lags: Vec<f64> = baseline.concat();
    let recent_lags: Vec<f64> = recent.concat();
    if baseline_medians.len() < params.min_baseline_days.max(2)
        || baseline_lags.len() < params.min_records
        || recent_lags.len() < params.min_records
    {
        return Outcome::NotEnoughData(format!(
            "{} baseline days with records, {} baseline and {} recent records",
            baseline_medians.len(),
            baseline_lags.len(),
            recent_lags.len()
        ));
    }
    let (mean, sd) = aberration::mean_and_sd(&baseline_medians);
    let sd = sd.max(params.min_sd_days);
    let recent_medians: Vec<f64> = recent.iter().map(|d| median(d).unwrap_or(f64::NAN)).collect();
    let last =
        *change::ewma(&recent_medians, mean, sd, &params.ewma).last().expect("recent window is not empty");
    let test = mannwhitney::mann_whitney(&recent_lags, &baseline_lags);
    let (recent_median, baseline_median) =
        (median(&recent_lags).unwrap_or(f64::NAN), median(&baseline_lags).unwrap_or(f64::NAN));
    let rose = recent_median - baseline_median >= params.min_effect_days && test.u1 > test.u2;
    if last.alarm != Some(Side::Upper) || test.p_value >= params.alpha || !rose {
        return Outcome::Clear;
    }
    let critical = recent_median >= 2.0 * baseline_median && recent_median - baseline_median >= 2.0;
    Outcome::Signal(Signal {
        rule: Rule::LagJump,
        source: input.source.clone(),
        subject: input.subject.clone(),
        severity: if critical { Severity::Critical } else { Severity::Warning },
        measure: "ewma_median_lag_days",
        observed: last.z,
        threshold: last.upper,
        figures: vec![
            Figure::new("baseline_mean_daily_median", mean),
            Figure::new("baseline_sd_daily_median", sd),
            Figure::new("recent_median_lag", recent_median),
            Figure::new("baseline_median_lag", baseline_median),
            Figure::new("mann_whitney_p", test.p_value),
            Figure::new("recent_records", recent_lags.len() as f64),
            Figure::new("baseline_records", baseline_lags.len() as f64),
        ],
        summary: format!(
            "{}{}: median reporting lag {:.1} days over the last {} days against {:.1} in the {} days before \
             (EWMA {:.2} > {:.2}, Mann-Whitney p = {:.2e})",
            input.source,
            subject_suffix(&input.subject),
            recent_median,
            recent.len(),
            baseline_median,
            baseline.len(),
            last.z,
            last.upper,
            test.p_value
        ),
    })
}

// ---------------------------------------------------------------------------------------------
// volume

/// Input of [`held_snapshot`]: whether the latest snapshot was held by the truncated-feed
/// guard, with its row count and the previous applied snapshot's.
#[derive(Debug, Clone, PartialEq)]
pub struct HeldInput {
    pub source: String,
    pub held: bool,
    pub rows: u64,
    pub previous_rows: Option<u64>,
}

/// Signals (critical) when the latest snapshot was held; clear otherwise.
pub fn held_snapshot(input: &HeldInput) -> Outcome {
    if !input.held {
        return Outcome::Clear;
    }
    let previous = input.previous_rows.map_or(f64::NAN, |r| r as f64);
    let against =
        input.previous_rows.map_or(String::new(), |r| format!(" against {r} in the last applied one"));
    Outcome::Signal(Signal {
        rule: Rule::HeldSnapshot,
        source: input.source.clone(),
        subject: String::new(),
        severity: Severity::Critical,
        measure: "rows",
        observed: input.rows as f64,
        threshold: previous,
        figures: vec![Figure::new("previous_rows", previous)],
        summary: format!(
            "{}: latest snapshot held (possibly truncated): {} rows{}",
            input.source, input.rows, against
        ),
    })
}

/// Parameters of the volume-drop rule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct VolumeParams {
    /// Previous snapshots whose new-record counts form the baseline. Default 7 (a week).
    pub baseline_snapshots: usize,
    /// Alarm when new records fall below this fraction of the baseline median. Default 0.5:
    /// Poisson noise alone almost never halves a count of 20 or more (P < 0.01 at 20).
    pub drop_fraction: f64,
    /// Smallest baseline median for the rule to be evaluated. Default 20: below it a halving
    /// is ordinary noise.
    pub min_baseline_median: f64,
    /// Smallest number of baseline snapshots. Default 3.
    pub min_baseline_snapshots: usize,
}

impl Default for VolumeParams {
    fn default() -> VolumeParams {
        VolumeParams {
            baseline_snapshots: 7,
            drop_fraction: 0.5,
            min_baseline_median: 20.0,
            min_baseline_snapshots: 3,
        }
    }
}

/// Input of [`volume_drop`]: new records in the latest snapshot and in previous ones (oldest
/// first).
#[derive(Debug, Clone, PartialEq)]
pub struct VolumeInput {
    pub source: String,
    /// A jurisdiction, or empty for the whole source.
    pub subject: String,
    pub latest_new: u64,
    pub baseline_new: Vec<u64>,
}

/// Alarms when the latest snapshot's new records are below `drop_fraction` of the median of
/// the last `baseline_snapshots` snapshots' new records.
pub fn volume_drop(input: &VolumeInput, params: &VolumeParams) -> Outcome {
    let baseline: Vec<f64> =
        tail(&input.baseline_new, params.baseline_snapshots).iter().map(|&n| n as f64).collect();
    let baseline_median = median(&baseline).unwrap_or(0.0);
    if baseline.len() < params.min_baseline_snapshots || baseline_median < params.min_baseline_median {
        return Outcome::NotEnoughData(format!(
            "{} baseline snapshots with median {} new records",
            baseline.len(),
            baseline_median
        ));
    }
    let threshold = params.drop_fraction * baseline_median;
    let observed = input.latest_new as f64;
    if observed >= threshold {
        return Outcome::Clear;
    }
    Outcome::Signal(Signal {
        rule: Rule::VolumeDrop,
        source: input.source.clone(),
        subject: input.subject.clone(),
        severity: if input.latest_new == 0 { Severity::Critical } else { Severity::Warning },
        measure: "new_records",
        observed,
        threshold,
        figures: vec![
            Figure::new("baseline_median_new", baseline_median),
            Figure::new("baseline_snapshots", baseline.len() as f64),
        ],
        summary: format!(
            "{}{}: {} new records in the latest snapshot, below {:.0}% of the baseline median {}",
            input.source,
            subject_suffix(&input.subject),
            input.latest_new,
            100.0 * params.drop_fraction,
            baseline_median
        ),
    })
}

// ---------------------------------------------------------------------------------------------
// staleness

/// Parameters of the failing-polls rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StalenessParams {
    /// Consecutive failed polls that raise a signal. Default 3: one or two failures are often a
    /// passing network fault or a file still being written.
    pub max_consecutive_failures: u32,
}

impl Default for StalenessParams {
    fn default() -> StalenessParams {
        StalenessParams { max_consecutive_failures: 3 }
    }
}

/// Input of [`stale_source`] and [`failing_polls`].
#[derive(Debug, Clone, PartialEq)]
pub struct StalenessInput {
    pub source: String,
    /// The time of evaluation (passed in; the rules read no clock).
    pub now: DateTime<Utc>,
    /// When the latest snapshot was applied, if ever.
    pub last_applied: Option<DateTime<Utc>>,
    /// When the source started being watched; counts as the last snapshot when there is none.
    pub watching_since: DateTime<Utc>,
    /// The source's `expect_every`; `None` disables [`stale_source`].
    pub expect_every: Option<Duration>,
    pub consecutive_failures: u32,
}

/// Alarms when no snapshot was applied within `expect_every` of `now`.
pub fn stale_source(input: &StalenessInput) -> Outcome {
    let Some(every) = input.expect_every else {
        return Outcome::NotEnoughData("no expect_every configured".into());
    };
    let since = input.last_applied.unwrap_or(input.watching_since);
    let elapsed_hours = (input.now - since).num_seconds() as f64 / 3600.0;
    let limit_hours = every.as_secs_f64() / 3600.0;
    if elapsed_hours <= limit_hours {
        return Outcome::Clear;
    }
    let what =
        if input.last_applied.is_some() { "since the last applied snapshot" } else { "and no snapshot yet" };
    Outcome::Signal(Signal {
        rule: Rule::StaleSource,
        source: input.source.clone(),
        subject: String::new(),
        severity: if elapsed_hours > 2.0 * limit_hours { Severity::Critical } else { Severity::Warning },
        measure: "hours_since_snapshot",
        observed: elapsed_hours,
        threshold: limit_hours,
        figures: vec![Figure::new("expect_every_hours", limit_hours)],
        summary: format!(
            "{}: {:.1} hours {} (expected every {:.1} hours)",
            input.source, elapsed_hours, what, limit_hours
        ),
    })
}

/// Alarms when the latest `max_consecutive_failures` polls or more all failed.
pub fn failing_polls(input: &StalenessInput, params: &StalenessParams) -> Outcome {
    let limit = params.max_consecutive_failures.max(1);
    if input.consecutive_failures < limit {
        return Outcome::Clear;
    }
    Outcome::Signal(Signal {
        rule: Rule::FailingPolls,
        source: input.source.clone(),
        subject: String::new(),
        severity: if input.consecutive_failures >= 2 * limit {
            Severity::Critical
        } else {
            Severity::Warning
        },
        measure: "consecutive_failures",
        observed: f64::from(input.consecutive_failures),
        threshold: f64::from(limit),
        figures: Vec::new(),
        summary: format!("{}: the last {} polls failed", input.source, input.consecutive_failures),
    })
}

// ---------------------------------------------------------------------------------------------
// count aberration

/// The count distribution assumed by the count CUSUM.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum CountFamily {
    /// Variance equal to the mean; reference value of Lucas (1985).
    Poisson,
    /// Variance above the mean, size estimated from the baseline by moments; falls back to
    /// Poisson when the baseline is not over-dispersed.
    NegativeBinomial,
}

/// Parameters of the count CUSUM (an option beside EARS).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CountCusumParams {
    pub family: CountFamily,
    /// Days of each day's moving baseline. Default 28: four weeks, weekday effects average out.
    pub baseline_days: usize,
    /// Days between a day and the end of its baseline. Default 2, as EARS C2, so an
    /// outbreak's first days do not raise their own baseline.
    pub guard_days: usize,
    /// The rise to detect, in baseline sds: `mu1 = mu0 + shift_sds * sd0`. Default 2.
    pub shift_sds: f64,
    /// Decision interval in baseline sds (`h = h_sds * sd0` cases). Default 3: with a 2-sd
    /// shift this is the standardised CUSUM k = 1, h = 3 whose in-control ARL for normal data
    /// is about 2,000 days (Siegmund's approximation); count skewness and an estimated baseline
    /// bring it down (see the detector benchmark for the measured false-alarm rate).
    pub h_sds: f64,
    /// Floor of the baseline mean (cases per day). Default 0.5, so a run of zeros still gives
    /// a finite reference value.
    pub min_mean: f64,
}

impl Default for CountCusumParams {
    fn default() -> CountCusumParams {
        CountCusumParams {
            family: CountFamily::Poisson,
            baseline_days: 28,
            guard_days: 2,
            shift_sds: 2.0,
            h_sds: 3.0,
            min_mean: 0.5,
        }
    }
}

/// Which count statistics to evaluate, and their parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CountParams {
    pub ears: EarsParams,
    /// Evaluate EARS C1, C2, C3 (default all three).
    pub c1: bool,
    pub c2: bool,
    pub c3: bool,
    /// The count CUSUM, off by default (`None`): EARS needs only a week of history.
    pub cusum: Option<CountCusumParams>,
}

impl Default for CountParams {
    fn default() -> CountParams {
        CountParams { ears: EarsParams::default(), c1: true, c2: true, c3: true, cusum: None }
    }
}

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
        measure: rule.as_str(),
        observed: value,
        threshold,
        summary: format!(
            "{}{}: {} cases on the latest report day, {} = {:.2} above its threshold {:.2}",
            input.source,
            subject_suffix(&input.subject),
            count,
            rule.as_str(),
            value,
            threshold
        ),
        figures,
    }
}

// ---------------------------------------------------------------------------------------------
// helpers

/// The last `n` items.
fn tail<T>(items: &[T], n: usize) -> &[T] {
    &items[items.len().saturating_sub(n)..]
}

/// The median of the non-NaN values; `None` when there are none.
pub fn median(values: &[f64]) -> Option<f64> {
    let mut sorted: Vec<f64> = values.iter().copied().filter(|v| !v.is_nan()).collect();
    if sorted.is_empty() {
        return None;
    }
    sorted.sort_by(f64::total_cmp);
    let mid = sorted.len() / 2;
    Some(if sorted.len() % 2 == 1 { sorted[mid] } else { (sorted[mid - 1] + sorted[mid]) / 2.0 })
}

fn subject_suffix(subject: &str) -> String {
    if subject.is_empty() { String::new() } else { format!(" ({subject})") }
}

#[cfg(test)]
mod tests;
