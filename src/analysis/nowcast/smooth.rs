//! The `smooth` nowcast: log incidence varies smoothly over reference dates and the delay
//! distribution may change over time. Expected increments are `mu[t][d] = lambda_t p_t(d)`
//! with Poisson counts. Because a Poisson row is a Poisson total times a multinomial split,
//! the likelihood factorises exactly into (1) the split of each row's reports over its
//! observed delays, a multinomial with probabilities `p_t(d) / F_t(k_t)` (`k_t` the largest
//! observed delay, `F_t` the delay cdf), and (2) each row's reported total, Poisson with mean
//! `lambda_t F_t(k_t)`. The model is fitted in that order, both parts by penalized Newton
//! (IRLS), and uncertainty comes from Laplace (Gaussian) approximations of both posteriors.
//!
//! Delay model: `p_t(d)` is a multinomial logit over delays 0..=D,
//! `log p_t(d) = alpha_d + b_t d / 7 + c_t ln(1 + d) - normaliser`, with a second-difference
//! penalty on `alpha` across delays and first-order random walks on `b_t` (a shift of the
//! whole distribution, an exponential tilt) and `c_t` (a change of shape) over reference
//! dates. The two tilts keep a discretised gamma delay close to a gamma when its mean or shape
//! changes, and the random walks carry the change seen in recent, short-observed rows to the
//! delays that have not been seen yet.
//!
//! Incidence model: `log lambda_t` has a second-order random-walk penalty (linear trends are
//! free); its strength is chosen by the Laplace approximation of the marginal likelihood over
//! a grid unless given. Extra-Poisson variation of daily totals is estimated from Pearson
//! residuals (quasi-Poisson) and widens the posterior and the predictive of unreported cases.
//!
//! Predictive draws: the delay parameters are drawn from their Gaussian posterior, log
//! incidence from its Gaussian posterior shifted to first order for the drawn completeness
//! (`d eta / d log F = -H^-1 diag(mu)`), and the cases still to be reported from a Poisson
//! (negative binomial if overdispersed) with mean `lambda_t (1 - F_t(k_t))`; each draw of the
//! eventual count is the count known so far plus that. Only draws from the fitted model: the
//! intervals assume its structure (smooth log incidence, a delay distribution whose change is
//! a smooth tilt) and the penalty strengths.

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Gamma, Poisson, StandardNormal};

use super::{Nowcast, NowcastRow, row_from_draws};
use crate::analysis::triangle::Triangle;

/// Method name in results and on the command line.
pub const METHOD: &str = "smooth";

/// How the delay distribution may change over reference dates.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DelayTrend {
    /// One delay distribution for the whole window.
    Fixed,
    /// A smooth exponential tilt `b_t d / 7`: the distribution stretches or shrinks.
    Scale,
    /// Tilts `b_t d / 7 + c_t ln(1 + d)`: mean and shape may both change (the two sufficient
    /// statistics of the gamma family).
    ScaleAndShape,
}

/// Parameters of the `smooth` nowcast.
#[derive(Debug, Clone, PartialEq)]
pub struct SmoothParams {
    /// Most recent reference dates used in the fit (default 120; at least D + 1 are used).
    /// Older rows are complete and reported as observed.
    pub window: usize,
    /// Precision of the second-order random walk on log incidence (the prior sd of a second
    /// difference is `1 / sqrt(penalty)`). Default `None`: chosen by Laplace marginal
    /// likelihood over 10^-1 .. 10^5.
    pub incidence_penalty: Option<f64>,
    /// How the delay distribution may change over time (default `ScaleAndShape`).
    pub delay_trend: DelayTrend,
    /// Precision of the daily random-walk steps of the delay tilts (a prior sd of
    /// `1 / sqrt(penalty)` per day for each tilt coefficient). Default `None`: chosen by
    /// Laplace marginal likelihood over 10^0 .. 10^4.
    pub delay_trend_penalty: Option<f64>,
    /// Precision of the second-difference penalty on the baseline log delay weights across
    /// delays, multiplied by `(1 + d)^2` at delay d (default 1). The log pmf of a gamma or
    /// lognormal delay bends like `1 / d^2`, so this leaves such shapes nearly free while
    /// keeping the sparsely reported tail from swinging: it matters only where delays have
    /// few reports.
    pub delay_shape_penalty: f64,
    /// Estimate extra-Poisson variation of the daily totals and widen the intervals by it
    /// (default true; it is 1, i.e. no widening, for Poisson data).
    pub overdispersion: bool,
    /// Predictive draws per reference date (default 1000).
    pub draws: usize,
}

impl Default for SmoothParams {
    fn default() -> SmoothParams {
        SmoothParams {
            window: 120,
            incidence_penalty: None,
            delay_trend: DelayTrend::ScaleAndShape,
            delay_trend_penalty: None,
            delay_shape_penalty: 1.0,
            overdispersion: true,
            draws: 1000,
        }
    }
}

