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
    /// marginal likelihood over 1, 10, .., 10^4.
    pub delay_trend_penalty: Option<f64>,
    /// Degrees of freedom of the Student-t distribution of the log stretch's steps between
    /// knots (default 2): heavy tails let a sudden change in reporting show as one large step
    /// while the stretch stays smooth elsewhere. Zero or less: Gaussian steps.
    pub delay_change_dof: f64,
    /// Days between the knots of the log stretch (default 7, counted back from the last
    /// date); it is linear between knots.
    pub delay_trend_knots: usize,
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
            delay_changes: true,
            delay_trend_penalty: None,
            delay_change_dof: 2.0,
            delay_trend_knots: 7,
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
// Delay model: a baseline delay distribution stretched in time by a factor that follows a
// random walk over reference dates

/// Knots of the log stretch over the window's reference dates: every `spacing` rows counted
/// back from the last row, plus the first row; a row's log stretch interpolates linearly
/// between the two knots around it.
#[derive(Debug)]
struct Knots {
    positions: Vec<usize>,
    /// For each window row: (lower knot, its weight, upper knot, its weight).
    weights: Vec<(usize, f64, usize, f64)>,
}

impl Knots {
    fn new(rows: usize, spacing: usize) -> Knots {
        let spacing = spacing.max(1);
        let mut positions: Vec<usize> =
            (0..).map(|i| i * spacing).take_while(|&back| back < rows).map(|back| rows - 1 - back).collect();
        if positions.last() != Some(&0) {
            positions.push(0);
        }
        positions.reverse();
        let weights = (0..rows).map(|r| Knots::interpolate(&positions, r)).collect();
        Knots { positions, weights }
    }

    fn interpolate(positions: &[usize], r: usize) -> (usize, f64, usize, f64) {
        let upper = positions.partition_point(|&p| p < r).min(positions.len() - 1);
        if upper == 0 || positions[upper] == r {
            return (upper, 1.0, upper, 0.0);
        }
        let (lo, hi) = (positions[upper - 1], positions[upper]);
        let u = (r - lo) as f64 / (hi - lo) as f64;
        (upper - 1, 1.0 - u, upper, u)
    }

    fn len(&self) -> usize {
        self.positions.len()
    }
}

/// The baseline delay distribution as a continuous cdf G on [0, D + 1]: linear within each
/// day from day 1 on (reports spread evenly over the day), and a power law `G(u) = G(1) u^a`
/// within day 0 with `a = log2(G(2) / G(1))`, so that a stretched distribution starts
/// rising the way its first two days do instead of jumping.
#[derive(Debug)]
struct Baseline {
    pmf: Vec<f64>,
    /// `prefix[j]`: the baseline cdf at day j (the sum of the pmf below j).
    prefix: Vec<f64>,
    /// Exponent of the power law within day 0.
    power: f64,
}

impl Baseline {
    fn new(log_weights: &[f64]) -> Baseline {
        let pmf = softmax(log_weights);
        let mut prefix = Vec::with_capacity(pmf.len() + 1);
        prefix.push(0.0);
        for p in &pmf {
            prefix.push(prefix.last().copied().unwrap_or(0.0) + p);
        }
        let power = if pmf.len() > 1 { (1.0 + pmf[1] / pmf[0]).log2() } else { 1.0 };
        Baseline { pmf, prefix, power }
    }

    fn end(&self) -> f64 {
        self.pmf.len() as f64
    }

    fn cdf(&self, u: f64) -> f64 {
        if u <= 0.0 {
            0.0
        } else if u < 1.0 {
            self.pmf[0] * u.powf(self.power)
        } else if u >= self.end() {
            1.0
        } else {
            let j = u.floor() as usize;
            self.prefix[j] + (u - j as f64) * self.pmf[j]
        }
    }

    /// Density just below u (the derivative of the cdf from the left).
    fn density_below(&self, u: f64) -> f64 {
        if u <= 0.0 || u > self.end() {
            0.0
        } else if u <= 1.0 {
            self.power * self.pmf[0] * u.powf(self.power - 1.0)
        } else {
            self.pmf[u.ceil() as usize - 1]
        }
    }

