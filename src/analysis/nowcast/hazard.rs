//! The `hazard` nowcast: reverse-time discrete reporting hazards (Lawless 1994, Can J Stat
//! 22:15; restated in Hohle & an der Heiden 2014, Biometrics 70:993, section 3.1) estimated
//! over a moving window of reference dates, with conjugate Beta posteriors on the hazards and
//! the negative-binomial predictive of Hohle & an der Heiden (2014) for the cases still to
//! come. Also owns the chain-ladder estimate, whose point estimates the hazard method must
//! reproduce. Pure: a triangle, parameters and a seed in, a `Nowcast` out; no IO, no clock,
//! no randomness but the seeded generator, and no panics on thin data (problems instead).
//!
//! Notation: `C[t][d]` the cumulative count of reference date t known at delay d, `n[t][d]`
//! its increments after the triangle's downward-revision rule, D the maximum delay. For delay
//! d, over the last `window` reference dates that observe delay d, `R_d = sum n[t][d]` and
//! `N_d = sum_{j <= d} n[t][j]`; the hazard is `g_d = R_d / N_d`, the completeness
//! `F(D) = 1, F(d - 1) = F(d)(1 - g_d)`, and the point estimate of row t is
//! `C[t][T - t] / F(T - t)`. Assumption: the delay distribution is stable within the window.

use rand::SeedableRng;
use rand::rngs::StdRng;
use rand_distr::{Beta, Distribution, Gamma, Poisson};

use super::{Nowcast, NowcastRow, row_from_draws};
use crate::analysis::triangle::Triangle;
use crate::model::NowcastMethod;

/// The method name recorded in every `Nowcast` this module makes.
pub const METHOD: NowcastMethod = NowcastMethod::Hazard;

/// Parameters of the hazard nowcast.
#[derive(Debug, Clone, PartialEq)]
pub struct HazardParams {
    /// Reference dates used to estimate each hazard: the last `window` dates that observe
    /// that delay. Default 42.
    pub window: usize,
    /// Posterior predictive draws per reference date. Default 2000.
    pub draws: usize,
    /// Beta(prior_a / D, prior_b) prior on each of the D hazards g_1..g_D. Default 0.5/0.5:
    /// Jeffreys' prior in total over the delays, not per delay, so that delays at which
    /// nothing is ever reported (a reference date that is known at once, such as the report
    /// date itself) do not add up to phantom cases: with 0.5 per delay, 28 empty delays
    /// would add about 14 / N of the count, N the cases in the window. The posterior is
    /// dominated by any delay with more than a handful of cases either way.
    pub prior_a: f64,
    pub prior_b: f64,
    /// Gamma(shape gamma_alpha, rate gamma_beta) prior on each date's expected eventual
    /// count. Default 1 and 0.001 (docs/validation.md): nearly flat over counts.
    pub gamma_alpha: f64,
    pub gamma_beta: f64,
    /// Shape of the empirical-Bayes prior on the expected count of recent dates (default
    /// 2): a gamma with mean the recent level (the mean point estimate of the last
    /// `LEVEL_ROWS` dates that are at least half complete) replaces the flat prior, so a
    /// date with almost nothing reported yet borrows the level of its neighbours instead of
    /// resting on the flat prior (which says "about 1 / completeness"). `None`: the flat
    /// prior everywhere.
    pub level_prior_shape: Option<f64>,
}

/// Dates whose point estimates set the level prior (the most recent ones that are at least
/// half complete).
pub const LEVEL_ROWS: usize = 14;

impl Default for HazardParams {
    fn default() -> Self {
        HazardParams {
            window: 42,
            draws: 2000,
            prior_a: 0.5,
            prior_b: 0.5,
            gamma_alpha: 1.0,
            gamma_beta: 0.001,
            level_prior_shape: Some(2.0),
        }
    }
}

/// The sufficient statistics of the hazards over the window, indexed by delay 0..=D.
#[derive(Debug, Clone, PartialEq)]
pub struct HazardCounts {
    /// `R_d`: cases first known at exactly delay d.
    pub reported: Vec<f64>,
    /// `N_d`: cases known by delay d.
    pub known: Vec<f64>,
    /// Reference dates that entered each delay's sums.
    pub dates_used: Vec<usize>,
}