/// Ridge on every coefficient: it fixes the level of the multinomial logit and the split
/// between baseline and tilts, which the likelihood cannot see, and keeps never-reported
/// delays finite. Small enough not to matter where there are data.
const RIDGE: f64 = 1e-4;
/// Ridge on log incidence (a prior sd of 1000 on its level).
const INCIDENCE_RIDGE: f64 = 1e-6;
/// Log incidence above this is clamped in draws (e^40 cases is no count).
const MAX_LOG_RATE: f64 = 40.0;
/// Largest quasi-Poisson dispersion used; a larger estimate is reported as a problem.
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
struct Window {
    /// Triangle row of window row 0.
    first_row: usize,
    /// Effective maximum delay: the triangle's, or less when fewer dates were observed.
    max_delay: usize,
    /// Largest observed delay of each window row.
    observed: Vec<usize>,
    /// Increments (downward revisions clipped) of each window row.
    n: Vec<Vec<f64>>,
    /// Reports so far of each window row (sum of `n`).
    totals: Vec<f64>,
}

impl Window {
    fn new(tri: &Triangle, params: &SmoothParams, problems: &mut Vec<String>) -> Window {
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
        Window { first_row, max_delay, observed, n, totals }
    }

    fn len(&self) -> usize {
        self.n.len()
    }

    /// Window rows not yet observed up to the maximum delay: the rows that get a nowcast.
    fn incomplete(&self) -> Vec<usize> {
        (0..self.len()).filter(|&r| self.observed[r] < self.max_delay).collect()
    }
}

