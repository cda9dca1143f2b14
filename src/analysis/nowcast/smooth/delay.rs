//! The smooth nowcast's delay model: the multinomial split of each row's reports over its
//! observed delays, with a baseline pmf and a per-row stretch that follows a Student-t random
//! walk, fitted by penalised Fisher scoring with its step precision chosen by Laplace marginal
//! likelihood. Report-day effects follow the reporting calendar: what falls due on a report
//! date (the baseline mass) is reported then with that date's share and otherwise carried to
//! the next date, so a weekend lull is followed by a Monday catch-up and a closed day by a
//! backlog, and a row's eventual count never changes. The share's logit has a coefficient for
//! the date's weekday and one for the date itself (Student-t, so a closed day can be an
//! outlier without loosening the others).

use super::*;

/// Largest log stretch used (a factor of e^3, about 20, either way).
pub(super) const MAX_LOG_STRETCH: f64 = 3.0;
/// Precision that pins the first knot's log stretch to zero: the baseline is the delay
/// distribution at the start of the window.
pub(super) const ANCHOR: f64 = 1e6;
/// Prior precision of the weekday logits (a prior sd of about 3: nearly free, but
/// finite when a weekday has no reports at all).
pub(super) const WEEKDAY_PRECISION: f64 = 0.1;
/// Scale precision and degrees of freedom of the Student-t prior of the per-date logits:
/// ordinary days vary by about 0.1, while the heavy tail lets a closed day go far from the
/// rest. A looser scale (0.3) let the per-date terms mimic a change in the delay (in the
/// suite's class of strata with different delays, 90% coverage fell from 0.80 to 0.59).
pub(super) const DATE_PRECISION: f64 = 100.0;
pub(super) const DATE_DOF: f64 = 2.0;
/// Logit of the share of due reports made on an ordinary report date (about 0.98): the
/// effects move it down for a weekend or a closed day, and a little up.
const ORDINARY_DAY_LOGIT: f64 = 4.0;
/// Days of the week (report-day classes).
const WEEKDAYS: usize = 7;

#[derive(Debug)]
pub(super) struct DelayModel<'a> {
    pub(super) window: &'a Window,
    /// Whether the log stretch varies (one coefficient per knot) or not.
    pub(super) terms: usize,
    pub(super) knots: Knots,
    /// Baseline smoothness, anchor and ridge (fixed quadratic part of the penalty).
    pub(super) penalty: Matrix,
    /// Precision per day of the log stretch's random-walk steps.
    pub(super) trend_penalty: f64,
    /// Degrees of freedom of the Student-t steps (infinite: Gaussian).
    pub(super) dof: f64,
    /// Whether report-day effects are modelled (a weekday factor and a per-date factor).
    pub(super) report_days: bool,
    /// Half-life in rows of the rows' weights (infinite: equal weights).
    pub(super) half_life: f64,
}

#[derive(Debug)]
pub(super) struct DelayFit {
    pub(super) minimum: Minimum,
    pub(super) converged: bool,
}

