//! The three parametric delay families (gamma, lognormal, Weibull) and what the fits need from
//! them: density, distribution function, mean and quantiles of the continuous delay, and the
//! probabilities of a whole-day delay under daily interval censoring with the primary event
//! uniform within its day, with and without right truncation at a horizon.
//!
//! Censoring uses the integrated distribution function `G(x) = ∫_0^x F(u) du` (zero for
//! `x <= 0`): a whole-day delay `N = floor(P + X)`, with `P` uniform on `[0, 1)` and `X` the
//! continuous delay, has `P(N = n) = G(n + 1) - 2 G(n) + G(n - 1)`, and the sum over `m <= tau`
//! telescopes to `G(tau + 1) - G(tau)` (the truncation mass). Second differences of `G` lose
//! precision in the upper tail, where `G(x) ≈ x - mean`, so beyond the median the same
//! differences are taken of the tail integral `J(x) = ∫_x^∞ (1 - F(u)) du`, which satisfies
//! `G(x) = x - mean + J(x)`. Closed forms of both are in the functions below.

use statrs::function::erf::erfc;
use statrs::function::gamma::{gamma_lr, gamma_ur, ln_gamma};

use crate::model::vocabulary::vocabulary;

vocabulary! {
    /// A parametric family for a continuous delay in days; the name is used in configs, the
    /// CLI and stored results.
    pub enum Family("delay family") {
        /// Parameters `[shape k, rate b]`; mean `k / b`.
        Gamma => "gamma",
        /// Parameters `[meanlog mu, sdlog s]`; median `exp(mu)`.
        Lognormal => "lognormal",
        /// Parameters `[shape k, scale lambda]`; `F(x) = 1 - exp(-(x / lambda)^k)`.
        Weibull => "weibull",
    }
}

vocabulary! {
    /// The delay family a request asks for: one family, or `Auto` (the lowest AIC).
    pub enum FamilyChoice("delay family") {
        Auto => "auto",
        Gamma => "gamma",
        Lognormal => "lognormal",
        Weibull => "weibull",
    }
}

impl FamilyChoice {
    /// The family asked for by name, `None` for `Auto`.
    pub fn family(self) -> Option<Family> {
        match self {
            FamilyChoice::Auto => None,
            FamilyChoice::Gamma => Some(Family::Gamma),
            FamilyChoice::Lognormal => Some(Family::Lognormal),
            FamilyChoice::Weibull => Some(Family::Weibull),
        }
    }
}

impl Family {
    /// The family called `name` (as returned by [`Family::name`], case-insensitive).
    pub fn from_name(name: &str) -> Option<Family> {
        Family::ALL.into_iter().find(|family| family.name().eq_ignore_ascii_case(name))
    }

    /// Names of the two parameters, in the order of `params`.
    pub fn param_names(self) -> [&'static str; 2] {
        match self {
            Family::Gamma => ["shape", "rate"],
            Family::Lognormal => ["meanlog", "sdlog"],
            Family::Weibull => ["shape", "scale"],
        }
    }
}

/// One member of a [`Family`] with valid parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Dist {
    family: Family,
    a: f64,
    b: f64,
    mean: f64,
    /// Points at or below this use the integrated CDF, above it the tail integral.
    switch: f64,
}

/// The integrated distribution function and the tail integral at one point.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Point {
    pub g: f64,
    pub j: f64,
}

const SQRT_2: f64 = std::f64::consts::SQRT_2;
const LN_SQRT_2PI: f64 = 0.918_938_533_204_672_8;

/// Standard normal distribution function, accurate in both tails.
fn phi(z: f64) -> f64 {
    0.5 * erfc(-z / SQRT_2)
}

impl Dist {
    /// The distribution with `params` (see [`Family`] for their order), or `None` when they are
    /// not finite or a parameter that must be positive is not.
    pub fn new(family: Family, params: [f64; 2]) -> Option<Dist> {
        let [a, b] = params;
        let valid = a.is_finite() && b.is_finite() && b > 0.0 && (family == Family::Lognormal || a > 0.0);
        if !valid {
            return None;
        }
        let (mean, switch) = match family {
            Family::Gamma => (a / b, a / b),
            Family::Lognormal => ((a + b * b / 2.0).exp(), a.exp()),
            Family::Weibull => (b * ln_gamma(1.0 + 1.0 / a).exp(), b * std::f64::consts::LN_2.powf(1.0 / a)),
        };
        if !mean.is_finite() {
            return None;
        }
        Some(Dist { family, a, b, mean, switch })
    }

