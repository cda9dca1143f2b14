//! Maximum-likelihood fits of a delay family to whole-day delays with daily interval censoring
//! and right truncation at each record's horizon, with nonparametric bootstrap intervals and an
//! identifiability check.
//!
//! The optimiser is Nelder–Mead on transformed parameters within a box (log shape and log
//! scale, or meanlog and log sdlog), started from moment estimates and from inflated means (the
//! observed mean is biased low under truncation), and polished by a restart from the best
//! point. The bootstrap resamples records (multinomially over the distinct (delay, horizon)
//! pairs) and refits from the estimate.
//!
//! Identifiability (Seaman, Presanis & Jackson 2022): when delays as long as the true ones are
//! not yet observable, the likelihood can keep rising as the scale grows. A fit is marked
//! `identifiable = false`, with a warning, when any of these holds: the maximum lies on the
//! boundary of the parameter box; the profile likelihood of the mean at three times the
//! estimate is within 1.92 log-likelihood units of the maximum (the 95% likelihood region does
//! not bound the mean); more than 10% of bootstrap refits end on the boundary; the bootstrap
//! interval of the mean reaches above three times the estimate; or every record is truncated
//! and the fitted 95th percentile lies beyond the longest horizon, so that the upper tail is
//! the family's extrapolation rather than anything the data could show (a light-tailed family
//! can otherwise look identified when the true family is not). The upper limits of the mean and
//! 95th-percentile intervals are then set to infinity.

use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Binomial, Distribution};
use statrs::function::gamma::ln_gamma;

use super::DelayObs;
use super::dist::{Dist, Family, Point};
use super::likelihood::{Counts, Design};
use crate::analysis::numeric::simplex::{Bounds, Settings, minimize_1d, nelder_mead};

/// How a fit is made.
#[derive(Debug, Clone, PartialEq)]
pub struct FitOptions {
    /// Bootstrap resamples for the intervals (0: no intervals).
    pub bootstrap: usize,
    /// Coverage of the intervals, e.g. 0.95.
    pub level: f64,
    /// Correct for right truncation at each record's horizon; `false` gives the naive fit.
    pub truncation: bool,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions { bootstrap: 200, level: 0.95, truncation: true }
    }
}

/// A two-sided interval.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Interval {
    pub lower: f64,
    /// `f64::INFINITY` when the fit is not identifiable.
    pub upper: f64,
}

/// A fitted delay distribution.
#[derive(Debug, Clone, PartialEq)]
pub struct DelayFit {
    pub family: Family,
    /// In the order of [`Family::param_names`]; NaN when nothing could be fitted.
    pub params: [f64; 2],
    pub log_likelihood: f64,
    /// `4 - 2 log_likelihood`; NaN when nothing could be fitted.
    pub aic: f64,
    /// Mean, median and 95th percentile of the fitted continuous delay, in days.
    pub mean: f64,
    pub median: f64,
    pub p95: f64,
    /// Bootstrap percentile intervals at `FitOptions::level`; `None` without bootstrap.
    pub mean_interval: Option<Interval>,
    pub median_interval: Option<Interval>,
    pub p95_interval: Option<Interval>,
    /// Bootstrap refits that produced a valid distribution.
    pub bootstrap_replicates: usize,
    /// Records used (non-negative delays).
    pub n: usize,
    /// `false` when the upper tail and the mean are not identified by these data.
    pub identifiable: bool,
    pub warnings: Vec<String>,
}

/// Fits `family` to `obs` by maximum likelihood; `seed` drives the bootstrap.
///
/// Negative delays are excluded (and counted in a warning); a horizon shorter than its delay
/// (impossible for a record that was observed) is raised to the delay, with a warning.
pub fn fit(obs: &[DelayObs], family: Family, options: &FitOptions, seed: u64) -> DelayFit {
    fit_counted(&once_each(obs), family, options, seed)
}

/// Each observation counted once.
fn once_each(obs: &[DelayObs]) -> Vec<(DelayObs, u64)> {
    obs.iter().map(|o| (*o, 1)).collect()
}