/// A copy of the triangle with non-finite or negative cells replaced by the previous cell of
/// the row (or zero), reported as a problem.
fn sanitised(tri: &Triangle, problems: &mut Vec<String>) -> Triangle {
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
struct Predictive {
    /// Window row, completeness, draws of the eventual count.
    rows: Vec<(usize, f64, Vec<f64>)>,
}

fn predict(
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
    let log_completeness: Vec<f64> =
        (0..window.len()).map(|r| delay_model.log_completeness(&delay.minimum.x, r)).collect();
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
fn assemble_rows(tri: &Triangle, window: &Window, predictive: Option<Predictive>) -> Vec<NowcastRow> {
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

// ---------------------------------------------------------------------------------------
// Delay model: multinomial logit with tilts that follow random walks over reference dates

#[derive(Debug)]
struct DelayModel<'a> {
    window: &'a Window,
    /// `basis[d][j]`: the tilt covariates of delay d.
    basis: Vec<Vec<f64>>,
    terms: usize,
    penalty: Matrix,
}

#[derive(Debug)]
struct DelayFit {
    minimum: Minimum,
    converged: bool,
}

impl<'a> DelayModel<'a> {
    fn new(window: &'a Window, params: &SmoothParams, trend_penalty: f64) -> DelayModel<'a> {
        let terms = match params.delay_trend {
            DelayTrend::Fixed => 0,
            DelayTrend::Scale => 1,
            DelayTrend::ScaleAndShape => 2,
        };
        let basis = (0..=window.max_delay)
            .map(|d| [d as f64 / 7.0, (1.0 + d as f64).ln()].into_iter().take(terms).collect())
            .collect();
        let mut model = DelayModel { window, basis, terms, penalty: Matrix::zeros(0) };
        model.penalty = model.penalty_matrix(params.delay_shape_penalty, trend_penalty);
        model
    }

    fn len(&self) -> usize {
        self.window.max_delay + 1 + self.terms * self.window.len()
    }

    fn tilt_index(&self, r: usize, j: usize) -> usize {
        self.window.max_delay + 1 + r * self.terms + j
    }

    /// Second differences of the baseline across delays, first differences of each tilt
    /// across reference dates, and the ridge.
    fn penalty_matrix(&self, shape_penalty: f64, trend_penalty: f64) -> Matrix {
        let mut p = Matrix::zeros(self.len());
        for d in 2..=self.window.max_delay {
            // Centred at d - 1; weight (1 + (d - 1))^2 (see `SmoothParams::delay_shape_penalty`).
            p.add_outer(&[(d, 1.0), (d - 1, -2.0), (d - 2, 1.0)], shape_penalty * (d * d) as f64);
        }
        for j in 0..self.terms {
            for r in 1..self.window.len() {
                p.add_outer(
                    &[(self.tilt_index(r, j), 1.0), (self.tilt_index(r - 1, j), -1.0)],
                    trend_penalty,
                );
            }
        }
        (0..self.len()).for_each(|i| p.add(i, i, RIDGE));
        p
    }

    /// Log weights `alpha_d + tilt_r(d)` of window row r for delays 0..=upto.
    fn log_weights(&self, theta: &[f64], r: usize, upto: usize) -> Vec<f64> {
        let tilts = &theta[self.tilt_index(r, 0)..self.tilt_index(r, 0) + self.terms];
        (0..=upto).map(|d| theta[d] + dot(tilts, &self.basis[d])).collect()
    }

    /// `ln F_r(k_r)`: log of the share of row r's eventual count reported by its largest
    /// observed delay.
    fn log_completeness(&self, theta: &[f64], r: usize) -> f64 {
        let weights = self.log_weights(theta, r, self.window.max_delay);
        log_sum_exp(&weights[..=self.window.observed[r]]) - log_sum_exp(&weights)
    }

    /// Rows that inform the delay split: more than one observed delay and some reports.
    fn informative_rows(&self) -> impl Iterator<Item = usize> + '_ {
        (0..self.window.len()).filter(|&r| self.window.observed[r] > 0 && self.window.totals[r] > 0.0)
    }

    fn initial(&self) -> Vec<f64> {
        let mut theta = vec![0.0; self.len()];
        let complete = (0..self.window.len()).filter(|&r| self.window.observed[r] == self.window.max_delay);
        let mut sums = vec![0.0; self.window.max_delay + 1];
        for r in complete {
            sums.iter_mut().zip(&self.window.n[r]).for_each(|(s, n)| *s += n);
        }
        let total: f64 = sums.iter().sum::<f64>() + 0.5 * sums.len() as f64;
        sums.iter().enumerate().for_each(|(d, s)| theta[d] = ((s + 0.5) / total).ln());
        theta
    }

    /// Laplace approximation of the log marginal likelihood (up to a constant).
    fn evidence(&self, minimum: &Minimum) -> Option<f64> {
        laplace_evidence(&self.penalty, minimum)
    }
}

/// Fits the delay model, choosing the strength of the tilts' random walks by Laplace
/// marginal likelihood unless it is given.
fn fit_delay<'a>(window: &'a Window, params: &SmoothParams) -> Option<(DelayModel<'a>, DelayFit)> {
    let strengths: Vec<f64> = match (params.delay_trend, params.delay_trend_penalty) {
        (DelayTrend::Fixed, _) => vec![1.0],
        (_, Some(strength)) => vec![strength.max(0.0)],
        (_, None) => (0..=8).map(|i| 10f64.powf(i as f64 / 2.0)).collect(),
    };
    let mut best: Option<(f64, DelayModel<'a>, DelayFit)> = None;
    let mut start: Option<Vec<f64>> = None;
    for strength in strengths {
        let model = DelayModel::new(window, params, strength);
        let initial = start.take().unwrap_or_else(|| model.initial());
        let Some((minimum, converged)) = minimise(&model, initial) else { continue };
        let Some(evidence) = model.evidence(&minimum) else { continue };
        start = Some(minimum.x.clone());
        if best.as_ref().is_none_or(|(e, ..)| evidence > *e) {
            best = Some((evidence, model, DelayFit { minimum, converged }));
        }
    }
    best.map(|(_, model, fit)| (model, fit))
}

impl Objective for DelayModel<'_> {
    /// Negative penalized log likelihood of the split of each row over its observed delays.
    fn value(&self, theta: &[f64]) -> f64 {
        let log_lik: f64 = self
            .informative_rows()
            .map(|r| {
                let w = self.log_weights(theta, r, self.window.observed[r]);
                dot(&self.window.n[r], &w) - self.window.totals[r] * log_sum_exp(&w)
            })
            .sum();
        0.5 * self.penalty.quadratic(theta) - log_lik
    }

    fn derivatives(&self, theta: &[f64]) -> (Vec<f64>, Matrix) {
        let mut gradient = self.penalty.times(theta);
        let mut hessian = self.penalty.clone();
        for r in self.informative_rows() {
            self.add_row_derivatives(theta, r, &mut gradient, &mut hessian);
        }
        (gradient, hessian)
    }
}

impl DelayModel<'_> {
    /// Adds row r's multinomial score and information: for log weights w with softmax pi and
    /// total O, the score is `n - O pi` and the information `O (diag pi - pi pi^T)`, mapped to
    /// the baseline (identity) and the row's tilts (basis).
    fn add_row_derivatives(&self, theta: &[f64], r: usize, gradient: &mut [f64], hessian: &mut Matrix) {
        let k = self.window.observed[r];
        let total = self.window.totals[r];
        let pi = softmax(&self.log_weights(theta, r, k));
        let zbar: Vec<f64> =
            (0..self.terms).map(|j| (0..=k).map(|d| pi[d] * self.basis[d][j]).sum()).collect();
        let tilt = self.tilt_index(r, 0);
        for d in 0..=k {
            let residual = self.window.n[r][d] - total * pi[d];
            gradient[d] -= residual;
            for j in 0..self.terms {
                gradient[tilt + j] -= residual * self.basis[d][j];
            }
            hessian.add(d, d, total * pi[d]);
            for e in 0..=k {
                hessian.add(d, e, -total * pi[d] * pi[e]);
            }
            for j in 0..self.terms {
                let v = total * pi[d] * (self.basis[d][j] - zbar[j]);
                hessian.add(d, tilt + j, v);
                hessian.add(tilt + j, d, v);
            }
        }
        for j in 0..self.terms {
            for l in 0..self.terms {
                let second: f64 = (0..=k).map(|d| pi[d] * self.basis[d][j] * self.basis[d][l]).sum();
                hessian.add(tilt + j, tilt + l, total * (second - zbar[j] * zbar[l]));
            }
        }
    }
}