    /// `pi_i dG(u)/dpi_i` for u within day 0 (only days 0 and 1 enter), as (day, value).
    fn first_day_gradient(&self, u: f64) -> [(usize, f64); 2] {
        if u <= 0.0 || self.pmf.len() < 2 {
            return [(0, self.cdf(u.min(1.0))), (1, 0.0)];
        }
        let g = self.cdf(u.min(1.0));
        let log_u = u.min(1.0).ln();
        let two = self.pmf[0] + self.pmf[1];
        // a = log2(two / pi_0): da/dpi_0 = (1/two - 1/pi_0) / ln 2, da/dpi_1 = (1/two) / ln 2.
        let da0 = (1.0 / two - 1.0 / self.pmf[0]) / std::f64::consts::LN_2;
        let da1 = (1.0 / two) / std::f64::consts::LN_2;
        [(0, g * (1.0 + self.pmf[0] * log_u * da0)), (1, g * self.pmf[1] * log_u * da1)]
    }

    /// The baseline mass of `[u0, u1)` and `pi_i dmass/dpi_i` for the days it depends on.
    /// The mass is homogeneous of degree 1 in the pmf, so these sum to the mass.
    fn mass_gradient(&self, u0: f64, u1: f64) -> (f64, Vec<(usize, f64)>) {
        let mass = self.cdf(u1) - self.cdf(u0);
        let mut gradient = Vec::new();
        if u0 < 1.0 {
            let [(i0, a0), (i1, a1)] = self.first_day_gradient(u1);
            let [(_, b0), (_, b1)] = self.first_day_gradient(u0);
            gradient.push((i0, a0 - b0));
            if self.pmf.len() > 1 {
                gradient.push((i1, a1 - b1));
            }
        }
        let last = (u1.min(self.end()).ceil() as usize).min(self.pmf.len());
        for j in (u0.floor() as usize).max(1)..last {
            let overlap = u1.min(j as f64 + 1.0) - u0.max(j as f64);
            if overlap > 0.0 {
                match gradient.iter_mut().find(|(i, _)| *i == j) {
                    Some(entry) => entry.1 += overlap * self.pmf[j],
                    None => gradient.push((j, overlap * self.pmf[j])),
                }
            }
        }
        (mass, gradient)
    }
}

/// Largest log stretch used (a factor of e^3, about 20, either way).
const MAX_LOG_STRETCH: f64 = 3.0;
/// Precision that pins the first knot's log stretch to zero: the baseline is the delay
/// distribution at the start of the window.
const ANCHOR: f64 = 1e6;

#[derive(Debug)]
struct DelayModel<'a> {
    window: &'a Window,
    /// Whether the log stretch varies (one coefficient per knot) or not.
    terms: usize,
    knots: Knots,
    /// Baseline smoothness, anchor and ridge (fixed quadratic part of the penalty).
    penalty: Matrix,
    /// Precision per day of the log stretch's random-walk steps.
    trend_penalty: f64,
    /// Degrees of freedom of the Student-t steps (infinite: Gaussian).
    dof: f64,
}

#[derive(Debug)]
struct DelayFit {
    minimum: Minimum,
    converged: bool,
}