/// `fit` of observations given with how many records share each: the same fit as with every
/// record listed, in time and memory proportional to the distinct observations.
pub fn fit_counted(obs: &[(DelayObs, u64)], family: Family, options: &FitOptions, seed: u64) -> DelayFit {
    let data = Data::new(obs, options.truncation);
    let mut warnings = data.warnings.clone();
    if data.n == 0 {
        warnings.push("no non-negative delays to fit".to_string());
        return unfitted(family, warnings);
    }
    let space = Space::new(family, data.reach);
    let mut problem = Problem::new(&data.design, space);
    let counts = data.design.base_counts();
    let estimate = problem.maximise(&counts, &space.starts(data.mean, data.cv));
    let Some(dist) = space.dist(estimate.x) else {
        warnings.push("the likelihood could not be maximised".to_string());
        return unfitted(family, warnings);
    };
    let log_likelihood = -estimate.value;
    let mut unidentified = problem.likelihood_checks(&counts, &estimate, &dist);
    unidentified.extend(tail_check(&dist, data.longest_horizon));
    let mut rng = StdRng::seed_from_u64(seed);
    let boot = problem.bootstrap(&data.design, estimate.x, options.bootstrap, &mut rng);
    let intervals = boot.intervals(options.level);
    unidentified.extend(boot.checks(intervals, dist.mean()));
    let identifiable = unidentified.is_empty();
    if !identifiable {
        warnings.push(not_identified_warning(family, &unidentified));
    }
    let bounded = |interval: Interval| Interval {
        upper: if identifiable { interval.upper } else { f64::INFINITY },
        ..interval
    };
    DelayFit {
        family,
        params: dist.params(),
        log_likelihood,
        aic: 4.0 - 2.0 * log_likelihood,
        mean: dist.mean(),
        median: dist.median(),
        p95: dist.quantile(0.95),
        mean_interval: intervals.map(|i| bounded(i[0])),
        median_interval: intervals.map(|i| i[1]),
        p95_interval: intervals.map(|i| bounded(i[2])),
        bootstrap_replicates: boot.replicates,
        n: data.n,
        identifiable,
        warnings,
    }
}

fn not_identified_warning(family: Family, reasons: &[String]) -> String {
    format!(
        "{} fit: the upper tail and the mean are not identified ({}); delays this long are not \
         yet observable under the right truncation (Seaman et al. 2022), so the mean and 95th \
         percentile are not estimates and their intervals are unbounded above",
        family.name(),
        reasons.join("; ")
    )
}

/// The upper tail is extrapolation when every record is truncated and the fitted 95th
/// percentile lies beyond the longest horizon.
fn tail_check(dist: &Dist, longest_horizon: Option<i64>) -> Option<String> {
    let longest = longest_horizon?;
    let p95 = dist.quantile(0.95);
    (p95 > longest as f64).then(|| {
        format!(
            "the fitted 95th percentile ({p95:.1} days) lies beyond the longest observable delay \
             ({longest} days)"
        )
    })
}

/// Fits every family and sorts them by AIC, best first (fits without an AIC last).
pub fn fit_all(obs: &[DelayObs], options: &FitOptions, seed: u64) -> Vec<DelayFit> {
    fit_all_counted(&once_each(obs), options, seed)
}

/// `fit_all` of counted observations (see `fit_counted`).
pub fn fit_all_counted(obs: &[(DelayObs, u64)], options: &FitOptions, seed: u64) -> Vec<DelayFit> {
    let mut fits: Vec<DelayFit> =
        Family::ALL.into_iter().map(|family| fit_counted(obs, family, options, seed)).collect();
    let key = |f: &DelayFit| if f.aic.is_nan() { f64::INFINITY } else { f.aic };
    fits.sort_by(|a, b| key(a).total_cmp(&key(b)));
    fits
}

/// Half the 95% quantile of chi-squared with one degree of freedom.
const PROFILE_DROP: f64 = 1.920_729_410_347_062;

fn unfitted(family: Family, warnings: Vec<String>) -> DelayFit {
    DelayFit {
        family,
        params: [f64::NAN; 2],
        log_likelihood: f64::NAN,
        aic: f64::NAN,
        mean: f64::NAN,
        median: f64::NAN,
        p95: f64::NAN,
        mean_interval: None,
        median_interval: None,
        p95_interval: None,
        bootstrap_replicates: 0,
        n: 0,
        identifiable: false,
        warnings,
    }
}

