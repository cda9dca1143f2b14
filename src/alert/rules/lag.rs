//! The lag-jump rule: an EWMA of the daily median reporting lag, confirmed by a Mann-Whitney
//! test of recent against baseline lags.

use super::{median, subject_suffix};
use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::analysis::aberration;
use crate::analysis::change::{self, Side};
use crate::analysis::mannwhitney;
use crate::config::rules::LagParams;

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
             (EWMA of the daily median {}, Mann-Whitney p = {:.2e})",
            input.source,
            subject_suffix(&input.subject),
            recent_median,
            recent.len(),
            baseline_median,
            baseline.len(),
            super::above(last.z, last.upper),
            test.p_value
        ),
    })
}
