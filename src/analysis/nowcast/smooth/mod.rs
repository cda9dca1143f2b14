//! The `smooth` nowcast: log incidence varies smoothly over reference dates and the delay
//! distribution may stretch or shrink over time. Expected increments are
//! `mu[t][d] = lambda_t p_t(d)` with Poisson counts. A Poisson row is a Poisson total times a
//! multinomial split, so the likelihood factorises exactly into (1) the split of each row's
//! reports over its observed delays 0..=k_t, multinomial with probabilities
//! `p_t(d) / F_t(k_t)` (`F_t` the delay cdf), and (2) each row's reported total, Poisson with
//! mean `lambda_t F_t(k_t)`. The two parts are fitted in that order, each by penalized Newton
//! (IRLS, Fisher scoring for the delays), and uncertainty comes from Laplace (Gaussian)
//! approximations of both posteriors.
//!
//! Delay model: a baseline pmf over delays 0..=D (a multinomial logit, with a
//! second-difference penalty across delays), read as a smooth cdf G (monotone cubic within
//! each day), and a stretch factor `s_t = exp(sigma_t)` per reference date: row t's delays
//! are the baseline's multiplied by `s_t`, `P(delay <= d) = G((d + 1) / s_t)`, conditioned on
//! delay <= D. A reporting backlog that doubles every delay is `s = 2`. `sigma_t` is zero at
//! the start of the window and follows a random walk over reference dates with Student-t
//! steps (heavy tails: a sudden change in reporting is one large step, elsewhere the stretch
//! stays smooth); its step precision is chosen by Laplace marginal likelihood. A stretch
//! reads the well-reported short delays of the baseline to predict the long delays of recent
//! rows, which is how a lengthening seen in the first days after reference dates is carried
//! to the delays not yet seen. Shape changes other than a stretch (a shifting mix of fast
//! and slow reporters) are followed by forgetting instead: each row's split is weighted by
//! `0.5^(age / half-life)`, the half-life about 1000 cases' worth of reference dates (at
//! least 14 days), so the baseline describes recent reporting.
//!
//! Incidence model: `log lambda_t` has a second-order random-walk penalty (linear trends are
//! free), its strength chosen by Laplace marginal likelihood over a grid unless given.
//! Extra-Poisson variation of daily totals is estimated from Pearson residuals
//! (quasi-Poisson) and widens the posterior and the predictive of unreported cases.
//!
//! Predictive draws: delay parameters from their Gaussian posterior; log incidence from its
//! Gaussian posterior, shifted to first order for the drawn completeness
//! (`d eta / d ln F = -H^-1 diag(mu)`); the cases still to be reported from a Poisson
//! with mean `lambda_t (1 - F_t(k_t))`, or when overdispersed from a gamma-Poisson whose
//! day rate is first updated by the count reported so far (a nearly complete date keeps
//! little extra-Poisson spread). Each draw of
//! the eventual count is the count known so far plus those. The intervals are model-based:
//! they assume smooth log incidence, a delay distribution that changes by stretching, and
//! independent (or quasi-Poisson) counts; they do not cover reporting changes of other kinds.

use chrono::Datelike;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Gamma, Poisson};

mod baseline;
mod delay;
mod incidence;
mod sampler;
#[cfg(test)]
mod tests;

use self::baseline::*;
use self::delay::*;
use self::incidence::*;
use self::sampler::*;
use super::{Nowcast, NowcastRow, row_from_draws};
use crate::analysis::numeric::linalg::*;
use crate::analysis::numeric::newton::*;
use crate::analysis::triangle::Triangle;
use crate::model::NowcastMethod;

/// Method name in results and on the command line.
pub const METHOD: NowcastMethod = NowcastMethod::Smooth;