/// The records a fit uses, grouped, with their moments and the notes made on the way.
#[derive(Debug)]
struct Data {
    design: Design,
    n: usize,
    mean: f64,
    cv: f64,
    /// The longest delay or horizon in the data.
    reach: i64,
    /// The longest horizon, when every record has one (no delay beyond it was observable).
    longest_horizon: Option<i64>,
    warnings: Vec<String>,
}

impl Data {
    fn new(obs: &[(DelayObs, u64)], truncation: bool) -> Data {
        let total = |pick: &dyn Fn(&DelayObs) -> bool| -> u64 {
            obs.iter().filter(|(o, _)| pick(o)).map(|(_, count)| count).sum()
        };
        let mut warnings = Vec::new();
        let negative = total(&|o| o.delay < 0);
        if negative > 0 {
            warnings.push(format!(
                "{negative} negative delays excluded from the fit (asymptomatic cases or \
                 data-entry errors)"
            ));
        }
        let short = total(&|o| o.delay >= 0 && truncation && o.horizon.is_some_and(|t| t < o.delay));
        if short > 0 {
            warnings.push(format!(
                "{short} records had a horizon shorter than their delay; it was raised to the delay"
            ));
        }
        let records: Vec<((i64, Option<i64>), u64)> = obs
            .iter()
            .filter(|(o, count)| o.delay >= 0 && *count > 0)
            .map(|(o, count)| {
                let horizon = o.horizon.filter(|_| truncation).map(|t| t.max(o.delay));
                ((o.delay, horizon), *count)
            })
            .collect();
        let reach = records.iter().map(|&((d, t), _)| t.unwrap_or(d).max(d)).max().unwrap_or(0);
        let longest_horizon = records
            .iter()
            .map(|r| r.0.1)
            .collect::<Option<Vec<i64>>>()
            .and_then(|horizons| horizons.into_iter().max());
        let n = records.iter().map(|r| r.1).sum::<u64>() as usize;
        let (mean, cv) = moments(records.iter().map(|&((d, _), count)| (d as f64, count as f64)), n);
        Data { design: Design::from_counts(records), n, mean, cv, reach, longest_horizon, warnings }
    }
}

/// Mean and coefficient of variation of whole-day delays, for starting values. The variance is
/// reduced by the 1/6 day² that daily censoring adds, and both are kept away from zero.
/// `values` come with the number of records that share each.
fn moments(values: impl Iterator<Item = (f64, f64)> + Clone, n: usize) -> (f64, f64) {
    let n = n.max(1) as f64;
    let mean = values.clone().map(|(v, w)| w * v).sum::<f64>() / n;
    let variance = values.map(|(v, w)| w * (v - mean).powi(2)).sum::<f64>() / n;
    let mean = mean.max(0.5);
    let variance = (variance - 1.0 / 6.0).max(0.01 * mean * mean);
    (mean, variance.sqrt() / mean)
}

/// Transformed parameters `theta` and their box, per family:
/// gamma `(ln shape, ln mean)`, lognormal `(meanlog, ln sdlog)`, Weibull `(ln shape, ln scale)`.
#[derive(Debug, Clone, Copy)]
struct Space {
    family: Family,
    bounds: Bounds,
}

/// Index of the shape-like coordinate, free in the profile of the mean.
fn shape_axis(family: Family) -> usize {
    match family {
        Family::Lognormal => 1,
        Family::Gamma | Family::Weibull => 0,
    }
}

impl Space {
    /// The scale may reach 50 times the longest delay or horizon in the data.
    fn new(family: Family, reach: i64) -> Space {
        let (scale_lo, scale_hi) = (0.01f64.ln(), (50.0 * (reach.max(1) + 1) as f64).ln());
        let (shape_lo, shape_hi) = match family {
            Family::Gamma => (0.05f64.ln(), 1000f64.ln()),
            Family::Lognormal => (0.02f64.ln(), 5f64.ln()),
            Family::Weibull => (0.1f64.ln(), 50f64.ln()),
        };
        let bounds = match shape_axis(family) {
            0 => Bounds { lower: [shape_lo, scale_lo], upper: [shape_hi, scale_hi] },
            _ => Bounds { lower: [scale_lo, shape_lo], upper: [scale_hi, shape_hi] },
        };
        Space { family, bounds }
    }