impl<'a> DelayModel<'a> {
    pub(super) fn new(window: &'a Window, params: &SmoothParams, trend_penalty: f64) -> DelayModel<'a> {
        let terms = usize::from(params.delay_changes);
        let knots = Knots::new(window.len(), params.delay_trend_knots);
        let dof = if params.delay_change_dof > 0.0 { params.delay_change_dof } else { f64::INFINITY };
        let report_days = params.report_day_effects;
        let half_life = delay_half_life(window, params.delay_half_life_cases);
        let mut model = DelayModel {
            window,
            terms,
            knots,
            penalty: Matrix::zeros(0),
            trend_penalty,
            dof,
            report_days,
            half_life,
        };
        model.penalty = model.baseline_penalty(params.delay_shape_penalty);
        model
    }

    pub(super) fn len(&self) -> usize {
        self.first_effect() + if self.report_days { WEEKDAYS + self.window.len() } else { 0 }
    }

    /// Index of the first report-day coefficient: the weekday factors, then one per report
    /// date of the window (report date j is the reference date of window row j).
    fn first_effect(&self) -> usize {
        self.window.max_delay + 1 + self.terms * self.knots.len()
    }

    /// Coefficient indices of report date j's effects: its weekday's, and its own while it
    /// is an observed date.
    fn effect_indices(&self, report: usize) -> [Option<usize>; 2] {
        if !self.report_days {
            return [None, None];
        }
        let weekday = self.first_effect() + (self.window.first_weekday + report) % WEEKDAYS;
        let own = (report < self.window.len()).then(|| self.first_effect() + WEEKDAYS + report);
        [Some(weekday), own]
    }

    /// Logit of the share of report date j: its weekday's and its own coefficient on top of
    /// `ORDINARY_DAY_LOGIT`.
    fn report_logit(&self, theta: &[f64], report: usize) -> f64 {
        ORDINARY_DAY_LOGIT + self.effect_indices(report).into_iter().flatten().map(|i| theta[i]).sum::<f64>()
    }

    /// Share of the cases due on row r's delay d (or carried to it) that is reported then:
    /// 1 at the maximum delay, 1 throughout without report-day effects.
    fn report_share(&self, theta: &[f64], r: usize, d: usize) -> f64 {
        if !self.report_days || d == self.window.max_delay {
            return 1.0;
        }
        1.0 / (1.0 + (-self.report_logit(theta, r + d)).exp())
    }

    /// Baseline mass of row r's delay d: the baseline cdf over the stretched interval
    /// `[d, d + 1) / stretch`.
    fn due_mass(&self, baseline: &Baseline, stretch: f64, d: usize) -> f64 {
        baseline.cdf((d + 1) as f64 / stretch) - baseline.cdf(d as f64 / stretch)
    }

    /// Row r's reported masses over delays `0..=last`: what falls due at a delay (the
    /// baseline mass) plus what was carried to it, times the report date's share; the rest
    /// is carried to the next date. Over all delays they sum to the row's baseline total.
    fn cell_masses(&self, baseline: &Baseline, theta: &[f64], r: usize, last: usize) -> Vec<f64> {
        let (stretch, _) = self.stretch(theta, r);
        let mut carried = 0.0;
        (0..=last)
            .map(|d| {
                let due = self.due_mass(baseline, stretch, d) + carried;
                let share = self.report_share(theta, r, d);
                carried = due * (1.0 - share);
                due * share
            })
            .collect()
    }

    /// The per-date logits with their Student-t prior's scaled squares: per coefficient,
    /// (index, value, precision times value squared).
    fn date_effects<'s>(&'s self, theta: &'s [f64]) -> impl Iterator<Item = (usize, f64, f64)> + 's {
        let first = self.first_effect() + WEEKDAYS;
        (first..self.len()).filter(|_| self.report_days).map(move |i| {
            let scaled = DATE_PRECISION * theta[i] * theta[i];
            (i, theta[i], scaled)
        })
    }

    fn date_penalty(&self, theta: &[f64]) -> f64 {
        self.date_effects(theta)
            .map(|(.., scaled)| 0.5 * (DATE_DOF + 1.0) * (scaled / DATE_DOF).ln_1p())
            .sum()
    }

    fn add_date_derivatives(&self, theta: &[f64], gradient: &mut [f64], hessian: &mut Matrix) {
        for (i, value, scaled) in self.date_effects(theta) {
            let weight = (DATE_DOF + 1.0) / (DATE_DOF + scaled) * DATE_PRECISION;
            gradient[i] += weight * value;
            hessian.add(i, i, weight);
        }
    }

    pub(super) fn knot_index(&self, knot: usize) -> usize {
        self.window.max_delay + 1 + knot
    }

    /// Second differences of the baseline across delays, the anchor, and the ridge.
    pub(super) fn baseline_penalty(&self, shape_penalty: f64) -> Matrix {
        let mut p = Matrix::zeros(self.len());
        for d in 2..=self.window.max_delay {
            // Centred at d - 1; weight (1 + (d - 1))^2 (see `SmoothParams::delay_shape_penalty`).
            p.add_outer(&[(d, 1.0), (d - 1, -2.0), (d - 2, 1.0)], shape_penalty * (d * d) as f64);
        }
        if self.terms > 0 {
            p.add(self.knot_index(0), self.knot_index(0), ANCHOR);
        }
        if self.report_days {
            let first = self.first_effect();
            (first..first + WEEKDAYS).for_each(|i| p.add(i, i, WEEKDAY_PRECISION));
        }
        (0..self.len()).for_each(|i| p.add(i, i, RIDGE));
        p
    }

    /// The steps of the log stretch between consecutive knots: (knot, days since the
    /// previous knot, step, squared step scaled to its precision).
    pub(super) fn steps<'s>(&'s self, theta: &'s [f64]) -> impl Iterator<Item = (usize, f64, f64, f64)> + 's {
        (1..self.knots.len()).filter(|_| self.terms > 0).map(move |k| {
            let gap = (self.knots.positions[k] - self.knots.positions[k - 1]) as f64;
            let step = theta[self.knot_index(k)] - theta[self.knot_index(k - 1)];
            (k, gap, step, self.trend_penalty * step * step / gap)
        })
    }

    /// Minus the log prior density of one step (up to a constant): `q / 2` for Gaussian
    /// steps, `(dof + 1) / 2 ln(1 + q / dof)` for Student-t steps, q the scaled squared step.
    pub(super) fn step_penalty(&self, scaled: f64) -> f64 {
        if self.dof.is_finite() { 0.5 * (self.dof + 1.0) * (scaled / self.dof).ln_1p() } else { 0.5 * scaled }
    }

    /// Weight of a step in the reweighted quadratic (IRLS) form of its penalty: the
    /// derivative of `step_penalty` with respect to `q / 2`.
    pub(super) fn step_weight(&self, scaled: f64) -> f64 {
        if self.dof.is_finite() { (self.dof + 1.0) / (self.dof + scaled) } else { 1.0 }
    }

    /// Adds the steps' penalty gradient and reweighted Hessian.
    pub(super) fn add_step_derivatives(&self, theta: &[f64], gradient: &mut [f64], hessian: &mut Matrix) {
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
    pub(super) fn evidence(&self, minimum: &Minimum) -> f64 {
        let steps = (self.terms * (self.knots.len() - 1)) as f64;
        -minimum.value + 0.5 * steps * self.trend_penalty.ln() - 0.5 * minimum.hessian.log_det()
    }

    /// The stretch factor of window row r, and the knots it comes from with their weights.
    pub(super) fn stretch(&self, theta: &[f64], r: usize) -> (f64, [(usize, f64); 2]) {
        let (lo, w_lo, hi, w_hi) = self.knots.weights[r];
        if self.terms == 0 {
            return (1.0, [(0, 0.0), (0, 0.0)]);
        }
        let log_stretch = w_lo * theta[self.knot_index(lo)] + w_hi * theta[self.knot_index(hi)];
        (log_stretch.clamp(-MAX_LOG_STRETCH, MAX_LOG_STRETCH).exp(), [(lo, w_lo), (hi, w_hi)])
    }

    pub(super) fn baseline(&self, theta: &[f64]) -> Baseline {
        Baseline::new(&theta[..=self.window.max_delay])
    }

    /// `ln F_r(k_r)`: log of the share of row r's eventual count reported by its largest
    /// observed delay. Delay d of row r covers baseline days `[d, d + 1) / stretch`.
    /// With report-day effects the masses of the delays still to come carry their report
    /// dates' weekday factors.
    pub(super) fn log_completeness(&self, baseline: &Baseline, theta: &[f64], r: usize) -> f64 {
        let (stretch, _) = self.stretch(theta, r);
        if !self.report_days {
            let reported = (self.window.observed[r] + 1) as f64 / stretch;
            let all = (self.window.max_delay + 1) as f64 / stretch;
            return baseline.cdf(reported).ln() - baseline.cdf(all).ln();
        }
        let reported: f64 = self.cell_masses(baseline, theta, r, self.window.observed[r]).iter().sum();
        let all = baseline.cdf((self.window.max_delay + 1) as f64 / stretch);
        reported.ln() - all.ln()
    }

    /// Rows that inform the delay split: more than one observed delay and some reports.
    pub(super) fn informative_rows(&self) -> impl Iterator<Item = usize> + '_ {
        (0..self.window.len()).filter(|&r| self.window.observed[r] > 0 && self.window.totals[r] > 0.0)
    }

    /// Start: log shares of the pooled complete rows, no stretch.
    pub(super) fn initial(&self) -> Vec<f64> {
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
    pub(super) fn row_log_likelihood(&self, baseline: &Baseline, theta: &[f64], r: usize) -> f64 {
        let k = self.window.observed[r];
        let masses = self.cell_masses(baseline, theta, r, k);
        let sum: f64 =
            self.window.n[r].iter().zip(&masses).filter(|(n, _)| **n > 0.0).map(|(n, m)| n * m.ln()).sum();
        self.row_weight(r) * (sum - self.window.totals[r] * masses.iter().sum::<f64>().ln())
    }

    /// Weight of row r's split in the fit: 1 for the latest row, halving every
    /// `half_life` rows back.
    pub(super) fn row_weight(&self, r: usize) -> f64 {
        let age = (self.window.len() - 1 - r) as f64;
        if self.half_life.is_finite() { 0.5f64.powf(age / self.half_life) } else { 1.0 }
    }

    /// Adds row r's score and Fisher information. With `x_d` the gradient of `ln m_d` (m_d
    /// the reported mass of delay d) and `q_d = m_d / C`, C their sum over the observed
    /// delays: score `sum_d (n_d - O q_d) x_d`, information
    /// `O (sum_d q_d x_d x_d^T - xbar xbar^T)` with `xbar = sum_d q_d x_d`.
    ///
    /// `m_d = s_d due_d` with `due_d = A_d + (1 - s_(d-1)) due_(d-1)`, A_d the baseline mass
    /// and s_d the report share (logistic in its date's coefficients). The unnormalised
    /// gradient `z_d` of `due_d` follows the same recursion,
    /// `z_d = A_d a_d + (1 - s_(d-1)) (z_(d-1) - s_(d-1) due_(d-1) e_(d-1))`, with `a_d` the
    /// gradient of `ln A_d` (baseline weights through `pi_j dA_d/dpi_j / A_d`, and the log
    /// stretch mapped to the row's two knots) and `e_i` the indicator of report date i's
    /// coefficients; then `x_d = z_d / due_d + (1 - s_d) e_d`.
    pub(super) fn add_row_derivatives(
        &self,
        baseline: &Baseline,
        theta: &[f64],
        r: usize,
        gradient: &mut [f64],
        hessian: &mut Matrix,
    ) {
        let (stretch, knots) = self.stretch(theta, r);
        let k = self.window.observed[r];
        let row_weight = self.row_weight(r);
        let total = self.window.totals[r] * row_weight;
        let top = (((k + 1) as f64 / stretch).floor() as usize + 1).min(self.window.max_delay);
        // Global indices of the local coordinates: baseline days 0..=top, the knots, then
        // the report dates' coefficients.
        let mut index: Vec<usize> = (0..=top).collect();
        let mut knot_weight = Vec::new();
        if self.terms > 0 {
            for (knot, w) in knots.into_iter().filter(|(_, w)| *w > 0.0) {
                index.push(self.knot_index(knot));
                knot_weight.push(w);
            }
        }
        let effect_local: Vec<Vec<usize>> = (0..=k)
            .map(|d| {
                let globals =
                    if d == self.window.max_delay { [None, None] } else { self.effect_indices(r + d) };
                globals
                    .into_iter()
                    .flatten()
                    .map(|global| {
                        index.iter().position(|&g| g == global).unwrap_or_else(|| {
                            index.push(global);
                            index.len() - 1
                        })
                    })
                    .collect()
            })
            .collect();
        let shares: Vec<f64> = (0..=k).map(|d| self.report_share(theta, r, d)).collect();
        let mut xs: Vec<Vec<f64>> = Vec::with_capacity(k + 1);
        let mut masses: Vec<f64> = Vec::with_capacity(k + 1);
        let mut z = vec![0.0; index.len()];
        let mut due = 0.0;
        let mut a: Vec<(usize, f64)> = Vec::new();
        for d in 0..=k {
            if d > 0 {
                let kept = 1.0 - shares[d - 1];
                effect_local[d - 1].iter().for_each(|&i| z[i] -= shares[d - 1] * due);
                z.iter_mut().for_each(|v| *v *= kept);
                due *= kept;
            }
            let (u0, u1) = (d as f64 / stretch, (d + 1) as f64 / stretch);
            let mass = baseline.mass_gradient(u0, u1, &mut a);
            if mass.is_finite() && mass > 0.0 {
                a.iter().for_each(|&(i, v)| z[i] += v);
                let log_stretch = -(u1 * baseline.density(u1) - u0 * baseline.density(u0));
                knot_weight.iter().enumerate().for_each(|(i, w)| z[top + 1 + i] += w * log_stretch);
                due += mass;
            }
            let mut x: Vec<f64> =
                if due > 0.0 { z.iter().map(|v| v / due).collect() } else { vec![0.0; z.len()] };
            effect_local[d].iter().for_each(|&i| x[i] += 1.0 - shares[d]);
            xs.push(x);
            masses.push(due * shares[d]);
        }
        let norm: f64 = masses.iter().sum();
        if norm.is_nan() || norm <= 0.0 {
            return;
        }
        // The row's information in local coordinates (upper triangle), scattered once.
        let n = index.len();
        let mut local = vec![0.0; n * n];
        let mut xbar = vec![0.0; n];
        for (d, x) in xs.iter().enumerate() {
            let q = masses[d] / norm;
            if q <= 0.0 {
                continue;
            }
            let residual = self.window.n[r][d] * row_weight - total * q;
            for (i, &v) in x.iter().enumerate().filter(|(_, v)| **v != 0.0) {
                xbar[i] += q * v;
                gradient[index[i]] -= residual * v;
                let weight = total * q * v;
                local[i * n + i..(i + 1) * n].iter_mut().zip(&x[i..]).for_each(|(h, w)| *h += weight * w);
            }
        }
        for i in 0..n {
            for j in i..n {
                let value = local[i * n + j] - total * xbar[i] * xbar[j];
                hessian.add(index[i], index[j], value);
                if i != j {
                    hessian.add(index[j], index[i], value);
                }
            }
        }
    }
}

/// Half-life in rows of the delay fit's weights: `cases` over the window's mean daily
/// count, at least `MIN_DELAY_HALF_LIFE_DAYS`; infinite without forgetting.
pub(super) fn delay_half_life(window: &Window, cases: Option<f64>) -> f64 {
    let Some(cases) = cases.filter(|c| c.is_finite() && *c > 0.0) else { return f64::INFINITY };
    let daily = window.totals.iter().sum::<f64>() / window.len().max(1) as f64;
    if daily > 0.0 { (cases / daily).max(MIN_DELAY_HALF_LIFE_DAYS) } else { f64::INFINITY }
}

impl Objective for DelayModel<'_> {
    /// Negative penalized log likelihood of the split of each row over its observed delays.
    fn value(&self, theta: &[f64]) -> f64 {
        let baseline = self.baseline(theta);
        let log_lik: f64 =
            self.informative_rows().map(|r| self.row_log_likelihood(&baseline, theta, r)).sum();
        let steps: f64 = self.steps(theta).map(|(.., scaled)| self.step_penalty(scaled)).sum();
        0.5 * self.penalty.quadratic(theta) + steps + self.date_penalty(theta) - log_lik
    }

    /// Exact gradient; the Hessian is the Fisher information plus the penalty, with the
    /// Student-t steps in reweighted (IRLS) form, which keeps it positive definite.
    fn derivatives(&self, theta: &[f64]) -> (Vec<f64>, Matrix) {
        let baseline = self.baseline(theta);
        let mut gradient = self.penalty.times(theta);
        let mut hessian = self.penalty.clone();
        self.add_step_derivatives(theta, &mut gradient, &mut hessian);
        self.add_date_derivatives(theta, &mut gradient, &mut hessian);
        for r in self.informative_rows() {
            self.add_row_derivatives(&baseline, theta, r, &mut gradient, &mut hessian);
        }
        (gradient, hessian)
    }
}

/// Fits the delay model, choosing the precision of the log stretch's random walk by Laplace
/// marginal likelihood unless it is given. The precisions are tried from the stiffest down,
/// each fit warm-started from the last, and the search stops once the evidence falls: it is
/// unimodal in the precision in practice, and the loosest fits are the slowest (and the
/// ones least often converged). Over the simulation suite's 96 series (8 classes, 12 seeds)
/// the loosest precision, 10, was never the best.
pub(super) fn fit_delay<'a>(window: &'a Window, params: &SmoothParams) -> Option<(DelayModel<'a>, DelayFit)> {
    let strengths: Vec<f64> = match (params.delay_changes, params.delay_trend_penalty) {
        (false, _) => vec![1.0],
        (true, Some(strength)) => vec![strength.max(1e-9)],
        (true, None) => (1..=4).rev().map(|i| 10f64.powi(i)).collect(),
    };
    let mut best: Option<(f64, DelayModel<'a>, DelayFit)> = None;
    let mut start: Option<Vec<f64>> = None;
    for strength in strengths {
        let model = DelayModel::new(window, params, strength);
        let initial = start.take().unwrap_or_else(|| model.initial());
        let Some((minimum, converged)) = minimise(&model, initial) else { continue };
        let evidence = model.evidence(&minimum);
        start = Some(minimum.x.clone());
        match &best {
            Some((best_evidence, ..)) if evidence <= *best_evidence => break,
            _ => best = Some((evidence, model, DelayFit { minimum, converged })),
        }
    }
    best.map(|(_, model, fit)| (model, fit))
}