// ---------------------------------------------------------------------------------------
// Incidence model: Poisson totals with offsets ln F, second-order random walk on log lambda

#[derive(Debug)]
struct IncidenceModel<'a> {
    totals: &'a [f64],
    offsets: &'a [f64],
    /// Penalty matrix (random walk of the given precision plus ridge).
    penalty: Matrix,
}

#[derive(Debug)]
struct IncidenceFit {
    minimum: Minimum,
    /// Fitted means of the reported totals, `lambda_t F_t`.
    fitted: Vec<f64>,
    /// Quasi-Poisson dispersion (1 for Poisson-like data).
    dispersion: f64,
}

/// Second-order random-walk penalty of precision `strength` on `n` values, plus the ridge.
fn random_walk2(n: usize, strength: f64) -> Matrix {
    let mut p = Matrix::zeros(n);
    for t in 2..n {
        p.add_outer(&[(t, 1.0), (t - 1, -2.0), (t - 2, 1.0)], strength);
    }
    (0..n).for_each(|i| p.add(i, i, INCIDENCE_RIDGE));
    p
}

impl Objective for IncidenceModel<'_> {
    fn value(&self, eta: &[f64]) -> f64 {
        let log_lik: f64 = eta
            .iter()
            .zip(self.offsets)
            .zip(self.totals)
            .map(|((e, o), y)| y * (e + o) - (e + o).min(MAX_LOG_RATE * 2.0).exp())
            .sum();
        0.5 * self.penalty.quadratic(eta) - log_lik
    }

    fn derivatives(&self, eta: &[f64]) -> (Vec<f64>, Matrix) {
        let mut gradient = self.penalty.times(eta);
        let mut hessian = self.penalty.clone();
        for t in 0..eta.len() {
            let mu = (eta[t] + self.offsets[t]).min(MAX_LOG_RATE * 2.0).exp();
            gradient[t] -= self.totals[t] - mu;
            hessian.add(t, t, mu);
        }
        (gradient, hessian)
    }
}

/// Fits log incidence, choosing the penalty by Laplace marginal likelihood unless given.
fn fit_incidence(window: &Window, log_completeness: &[f64], params: &SmoothParams) -> Option<IncidenceFit> {
    let initial: Vec<f64> =
        window.totals.iter().zip(log_completeness).map(|(y, lf)| (y + 0.5).ln() - lf).collect();
    let strengths: Vec<f64> = match params.incidence_penalty {
        Some(strength) => vec![strength.max(0.0)],
        None => (-2..=10).map(|i| 10f64.powf(i as f64 / 2.0)).collect(),
    };
    let mut best: Option<(f64, Minimum)> = None;
    let mut start = initial;
    for strength in strengths {
        let model = IncidenceModel {
            totals: &window.totals,
            offsets: log_completeness,
            penalty: random_walk2(window.len(), strength),
        };
        let Some((minimum, _)) = minimise(&model, start.clone()) else { continue };
        let Some(evidence) = laplace_evidence(&model.penalty, &minimum) else { continue };
        start.clone_from(&minimum.x);
        if best.as_ref().is_none_or(|(e, _)| evidence > *e) {
            best = Some((evidence, minimum));
        }
    }
    let (_, minimum) = best?;
    let fitted: Vec<f64> = minimum.x.iter().zip(log_completeness).map(|(e, o)| (e + o).exp()).collect();
    let dispersion = if params.overdispersion {
        pearson_dispersion(&window.totals, &fitted, &minimum.covariance)
    } else {
        1.0
    };
    Some(IncidenceFit { minimum, fitted, dispersion })
}

/// Laplace approximation of the log marginal likelihood (up to a constant):
/// `-f(eta_hat) + ln|Q| / 2 - ln|H| / 2`, with f the negative penalized log likelihood and Q
/// the prior precision.
fn laplace_evidence(penalty: &Matrix, minimum: &Minimum) -> Option<f64> {
    let prior = penalty.cholesky()?;
    Some(-minimum.value + 0.5 * prior.log_det() - 0.5 * minimum.hessian.log_det())
}