impl<'a> DelayModel<'a> {
    fn new(window: &'a Window, params: &SmoothParams, trend_penalty: f64) -> DelayModel<'a> {
        let terms = usize::from(params.delay_changes);
        let knots = Knots::new(window.len(), params.delay_trend_knots);
        let dof = if params.delay_change_dof > 0.0 { params.delay_change_dof } else { f64::INFINITY };
        let mut model = DelayModel { window, terms, knots, penalty: Matrix::zeros(0), trend_penalty, dof };
        model.penalty = model.baseline_penalty(params.delay_shape_penalty);
        model
    }

    fn len(&self) -> usize {
        self.window.max_delay + 1 + self.terms * self.knots.len()
    }

    fn knot_index(&self, knot: usize) -> usize {
        self.window.max_delay + 1 + knot
    }

    /// Second differences of the baseline across delays, the anchor, and the ridge.
    fn baseline_penalty(&self, shape_penalty: f64) -> Matrix {
        let mut p = Matrix::zeros(self.len());
        for d in 2..=self.window.max_delay {
            // Centred at d - 1; weight (1 + (d - 1))^2 (see `SmoothParams::delay_shape_penalty`).
            p.add_outer(&[(d, 1.0), (d - 1, -2.0), (d - 2, 1.0)], shape_penalty * (d * d) as f64);
        }
        if self.terms > 0 {
            p.add(self.knot_index(0), self.knot_index(0), ANCHOR);
        }
        (0..self.len()).for_each(|i| p.add(i, i, RIDGE));
        p
    }

    /// The steps of the log stretch between consecutive knots: (knot, days since the
    /// previous knot, step, squared step scaled to its precision).
    fn steps<'s>(&'s self, theta: &'s [f64]) -> impl Iterator<Item = (usize, f64, f64, f64)> + 's {
        (1..self.knots.len()).filter(|_| self.terms > 0).map(move |k| {
            let gap = (self.knots.positions[k] - self.knots.positions[k - 1]) as f64;
            let step = theta[self.knot_index(k)] - theta[self.knot_index(k - 1)];
            (k, gap, step, self.trend_penalty * step * step / gap)
        })
    }

    /// Minus the log prior density of one step (up to a constant): `q / 2` for Gaussian
    /// steps, `(dof + 1) / 2 ln(1 + q / dof)` for Student-t steps, q the scaled squared step.
    fn step_penalty(&self, scaled: f64) -> f64 {
        if self.dof.is_finite() { 0.5 * (self.dof + 1.0) * (scaled / self.dof).ln_1p() } else { 0.5 * scaled }
    }

    /// Weight of a step in the reweighted quadratic (IRLS) form of its penalty: the
    /// derivative of `step_penalty` with respect to `q / 2`.
    fn step_weight(&self, scaled: f64) -> f64 {
        if self.dof.is_finite() { (self.dof + 1.0) / (self.dof + scaled) } else { 1.0 }
    }

    /// Adds the steps' penalty gradient and reweighted Hessian.
    fn add_step_derivatives(&self, theta: &[f64], gradient: &mut [f64], hessian: &mut Matrix) {
        for (k, gap, step, scaled) in self.steps(theta) {
            let weight = self.step_weight(scaled) * self.trend_penalty / gap;
            let (hi, lo) = (self.knot_index(k), self.knot_index(k - 1));
            gradient[hi] += weight * step;
            gradient[lo] -= weight * step;
            hessian.add_outer(&[(hi, 1.0), (lo, -1.0)], weight);
        }
    }

    /// Laplace approximation of the log marginal likelihood, up to a constant that does not
    /// depend on the step precision: `-f + (S / 2) ln(precision) - ln|H| / 2` with S steps.
    fn evidence(&self, minimum: &Minimum) -> f64 {
        let steps = (self.terms * (self.knots.len() - 1)) as f64;
        -minimum.value + 0.5 * steps * self.trend_penalty.ln() - 0.5 * minimum.hessian.log_det()
    }

    /// The stretch factor of window row r, and the knots it comes from with their weights.
    fn stretch(&self, theta: &[f64], r: usize) -> (f64, [(usize, f64); 2]) {
        let (lo, w_lo, hi, w_hi) = self.knots.weights[r];
        if self.terms == 0 {
            return (1.0, [(0, 0.0), (0, 0.0)]);
        }
        let log_stretch = w_lo * theta[self.knot_index(lo)] + w_hi * theta[self.knot_index(hi)];
        (log_stretch.clamp(-MAX_LOG_STRETCH, MAX_LOG_STRETCH).exp(), [(lo, w_lo), (hi, w_hi)])
    }

    fn baseline(&self, theta: &[f64]) -> Baseline {
        Baseline::new(&theta[..=self.window.max_delay])
    }

    /// `ln F_r(k_r)`: log of the share of row r's eventual count reported by its largest
    /// observed delay. Delay d of row r covers baseline days `[d, d + 1) / stretch`.
    fn log_completeness(&self, baseline: &Baseline, theta: &[f64], r: usize) -> f64 {
        let (stretch, _) = self.stretch(theta, r);
        let reported = (self.window.observed[r] + 1) as f64 / stretch;
        let all = (self.window.max_delay + 1) as f64 / stretch;
        baseline.cdf(reported).ln() - baseline.cdf(all).ln()
    }

    /// Rows that inform the delay split: more than one observed delay and some reports.
    fn informative_rows(&self) -> impl Iterator<Item = usize> + '_ {
        (0..self.window.len()).filter(|&r| self.window.observed[r] > 0 && self.window.totals[r] > 0.0)
    }

