//! Fit tests: recovery of known parameters, the truncation correction during exponential growth
//! (the acceptance check), identifiability under strong truncation, and bookkeeping.

use rand_distr::{Gamma, LogNormal};

use super::*;
use crate::analysis::delay::simulate::{Growth, observed};

const GROWTH: Growth = Growth { rate: 0.1, days: 60, primaries: 4000 };

fn options(bootstrap: usize) -> FitOptions {
    FitOptions { bootstrap, ..FitOptions::default() }
}

fn naive_mean(obs: &[DelayObs]) -> f64 {
    obs.iter().map(|o| o.delay as f64).sum::<f64>() / obs.len() as f64
}

/// A data set drawn during growth, its true mean, and the family it was drawn from.
struct GrowthCase {
    name: &'static str,
    family: Family,
    truth: f64,
    obs: Vec<DelayObs>,
}

fn growth_cases() -> Vec<GrowthCase> {
    // Lauer et al. 2020 incubation, lognormal meanlog 1.621, sdlog 0.418 (parameters from
    // memory per docs/validation.md): true mean exp(1.621 + 0.418^2 / 2).
    let lauer = LogNormal::new(1.621, 0.418).unwrap();
    // Verity et al. 2020 onset to death, gamma shape 4.938, rate 0.2774 (memory; published
    // mean 17.8 d). rand_distr's Gamma takes a scale.
    let verity = Gamma::new(4.938, 1.0 / 0.2774).unwrap();
    vec![
        GrowthCase {
            name: "incubation lognormal",
            family: Family::Lognormal,
            truth: (1.621f64 + 0.418 * 0.418 / 2.0).exp(),
            obs: observed(&GROWTH, &lauer, 11),
        },
        GrowthCase {
            name: "onset-to-death gamma",
            family: Family::Gamma,
            truth: 4.938 / 0.2774,
            obs: observed(&GROWTH, &verity, 12),
        },
    ]
}

/// Acceptance: during growth at r = 0.1/day the naive mean is biased low (for the
/// gamma, docs/validation.md derives an observed mean of 13.08 d against 17.8 d), while the
/// truncation-corrected fit is within 10% of the truth.
#[test]
fn truncation_correction_recovers_the_mean_during_growth() {
    for case in growth_cases() {
        let n = case.obs.len();
        assert!(n >= 500, "{}: only {n} records observed", case.name);
        let naive = naive_mean(&case.obs);
        let naive_fit = fit(&case.obs, case.family, &FitOptions { truncation: false, ..options(0) }, 1);
        let corrected = fit(&case.obs, case.family, &options(100), 1);
        let error = (corrected.mean - case.truth).abs() / case.truth;
        eprintln!(
            "{}: n={n} truth={:.3} naive={naive:.3} naive fit={:.3} corrected={:.3} {:?}",
            case.name, case.truth, naive_fit.mean, corrected.mean, corrected.mean_interval
        );
        assert!(error < 0.10, "{}: corrected mean {}", case.name, corrected.mean);
        // Clearly biased: for the lognormal the bias is about 9% (several standard errors of
        // the naive mean), for the gamma about 28%.
        assert!(naive < 0.95 * case.truth, "{}: naive mean {naive}", case.name);
        assert!(naive_fit.mean < 0.95 * case.truth, "{}: naive fit", case.name);
        assert!(corrected.identifiable, "{}: {:?}", case.name, corrected.warnings);
        let interval = corrected.mean_interval.unwrap();
        assert!(interval.lower < case.truth && case.truth < interval.upper);
    }
}

/// Onset to death (Verity et al. 2020 gamma, memory) seen only ten days into an epidemic:
/// almost no death delay near the mean of 17.8 d is observable yet, so the mean must not be
/// reported as identified (Seaman et al. 2022, via docs/validation.md).
#[test]
fn strong_truncation_is_not_identifiable() {
    let early = Growth { rate: 0.2, days: 10, primaries: 10_000 };
    let obs = observed(&early, &Gamma::new(4.938, 1.0 / 0.2774).unwrap(), 5);
    assert!(obs.len() >= 100, "{}", obs.len());
    for result in fit_all(&obs, &options(50), 3) {
        eprintln!(
            "{}: mean {:.2} {:?} identifiable {} {:?}",
            result.family.name(),
            result.mean,
            result.mean_interval,
            result.identifiable,
            result.warnings
        );
        assert!(!result.identifiable, "{:?}", result.family);
        assert!(result.warnings.iter().any(|w| w.contains("not identified")));
        assert_eq!(result.mean_interval.unwrap().upper, f64::INFINITY);
    }
}

