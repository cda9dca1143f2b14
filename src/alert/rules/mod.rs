//! The alert rules: measured aggregates in, an [`Outcome`] out, one file per rule family.
//! One input type and one parameter type per rule, plain numbers and vectors so the caller can
//! fill them from SQL; the parameter types, each default documented with its reason, live in
//! `config::rules` (the config reads them) and are re-exported here. Pure: no IO, no clock (the current time is an
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
//! - `count_z_recent`, `count_z_guarded`, `count_z_guarded_3day`, `count_cusum`: warning; critical when the statistic is at
//!   least twice its threshold.
//! - `nowcast_calibration`: warning; critical when the 90% coverage is under 0.75 and the
//!   score is also worse than the naive count's.

mod calibration;
mod count;
mod lag;
mod missingness;
mod staleness;
mod volume;

pub use crate::config::rules::{
    CountCusumParams, CountFamily, CountParams, CusumInterval, LagParams, MissingnessParams, StalenessParams,
    VolumeParams,
};
pub use calibration::*;
pub use count::*;
pub use lag::*;
pub use missingness::*;
pub use staleness::*;
pub use volume::*;

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

/// `n` with its noun in the right number: "1 case", "0 cases", "2.5 cases".
pub fn counted(n: f64, singular: &str, plural: &str) -> String {
    let noun = if n == 1.0 { singular } else { plural };
    format!("{} {noun}", whole_or_decimal(n))
}

/// Whether a case count is a small cell: from 1 to `small_cell_max` (0 turns it off).
pub fn is_small_cell(n: f64, small_cell_max: u32) -> bool {
    n >= 1.0 && n <= f64::from(small_cell_max)
}

/// A case count as a message may release it: a range ("1-4") when it is from 1 to
/// `small_cell_max` (small-cell suppression), else [`whole_or_decimal`]. 0 turns it off.
pub fn cell(n: f64, small_cell_max: u32) -> String {
    if is_small_cell(n, small_cell_max) { format!("1-{small_cell_max}") } else { whole_or_decimal(n) }
}

/// "1 case", "12 cases", or "1-4 cases" under small-cell suppression.
pub fn cases(n: f64, small_cell_max: u32) -> String {
    if is_small_cell(n, small_cell_max) {
        format!("{} cases", cell(n, small_cell_max))
    } else {
        counted(n, "case", "cases")
    }
}

/// A count as a whole number when it is one, else to one decimal.
pub fn whole_or_decimal(n: f64) -> String {
    if n.fract() == 0.0 && n.abs() < 1e15 { format!("{n:.0}") } else { format!("{n:.1}") }
}

/// A statistic and the threshold it passed, each to the fewest decimals (at least two, at
/// most six) that keep them apart, so a message never says "10.13 > 10.13".
pub fn above(value: f64, threshold: f64) -> String {
    let decimals = (2..=6).find(|&d| format!("{value:.d$}") != format!("{threshold:.d$}")).unwrap_or(6);
    format!("{value:.decimals$} > {threshold:.decimals$}")
}

fn subject_suffix(subject: &str) -> String {
    if subject.is_empty() { String::new() } else { format!(" ({subject})") }
}

#[cfg(test)]
mod tests;