    /// Start: log shares of the pooled complete rows, no stretch.
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

    /// Log likelihood of row r's split over its observed delays:
    /// `sum_d n_d ln A_d - O ln C`, A_d the baseline mass of delay d's stretched interval and
    /// C their sum.
    fn row_log_likelihood(&self, baseline: &Baseline, theta: &[f64], r: usize) -> f64 {
        let (stretch, _) = self.stretch(theta, r);
        let k = self.window.observed[r];
        let mut sum = 0.0;
        for (d, &n) in self.window.n[r].iter().enumerate().take(k + 1) {
            if n > 0.0 {
                let mass = baseline.cdf((d + 1) as f64 / stretch) - baseline.cdf(d as f64 / stretch);
                sum += n * mass.ln();
            }
        }
        sum - self.window.totals[r] * baseline.cdf((k + 1) as f64 / stretch).ln()
    }

    /// Adds row r's score and Fisher information. With `x_d` the gradient of `ln A_d` in the
    /// baseline weights (through the responsibilities `pi_j overlap_dj / A_d`) and the log
    /// stretch, and `q_d = A_d / C`: score `sum_d (n_d - O q_d) x_d`, information
    /// `O (sum_d q_d x_d x_d^T - xbar xbar^T)` with `xbar = sum_d q_d x_d` (the softmax
    /// normaliser cancels).
    fn add_row_derivatives(
        &self,
        baseline: &Baseline,
        theta: &[f64],
        r: usize,
        gradient: &mut [f64],
        hessian: &mut Matrix,
    ) {
        let (stretch, knots) = self.stretch(theta, r);
        let k = self.window.observed[r];
        let total = self.window.totals[r];
        let top = (((k + 1) as f64 / stretch).floor() as usize).clamp(1, self.window.max_delay);
        let slot = top + 1; // local index of the log stretch
        let norm = baseline.cdf((k + 1) as f64 / stretch);
        let mut xbar = vec![0.0; top + 2];
        let mut score = vec![0.0; top + 2];
        let mut info = Matrix::zeros(top + 2);
        for d in 0..=k {
            let (u0, u1) = (d as f64 / stretch, (d + 1) as f64 / stretch);
            let (mass, gradient) = baseline.mass_gradient(u0, u1);
            if !(mass > 0.0) {
                continue;
            }
            let mut x: Vec<(usize, f64)> = gradient.into_iter().map(|(j, v)| (j, v / mass)).collect();
            if self.terms > 0 {
                x.push((slot, -(u1 * baseline.density_below(u1) - u0 * baseline.density_below(u0)) / mass));
            }
            let q = mass / norm;
            let residual = self.window.n[r][d] - total * q;
            for &(i, v) in &x {
                xbar[i] += q * v;
                score[i] += residual * v;
            }
            info.add_outer(&x, total * q);
        }
        for i in 0..xbar.len() {
            for j in 0..xbar.len() {
                info.add(i, j, -total * xbar[i] * xbar[j]);
            }
        }
        self.scatter(&score, &info, slot, knots, gradient, hessian);
    }

