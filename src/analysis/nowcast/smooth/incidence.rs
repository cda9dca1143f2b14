//! The smooth nowcast's incidence model: Poisson row totals with offsets ln F, a second-order
//! random-walk penalty on log incidence whose strength is chosen by Laplace marginal
//! likelihood, and quasi-Poisson dispersion from Pearson residuals.

use super::*;

#[derive(Debug)]
pub(super) struct IncidenceModel<'a> {
    pub(super) totals: &'a [f64],
    pub(super) offsets: &'a [f64],
    /// Penalty matrix (random walk of the given precision plus ridge).
    pub(super) penalty: Matrix,
}

#[derive(Debug)]
pub(super) struct IncidenceFit {
    pub(super) minimum: Minimum,
    /// Laplace posterior covariance of log incidence.
    pub(super) covariance: Matrix,
    /// Fitted means of the reported totals, `lambda_t F_t`.
    pub(super) fitted: Vec<f64>,
    /// Quasi-Poisson dispersion (1 for Poisson-like data).
    pub(super) dispersion: f64,
}

/// Second-order random-walk penalty of precision `strength` on `n` values, plus the ridge.
pub(super) fn random_walk2(n: usize, strength: f64) -> Matrix {
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
pub(super) fn fit_incidence(
    window: &Window,
    log_completeness: &[f64],
    params: &SmoothParams,
) -> Option<IncidenceFit> {
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
pub(super) fn laplace_evidence(penalty: &Matrix, minimum: &Minimum) -> Option<f64> {
    let prior = penalty.cholesky()?;
    Some(-minimum.value + 0.5 * prior.log_det() - 0.5 * minimum.hessian.log_det())
}

/// Pearson chi-square over its residual degrees of freedom (n - trace of the hat matrix),
/// at least 1 and at most `MAX_DISPERSION`.
pub(super) fn pearson_dispersion(totals: &[f64], fitted: &[f64], covariance: &Matrix) -> f64 {
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