/// Parameters of the `smooth` nowcast.
#[derive(Debug, Clone, PartialEq)]
pub struct SmoothParams {
    /// Most recent reference dates used in the fit (default 120; at least D + 1 are used).
    /// Older rows are complete and reported as observed.
    pub window: usize,
    /// Precision of the second-order random walk on log incidence (the prior sd of a second
    /// difference is `1 / sqrt(penalty)`). Default `None`: chosen by Laplace marginal
    /// likelihood over 10^-1, 10^-0.5, .., 10^5.
    pub incidence_penalty: Option<f64>,
    /// Whether the delay distribution may stretch or shrink over reference dates (default
    /// true); false: one delay distribution for the whole window.
    pub delay_changes: bool,
    /// Precision per day of the random walk of the log stretch of the delay distribution (a
    /// prior scale of `1 / sqrt(penalty)` per day). Default `None`: chosen by Laplace
    /// marginal likelihood over 10^4, 1000, 100, 10, stiffest first, stopping once it falls.
    pub delay_trend_penalty: Option<f64>,
    /// Degrees of freedom of the Student-t distribution of the log stretch's steps between
    /// knots (default 2): heavy tails let a sudden change in reporting show as one large step
    /// while the stretch stays smooth elsewhere. Zero or less: Gaussian steps.
    pub delay_change_dof: f64,
    /// Days between the knots of the log stretch (default 1: every reference date; counted
    /// back from the last date); it is linear between knots. Wider spacing is faster but
    /// smears a sudden change over the knots around it.
    pub delay_trend_knots: usize,
    /// Precision of the second-difference penalty on the baseline log delay weights across
    /// delays, multiplied by `(1 + d)^2` at delay d (default 1). The log pmf of a gamma or
    /// lognormal delay bends like `1 / d^2`, so this leaves such shapes nearly free while
    /// keeping the sparsely reported tail from swinging: it matters only where delays have
    /// few reports.
    pub delay_shape_penalty: f64,
    /// How fast old reference dates lose weight in the delay fit, in cases: a row's weight
    /// halves with each half-life of age, the half-life in days being this divided by the
    /// window's mean daily count, and at least
    /// `MIN_DELAY_HALF_LIFE_DAYS` (default 1000 cases: 14 days at 70 or more cases a day,
    /// 100 days at 10 a day). The delay distribution then describes recent reporting when
    /// there are data enough to see it change, which the stretch alone cannot follow when
    /// the mix of reporters shifts (in the calibration suite's class of strata with
    /// different delays, 90% coverage rose from 0.73 to 0.86). `None`: every row weighs
    /// the same.
    pub delay_half_life_cases: Option<f64>,
    /// Estimate extra-Poisson variation of the daily totals and widen the intervals by it
    /// (default true; it is 1, i.e. no widening, for Poisson data).
    pub overdispersion: bool,
    /// Report-day effects (default true): the cases due on a report date are reported then
    /// with a share for that date's weekday (few at weekends) and for the date itself (a
    /// reporting holiday), and the rest are carried to the next date (a Monday catch-up, a
    /// backlog). The weekday shares carry over to the report dates still to come; the
    /// per-date ones do not (the future is assumed an ordinary week).
    pub report_day_effects: bool,
    /// Predictive draws per reference date (default 1000).
    pub draws: usize,
}

impl Default for SmoothParams {
    fn default() -> SmoothParams {
        SmoothParams {
            window: 120,
            incidence_penalty: None,
            delay_changes: true,
            delay_trend_penalty: None,
            delay_change_dof: 2.0,
            delay_trend_knots: 1,
            delay_shape_penalty: 1.0,
            delay_half_life_cases: Some(1000.0),
            overdispersion: true,
            report_day_effects: true,
            draws: 1000,
        }
    }
}

/// Ridge on every delay coefficient: it fixes the level of the multinomial logit, which the
/// likelihood cannot see, and keeps never-reported delays finite. Small enough not to matter
/// where there are data.
const RIDGE: f64 = 1e-4;
/// Ridge on log incidence (a prior sd of 1000 on its level).
const INCIDENCE_RIDGE: f64 = 1e-6;
/// Log incidence above this is clamped in draws (e^40 cases is no count).
const MAX_LOG_RATE: f64 = 40.0;
/// Shortest half-life of the delay fit's row weights (`SmoothParams::delay_half_life_cases`):
/// two weeks of reference dates always weigh at least half as much as the latest.
pub const MIN_DELAY_HALF_LIFE_DAYS: f64 = 14.0;
/// Largest quasi-Poisson dispersion used (a larger estimate is capped).
const MAX_DISPERSION: f64 = 50.0;

/// Nowcasts every reference date of `tri` with the `smooth` method. Reproducible for a seed.
pub fn nowcast(tri: &Triangle, params: &SmoothParams, seed: u64) -> Nowcast {
    let mut problems = Vec::new();
    let tri = sanitised(tri, &mut problems);
    if tri.rows() == 0 {
        problems.push("the triangle has no reference dates".to_string());
        return Nowcast { method: METHOD, rows: Vec::new(), problems };
    }
    let window = Window::new(&tri, params, &mut problems);
    let predictive = if window.max_delay == 0 {
        None
    } else if window.totals.iter().sum::<f64>() <= 0.0 {
        problems.push("no cases in the window: the nowcast is the count observed so far".to_string());
        None
    } else {
        predict(&tri, &window, params, seed, &mut problems)
    };
    let rows = assemble_rows(&tri, &window, predictive);
    Nowcast { method: METHOD, rows, problems }
}

// ---------------------------------------------------------------------------------------
// Data

/// The rows of the triangle used in the fit, with their increments.
#[derive(Debug)]
pub(super) struct Window {
    /// Triangle row of window row 0.
    pub(super) first_row: usize,
    /// Effective maximum delay: the triangle's, or less when fewer dates were observed.
    pub(super) max_delay: usize,
    /// Largest observed delay of each window row.
    pub(super) observed: Vec<usize>,
    /// Increments (downward revisions clipped) of each window row.
    pub(super) n: Vec<Vec<f64>>,
    /// Reports so far of each window row (sum of `n`).
    pub(super) totals: Vec<f64>,
    /// Weekday of window row 0's reference date (0 = Monday).
    pub(super) first_weekday: usize,
}