    pub fn family(&self) -> Family {
        self.family
    }

    pub fn params(&self) -> [f64; 2] {
        [self.a, self.b]
    }

    /// Mean of the continuous delay.
    pub fn mean(&self) -> f64 {
        self.mean
    }

    /// Distribution function `F(x)` of the continuous delay.
    pub fn cdf(&self, x: f64) -> f64 {
        if x <= 0.0 {
            return 0.0;
        }
        match self.family {
            Family::Gamma => gamma_lr(self.a, self.b * x),
            Family::Lognormal => phi((x.ln() - self.a) / self.b),
            Family::Weibull => -(-(x / self.b).powf(self.a)).exp_m1(),
        }
    }

    /// Natural log of the density `f(x)`; minus infinity for `x <= 0`.
    pub fn ln_pdf(&self, x: f64) -> f64 {
        if x <= 0.0 {
            return f64::NEG_INFINITY;
        }
        let (a, b) = (self.a, self.b);
        match self.family {
            Family::Gamma => a * b.ln() + (a - 1.0) * x.ln() - b * x - ln_gamma(a),
            Family::Lognormal => {
                let z = (x.ln() - a) / b;
                -x.ln() - b.ln() - LN_SQRT_2PI - z * z / 2.0
            }
            Family::Weibull => {
                let r = x / b;
                a.ln() - b.ln() + (a - 1.0) * r.ln() - r.powf(a)
            }
        }
    }

    /// Quantile of the continuous delay for `p` in `(0, 1)`.
    pub fn quantile(&self, p: f64) -> f64 {
        if !(p > 0.0 && p < 1.0) {
            return f64::NAN;
        }
        match self.family {
            Family::Gamma => self.quantile_by_bisection(p),
            Family::Lognormal => (self.a + self.b * normal_quantile(p)).exp(),
            Family::Weibull => self.b * (-(-p).ln_1p()).powf(1.0 / self.a),
        }
    }

    /// Median of the continuous delay.
    pub fn median(&self) -> f64 {
        self.quantile(0.5)
    }

    fn quantile_by_bisection(&self, p: f64) -> f64 {
        let mut hi = self.mean.max(1e-300);
        while self.cdf(hi) < p && hi < 1e300 {
            hi *= 2.0;
        }
        let mut lo = 0.0;
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if self.cdf(mid) < p {
                lo = mid;
            } else {
                hi = mid;
            }
            if hi - lo <= 1e-13 * hi {
                break;
            }
        }
        0.5 * (lo + hi)
    }

    /// Integrated distribution function `G(x) = ∫_0^x F(u) du`, zero for `x <= 0`.
    pub fn integrated_cdf(&self, x: f64) -> f64 {
        self.point(x).g
    }

    /// `G` and `J` at `x`, each computed directly where that is accurate.
    pub(crate) fn point(&self, x: f64) -> Point {
        if x <= 0.0 {
            return Point { g: 0.0, j: self.mean - x };
        }
        if x <= self.switch {
            let g = self.lower(x);
            Point { g, j: self.mean - x + g }
        } else {
            let j = self.upper(x);
            Point { g: x - self.mean + j, j }
        }
    }

    /// `G(x)` for `x > 0` in closed form (docs/validation.md "Delay distributions"; the Weibull
    /// form `x F(x) - E[X; X <= x]` equals the reference `x - (lam/k) Gamma(1/k) P(1/k, t)`
    /// without its cancellation for small `x`).
    fn lower(&self, x: f64) -> f64 {
        let (a, b) = (self.a, self.b);
        match self.family {
            Family::Gamma => {
                let y = b * x;
                x * gamma_lr(a, y) - (a / b) * gamma_lr(a + 1.0, y)
            }
            Family::Lognormal => {
                let z = (x.ln() - a) / b;
                x * phi(z) - self.mean * phi(z - b)
            }
            Family::Weibull => {
                let t = (x / b).powf(a);
                if t <= 0.0 {
                    return 0.0;
                }
                x * -(-t).exp_m1() - self.mean * gamma_lr(1.0 + 1.0 / a, t)
            }
        }
    }

    /// `J(x) = E[(X - x)+]` for `x > 0` in closed form.
    fn upper(&self, x: f64) -> f64 {
        let (a, b) = (self.a, self.b);
        match self.family {
            Family::Gamma => {
                let y = b * x;
                let q = gamma_ur(a, y);
                // Q(k + 1, y) = Q(k, y) + y^k e^-y / Gamma(k + 1).
                let q1 = q + (a * y.ln() - y - ln_gamma(a + 1.0)).exp();
                (a / b) * q1 - x * q
            }
            Family::Lognormal => {
                let z = (x.ln() - a) / b;
                self.mean * phi(b - z) - x * phi(-z)
            }
            Family::Weibull => {
                let t = (x / b).powf(a);
                // (lam / k) Gamma(1/k) = lam Gamma(1 + 1/k) = mean.
                self.mean * gamma_ur(1.0 / a, t)
            }
        }
    }

    /// Uses the tail integral for differences that reach above `x`.
    pub(crate) fn uses_tail(&self, x: f64) -> bool {
        x > self.switch
    }

    /// `P(N = n)` for the whole-day delay under daily interval censoring.
    pub fn daily_pmf(&self, n: i64) -> f64 {
        if n < 0 {
            return 0.0;
        }
        let x = n as f64;
        second_difference(self.uses_tail(x + 1.0), self.point(x - 1.0), self.point(x), self.point(x + 1.0))
    }

    /// `P(N <= tau) = G(tau + 1) - G(tau)`, the mass a horizon `tau` lets through.
    pub fn daily_cdf(&self, tau: i64) -> f64 {
        if tau < 0 {
            return 0.0;
        }
        let x = tau as f64;
        truncation_mass(self.uses_tail(x + 1.0), self.point(x), self.point(x + 1.0))
    }
}