    fn params(&self, theta: [f64; 2]) -> [f64; 2] {
        match self.family {
            Family::Gamma => {
                let shape = theta[0].exp();
                [shape, shape / theta[1].exp()]
            }
            Family::Lognormal => [theta[0], theta[1].exp()],
            Family::Weibull => [theta[0].exp(), theta[1].exp()],
        }
    }

    fn dist(&self, theta: [f64; 2]) -> Option<Dist> {
        Dist::new(self.family, self.params(theta))
    }

    /// `theta` with mean `mean` and shape coordinate `shape`.
    fn at_mean(&self, mean: f64, shape: f64) -> [f64; 2] {
        match self.family {
            Family::Gamma => [shape, mean.ln()],
            Family::Lognormal => [mean.ln() - (2.0 * shape).exp() / 2.0, shape],
            Family::Weibull => [shape, mean.ln() - ln_gamma(1.0 + (-shape).exp())],
        }
    }

    /// Starting points from a mean and a coefficient of variation: the moments themselves, a
    /// shape-1 variant, and means inflated to allow for truncation.
    fn starts(&self, mean: f64, cv: f64) -> Vec<[f64; 2]> {
        [(1.0, cv), (1.0, 1.0), (1.5, cv), (3.0, cv * 1.2)]
            .into_iter()
            .map(|(inflate, cv)| self.theta_from_moments(mean * inflate, cv))
            .map(|theta| self.bounds.project(theta))
            .collect()
    }

    fn theta_from_moments(&self, mean: f64, cv: f64) -> [f64; 2] {
        match self.family {
            Family::Gamma => [(1.0 / (cv * cv)).ln(), mean.ln()],
            Family::Lognormal => {
                let s2 = (1.0 + cv * cv).ln();
                [mean.ln() - s2 / 2.0, s2.sqrt().ln()]
            }
            Family::Weibull => {
                // Justus' approximation of the Weibull shape from the coefficient of variation.
                let shape = cv.powf(-1.086);
                [shape.ln(), mean.ln() - ln_gamma(1.0 + 1.0 / shape)]
            }
        }
    }

    /// The name of a parameter at the edge of the box, if any.
    fn touching(&self, theta: [f64; 2]) -> Option<&'static str> {
        let touching = self.bounds.touching(theta, 1e-3);
        let names = match self.family {
            Family::Gamma => ["shape", "mean"],
            Family::Lognormal => ["meanlog", "sdlog"],
            Family::Weibull => ["shape", "scale"],
        };
        (0..2).find(|&i| touching[i]).map(|i| names[i])
    }
}

const PRECISE: Settings =
    Settings { step: 0.3, max_evaluations: 800, value_tolerance: 1e-12, size_tolerance: 1e-7 };
const POLISH: Settings = Settings { step: 0.05, ..PRECISE };
const BOOTSTRAP: Settings =
    Settings { step: 0.1, max_evaluations: 300, value_tolerance: 1e-9, size_tolerance: 1e-5 };

/// The likelihood of one data set in one family, with a reusable buffer.
struct Problem<'a> {
    design: &'a Design,
    space: Space,
    scratch: Vec<Point>,
}

/// The best point found and the negative log-likelihood there.
type Estimate = crate::analysis::numeric::simplex::Minimum;

/// Bootstrap estimates of (mean, median, 95th percentile).
struct Boot {
    draws: Vec<[f64; 3]>,
    replicates: usize,
    at_boundary: usize,
}

