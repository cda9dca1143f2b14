//! The smooth nowcast's predictive draws: delay parameters and log incidence from their
//! Gaussian (Laplace) posteriors, then the cases still to be reported, Poisson or negative
//! binomial.

use super::*;

#[derive(Debug)]
pub(super) struct Sampler<'a> {
    pub(super) delay_model: &'a DelayModel<'a>,
    pub(super) theta: &'a [f64],
    /// Cholesky factor of the posterior covariance of the delay coefficients.
    pub(super) theta_factor: Cholesky,
    /// Incomplete window rows, their fitted log incidence and log completeness.
    pub(super) rows: Vec<usize>,
    pub(super) eta: Vec<f64>,
    pub(super) log_completeness: Vec<f64>,
    /// `d eta_i / d ln F_c` over incomplete rows (first-order response of the incidence fit).
    pub(super) response: Vec<Vec<f64>>,
    /// Cholesky factor of the (dispersion-scaled) posterior covariance of log incidence.
    pub(super) eta_factor: Cholesky,
    pub(super) dispersion: f64,
}

impl<'a> Sampler<'a> {
    pub(super) fn new(
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

    pub(super) fn draw(&self, latest: &[f64], draws: usize, seed: u64) -> Predictive {
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

    pub(super) fn draw_theta(&self, rng: &mut impl Rng, theta: &mut [f64]) {
        let shift = self.theta_factor.times_normal(rng);
        for (i, s) in shift.into_iter().enumerate() {
            theta[i] = self.theta[i] + s;
        }
    }

    /// Log incidence given drawn completeness: the fit's first-order response plus
    /// posterior noise.
    pub(super) fn draw_eta(&self, rng: &mut impl Rng, log_f: &[f64]) -> Vec<f64> {
        let noise = self.eta_factor.times_normal(rng);
        let change: Vec<f64> = log_f.iter().zip(&self.log_completeness).map(|(a, b)| a - b).collect();
        (0..self.rows.len()).map(|i| self.eta[i] + dot(&self.response[i], &change) + noise[i]).collect()
    }

    /// Cases still to be reported: Poisson with the given mean, or negative binomial with
    /// variance `dispersion * mean` when overdispersed.
    pub(super) fn draw_count(&self, rng: &mut impl Rng, mean: f64) -> f64 {
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