/// Point hazards and completeness of one triangle, and what the analyst should know.
#[derive(Debug, Clone, PartialEq)]
pub struct HazardEstimate {
    pub counts: HazardCounts,
    /// `g_d`, d = 0..=D (`g_0` is 1 when any case is known; it is never used).
    pub hazards: Vec<f64>,
    /// `F(d)`, d = 0..=D: the expected share of the eventual count known by delay d.
    pub completeness: Vec<f64>,
    pub problems: Vec<String>,
}

/// Window sums `R_d`, `N_d` from the clipped increments of the triangle.
pub fn hazard_counts(tri: &Triangle, window: usize) -> HazardCounts {
    let increments = tri.increments().n;
    let delays = tri.max_delay + 1;
    let mut counts =
        HazardCounts { reported: vec![0.0; delays], known: vec![0.0; delays], dates_used: vec![0; delays] };
    for d in 0..delays {
        let observing: Vec<&Vec<f64>> = increments.iter().filter(|row| row.len() > d).collect();
        let recent = &observing[observing.len().saturating_sub(window)..];
        counts.reported[d] = recent.iter().map(|row| row[d]).sum();
        counts.known[d] = recent.iter().map(|row| row[..=d].iter().sum::<f64>()).sum();
        counts.dates_used[d] = recent.len();
    }
    counts
}

/// `g_d = R_d / N_d`, with `g_d = 0` where `N_d = 0` (no information: no correction).
pub fn hazards_from_counts(counts: &HazardCounts) -> Vec<f64> {
    counts
        .reported
        .iter()
        .zip(&counts.known)
        .map(|(&reported, &known)| if known > 0.0 { reported / known } else { 0.0 })
        .collect()
}

/// `F(D) = 1, F(d - 1) = F(d)(1 - g_d)` for hazards indexed 0..=D; writes into `cdf`.
fn fill_completeness(hazards: impl Fn(usize) -> f64, cdf: &mut [f64]) {
    let Some(last) = cdf.len().checked_sub(1) else { return };
    cdf[last] = 1.0;
    for d in (1..=last).rev() {
        cdf[d - 1] = cdf[d] * (1.0 - hazards(d));
    }
}

/// Hazards, completeness and problems of a triangle over `window` dates.
pub fn estimate(tri: &Triangle, window: usize) -> HazardEstimate {
    let counts = hazard_counts(tri, window);
    let hazards = hazards_from_counts(&counts);
    let mut completeness = vec![1.0; tri.max_delay + 1];
    fill_completeness(|d| hazards[d], &mut completeness);
    let problems = estimate_problems(tri, &counts);
    HazardEstimate { counts, hazards, completeness, problems }
}

/// `F(d)`, d = 0..=D: the expected share of a date's eventual count known at delay d.
pub fn completeness(tri: &Triangle, window: usize) -> Vec<f64> {
    estimate(tri, window).completeness
}

/// `C[t][T - t] / F(T - t)` for every row of the triangle. Infinite (or NaN for 0/0) where
/// the completeness is 0, i.e. no case in the window was known before some later delay;
/// `nowcast` reports that as a problem and falls back on its draws.
pub fn point_estimates(tri: &Triangle, window: usize) -> Vec<f64> {
    let cdf = completeness(tri, window);
    (0..tri.rows()).map(|t| tri.latest(t) / cdf[known_delay(tri, t)]).collect()
}

/// Chain-ladder development factors `f_d = sum C[t][d + 1] / sum C[t][d]`, d = 0..D-1,
/// over all rows that observe delay d + 1 (1 where the denominator is 0).
pub fn development_factors(tri: &Triangle) -> Vec<f64> {
    (0..tri.max_delay)
        .map(|d| {
            let developed = tri.cumulative.iter().filter(|row| row.len() > d + 1);
            let (next, this) =
                developed.fold((0.0, 0.0), |(next, this), row| (next + row[d + 1], this + row[d]));
            if this > 0.0 { next / this } else { 1.0 }
        })
        .collect()
}

/// Chain-ladder ultimate count of every row: `C[t][h] * prod_{d >= h} f_d`. Equals the
/// hazard point estimate with a window covering all rows when no count was revised down.
pub fn chain_ladder(tri: &Triangle) -> Vec<f64> {
    let factors = development_factors(tri);
    (0..tri.rows()).map(|t| tri.latest(t) * factors[known_delay(tri, t)..].iter().product::<f64>()).collect()
}