/// Pearson chi-square over its residual degrees of freedom (n - trace of the hat matrix),
/// at least 1 and at most `MAX_DISPERSION`.
fn pearson_dispersion(totals: &[f64], fitted: &[f64], covariance: &Matrix) -> f64 {
    let (mut chi2, mut edf, mut n) = (0.0, 0.0, 0.0);
    for (t, (&y, &mu)) in totals.iter().zip(fitted).enumerate() {
        if mu > 1e-9 {
            chi2 += (y - mu).powi(2) / mu;
            edf += covariance.at(t, t) * mu;
            n += 1.0;
        }
    }
    if n - edf < 3.0 {
        return 1.0;
    }
    (chi2 / (n - edf)).clamp(1.0, MAX_DISPERSION)
}

// ---------------------------------------------------------------------------------------
// Predictive draws

#[derive(Debug)]
struct Sampler<'a> {
    delay_model: &'a DelayModel<'a>,
    theta: &'a [f64],
    /// Delay coefficients that matter for incomplete rows, and the Cholesky factor of their
    /// posterior covariance.
    theta_indices: Vec<usize>,
    theta_factor: Cholesky,
    /// Incomplete window rows, their fitted log incidence and log completeness.
    rows: Vec<usize>,
    eta: Vec<f64>,
    log_completeness: Vec<f64>,
    /// `d eta_i / d ln F_c` over incomplete rows (first-order response of the incidence fit).
    response: Vec<Vec<f64>>,
    /// Cholesky factor of the (dispersion-scaled) posterior covariance of log incidence.
    eta_factor: Cholesky,
    dispersion: f64,
}

impl<'a> Sampler<'a> {
    fn new(
        delay_model: &'a DelayModel<'a>,
        delay: &'a DelayFit,
        incidence: &IncidenceFit,
        log_completeness: &[f64],
        window: &Window,
    ) -> Option<Sampler<'a>> {
        let rows = window.incomplete();
        let mut theta_indices: Vec<usize> = (0..=window.max_delay).collect();
        for &r in &rows {
            theta_indices.extend((0..delay_model.terms).map(|j| delay_model.tilt_index(r, j)));
        }
        let theta_factor = delay.minimum.covariance.submatrix(&theta_indices).cholesky()?;
        let sigma = &incidence.minimum.covariance;
        let response = rows
            .iter()
            .map(|&i| rows.iter().map(|&c| -sigma.at(i, c) * incidence.fitted[c]).collect())
            .collect();
        let mut eta_cov = sigma.submatrix(&rows);
        eta_cov.scale(incidence.dispersion);
        Some(Sampler {
            delay_model,
            theta: &delay.minimum.x,
            theta_indices,
            theta_factor,
            eta: rows.iter().map(|&r| incidence.minimum.x[r]).collect(),
            log_completeness: rows.iter().map(|&r| log_completeness[r]).collect(),
            rows,
            response,
            eta_factor: eta_cov.cholesky()?,
            dispersion: incidence.dispersion,
        })
    }

    fn draw(&self, latest: &[f64], draws: usize, seed: u64) -> Predictive {
        let mut rng = StdRng::seed_from_u64(seed);
        let mut out: Vec<Vec<f64>> = vec![Vec::with_capacity(draws); self.rows.len()];
        let mut theta = self.theta.to_vec();
        for _ in 0..draws {
            self.draw_theta(&mut rng, &mut theta);
            let log_f: Vec<f64> =
                self.rows.iter().map(|&r| self.delay_model.log_completeness(&theta, r)).collect();
            let eta = self.draw_eta(&mut rng, &log_f);
            for (i, &r) in self.rows.iter().enumerate() {
                let unreported = eta[i].min(MAX_LOG_RATE).exp() * -log_f[i].exp_m1();
                out[i].push(latest[r] + self.draw_count(&mut rng, unreported));
            }
        }
        let rows = self
            .rows
            .iter()
            .zip(out)
            .zip(&self.log_completeness)
            .map(|((&r, draws), lf)| (r, lf.exp(), draws))
            .collect();
        Predictive { rows }
    }

    fn draw_theta(&self, rng: &mut impl Rng, theta: &mut [f64]) {
        let shift = self.theta_factor.times_normal(rng);
        for (&i, s) in self.theta_indices.iter().zip(shift) {
            theta[i] = self.theta[i] + s;
        }
    }

    /// Log incidence given drawn completeness: the fit's first-order response plus
    /// posterior noise.
    fn draw_eta(&self, rng: &mut impl Rng, log_f: &[f64]) -> Vec<f64> {
        let noise = self.eta_factor.times_normal(rng);
        let change: Vec<f64> = log_f.iter().zip(&self.log_completeness).map(|(a, b)| a - b).collect();
        (0..self.rows.len()).map(|i| self.eta[i] + dot(&self.response[i], &change) + noise[i]).collect()
    }

    /// Cases still to be reported: Poisson with the given mean, or negative binomial with
    /// variance `dispersion * mean` when overdispersed.
    fn draw_count(&self, rng: &mut impl Rng, mean: f64) -> f64 {
        if !(mean.is_finite() && mean > 0.0) {
            return 0.0;
        }
        let rate = if self.dispersion > 1.0 {
            let shape = mean / (self.dispersion - 1.0);
            Gamma::new(shape, self.dispersion - 1.0).map_or(mean, |g| g.sample(rng))
        } else {
            mean
        };
        Poisson::new(rate.min(Poisson::<f64>::MAX_LAMBDA)).map_or(0.0, |p| p.sample(rng))
    }
}