    /// Adds a row's local score and information to the global gradient (of the negative log
    /// likelihood) and Hessian; the local log-stretch slot maps to the row's two knots.
    fn scatter(
        &self,
        score: &[f64],
        info: &Matrix,
        slot: usize,
        knots: [(usize, f64); 2],
        gradient: &mut [f64],
        hessian: &mut Matrix,
    ) {
        let targets = |i: usize| -> Vec<(usize, f64)> {
            if i < slot {
                vec![(i, 1.0)]
            } else if self.terms > 0 {
                knots.iter().filter(|(_, w)| *w > 0.0).map(|&(knot, w)| (self.knot_index(knot), w)).collect()
            } else {
                Vec::new()
            }
        };
        let mapped: Vec<Vec<(usize, f64)>> = (0..score.len()).map(targets).collect();
        for (i, to) in mapped.iter().enumerate() {
            for &(gi, wi) in to {
                gradient[gi] -= wi * score[i];
                for (j, to_j) in mapped.iter().enumerate() {
                    for &(gj, wj) in to_j {
                        hessian.add(gi, gj, wi * wj * info.at(i, j));
                    }
                }
            }
        }
    }
}

impl Objective for DelayModel<'_> {
    /// Negative penalized log likelihood of the split of each row over its observed delays.
    fn value(&self, theta: &[f64]) -> f64 {
        let baseline = self.baseline(theta);
        let log_lik: f64 =
            self.informative_rows().map(|r| self.row_log_likelihood(&baseline, theta, r)).sum();
        let steps: f64 = self.steps(theta).map(|(.., scaled)| self.step_penalty(scaled)).sum();
        0.5 * self.penalty.quadratic(theta) + steps - log_lik
    }

    /// Exact gradient; the Hessian is the Fisher information plus the penalty, with the
    /// Student-t steps in reweighted (IRLS) form, which keeps it positive definite.
    fn derivatives(&self, theta: &[f64]) -> (Vec<f64>, Matrix) {
        let baseline = self.baseline(theta);
        let mut gradient = self.penalty.times(theta);
        let mut hessian = self.penalty.clone();
        self.add_step_derivatives(theta, &mut gradient, &mut hessian);
        for r in self.informative_rows() {
            self.add_row_derivatives(&baseline, theta, r, &mut gradient, &mut hessian);
        }
        (gradient, hessian)
    }
}