impl Window {
    pub(super) fn new(tri: &Triangle, params: &SmoothParams, problems: &mut Vec<String>) -> Window {
        let rows = tri.rows();
        let max_delay = tri.max_delay.min(rows - 1);
        if max_delay < tri.max_delay {
            problems.push(format!(
                "only {rows} reference dates: delays beyond {max_delay} days are not observed and are assumed not to occur"
            ));
        }
        let size = params.window.max(max_delay + 1).min(rows);
        let first_row = rows - size;
        let increments = tri.increments();
        if increments.downward_cells > 0 {
            problems.push(format!(
                "{} downward revisions (total {}) were clipped to zero in the fit",
                increments.downward_cells, increments.downward_total
            ));
        }
        let n: Vec<Vec<f64>> = increments.n.into_iter().skip(first_row).collect();
        let observed = n.iter().map(|row| row.len().saturating_sub(1).min(max_delay)).collect();
        let totals = n.iter().map(|row| row.iter().sum()).collect();
        let first_weekday = tri.date(first_row).weekday().num_days_from_monday() as usize;
        Window { first_row, max_delay, observed, n, totals, first_weekday }
    }

    pub(super) fn len(&self) -> usize {
        self.n.len()
    }

    /// Window rows not yet observed up to the maximum delay: the rows that get a nowcast.
    pub(super) fn incomplete(&self) -> Vec<usize> {
        (0..self.len()).filter(|&r| self.observed[r] < self.max_delay).collect()
    }
}

/// A copy of the triangle with non-finite or negative cells replaced by the previous cell of
/// the row (or zero), reported as a problem.
pub(super) fn sanitised(tri: &Triangle, problems: &mut Vec<String>) -> Triangle {
    let mut clean = tri.clone();
    let mut replaced = 0;
    for row in &mut clean.cumulative {
        let mut previous = 0.0;
        for cell in row.iter_mut() {
            if !(cell.is_finite() && *cell >= 0.0) {
                *cell = previous;
                replaced += 1;
            }
            previous = *cell;
        }
    }
    if replaced > 0 {
        problems
            .push(format!("{replaced} cells were missing, negative or not finite and were carried forward"));
    }
    clean
}

// ---------------------------------------------------------------------------------------
// Fitting and prediction

/// Predictive draws of the eventual count of each incomplete window row, with the estimated
/// completeness.
#[derive(Debug)]
pub(super) struct Predictive {
    /// Window row, completeness, draws of the eventual count.
    pub(super) rows: Vec<(usize, f64, Vec<f64>)>,
}

pub(super) fn predict(
    tri: &Triangle,
    window: &Window,
    params: &SmoothParams,
    seed: u64,
    problems: &mut Vec<String>,
) -> Option<Predictive> {
    let informative: f64 =
        (0..window.len()).filter(|&r| window.observed[r] > 0).map(|r| window.totals[r]).sum();
    if informative < 20.0 {
        problems.push(format!(
            "only {informative} cases with more than one observed delay: the delay distribution is poorly determined"
        ));
    }
    let Some((delay_model, delay)) = fit_delay(window, params) else {
        problems.push(
            "the delay model could not be fitted: the nowcast is the count observed so far".to_string(),
        );
        return None;
    };
    if !delay.converged {
        problems.push("the delay model fit did not fully converge".to_string());
    }
    let baseline = delay_model.baseline(&delay.minimum.x);
    let log_completeness: Vec<f64> =
        (0..window.len()).map(|r| delay_model.log_completeness(&baseline, &delay.minimum.x, r)).collect();
    let Some(incidence) = fit_incidence(window, &log_completeness, params) else {
        problems.push(
            "the incidence model could not be fitted: the nowcast is the count observed so far".to_string(),
        );
        return None;
    };
    if incidence.dispersion >= 1.5 {
        problems.push(format!(
            "daily counts vary {:.1} times more than Poisson around the smooth curve; intervals are widened by it",
            incidence.dispersion
        ));
    }
    let latest: Vec<f64> = (0..window.len()).map(|r| tri.latest(window.first_row + r)).collect();
    let sampler = Sampler::new(&delay_model, &delay, &incidence, &log_completeness, window)?;
    Some(sampler.draw(&latest, params.draws.max(1), seed))
}

/// Nowcast rows for every triangle row: draws where there are any, the observed count
/// (completeness 1) for complete rows and when no model could be fitted.
pub(super) fn assemble_rows(
    tri: &Triangle,
    window: &Window,
    predictive: Option<Predictive>,
) -> Vec<NowcastRow> {
    let last = tri.rows() - 1;
    let mut draws_by_row: Vec<Option<(f64, Vec<f64>)>> = vec![None; tri.rows()];
    for (r, completeness, draws) in predictive.map(|p| p.rows).unwrap_or_default() {
        draws_by_row[window.first_row + r] = Some((completeness, draws));
    }
    draws_by_row
        .into_iter()
        .enumerate()
        .map(|(t, drawn)| {
            let observed = tri.latest(t);
            let (completeness, mut draws) = drawn.unwrap_or((1.0, vec![observed]));
            row_from_draws(tri.date(t), last - t, observed, completeness, &mut draws)
        })
        .collect()
}