/// `P(N = n)` from `G` (or `J`) at `n - 1`, `n`, `n + 1`; never negative.
pub(crate) fn second_difference(tail: bool, prev: Point, mid: Point, next: Point) -> f64 {
    let p = if tail { next.j - 2.0 * mid.j + prev.j } else { next.g - 2.0 * mid.g + prev.g };
    p.max(0.0)
}

/// `G(tau + 1) - G(tau)` from `G` (or `1 - (J(tau) - J(tau + 1))`); within `[0, 1]`.
pub(crate) fn truncation_mass(tail: bool, at: Point, next: Point) -> f64 {
    let mass = if tail { 1.0 - (at.j - next.j) } else { next.g - at.g };
    mass.clamp(0.0, 1.0)
}

/// Standard normal quantile.
fn normal_quantile(p: f64) -> f64 {
    -SQRT_2 * statrs::function::erf::erfc_inv(2.0 * p)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn dist(family: Family, params: [f64; 2]) -> Dist {
        Dist::new(family, params).unwrap()
    }

    /// scipy 1.17.1 values for the formulas as written (docs/validation.md "Delay distributions").
    #[test]
    fn daily_pmf_matches_reference_values() {
        let cases: &[(Family, [f64; 2], i64, f64)] = &[
            (Family::Lognormal, [1.621, 0.418], 1, 0.0033923538),
            (Family::Lognormal, [1.621, 0.418], 3, 0.1411262264),
            (Family::Lognormal, [1.621, 0.418], 5, 0.1882610594),
            (Family::Lognormal, [1.621, 0.418], 10, 0.0257470846),
            (Family::Gamma, [2.0, 1.0], 0, 0.1036383235),
            (Family::Gamma, [2.0, 1.0], 3, 0.1533642826),
            (Family::Weibull, [2.0, 6.0], 0, 0.0091826063),
            (Family::Weibull, [2.0, 6.0], 1, 0.0533036606),
            (Family::Weibull, [2.0, 6.0], 2, 0.0981588212),
            (Family::Weibull, [2.0, 6.0], 3, 0.1283091573),
            (Family::Weibull, [2.0, 6.0], 4, 0.1411003321),
        ];
        for &(family, params, n, want) in cases {
            let got = dist(family, params).daily_pmf(n);
            assert!((got - want).abs() < 1e-9, "{family:?} n={n}: {got} vs {want}");
        }
    }

    /// scipy (docs/validation.md): Gamma(2, rate 1) sum_{m<=5} = 0.9726643884 and
    /// P(N=3 | N<=5) = 0.15767441; the telescoped mass must equal the explicit sum.
    #[test]
    fn truncation_mass_is_the_telescoped_sum() {
        let d = dist(Family::Gamma, [2.0, 1.0]);
        let explicit: f64 = (0..=5).map(|m| d.daily_pmf(m)).sum();
        assert!((d.daily_cdf(5) - 0.9726643884).abs() < 1e-9);
        assert!((explicit - d.daily_cdf(5)).abs() < 1e-12);
        assert!((d.daily_pmf(3) / d.daily_cdf(5) - 0.15767441).abs() < 1e-8);
        for family in Family::ALL {
            let d = dist(family, [1.5, 0.8]);
            for tau in [0, 1, 3, 7, 20, 60] {
                let explicit: f64 = (0..=tau).map(|m| d.daily_pmf(m)).sum();
                assert!((explicit - d.daily_cdf(tau)).abs() < 1e-10, "{family:?} {tau}");
            }
        }
    }

    /// The closed forms of G must agree with a direct numerical integral of F (midpoint rule),
    /// and the Weibull form used here with the docs/validation.md form.
    #[test]
    fn integrated_cdf_matches_numerical_integral() {
        let cases: &[(Family, [f64; 2])] = &[
            (Family::Gamma, [2.0, 1.0]),
            (Family::Gamma, [4.938, 0.2774]),
            (Family::Gamma, [0.7, 0.1]),
            (Family::Lognormal, [1.621, 0.418]),
            (Family::Lognormal, [0.5, 1.2]),
            (Family::Weibull, [2.0, 6.0]),
            (Family::Weibull, [0.8, 4.0]),
        ];
        for &(family, params) in cases {
            let d = dist(family, params);
            for x in [0.3, 1.0, 2.5, 6.0, 15.0, 40.0] {
                let steps = 200_000;
                let h = x / steps as f64;
                let numeric: f64 = (0..steps).map(|i| d.cdf((i as f64 + 0.5) * h) * h).sum();
                let closed = d.integrated_cdf(x);
                assert!(
                    (closed - numeric).abs() < 1e-7 * (1.0 + numeric),
                    "{family:?} x={x}: {closed} vs {numeric}"
                );
            }
        }
        let (k, lam) = (0.8, 4.0);
        let d = dist(Family::Weibull, [k, lam]);
        for x in [0.5, 3.0, 10.0] {
            let t: f64 = (x / lam).powf(k);
            let reference = x - (lam / k) * ln_gamma(1.0 / k).exp() * gamma_lr(1.0 / k, t);
            assert!((d.integrated_cdf(x) - reference).abs() < 1e-10);
        }
    }

    #[test]
    fn pmf_sums_to_one_and_tail_stays_accurate() {
        for family in Family::ALL {
            let d = dist(family, [2.0, 0.5]);
            let total: f64 = (0..2000).map(|n| d.daily_pmf(n)).sum();
            assert!((total - 1.0).abs() < 1e-6, "{family:?} {total}");
            // Far in the tail the pmf is tiny but positive and decreasing.
            let (p100, p101) = (d.daily_pmf(100), d.daily_pmf(101));
            assert!(p100 >= p101 && p101 >= 0.0, "{family:?} {p100} {p101}");
        }
        // Gamma(2, 1): P(N = 40) ≈ integral of the density around 40, about 40 e^-40.
        let g = dist(Family::Gamma, [2.0, 1.0]);
        let approx = (-40f64).exp() * 40.0 * (1.0f64.exp() + (-1.0f64).exp() - 2.0);
        assert!((g.daily_pmf(40) / approx - 1.0).abs() < 0.05);
    }

    #[test]
    fn quantiles_invert_the_cdf() {
        for family in Family::ALL {
            let d = dist(family, [1.7, 0.6]);
            for p in [0.05, 0.5, 0.95] {
                let q = d.quantile(p);
                assert!((d.cdf(q) - p).abs() < 1e-9, "{family:?} p={p}");
            }
        }
        // Lauer et al. 2020 (memory, docs/validation.md): meanlog 1.621, sdlog 0.418 gives a
        // median of 5.06 d and a 97.5th percentile of 11.48 d.
        let lauer = dist(Family::Lognormal, [1.621, 0.418]);
        assert!((lauer.median() - 5.06).abs() < 0.01);
        assert!((lauer.quantile(0.975) - 11.48).abs() < 0.01);
        // Verity et al. 2020 (memory): gamma shape 4.938, rate 0.2774 has mean 17.8 d.
        assert!((dist(Family::Gamma, [4.938, 0.2774]).mean() - 17.8).abs() < 0.01);
    }

    #[test]
    fn names_round_trip_and_invalid_params_are_rejected() {
        for family in Family::ALL {
            assert_eq!(Family::from_name(family.name()), Some(family));
        }
        assert_eq!(Family::from_name("LogNormal"), Some(Family::Lognormal));
        assert_eq!(Family::from_name("normal"), None);
        assert!(Dist::new(Family::Gamma, [0.0, 1.0]).is_none());
        assert!(Dist::new(Family::Lognormal, [-1.0, 0.5]).is_some());
        assert!(Dist::new(Family::Weibull, [1.0, f64::NAN]).is_none());
    }
}
