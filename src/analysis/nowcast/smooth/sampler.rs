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
                let rate = eta[i].min(MAX_LOG_RATE).exp();
                let unreported = draw_unreported(&mut rng, rate, log_f[i].exp(), latest[r], self.dispersion);
                out[i].push(latest[r] + unreported);
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
}

/// Cases of one reference date still to be reported, given its expected count `rate`,
/// its completeness and the count reported so far. Poisson with mean
/// `rate (1 - completeness)` when the counts are Poisson. When overdispersed, the date's
/// own rate is gamma about `rate` (variance `(dispersion - 1) rate`, so the eventual
/// count has variance `dispersion * rate`), and the reports so far say how high it is:
/// the rate is drawn from its conjugate posterior given `reported ~ Poisson(rate
/// completeness)`, and the unreported cases are Poisson with that rate times
/// `1 - completeness`. A nearly complete date so has nearly no extra-Poisson spread
/// left, however overdispersed the series (the conjugate gamma-Poisson update, a textbook
/// result; the test checks it against the generative model by simulation).
pub(super) fn draw_unreported(
    rng: &mut impl Rng,
    rate: f64,
    completeness: f64,
    reported: f64,
    dispersion: f64,
) -> f64 {
    let missing = 1.0 - completeness.clamp(0.0, 1.0);
    if !(rate.is_finite() && rate > 0.0 && missing > 0.0) {
        return 0.0;
    }
    let day_rate = if dispersion > 1.0 {
        let scale = dispersion - 1.0;
        let (shape, scale) = (rate / scale + reported, scale / (1.0 + scale * (1.0 - missing)));
        Gamma::new(shape, scale).map_or(rate, |g| g.sample(rng))
    } else {
        rate
    };
    let mean = day_rate * missing;
    Poisson::new(mean.min(Poisson::<f64>::MAX_LAMBDA)).map_or(0.0, |p| p.sample(rng))
}
