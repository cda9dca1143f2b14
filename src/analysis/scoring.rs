//! Self-scoring of stored nowcasts and the `auto` choice. Every stored nowcast row is scored
//! once its truth has matured (the count known `backtest_lag` days after the nowcast was
//! made): interval coverage, weighted interval score (Bracher et al. 2021), error of the
//! median, and the naive count's score. `auto` picks, for a nowcast as of a snapshot, the
//! method with the lowest mean WIS over horizons 0..=7 among the scores that had matured by
//! then, over a recent window of forecast days; until enough have matured it uses the method
//! that calibrated best in the simulation suite (`DEFAULT_METHOD`). A chosen method whose
//! rolling 90% coverage is under 0.75, or whose score is worse than the naive count's, carries
//! a warning. Pure: scores in, a choice out.

use super::nowcast::NowcastRow;
use super::score::{covered, wis_of_row};
use crate::model::NowcastMethod;

/// The method `auto` uses before any scores have matured: the one that calibrated best over
/// the scenario classes of the simulation suite (docs/validation.md).
pub const DEFAULT_METHOD: NowcastMethod = NowcastMethod::Smooth;
/// Horizons `auto` compares methods over (the recent days that the published figure shows).
pub const AUTO_HORIZONS: usize = 7;
/// Forecast days with matured scores that a method needs before `auto` trusts its scores.
pub const MIN_SCORED_DAYS: usize = 7;
/// Rolling 90% coverage under which a nowcast output carries a warning.
pub const COVERAGE_FLOOR: f64 = 0.75;
/// Expected completeness under which a reference date's estimate rests mostly on the model.
pub const LOW_INFORMATION: f64 = 0.1;

/// The scores of one nowcast row against its matured truth.
#[derive(Debug, Clone, PartialEq)]
pub struct RowScore {
    pub in50: bool,
    pub in90: bool,
    pub in95: bool,
    pub wis: f64,
    /// The naive count's score: `|truth - observed|` (a point forecast's WIS).
    pub naive_wis: f64,
    /// `median - truth`.
    pub median_error: f64,
}

/// Scores one stored row against the count now known.
pub fn score_row(row: &NowcastRow, truth: f64) -> RowScore {
    RowScore {
        in50: covered(row.lower50, row.upper50, truth),
        in90: covered(row.lower90, row.upper90, truth),
        in95: covered(row.lower95, row.upper95, truth),
        wis: wis_of_row(row, truth),
        naive_wis: (truth - row.observed).abs(),
        median_error: row.median - truth,
    }
}

/// A method's rolling scores over the window (horizons 0..=`AUTO_HORIZONS`).
#[derive(Debug, Clone, PartialEq)]
pub struct MethodScore {
    pub method: NowcastMethod,
    /// Scored rows.
    pub cells: usize,
    /// Distinct forecast days among them.
    pub forecast_days: usize,
    pub coverage50: f64,
    pub coverage90: f64,
    pub wis: f64,
    pub naive_wis: f64,
}

impl MethodScore {
    /// Mean WIS relative to the naive count's (below 1: better than naive).
    pub fn relative_wis(&self) -> f64 {
        if self.naive_wis > 0.0 { self.wis / self.naive_wis } else { f64::INFINITY }
    }
}

/// What `auto` chose and why, with the chosen method's scores when they drove the choice.
#[derive(Debug, Clone, PartialEq)]
pub struct AutoChoice {
    pub method: NowcastMethod,
    pub reason: String,
    pub score: Option<MethodScore>,
    /// Set when the chosen method's matured scores show it miscalibrated.
    pub warning: Option<String>,
}

