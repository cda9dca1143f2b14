//! The nowcast calibration rule: the method `auto` draws has, over its last matured forecast
//! days, 90% intervals that covered the truth less than 75% of the time, or a weighted
//! interval score worse than the naive count's. Published figures built on it would carry
//! intervals that are too narrow; the signal asks the analyst to check the reporting delays.

use crate::alert::{Figure, Outcome, Rule, Severity, Signal};
use crate::analysis::scoring::{COVERAGE_FLOOR, MIN_SCORED_DAYS, MethodScore};

/// Input of [`nowcast_calibration`]: the rolling scores of the method `auto` chose for one
/// reference field of a source (`None`: no score has matured yet).
#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationInput {
    pub source: String,
    /// The reference field, e.g. `onset_date`.
    pub subject: String,
    pub score: Option<MethodScore>,
}

/// Signals (warning) when the chosen method's rolling 90% coverage is under 0.75 or its mean
/// WIS exceeds the naive count's; critical when both hold. Needs `MIN_SCORED_DAYS` matured
/// forecast days; below that it neither raises nor clears.
pub fn nowcast_calibration(input: &CalibrationInput) -> Outcome {
    let Some(score) = input.score.as_ref().filter(|s| s.forecast_days >= MIN_SCORED_DAYS) else {
        let days = input.score.as_ref().map_or(0, |s| s.forecast_days);
        return Outcome::NotEnoughData(format!(
            "{days} matured forecast days (at least {MIN_SCORED_DAYS} needed)"
        ));
    };
    let under = score.coverage90 < COVERAGE_FLOOR;
    let worse = score.wis > score.naive_wis;
    if !under && !worse {
        return Outcome::Clear;
    }
    let mut what = Vec::new();
    if under {
        what.push(format!("90% intervals covered {:.0}% of matured counts", 100.0 * score.coverage90));
    }
    if worse {
        what.push(format!("mean WIS {:.2} above the naive count's {:.2}", score.wis, score.naive_wis));
    }
    Outcome::Signal(Signal {
        rule: Rule::NowcastCalibration,
        source: input.source.clone(),
        subject: input.subject.clone(),
        severity: if under && worse { Severity::Critical } else { Severity::Warning },
        measure: "coverage90",
        observed: score.coverage90,
        threshold: COVERAGE_FLOOR,
        figures: vec![
            Figure::new("wis", score.wis),
            Figure::new("naive_wis", score.naive_wis),
            Figure::new("forecast_days", score.forecast_days as f64),
            Figure::new("scored_cells", score.cells as f64),
        ],
        summary: format!(
            "{}: the {} nowcast by {} is miscalibrated over the last {} matured forecast days: {}",
            input.source,
            score.method,
            input.subject,
            score.forecast_days,
            what.join("; ")
        ),
    })
}