/// Fits the delay model, choosing the precision of the log stretch's random walk by Laplace
/// marginal likelihood unless it is given.
fn fit_delay<'a>(window: &'a Window, params: &SmoothParams) -> Option<(DelayModel<'a>, DelayFit)> {
    let strengths: Vec<f64> = match (params.delay_changes, params.delay_trend_penalty) {
        (false, _) => vec![1.0],
        (true, Some(strength)) => vec![strength.max(1e-9)],
        (true, None) => (0..=4).map(|i| 10f64.powi(i)).collect(),
    };
    let mut best: Option<(f64, DelayModel<'a>, DelayFit)> = None;
    let mut start: Option<Vec<f64>> = None;
    for strength in strengths {
        let model = DelayModel::new(window, params, strength);
        let initial = start.take().unwrap_or_else(|| model.initial());
        let Some((minimum, converged)) = minimise(&model, initial) else { continue };
        let evidence = model.evidence(&minimum);
        start = Some(minimum.x.clone());
        if best.as_ref().is_none_or(|(e, ..)| evidence > *e) {
            best = Some((evidence, model, DelayFit { minimum, converged }));
        }
    }
    best.map(|(_, model, fit)| (model, fit))
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
    /// Laplace posterior covariance of log incidence.
    covariance: Matrix,
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
    let covariance = minimum.hessian.inverse();
    let fitted: Vec<f64> = minimum.x.iter().zip(log_completeness).map(|(e, o)| (e + o).exp()).collect();
    let dispersion =
        if params.overdispersion { pearson_dispersion(&window.totals, &fitted, &covariance) } else { 1.0 };
    Some(IncidenceFit { minimum, covariance, fitted, dispersion })
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
    /// Cholesky factor of the posterior covariance of the delay coefficients.
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
        let theta_factor = delay.minimum.hessian.inverse().cholesky()?;
        let sigma = &incidence.covariance;
        let response = rows
            .iter()
            .map(|&i| rows.iter().map(|&c| -sigma.at(i, c) * incidence.fitted[c]).collect())
            .collect();
        let mut eta_cov = sigma.submatrix(&rows);
        eta_cov.scale(incidence.dispersion);
        Some(Sampler {
            delay_model,
            theta: &delay.minimum.x,
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
            let baseline = self.delay_model.baseline(&theta);
            let log_f: Vec<f64> =
                self.rows.iter().map(|&r| self.delay_model.log_completeness(&baseline, &theta, r)).collect();
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
        for (i, s) in shift.into_iter().enumerate() {
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
    /// Cholesky factor of the Hessian at `x` (its inverse is the Laplace posterior
    /// covariance).
    hessian: Cholesky,
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
    let mut iterations = 0; // TRACE
    for _ in 0..MAX_ITERATIONS {
        iterations += 1; // TRACE
        let (gradient, hessian) = objective.derivatives(&x);
        let step = hessian.cholesky()?.solve(&gradient);
        let decrement = dot(&gradient, &step);
        if !decrement.is_finite() {
            return None;
        }
        if decrement < 1e-6 * (1.0 + value.abs()).min(1e4) {
            converged = true;
            break;
        }
        let Some((next, next_value)) = backtrack(objective, &x, &step, value, decrement) else {
            converged = decrement < 1e-4 * (1.0 + value.abs()).min(1e4);
            break;
        };
        x = next;
        value = next_value;
    }
    if std::env::var("SMOOTH_TRACE").is_ok() {
        eprintln!("TRACE n={} iterations={iterations} converged={converged} value={value}", x.len());
    } // TRACE
    let (_, hessian) = objective.derivatives(&x);
    let hessian = hessian.cholesky()?;
    Some((Minimum { x, value, hessian }, converged))
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
        let incidence = epidemic_curve(100, 10.0, 150.0, 70.0, 18.0, 25.0);
        let shift_at = |day: usize| {
            Scenario::delay_shift(
                incidence.clone(),
                30,
                discretised_gamma(3.0, 0.6, 30),
                discretised_gamma(7.0, 0.6, 30),
                day,
            )
        };
        let cases: Vec<(&str, Scenario)> = vec![
            ("constant", constant_scenario()),
            ("shift80", shift_at(80)),
            ("shift90", shift_at(90)),
            ("shift70", shift_at(70)),
        ];
        let configs: Vec<(bool, Option<f64>, f64, usize)> = std::env::var("CONFIGS")
            .ok()
            .map(|v| {
                v.split(',')
                    .map(|c| {
                        let f: Vec<&str> = c.split(':').collect();
                        let trend = match f[0] {
                            "F" => false,
                            _ => true,
                        };
                        (
                            trend,
                            f[1].parse().ok(),
                            f.get(2).and_then(|v| v.parse().ok()).unwrap_or(2.0),
                            f.get(3).and_then(|v| v.parse().ok()).unwrap_or(7),
                        )
                    })
                    .collect()
            })
            .unwrap_or_else(|| vec![(true, None, 2.0, 7)]);
        let only: Option<String> = std::env::var("ONLY").ok();
        for (name, scenario) in &cases {
            if only.as_ref().is_some_and(|o| !o.split(',').any(|x| x == *name)) {
                continue;
            }
            for &(trend, kb, dof, spacing) in &configs {
                let params = SmoothParams {
                    delay_changes: trend,
                    delay_trend_penalty: kb,
                    delay_change_dof: dof,
                    delay_trend_knots: spacing,
                    draws: 500,
                    ..SmoothParams::default()
                };
                let mut acc = Score::default();
                let mut by_h: Vec<Score> = (0..8).map(|_| Score::default()).collect();
                let started = std::time::Instant::now();
                for seed in 0..30 {
                    let (tri, truth) = simulate(scenario, seed);
                    let nc = nowcast(&tri, &params, seed);
                    score(&nc, &truth, 0..=7, &mut acc);
                    for h in 0..8 {
                        score(&nc, &truth, h..=h, &mut by_h[h]);
                    }
                }
                eprintln!(
                    "{name} {trend:?} {kb:?} dof {dof} knots {spacing}: cov90 {:.3} cov50 {:.3} wis {:.2} naive {:.2} bias {:.3} ({:?})\n   bias {:?}\n   wis {:?}\n   cov90 {:?}",
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
        let scenario = Scenario::delay_shift(
            incidence,
            30,
            discretised_gamma(3.0, 0.6, 30),
            discretised_gamma(7.0, 0.6, 30),
            90,
        );
        let params = SmoothParams {
            draws: 500,
            delay_change_dof: std::env::var("DOF").map_or(2.0, |v| v.parse().unwrap()),
            delay_changes: std::env::var("FIXED").is_err(),
            ..SmoothParams::default()
        };
        for seed in 0..30 {
            let (tri, truth) = simulate(&scenario, seed);
            let window = Window::new(&tri, &params, &mut vec![]);
            let (model, fit) = fit_delay(&window, &params).unwrap();
            let means: Vec<String> = [60, 85, 92, 96, 99]
                .iter()
                .map(|&r| {
                    let (stretch, _) = model.stretch(&fit.minimum.x, r);
                    let b = model.baseline(&fit.minimum.x);
                    let mean: f64 = (0..=30)
                        .map(|d| (d as f64) * (b.cdf((d + 1) as f64 / stretch) - b.cdf(d as f64 / stretch)))
                        .sum::<f64>()
                        / b.cdf(31.0 / stretch);
                    format!("{mean:.2}")
                })
                .collect();
            let nc = nowcast(&tri, &params, 1);
            let row = &nc.rows[99];
            eprintln!(
                "seed {seed} kb {} means {means:?} h0 obs {} truth {} med {} [{}, {}] F {:.4}",
                model.trend_penalty,
                row.observed,
                truth[99],
                row.median,
                row.lower90,
                row.upper90,
                row.completeness
            );
        }
    }
}

#[cfg(test)]
mod gradient_check {
    use super::*;
    use crate::analysis::simulate::{Scenario, discretised_gamma, epidemic_curve, simulate};

    #[test]
    #[ignore]
    fn delay_gradient_matches_finite_differences() {
        let incidence = epidemic_curve(60, 10.0, 150.0, 40.0, 18.0, 25.0);
        let scenario = Scenario::delay_shift(
            incidence,
            15,
            discretised_gamma(3.0, 0.6, 15),
            discretised_gamma(7.0, 0.6, 15),
            45,
        );
        let (tri, _) = simulate(&scenario, 1);
        let params = SmoothParams { delay_change_dof: 0.0, ..SmoothParams::default() };
        let window = Window::new(&tri, &params, &mut vec![]);
        let model = DelayModel::new(&window, &params, 100.0);
        let mut theta = model.initial();
        let n = theta.len();
        for (i, v) in theta.iter_mut().enumerate() {
            if i > 15 {
                *v = 0.05 * ((i * 7 % 11) as f64 - 5.0);
            }
        }
        let (g, h) = model.derivatives(&theta);
        let mut worst: f64 = 0.0;
        for i in 0..n {
            let eps = 1e-6;
            let mut a = theta.clone();
            a[i] += eps;
            let mut b = theta.clone();
            b[i] -= eps;
            let fd = (model.value(&a) - model.value(&b)) / (2.0 * eps);
            worst = worst.max((fd - g[i]).abs());
            if i % 4 == 0 || i > 14 {
                eprintln!("p{i} fd {fd} g {}", g[i]);
            }
            if (fd - g[i]).abs() > 1e-3 * (1.0 + fd.abs()) {
                eprintln!("param {i}: fd {fd} analytic {}", g[i]);
            }
        }
        eprintln!("worst gradient error {worst}");
        // Fisher vs numerical Hessian diag for stretch params
        for i in 16..n {
            let eps = 1e-4;
            let mut a = theta.clone();
            a[i] += eps;
            let mut b = theta.clone();
            b[i] -= eps;
            let (ga, _) = model.derivatives(&a);
            let (gb, _) = model.derivatives(&b);
            eprintln!("param {i}: numeric H_ii {} fisher {}", (ga[i] - gb[i]) / (2.0 * eps), h.at(i, i));
        }
    }
}