/// Chooses among the `stored` methods (those with a nowcast to show) from their matured
/// rolling `scores`: the lowest mean WIS among methods with at least `MIN_SCORED_DAYS`
/// forecast days; otherwise `DEFAULT_METHOD` if stored, else the first stored method.
pub fn choose(scores: &[MethodScore], stored: &[NowcastMethod]) -> AutoChoice {
    let best = scores
        .iter()
        .filter(|s| stored.contains(&s.method) && s.forecast_days >= MIN_SCORED_DAYS && s.wis.is_finite())
        .min_by(|a, b| a.wis.total_cmp(&b.wis));
    if let Some(best) = best {
        let reason = format!(
            "auto chose {} (mean WIS {:.2}, {:.2} of the naive count's; 90% coverage {:.2}; over {} matured forecast days, horizons 0-{AUTO_HORIZONS})",
            best.method,
            best.wis,
            best.relative_wis(),
            best.coverage90,
            best.forecast_days
        );
        return AutoChoice {
            method: best.method,
            reason,
            score: Some(best.clone()),
            warning: calibration_warning(best),
        };
    }
    let method =
        if stored.contains(&DEFAULT_METHOD) || stored.is_empty() { DEFAULT_METHOD } else { stored[0] };
    let most = scores.iter().map(|s| s.forecast_days).max().unwrap_or(0);
    let reason = format!(
        "auto chose {method}: fewer than {MIN_SCORED_DAYS} forecast days have matured scores ({most} so far), \
         so it uses the default ({DEFAULT_METHOD}, the best calibrated in the simulation suite{})",
        if method == DEFAULT_METHOD { "" } else { "; not stored here, so the stored method" }
    );
    // Scores too few to choose by can still show a method failing badly.
    let warning = scores.iter().find(|s| s.method == method).and_then(calibration_warning);
    AutoChoice { method, reason, score: None, warning }
}

/// A warning when a method's rolling 90% coverage is under `COVERAGE_FLOOR` or its mean WIS
/// is worse than the naive count's; needs `MIN_SCORED_DAYS` forecast days.
pub fn calibration_warning(score: &MethodScore) -> Option<String> {
    if score.forecast_days < MIN_SCORED_DAYS {
        return None;
    }
    let under = score.coverage90 < COVERAGE_FLOOR;
    let worse = score.wis > score.naive_wis;
    (under || worse).then(|| {
        let mut what = Vec::new();
        if under {
            what.push(format!(
                "its 90% intervals covered the truth {:.0}% of the time",
                100.0 * score.coverage90
            ));
        }
        if worse {
            what.push(format!(
                "its score was worse than the naive count's ({:.2} vs {:.2})",
                score.wis, score.naive_wis
            ));
        }
        format!(
            "WARNING: the {} nowcast is miscalibrated over the last {} matured forecast days: {}. Treat its \
             intervals as too narrow and check the reporting delays.",
            score.method,
            score.forecast_days,
            what.join(", and ")
        )
    })
}

/// Whether a row's estimate rests mostly on the model (expected completeness under 10%).
pub fn low_information(row: &NowcastRow) -> bool {
    row.completeness < LOW_INFORMATION
}

#[cfg(test)]
mod tests {
    use super::*;

    fn score(method: NowcastMethod, days: usize, wis: f64, coverage90: f64) -> MethodScore {
        MethodScore {
            method,
            cells: days * 8,
            forecast_days: days,
            coverage50: 0.5,
            coverage90,
            wis,
            naive_wis: 10.0,
        }
    }

    const BOTH: [NowcastMethod; 2] = [NowcastMethod::Hazard, NowcastMethod::Smooth];

    #[test]
    fn the_lowest_matured_score_wins() {
        let scores = [score(NowcastMethod::Hazard, 20, 3.0, 0.9), score(NowcastMethod::Smooth, 20, 4.0, 0.9)];
        let choice = choose(&scores, &BOTH);
        assert_eq!(choice.method, NowcastMethod::Hazard);
        assert!(choice.reason.contains("20 matured forecast days"), "{}", choice.reason);
        assert!(choice.warning.is_none());
    }

    #[test]
    fn too_few_matured_days_use_the_default() {
        let scores = [score(NowcastMethod::Hazard, 3, 1.0, 0.9)];
        let choice = choose(&scores, &BOTH);
        assert_eq!(choice.method, DEFAULT_METHOD);
        assert!(choice.reason.contains("3 so far"), "{}", choice.reason);
        // A stratum that stores only the hazard nowcast gets hazard.
        assert_eq!(choose(&[], &[NowcastMethod::Hazard]).method, NowcastMethod::Hazard);
    }

    #[test]
    fn under_coverage_or_a_score_worse_than_naive_warns() {
        let low = choose(&[score(NowcastMethod::Smooth, 10, 4.0, 0.71)], &BOTH);
        assert!(low.warning.as_deref().is_some_and(|w| w.contains("71%")), "{low:?}");
        let worse = choose(&[score(NowcastMethod::Smooth, 10, 12.0, 0.9)], &BOTH);
        assert!(worse.warning.as_deref().is_some_and(|w| w.contains("worse than the naive")), "{worse:?}");
        assert!(calibration_warning(&score(NowcastMethod::Smooth, 3, 12.0, 0.2)).is_none(), "too few days");
    }
}