#[test]
fn recovers_parameters_without_truncation() {
    let cases: [(Family, [f64; 2]); 3] =
        [(Family::Gamma, [2.5, 0.4]), (Family::Lognormal, [1.2, 0.6]), (Family::Weibull, [1.8, 7.0])];
    for (seed, (family, params)) in cases.into_iter().enumerate() {
        let truth = Dist::new(family, params).unwrap();
        let obs = sample_untruncated(&truth, 3000, seed as u64);
        let result = fit(&obs, family, &options(0), 0);
        for i in 0..2 {
            let relative = (result.params[i] - params[i]).abs() / params[i].abs();
            assert!(relative < 0.08, "{family:?} {:?} vs {params:?}", result.params);
        }
        assert!(result.identifiable, "{family:?} {:?}", result.warnings);
    }
}

/// Whole-day delays from `dist` with the primary uniform in its day, no truncation.
fn sample_untruncated(dist: &Dist, n: usize, seed: u64) -> Vec<DelayObs> {
    use rand::{RngExt, SeedableRng};
    let mut rng = StdRng::seed_from_u64(seed);
    (0..n)
        .map(|_| {
            let (u, v): (f64, f64) = (rng.random(), rng.random());
            let x = dist.quantile(v.clamp(1e-12, 1.0 - 1e-12));
            DelayObs { delay: (u + x).floor() as i64, horizon: None }
        })
        .collect()
}

#[test]
fn fit_all_sorts_by_aic_and_is_reproducible() {
    let case = growth_cases().remove(1);
    let fits = fit_all(&case.obs, &options(20), 9);
    assert_eq!(fits.len(), 3);
    assert!(fits.windows(2).all(|w| w[0].aic <= w[1].aic));
    let again = fit_all(&case.obs, &options(20), 9);
    assert_eq!(fits, again);
    for f in &fits {
        let [a, b] = [f.mean_interval.unwrap(), f.p95_interval.unwrap()];
        assert!(a.lower <= f.mean && f.mean <= a.upper && b.lower <= f.p95 && f.p95 <= b.upper);
    }
}

#[test]
fn negative_delays_are_excluded_and_empty_data_is_reported() {
    let mut obs = sample_untruncated(&Dist::new(Family::Gamma, [3.0, 0.5]).unwrap(), 200, 4);
    obs.extend([-1, -3].map(|delay| DelayObs { delay, horizon: None }));
    let result = fit(&obs, Family::Gamma, &options(0), 0);
    assert_eq!(result.n, 200);
    assert!(result.warnings.iter().any(|w| w.starts_with("2 negative")));
    assert!(result.log_likelihood.is_finite());

    let empty = fit(&obs[200..], Family::Weibull, &options(10), 0);
    assert_eq!(empty.n, 0);
    assert!(empty.aic.is_nan() && !empty.identifiable && empty.mean_interval.is_none());
}

/// Performance target: 100,000 records, censoring and truncation, at most 2 s per
/// family in release. Run with `cargo test --release --lib analysis::delay -- --ignored`.
#[test]
#[ignore]
fn timing_100k_records() {
    let growth = Growth { primaries: 600_000, ..GROWTH };
    let obs = observed(&growth, &Gamma::new(4.938, 1.0 / 0.2774).unwrap(), 21);
    assert!(obs.len() >= 100_000, "{}", obs.len());
    let obs = &obs[..100_000];
    for family in Family::ALL {
        let start = std::time::Instant::now();
        let result = fit(obs, family, &FitOptions::default(), 7);
        let elapsed = start.elapsed();
        eprintln!(
            "{}: {elapsed:?} mean {:.3} aic {:.1} identifiable {}",
            family.name(),
            result.mean,
            result.aic,
            result.identifiable
        );
        assert!(elapsed.as_secs_f64() <= 2.0);
    }
}
