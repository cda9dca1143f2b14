//! The missingness-jump rule: a p-chart of the share of new or changed records missing a field,
//! against the pooled share of the previous snapshots.

use super::tail;
use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::analysis::change;
use crate::config::rules::MissingnessParams;

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