/// The largest delay of row t that the estimates use (at most D).
fn known_delay(tri: &Triangle, t: usize) -> usize {
    tri.observed_delay(t).min(tri.max_delay)
}

/// Days between reference date t and the triangle's last day.
fn horizon(tri: &Triangle, t: usize) -> usize {
    tri.rows() - 1 - t
}

fn estimate_problems(tri: &Triangle, counts: &HazardCounts) -> Vec<String> {
    let mut problems = Vec::new();
    let never_observed: Vec<usize> = (1..=tri.max_delay).filter(|&d| counts.dates_used[d] == 0).collect();
    let empty: Vec<usize> =
        (1..=tri.max_delay).filter(|&d| counts.dates_used[d] > 0 && counts.known[d] <= 0.0).collect();
    if !never_observed.is_empty() {
        problems.push(format!(
            "the triangle spans {} days, too few to observe delays {}: their hazards are set to 0 \
             (no reports assumed at those delays)",
            tri.rows(),
            describe_delays(&never_observed)
        ));
    }
    if !empty.is_empty() {
        problems.push(format!(
            "no case in the estimation window was known by delays {}: their hazards are set to 0 \
             (no reports assumed at those delays)",
            describe_delays(&empty)
        ));
    }
    let downward = tri.increments();
    if downward.downward_cells > 0 {
        problems.push(format!(
            "{} downward revisions (total {}) were clipped to zero when estimating hazards",
            downward.downward_cells, downward.downward_total
        ));
    }
    problems
}

/// Delays as ranges: `[1, 2, 3, 7]` -> "1-3, 7".
fn describe_delays(delays: &[usize]) -> String {
    let mut ranges: Vec<(usize, usize)> = Vec::new();
    for &d in delays {
        match ranges.last_mut() {
            Some((_, end)) if *end + 1 == d => *end = d,
            _ => ranges.push((d, d)),
        }
    }
    let text: Vec<String> =
        ranges.iter().map(|&(a, b)| if a == b { a.to_string() } else { format!("{a}-{b}") }).collect();
    text.join(", ")
}

fn invalid_params(params: &HazardParams) -> Vec<String> {
    let positive = [
        ("prior_a", params.prior_a),
        ("prior_b", params.prior_b),
        ("gamma_alpha", params.gamma_alpha),
        ("gamma_beta", params.gamma_beta),
    ];
    let mut problems: Vec<String> = positive
        .iter()
        .filter(|(_, value)| !(value.is_finite() && *value > 0.0))
        .map(|(name, value)| format!("hazard parameter {name} must be positive and finite, got {value}"))
        .collect();
    for (name, value) in [("window", params.window), ("draws", params.draws)] {
        if value == 0 {
            problems.push(format!("hazard parameter {name} must be at least 1"));
        }
    }
    problems
}

/// Beta posteriors of the hazards g_1..g_D; `None` where the window holds no information
/// (`N_d = 0`), whose hazard stays 0 in every draw as in the point estimate.
struct HazardPosterior {
    hazards: Vec<Option<Beta<f64>>>,
}

impl HazardPosterior {
    fn new(counts: &HazardCounts, params: &HazardParams) -> HazardPosterior {
        let prior_a = params.prior_a / counts.reported.len().saturating_sub(1).max(1) as f64;
        let hazards = counts
            .reported
            .iter()
            .zip(&counts.known)
            .map(|(&reported, &known)| {
                let not_reported = (known - reported).max(0.0);
                if known > 0.0 {
                    Beta::new(prior_a + reported, params.prior_b + not_reported).ok()
                } else {
                    None
                }
            })
            .collect();
        HazardPosterior { hazards }
    }

    /// One posterior draw of the completeness curve F(0..=D), written into `cdf`.
    fn draw_completeness(&self, rng: &mut StdRng, cdf: &mut [f64]) {
        let drawn: Vec<f64> =
            self.hazards.iter().map(|posterior| posterior.map_or(0.0, |beta| beta.sample(rng))).collect();
        fill_completeness(|d| drawn[d], cdf);
    }
}

