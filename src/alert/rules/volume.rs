//! The volume rules: a snapshot held by the truncated-feed guard, and a drop in the new records
//! a snapshot brings.

use super::{median, subject_suffix, tail};
use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::config::rules::VolumeParams;

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