impl<'a> Problem<'a> {
    fn new(design: &'a Design, space: Space) -> Problem<'a> {
        Problem { design, space, scratch: Vec::new() }
    }

    fn negative_ll(&mut self, theta: [f64; 2], counts: &Counts) -> f64 {
        match self.space.dist(theta) {
            Some(dist) => -self.design.log_likelihood(&dist, counts, &mut self.scratch),
            None => f64::INFINITY,
        }
    }

    fn minimise(&mut self, counts: &Counts, start: [f64; 2], settings: &Settings) -> Estimate {
        let bounds = self.space.bounds;
        nelder_mead(|t| self.negative_ll(t, counts), start, &bounds, settings)
    }

    /// Best of the runs from every start, polished by a restart.
    fn maximise(&mut self, counts: &Counts, starts: &[[f64; 2]]) -> Estimate {
        let best = starts
            .iter()
            .map(|&start| self.minimise(counts, start, &PRECISE))
            .min_by(|a, b| a.value.total_cmp(&b.value))
            .expect("at least one start");
        let polished = self.minimise(counts, best.x, &POLISH);
        if polished.value <= best.value { polished } else { best }
    }

    /// Profile log-likelihood at a fixed mean, maximised over the shape coordinate.
    fn profile_mean(&mut self, counts: &Counts, mean: f64) -> f64 {
        let axis = shape_axis(self.space.family);
        let (lo, hi) = (self.space.bounds.lower[axis], self.space.bounds.upper[axis]);
        let space = self.space;
        -minimize_1d(|shape| self.negative_ll(space.at_mean(mean, shape), counts), lo, hi, 40)
    }

    /// A maximum on the boundary, or a flat profile of the mean towards larger values.
    fn likelihood_checks(&mut self, counts: &Counts, estimate: &Estimate, dist: &Dist) -> Vec<String> {
        let mut problems = Vec::new();
        if let Some(name) = self.space.touching(estimate.x) {
            problems.push(format!("the maximum lies on the boundary ({name} at its limit)"));
        }
        let profile = self.profile_mean(counts, 3.0 * dist.mean());
        if -estimate.value - profile < PROFILE_DROP {
            problems.push(
                "the likelihood profile is flat: a mean three times the estimate is inside the \
                 95% likelihood region"
                    .to_string(),
            );
        }
        problems
    }

    fn bootstrap(&mut self, design: &Design, estimate: [f64; 2], resamples: usize, rng: &mut StdRng) -> Boot {
        let mut boot = Boot { draws: Vec::with_capacity(resamples), replicates: 0, at_boundary: 0 };
        for _ in 0..resamples {
            let counts = design.counts(resample(design, rng));
            let refit = self.minimise(&counts, estimate, &BOOTSTRAP);
            let Some(dist) = self.space.dist(refit.x).filter(|_| refit.value.is_finite()) else {
                continue;
            };
            boot.replicates += 1;
            if self.space.touching(refit.x).is_some() {
                boot.at_boundary += 1;
            }
            boot.draws.push([dist.mean(), dist.median(), dist.quantile(0.95)]);
        }
        boot
    }
}

/// Multinomial resample of the records, as counts per distinct pair (conditional binomials).
fn resample(design: &Design, rng: &mut StdRng) -> Vec<u64> {
    let total: u64 = design.pairs().iter().map(|p| p.count).sum();
    let (mut left, mut mass) = (total, total);
    design
        .pairs()
        .iter()
        .map(|pair| {
            if left == 0 || mass == 0 {
                return 0;
            }
            let p = (pair.count as f64 / mass as f64).min(1.0);
            mass -= pair.count;
            let k = Binomial::new(left, p).map_or(0, |b| b.sample(rng));
            left -= k;
            k
        })
        .collect()
}

impl Boot {
    /// Percentile intervals of mean, median and 95th percentile.
    fn intervals(&self, level: f64) -> Option<[Interval; 3]> {
        if self.draws.len() < 2 {
            return None;
        }
        let alpha = (1.0 - level) / 2.0;
        Some([0, 1, 2].map(|i| {
            let mut values: Vec<f64> = self.draws.iter().map(|d| d[i]).collect();
            values.sort_by(f64::total_cmp);
            Interval { lower: sorted_quantile(&values, alpha), upper: sorted_quantile(&values, 1.0 - alpha) }
        }))
    }

    /// Refits that end on the boundary, or an interval of the mean reaching far above it.
    fn checks(&self, intervals: Option<[Interval; 3]>, mean: f64) -> Vec<String> {
        let mut problems = Vec::new();
        if self.replicates > 0 && self.at_boundary as f64 > 0.1 * self.replicates as f64 {
            problems.push(format!(
                "{} of {} bootstrap refits end on the parameter boundary",
                self.at_boundary, self.replicates
            ));
        }
        let upper = intervals.map_or(f64::NAN, |i| i[0].upper);
        if upper > 3.0 * mean {
            problems.push(format!(
                "the bootstrap interval of the mean reaches {upper:.1} days, over three times \
                 the estimate"
            ));
        }
        problems
    }
}

fn sorted_quantile(sorted: &[f64], p: f64) -> f64 {
    let h = (sorted.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let hi = (lo + 1).min(sorted.len() - 1);
    sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
}

#[cfg(test)]
mod tests;