/// One draw of the eventual count given `observed` cases so far and completeness `q`:
/// `lambda ~ Gamma(alpha + x, rate beta + q)`, then `N - x ~ Poisson(lambda (1 - q))`, which
/// is `NegBin(size = alpha + x, prob = (beta + q)/(beta + 1))` (Hohle & an der Heiden 2014).
fn draw_eventual(rng: &mut StdRng, observed: f64, q: f64, (alpha, beta): (f64, f64)) -> f64 {
    let missing_share = 1.0 - q;
    if missing_share <= 0.0 {
        return observed;
    }
    let shape = alpha + observed.max(0.0);
    let rate = beta + q.max(0.0);
    let lambda = Gamma::new(shape, 1.0 / rate).map_or(shape / rate, |gamma| gamma.sample(rng));
    observed + draw_poisson(rng, lambda * missing_share)
}

/// A Poisson draw that tolerates a zero mean and means beyond the sampler's range (returned
/// as the mean, whose relative spread there is below 1e-9).
fn draw_poisson(rng: &mut StdRng, mean: f64) -> f64 {
    if mean.is_nan() || mean <= 0.0 {
        return 0.0;
    }
    Poisson::new(mean).map_or(mean, |poisson| poisson.sample(rng))
}

/// Hazard nowcast of every reference date of the triangle; method name "hazard". Rows that
/// observe the maximum delay have completeness 1 and no uncertainty.
pub fn nowcast(tri: &Triangle, params: &HazardParams, seed: u64) -> Nowcast {
    let invalid = invalid_params(params);
    if !invalid.is_empty() {
        return Nowcast { method: METHOD, rows: Vec::new(), problems: invalid };
    }
    if tri.rows() == 0 {
        let problems = vec!["the triangle is empty: there is no reference date to nowcast".to_string()];
        return Nowcast { method: METHOD, rows: Vec::new(), problems };
    }
    let estimate = estimate(tri, params.window);
    let mut problems = estimate.problems.clone();
    let pending: Vec<usize> = (0..tri.rows()).filter(|&t| known_delay(tri, t) < tri.max_delay).collect();
    let draws = draw_pending(tri, &estimate, &pending, params, seed);

    let mut rows: Vec<NowcastRow> = (0..tri.rows()).map(|t| complete_row(tri, t)).collect();
    let mut zero_completeness = Vec::new();
    for (&t, mut row_draws) in pending.iter().zip(draws) {
        let point_q = estimate.completeness[known_delay(tri, t)];
        let q = if point_q > 0.0 {
            point_q
        } else {
            zero_completeness.push(horizon(tri, t));
            row_draws.mean_completeness()
        };
        rows[t] = row_from_draws(tri.date(t), horizon(tri, t), tri.latest(t), q, &mut row_draws.eventual);
    }
    if !zero_completeness.is_empty() {
        problems.push(format!(
            "estimated completeness is 0 at horizons {} (no case in the window was known that early): \
             their completeness is the posterior mean and their intervals rest mostly on the priors",
            describe_delays(&zero_completeness)
        ));
    }
    Nowcast { method: METHOD, rows, problems }
}

/// A row that observes the maximum delay: its count is final.
fn complete_row(tri: &Triangle, t: usize) -> NowcastRow {
    let observed = tri.latest(t);
    row_from_draws(tri.date(t), horizon(tri, t), observed, 1.0, &mut [observed])
}

/// Predictive draws of one incomplete row, with the completeness behind each draw summed.
struct RowDraws {
    eventual: Vec<f64>,
    completeness_sum: f64,
}

impl RowDraws {
    fn mean_completeness(&self) -> f64 {
        self.completeness_sum / self.eventual.len().max(1) as f64
    }
}

/// The gamma prior (shape, rate) on the expected count of an incomplete date: centred on the
/// recent level when `level_prior_shape` is set and some recent date is at least half
/// complete, else the flat `gamma_alpha`, `gamma_beta`.
fn level_prior(tri: &Triangle, estimate: &HazardEstimate, params: &HazardParams) -> (f64, f64) {
    let flat = (params.gamma_alpha, params.gamma_beta);
    let Some(shape) = params.level_prior_shape.filter(|s| s.is_finite() && *s > 0.0) else { return flat };
    let recent: Vec<f64> = (tri.rows().saturating_sub(LEVEL_ROWS)..tri.rows())
        .filter_map(|t| {
            let q = estimate.completeness[known_delay(tri, t)];
            (q >= 0.5).then(|| tri.latest(t) / q)
        })
        .collect();
    if recent.is_empty() {
        return flat;
    }
    // A level of 0 (nothing reported lately) still allows a case: at least 0.1 a day.
    let level = (recent.iter().sum::<f64>() / recent.len() as f64).max(0.1);
    (shape, shape / level)
}