// ---------------------------------------------------------------------------------------
// Penalized Newton minimisation

trait Objective {
    fn value(&self, x: &[f64]) -> f64;
    /// Gradient and Hessian (positive definite) of `value`.
    fn derivatives(&self, x: &[f64]) -> (Vec<f64>, Matrix);
}

#[derive(Debug)]
struct Minimum {
    x: Vec<f64>,
    value: f64,
    /// Cholesky factor of the Hessian at `x`.
    hessian: Cholesky,
    /// Inverse Hessian: the Laplace posterior covariance.
    covariance: Matrix,
}

/// Newton's method with backtracking; returns the minimum and whether it converged. `None`
/// when the Hessian is not positive definite or the value is not finite.
fn minimise(objective: &impl Objective, mut x: Vec<f64>) -> Option<(Minimum, bool)> {
    const MAX_ITERATIONS: usize = 100;
    let mut value = objective.value(&x);
    if !value.is_finite() {
        return None;
    }
    let mut converged = false;
    for _ in 0..MAX_ITERATIONS {
        let (gradient, hessian) = objective.derivatives(&x);
        let step = hessian.cholesky()?.solve(&gradient);
        let decrement = dot(&gradient, &step);
        if !decrement.is_finite() {
            return None;
        }
        if decrement < 1e-9 * (1.0 + value.abs()).min(1e6) {
            converged = true;
            break;
        }
        let Some((next, next_value)) = backtrack(objective, &x, &step, value, decrement) else {
            converged = decrement < 1e-6 * (1.0 + value.abs());
            break;
        };
        x = next;
        value = next_value;
    }
    let (_, hessian) = objective.derivatives(&x);
    let hessian = hessian.cholesky()?;
    let covariance = hessian.inverse();
    Some((Minimum { x, value, hessian, covariance }, converged))
}

/// Halves the Newton step until the value decreases enough (Armijo condition).
fn backtrack(
    objective: &impl Objective,
    x: &[f64],
    step: &[f64],
    value: f64,
    decrement: f64,
) -> Option<(Vec<f64>, f64)> {
    let mut size = 1.0;
    for _ in 0..40 {
        let next: Vec<f64> = x.iter().zip(step).map(|(a, s)| a - size * s).collect();
        let next_value = objective.value(&next);
        if next_value.is_finite() && next_value <= value - 1e-4 * size * decrement {
            return Some((next, next_value));
        }
        size *= 0.5;
    }
    None
}

// ---------------------------------------------------------------------------------------
// Small dense linear algebra

/// A dense square matrix, row-major.
#[derive(Debug, Clone)]
struct Matrix {
    n: usize,
    a: Vec<f64>,
}

impl Matrix {
    fn zeros(n: usize) -> Matrix {
        Matrix { n, a: vec![0.0; n * n] }
    }

    fn at(&self, i: usize, j: usize) -> f64 {
        self.a[i * self.n + j]
    }

    fn add(&mut self, i: usize, j: usize, v: f64) {
        self.a[i * self.n + j] += v;
    }

    /// Adds `weight * v v^T` for a sparse vector v given as (index, value) pairs.
    fn add_outer(&mut self, v: &[(usize, f64)], weight: f64) {
        for &(i, a) in v {
            for &(j, b) in v {
                self.add(i, j, weight * a * b);
            }
        }
    }

    fn scale(&mut self, factor: f64) {
        self.a.iter_mut().for_each(|v| *v *= factor);
    }

    fn times(&self, x: &[f64]) -> Vec<f64> {
        self.a.chunks(self.n.max(1)).map(|row| dot(row, x)).collect()
    }

    fn quadratic(&self, x: &[f64]) -> f64 {
        dot(x, &self.times(x))
    }

    fn submatrix(&self, indices: &[usize]) -> Matrix {
        let mut sub = Matrix::zeros(indices.len());
        for (si, &i) in indices.iter().enumerate() {
            for (sj, &j) in indices.iter().enumerate() {
                sub.a[si * sub.n + sj] = self.at(i, j);
            }
        }
        sub
    }

    /// Cholesky factor; retries with a small diagonal jitter before giving up.
    fn cholesky(&self) -> Option<Cholesky> {
        let scale = (0..self.n).map(|i| self.at(i, i).abs()).fold(0.0, f64::max).max(1e-300);
        [0.0, 1e-10, 1e-7].into_iter().find_map(|jitter| Cholesky::factor(self, jitter * scale))
    }
}

/// Lower-triangular Cholesky factor L of a symmetric positive definite matrix, `A = L L^T`.
#[derive(Debug)]
struct Cholesky {
    n: usize,
    l: Vec<f64>,
}

impl Cholesky {
    fn factor(m: &Matrix, jitter: f64) -> Option<Cholesky> {
        let n = m.n;
        let mut l = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..=i {
                let partial = dot(&l[i * n..i * n + j], &l[j * n..j * n + j]);
                let v = m.at(i, j) - partial;
                if i == j {
                    let diag = v + jitter;
                    if !(diag.is_finite() && diag > 0.0) {
                        return None;
                    }
                    l[i * n + i] = diag.sqrt();
                } else {
                    l[i * n + j] = v / l[j * n + j];
                }
            }
        }
        Some(Cholesky { n, l })
    }

    fn log_det(&self) -> f64 {
        (0..self.n).map(|i| 2.0 * self.l[i * self.n + i].ln()).sum()
    }

    /// Solves `A x = b`.
    fn solve(&self, b: &[f64]) -> Vec<f64> {
        let n = self.n;
        let mut y = b.to_vec();
        for i in 0..n {
            y[i] = (y[i] - dot(&self.l[i * n..i * n + i], &y[..i])) / self.l[i * n + i];
        }
        for i in (0..n).rev() {
            let s: f64 = (i + 1..n).map(|k| self.l[k * n + i] * y[k]).sum();
            y[i] = (y[i] - s) / self.l[i * n + i];
        }
        y
    }

    /// `A^-1`, column by column.
    fn inverse(&self) -> Matrix {
        let n = self.n;
        let mut inv = Matrix::zeros(n);
        let mut unit = vec![0.0; n];
        for j in 0..n {
            unit[j] = 1.0;
            let column = self.solve(&unit);
            unit[j] = 0.0;
            for (i, v) in column.into_iter().enumerate() {
                inv.a[i * n + j] = v;
            }
        }
        inv
    }

    /// `L z` for standard normal z: a draw from N(0, A).
    fn times_normal(&self, rng: &mut impl Rng) -> Vec<f64> {
        let z: Vec<f64> = (0..self.n).map(|_| StandardNormal.sample(rng)).collect();
        (0..self.n).map(|i| dot(&self.l[i * self.n..i * self.n + i + 1], &z[..=i])).collect()
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn log_sum_exp(w: &[f64]) -> f64 {
    let max = w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !max.is_finite() {
        return max;
    }
    max + w.iter().map(|v| (v - max).exp()).sum::<f64>().ln()
}

fn softmax(w: &[f64]) -> Vec<f64> {
    let lse = log_sum_exp(w);
    w.iter().map(|v| (v - lse).exp()).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::simulate::{Scenario, discretised_gamma, epidemic_curve, simulate};
    use chrono::{Days, NaiveDate};

    /// Weighted interval score of a row (Bracher et al. 2021, PLoS Comput Biol 17:e1008618):
    /// median and the 50/90/95% intervals, `(0.5|y-m| + sum_k (a_k/2) IS_a_k) / (K + 0.5)`.
    fn wis(row: &NowcastRow, y: f64) -> f64 {
        let interval =
            |l: f64, u: f64, a: f64| (u - l) + (2.0 / a) * (l - y).max(0.0) + (2.0 / a) * (y - u).max(0.0);
        let sum = 0.5 * (y - row.median).abs()
            + 0.25 * interval(row.lower50, row.upper50, 0.5)
            + 0.05 * interval(row.lower90, row.upper90, 0.1)
            + 0.025 * interval(row.lower95, row.upper95, 0.05);
        sum / 3.5
    }

    #[derive(Debug, Default)]
    struct Score {
        n: f64,
        covered90: f64,
        covered50: f64,
        wis: f64,
        naive: f64,
        relative_error: f64,
    }

    fn score(nowcast: &Nowcast, truth: &[f64], horizons: std::ops::RangeInclusive<usize>, acc: &mut Score) {
        for row in nowcast.rows.iter().filter(|r| horizons.contains(&r.horizon)) {
            let t = truth.len() - 1 - row.horizon;
            let y = truth[t];
            acc.n += 1.0;
            acc.covered90 += f64::from(row.lower90 <= y && y <= row.upper90);
            acc.covered50 += f64::from(row.lower50 <= y && y <= row.upper50);
            acc.wis += wis(row, y);
            acc.naive += (y - row.observed).abs();
            acc.relative_error += (row.median - y) / y.max(1.0);
        }
    }

    fn shift_scenario() -> Scenario {
        let incidence = epidemic_curve(100, 10.0, 150.0, 70.0, 18.0, 25.0);
        Scenario::delay_shift(
            incidence,
            30,
            discretised_gamma(3.0, 0.6, 30),
            discretised_gamma(7.0, 0.6, 30),
            80,
        )
    }

    fn constant_scenario() -> Scenario {
        let incidence = epidemic_curve(100, 10.0, 150.0, 70.0, 18.0, 25.0);
        Scenario::constant_delay(incidence, 30, discretised_gamma(5.0, 0.6, 30))
    }

    #[test]
    #[ignore]
    fn explore() {
        for (name, scenario) in [("constant", constant_scenario()), ("shift", shift_scenario())] {
            for (trend, kb) in [(DelayTrend::Fixed, None), (DelayTrend::ScaleAndShape, None), (DelayTrend::ScaleAndShape, Some(100.0)), (DelayTrend::ScaleAndShape, Some(1000.0)), (DelayTrend::Scale, None)] {
                let params = SmoothParams { delay_trend: trend, delay_trend_penalty: kb, draws: 500, ..SmoothParams::default() };
                let mut acc = Score::default();
                let mut by_h: Vec<Score> = (0..8).map(|_| Score::default()).collect();
                let started = std::time::Instant::now();
                for seed in 0..30 {
                    let (tri, truth) = simulate(&scenario, seed);
                    let nc = nowcast(&tri, &params, seed);
                    score(&nc, &truth, 0..=7, &mut acc);
                    for h in 0..8 { score(&nc, &truth, h..=h, &mut by_h[h]); }
                }
                eprintln!(
                    "{name} {trend:?} {kb:?}: cov90 {:.3} cov50 {:.3} wis {:.2} naive {:.2} bias {:.3} ({:?})\n   bias {:?}\n   wis {:?}\n   cov90 {:?}",
                    acc.covered90 / acc.n,
                    acc.covered50 / acc.n,
                    acc.wis / acc.n,
                    acc.naive / acc.n,
                    acc.relative_error / acc.n,
                    started.elapsed(),
                    by_h.iter().map(|s| format!("{:.2}", s.relative_error / s.n)).collect::<Vec<_>>(),
                    by_h.iter().map(|s| format!("{:.1}", s.wis / s.n)).collect::<Vec<_>>(),
                    by_h.iter().map(|s| format!("{:.2}", s.covered90 / s.n)).collect::<Vec<_>>(),
                );
            }
        }
    }
}

#[cfg(test)]
mod debug_tests {
    use super::*;
    use crate::analysis::simulate::{Scenario, discretised_gamma, epidemic_curve, simulate};

    #[test]
    #[ignore]
    fn debug_one() {
        let incidence = epidemic_curve(100, 10.0, 150.0, 70.0, 18.0, 25.0);
        let scenario = Scenario::constant_delay(incidence, 30, discretised_gamma(5.0, 0.6, 30));
        let (tri, truth) = simulate(&scenario, 3);
        let params = SmoothParams { delay_trend: DelayTrend::Fixed, draws: 500, ..SmoothParams::default() };
        let window = Window::new(&tri, &params, &mut vec![]);
        let (model, fit) = fit_delay(&window, &params).unwrap();
        let (fit, conv) = (fit.minimum, fit.converged);
        eprintln!("converged {conv} value {}", fit.value);
        let p = softmax(&model.log_weights(&fit.x, 0, 30));
        eprintln!("p {:?}", p.iter().map(|v| format!("{v:.4}")).collect::<Vec<_>>());
        eprintln!("true {:?}", scenario.delay_pmf(0).iter().map(|v| format!("{v:.4}")).collect::<Vec<_>>());
        let lf: Vec<f64> = (0..window.len()).map(|r| model.log_completeness(&fit.x, r)).collect();
        let inc = fit_incidence(&window, &lf, &params).unwrap();
        eprintln!("dispersion {}", inc.dispersion);
        let nc = nowcast(&tri, &params, 1);
        for row in nc.rows.iter().rev().take(10) {
            let y = truth[truth.len() - 1 - row.horizon];
            eprintln!("h{} obs {} truth {} med {} [{}, {}] 95 [{}, {}] F {:.3}", row.horizon, row.observed, y, row.median, row.lower90, row.upper90, row.lower95, row.upper95, row.completeness);
        }
        eprintln!("{:?}", nc.problems);
    }
}