/// Joint posterior predictive draws of the incomplete rows: each draw shares one completeness
/// curve across rows, so the draws carry the correlation that the common hazards induce.
fn draw_pending(
    tri: &Triangle,
    estimate: &HazardEstimate,
    pending: &[usize],
    params: &HazardParams,
    seed: u64,
) -> Vec<RowDraws> {
    let posterior = HazardPosterior::new(&estimate.counts, params);
    let prior = level_prior(tri, estimate, params);
    let mut rng = StdRng::seed_from_u64(seed);
    let mut cdf = vec![1.0; tri.max_delay + 1];
    let mut draws: Vec<RowDraws> = pending
        .iter()
        .map(|_| RowDraws { eventual: Vec::with_capacity(params.draws), completeness_sum: 0.0 })
        .collect();
    for _ in 0..params.draws {
        posterior.draw_completeness(&mut rng, &mut cdf);
        for (&t, row) in pending.iter().zip(draws.iter_mut()) {
            let q = cdf[known_delay(tri, t)];
            row.completeness_sum += q;
            row.eventual.push(draw_eventual(&mut rng, tri.latest(t), q, prior));
        }
    }
    draws
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::nowcast::quantile_sorted;
    use crate::analysis::score::covered;
    use chrono::{Days, NaiveDate};

    fn start() -> NaiveDate {
        NaiveDate::from_ymd_opt(2026, 3, 1).unwrap()
    }

    /// A triangle from increments `n[t][d]` (unobserved cells ignored).
    fn from_increments(n: &[Vec<f64>], max_delay: usize) -> Triangle {
        let last = start() + Days::new(n.len() as u64 - 1);
        Triangle::from_fn(start(), last, max_delay, |t, d| n[t][..=d].iter().sum())
    }

    /// docs/validation.md: Lawless 1994 toy triangle, T = 4, D = 2.
    fn toy() -> Triangle {
        let n = [[10.0, 6.0, 4.0], [12.0, 7.0, 5.0], [15.0, 9.0, 6.0], [20.0, 12.0, 0.0], [25.0, 0.0, 0.0]];
        from_increments(&n.map(|row| row.to_vec()), 2)
    }

    /// docs/validation.md: Taylor & Ashe (1983) cumulative triangle (published in Mack 1993
    /// Table 1), origins as reference dates and development years as delays.
    fn taylor_ashe() -> Triangle {
        let rows: [&[f64]; 10] = [
            &[
                357848., 1124788., 1735330., 2218270., 2745596., 3319994., 3466336., 3606286., 3833515.,
                3901463.,
            ],
            &[352118., 1236139., 2170033., 3353322., 3799067., 4120063., 4647867., 4914039., 5339085.],
            &[290507., 1292306., 2218525., 3235179., 3985995., 4132918., 4628910., 4909315.],
            &[310608., 1418858., 2195047., 3757447., 4029929., 4381982., 4588268.],
            &[443160., 1136350., 2128333., 2897821., 3402672., 3873311.],
            &[396132., 1333217., 2180715., 2985752., 3691712.],
            &[440832., 1288463., 2419861., 3483130.],
            &[359480., 1421128., 2864498.],
            &[376686., 1363294.],
            &[344014.],
        ];
        Triangle::from_fn(start(), start() + Days::new(9), 9, |t, d| rows[t][d])
    }

    fn close(got: f64, want: f64, tolerance: f64) -> bool {
        (got - want).abs() <= tolerance
    }

    #[test]
    fn toy_hazards_completeness_and_nowcast() {
        let tri = toy();
        let est = estimate(&tri, 42);
        let f = &est.completeness;
        let points = point_estimates(&tri, 42);
        // (what, got, want, tolerance): docs/validation.md: Lawless 1994 toy triangle (scipy, exact fractions).
        let checks = [
            ("g_2", est.hazards[2], 15.0 / 74.0, 1e-12),
            ("g_1", est.hazards[1], 34.0 / 91.0, 1e-12),
            ("F(1)", f[1], 59.0 / 74.0, 1e-12),
            ("F(0)", f[0], 3363.0 / 6734.0, 1e-12),
            ("F(0) decimal", f[0], 0.499406, 1e-6),
            ("N_3", points[3], 40.135593, 1e-6),
            ("N_4", points[4], 50.059471, 1e-6),
        ];
        for (what, got, want, tolerance) in checks {
            assert!(close(got, want, tolerance), "{what} = {got}, want {want}");
        }
        // Rows 0..=2 observe the maximum delay: their counts are final (definition of F(D) = 1).
        assert_eq!(&points[..3], &[20.0, 24.0, 30.0]);
        assert!(est.problems.is_empty(), "{:?}", est.problems);
    }

    #[test]
    fn hazard_point_estimates_equal_chain_ladder() {
        // docs/validation.md: the hazard estimate equals the chain-ladder estimate
        // (Lawless 1994; Hohle & an der Heiden 2014 section 3.1), on the toy and Taylor & Ashe.
        for (name, tri) in [("toy", toy()), ("Taylor & Ashe", taylor_ashe())] {
            let hazard = point_estimates(&tri, tri.rows());
            let ladder = chain_ladder(&tri);
            for (t, (h, c)) in hazard.iter().zip(&ladder).enumerate() {
                assert!(
                    close(*h, *c, 1e-9 * c.abs().max(1.0)),
                    "{name} row {t}: hazard {h}, chain ladder {c}"
                );
            }
        }
    }

    #[test]
    fn taylor_ashe_development_factors() {
        // docs/validation.md: Taylor & Ashe development factors (published, Mack 1993), 4 decimals.
        let published = [3.4906, 1.7473, 1.4574, 1.1739, 1.1038, 1.0863, 1.0539, 1.0766, 1.0177];
        let factors = development_factors(&taylor_ashe());
        assert_eq!(factors.len(), published.len());
        for (d, (got, want)) in factors.iter().zip(published).enumerate() {
            assert!(close(*got, want, 5e-5), "f_{d} = {got}, published {want}");
        }
    }

    #[test]
    fn taylor_ashe_reserves() {
        let tri = taylor_ashe();
        let latest: Vec<f64> = (0..tri.rows()).map(|t| tri.latest(t)).collect();
        let reserves =
            |ultimate: &[f64]| -> Vec<f64> { ultimate.iter().zip(&latest).map(|(u, l)| u - l).collect() };
        let by_ladder = reserves(&chain_ladder(&tri));
        let by_hazard = reserves(&point_estimates(&tri, tri.rows()));
        for (name, reserve) in [("chain ladder", &by_ladder), ("hazard", &by_hazard)] {
            // docs/validation.md: total reserve 18,680,855.6 (scipy/numpy recomputation).
            let total: f64 = reserve.iter().sum();
            assert!(close(total, 18_680_855.6, 0.1), "{name}: total reserve {total}");
            // docs/validation.md: reserves by origin 2..10 in thousands (published, Mack 1993).
            let published = [95.0, 470.0, 710.0, 985.0, 1419.0, 2178.0, 3920.0, 4279.0, 4626.0];
            for (origin, want) in (2..=10).zip(published) {
                let got = reserve[origin - 1] / 1000.0;
                assert!(
                    close(got, want, 0.5),
                    "{name}: origin {origin} reserve {got} thousand, published {want}"
                );
            }
        }
    }

    #[test]
    fn negative_binomial_predictive_of_the_toy() {
        // docs/validation.md: conjugate NB predictive (Hohle & an der Heiden 2014) for t = 4 of
        // the toy, alpha = 1, beta = 0.001, q = F(0) (scipy): mean 51.0098, median 51, 95% [38, 66].
        let params = HazardParams {
            gamma_alpha: 1.0,
            gamma_beta: 0.001,
            level_prior_shape: None,
            ..HazardParams::default()
        };
        let q = 3363.0 / 6734.0;
        let mut rng = StdRng::seed_from_u64(20260301);
        let mut draws: Vec<f64> = (0..200_000)
            .map(|_| draw_eventual(&mut rng, 25.0, q, (params.gamma_alpha, params.gamma_beta)))
            .collect();
        draws.sort_by(f64::total_cmp);
        let mean = draws.iter().sum::<f64>() / draws.len() as f64;
        // (what, got, want, tolerance): Monte Carlo with 200,000 draws, tolerances from the brief.
        let checks = [
            ("mean", mean, 51.0098, 0.2),
            ("median", quantile_sorted(&draws, 0.5), 51.0, 1.0),
            ("2.5%", quantile_sorted(&draws, 0.025), 38.0, 1.0),
            ("97.5%", quantile_sorted(&draws, 0.975), 66.0, 1.0),
        ];
        for (what, got, want, tolerance) in checks {
            assert!(close(got, want, tolerance), "{what} = {got}, want {want}");
        }
    }

    #[test]
    fn nowcast_rows_of_the_toy() {
        let tri = toy();
        let now = nowcast(&tri, &HazardParams::default(), 7);
        assert_eq!(now.method, NowcastMethod::Hazard);
        assert_eq!(now.rows.len(), 5);
        assert!(now.problems.is_empty(), "{:?}", now.problems);
        for (t, row) in now.rows.iter().enumerate() {
            assert_eq!(row.date, tri.date(t));
            assert_eq!(row.horizon, 4 - t);
            assert_eq!(row.observed, tri.latest(t));
        }
        // Complete rows (T - t >= D): q = 1 and no uncertainty (definition of F(D) = 1).
        for row in &now.rows[..3] {
            let summaries = [
                row.median,
                row.mean,
                row.lower50,
                row.upper50,
                row.lower90,
                row.upper90,
                row.lower95,
                row.upper95,
            ];
            assert!(summaries.iter().all(|&value| value == row.observed), "{row:?}");
            assert_eq!(row.completeness, 1.0);
        }
        // Incomplete rows: the completeness shown (observed / predictive mean) is near the point
        // estimate F(T - t) (docs/validation.md toy, scipy), and the intervals are nested
        // around the median, above the count so far.
        for (t, q) in [(3, 59.0 / 74.0), (4, 3363.0 / 6734.0)] {
            let row = &now.rows[t];
            assert!(close(row.completeness, q, 0.06), "{row:?}");
            let ladder = [row.observed, row.lower95, row.lower90, row.lower50, row.median];
            let upper = [row.median, row.upper50, row.upper90, row.upper95];
            assert!(
                ladder.windows(2).all(|w| w[0] <= w[1]) && upper.windows(2).all(|w| w[0] <= w[1]),
                "{row:?}"
            );
        }
        // The median is near the point estimate (docs/validation.md toy N_4 = 50.06; NB median 51).
        assert!(close(now.rows[4].median, 51.0, 3.0), "{:?}", now.rows[4]);
    }

    #[test]
    fn nowcast_is_reproducible_from_its_seed() {
        let params = HazardParams { draws: 500, ..HazardParams::default() };
        let a = nowcast(&toy(), &params, 11);
        let b = nowcast(&toy(), &params, 11);
        let c = nowcast(&toy(), &params, 12);
        assert_eq!(a, b);
        assert_ne!(a.rows[4], c.rows[4]);
    }

    #[test]
    fn edge_cases_give_problems_not_panics() {
        let empty = Triangle {
            first_date: start(),
            last_day: start() - Days::new(1),
            max_delay: 3,
            cumulative: vec![],
        };
        let zeros = from_increments(&vec![vec![0.0; 4]; 8], 3);
        // Counts only in early rows: the last 2 dates observing delay 1..=3 hold no case.
        let mut sparse = vec![vec![0.0; 4]; 10];
        sparse[0] = vec![5.0, 3.0, 2.0, 1.0];
        let sparse = from_increments(&sparse, 3);
        let short = from_increments(&[vec![4.0, 2.0], vec![3.0]], 5);
        let revised = Triangle {
            first_date: start(),
            last_day: start() + Days::new(3),
            max_delay: 2,
            cumulative: vec![vec![5.0, 8.0, 7.0], vec![4.0, 6.0, 6.0], vec![3.0, 5.0], vec![2.0]],
        };
        let late_only =
            from_increments(&[vec![0.0, 0.0, 3.0], vec![0.0, 0.0, 2.0], vec![0.0, 0.0], vec![1.0]], 2);
        let windowed = HazardParams { window: 2, ..HazardParams::default() };
        let invalid = HazardParams { draws: 0, prior_a: -1.0, ..HazardParams::default() };
        // (name, triangle, params, expected rows, a word every problem list must contain)
        let cases = [
            ("empty", &empty, HazardParams::default(), 0, "empty"),
            ("all zero", &zeros, HazardParams::default(), 8, "no case"),
            ("window without data", &sparse, windowed, 10, "no case"),
            ("shorter than max delay", &short, HazardParams::default(), 2, "too few"),
            ("downward revision", &revised, HazardParams::default(), 4, "downward"),
            ("completeness 0", &late_only, HazardParams::default(), 4, "completeness is 0"),
            ("invalid params", &toy(), invalid, 0, "must be"),
        ];
        for (name, tri, params, rows, word) in cases {
            let now = nowcast(tri, &params, 1);
            assert_eq!(now.rows.len(), rows, "{name}");
            assert!(now.problems.iter().any(|p| p.contains(word)), "{name}: {:?}", now.problems);
            for row in &now.rows {
                let values = [row.median, row.mean, row.lower95, row.upper95, row.completeness];
                assert!(values.iter().all(|v| v.is_finite()), "{name}: {row:?}");
                assert!(row.completeness > 0.0 && row.completeness <= 1.0, "{name}: {row:?}");
            }
        }
        // All-zero rows nowcast to zero with no spurious uncertainty (hazards 0 where N_d = 0).
        let now = nowcast(&zeros, &HazardParams::default(), 1);
        assert!(now.rows.iter().all(|row| row.upper95 == 0.0 && row.median == 0.0));
        // A window with no data uses g_d = 0: recent rows keep their count (point estimate rule).
        assert_eq!(point_estimates(&sparse, 2)[9], 0.0);
    }

    /// Poisson counts with a constant delay distribution: (triangle, eventual counts).
    fn simulate(seed: u64, days: usize, max_delay: usize) -> (Triangle, Vec<f64>) {
        let mut rng = StdRng::seed_from_u64(seed);
        let weights: Vec<f64> = (0..=max_delay).map(|d| 0.8f64.powi(d as i32)).collect();
        let total: f64 = weights.iter().sum();
        let increments: Vec<Vec<f64>> = (0..days)
            .map(|t| {
                let expected = 40.0 * (0.01 * t as f64).exp();
                weights.iter().map(|w| draw_poisson(&mut rng, expected * w / total)).collect()
            })
            .collect();
        let truth = increments.iter().map(|row| row.iter().sum()).collect();
        (from_increments(&increments, max_delay), truth)
    }

    #[test]
    fn intervals_cover_a_simulated_truth() {
        // A simulation with known truth (brief: 100 dates, D = 20, constant delay, Poisson
        // counts): 90% intervals should cover the eventual count in roughly 80-98% of recent dates.
        let (days, max_delay) = (100, 20);
        let params = HazardParams { draws: 1000, ..HazardParams::default() };
        let (mut hits50, mut hits90, mut total) = (0, 0, 0);
        for seed in 0..30 {
            let (tri, truth) = simulate(seed, days, max_delay);
            let now = nowcast(&tri, &params, 1000 + seed);
            assert!(now.problems.is_empty(), "{:?}", now.problems);
            for row in now.rows.iter().filter(|row| row.horizon < max_delay) {
                let y = truth[(row.date - tri.first_date).num_days() as usize];
                hits50 += covered(row.lower50, row.upper50, y) as usize;
                hits90 += covered(row.lower90, row.upper90, y) as usize;
                total += 1;
            }
        }
        let (coverage50, coverage90) = (hits50 as f64 / total as f64, hits90 as f64 / total as f64);
        assert!((0.80..=0.98).contains(&coverage90), "90% coverage {coverage90}, 50% coverage {coverage50}");
        assert!((0.35..=0.75).contains(&coverage50), "50% coverage {coverage50}");
    }

    #[test]
    fn describe_delays_as_ranges() {
        // (delays, text): formatting of problem messages.
        let cases: [(&[usize], &str); 3] = [(&[1, 2, 3, 7], "1-3, 7"), (&[4], "4"), (&[], "")];
        for (delays, text) in cases {
            assert_eq!(describe_delays(delays), text);
        }
    }
}
