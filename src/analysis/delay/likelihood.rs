//! Log-likelihoods of observed delays: the per-record form used for reference checks
//! (continuous or daily censored, with or without right truncation), and a grouped form for
//! fitting, in which identical delays and identical horizons share one term, so that the cost
//! of an evaluation depends on the number of distinct days, not on the number of records.

use std::collections::BTreeMap;

use super::DelayObs;
use super::dist::{Dist, Family, Point, second_difference, truncation_mass};

/// Log-likelihood of `obs` under `family` with `params`.
///
/// - `censored`: each delay is a whole number of days with the primary event uniform within its
///   day, `P(N = d) = G(d + 1) - 2 G(d) + G(d - 1)`; otherwise the continuous density `f(d)`.
/// - `truncated`: a record with a horizon `tau` could only have been seen if its delay was at
///   most `tau`, so its term is divided by `P(N <= tau) = G(tau + 1) - G(tau)` (censored) or by
///   `F(tau)` (continuous; Seaman, Presanis & Jackson 2022). Records without a horizon are not
///   truncated.
///
/// Negative delays have probability zero (callers exclude them first, see
/// [`super::summarize`]); invalid parameters give NaN.
pub fn log_likelihood(
    family: Family,
    params: [f64; 2],
    obs: &[DelayObs],
    censored: bool,
    truncated: bool,
) -> f64 {
    let Some(dist) = Dist::new(family, params) else {
        return f64::NAN;
    };
    obs.iter().map(|o| record_term(&dist, o, censored, truncated)).sum()
}

fn record_term(dist: &Dist, obs: &DelayObs, censored: bool, truncated: bool) -> f64 {
    let horizon = obs.horizon.filter(|_| truncated);
    if censored {
        let ln_p = dist.daily_pmf(obs.delay).ln();
        ln_p - horizon.map_or(0.0, |tau| dist.daily_cdf(tau).ln())
    } else {
        let ln_f = dist.ln_pdf(obs.delay as f64);
        ln_f - horizon.map_or(0.0, |tau| dist.cdf(tau as f64).ln())
    }
}

/// One distinct delay: its value and the positions of `d - 1`, `d`, `d + 1` in the point list.
#[derive(Debug, Clone)]
struct DelayTerm {
    value: i64,
    at: [usize; 3],
}

/// One distinct horizon: its value and the positions of `tau`, `tau + 1`.
#[derive(Debug, Clone)]
struct HorizonTerm {
    value: i64,
    at: [usize; 2],
}

/// A distinct (delay, horizon) pair and how many records share it.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Pair {
    delay: usize,
    horizon: Option<usize>,
    pub count: u64,
}

/// Distinct records of a data set, prepared for fast daily-censored likelihoods.
#[derive(Debug, Clone)]
pub(crate) struct Design {
    points: Vec<i64>,
    delays: Vec<DelayTerm>,
    horizons: Vec<HorizonTerm>,
    pairs: Vec<Pair>,
}

/// Record counts per distinct delay and per distinct horizon.
#[derive(Debug, Clone)]
pub(crate) struct Counts {
    delays: Vec<f64>,
    horizons: Vec<f64>,
}

impl Design {
    /// Groups `(delay, horizon)` records; delays must be non-negative.
    #[cfg(test)]
    pub fn new(records: impl IntoIterator<Item = (i64, Option<i64>)>) -> Design {
        Design::from_counts(records.into_iter().map(|record| (record, 1)))
    }

    /// Groups `(delay, horizon)` records given with how many records share them.
    pub fn from_counts(records: impl IntoIterator<Item = ((i64, Option<i64>), u64)>) -> Design {
        let mut grouped: BTreeMap<(i64, Option<i64>), u64> = BTreeMap::new();
        for (record, count) in records {
            *grouped.entry(record).or_default() += count;
        }
        grouped.retain(|_, count| *count > 0);
        let mut points: Vec<i64> = grouped
            .keys()
            .flat_map(|&(d, tau)| {
                let horizon_points = tau.into_iter().flat_map(|t| [t, t + 1]);
                [d - 1, d, d + 1].into_iter().chain(horizon_points)
            })
            .collect();
        points.sort_unstable();
        points.dedup();
        let position = |x: i64| points.binary_search(&x).unwrap();

        let mut delay_index = BTreeMap::new();
        let mut horizon_index = BTreeMap::new();
        let mut delays = Vec::new();
        let mut horizons = Vec::new();
        let mut pairs = Vec::with_capacity(grouped.len());
        for (&(d, tau), &count) in &grouped {
            let delay = *delay_index.entry(d).or_insert_with(|| {
                delays.push(DelayTerm { value: d, at: [position(d - 1), position(d), position(d + 1)] });
                delays.len() - 1
            });
            let horizon = tau.map(|t| {
                *horizon_index.entry(t).or_insert_with(|| {
                    horizons.push(HorizonTerm { value: t, at: [position(t), position(t + 1)] });
                    horizons.len() - 1
                })
            });
            pairs.push(Pair { delay, horizon, count });
        }
        Design { points, delays, horizons, pairs }
    }

    pub fn pairs(&self) -> &[Pair] {
        &self.pairs
    }

    /// Counts per distinct delay and horizon for `pair_counts` (one per pair, in order).
    pub fn counts(&self, pair_counts: impl IntoIterator<Item = u64>) -> Counts {
        let mut counts =
            Counts { delays: vec![0.0; self.delays.len()], horizons: vec![0.0; self.horizons.len()] };
        for (pair, count) in self.pairs.iter().zip(pair_counts) {
            counts.delays[pair.delay] += count as f64;
            if let Some(h) = pair.horizon {
                counts.horizons[h] += count as f64;
            }
        }
        counts
    }

    /// Counts of the data set itself.
    pub fn base_counts(&self) -> Counts {
        self.counts(self.pairs.iter().map(|p| p.count))
    }

    /// Daily-censored, right-truncated log-likelihood; `scratch` is reused between calls.
    pub fn log_likelihood(&self, dist: &Dist, counts: &Counts, scratch: &mut Vec<Point>) -> f64 {
        scratch.clear();
        scratch.extend(self.points.iter().map(|&x| dist.point(x as f64)));
        let mut total = 0.0;
        for (term, &count) in self.delays.iter().zip(&counts.delays) {
            if count > 0.0 {
                let [a, b, c] = term.at.map(|i| scratch[i]);
                let p = second_difference(dist.uses_tail((term.value + 1) as f64), a, b, c);
                total += count * p.ln();
            }
        }
        for (term, &count) in self.horizons.iter().zip(&counts.horizons) {
            if count > 0.0 {
                let [a, b] = term.at.map(|i| scratch[i]);
                let mass = truncation_mass(dist.uses_tail((term.value + 1) as f64), a, b);
                total -= count * mass.ln();
            }
        }
        total
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn toy() -> Vec<DelayObs> {
        // docs/validation.md toy data: d = [2,3,3,5,7], tau = [10,6,5,8,7].
        [(2, 10), (3, 6), (3, 5), (5, 8), (7, 7)]
            .into_iter()
            .map(|(delay, tau)| DelayObs { delay, horizon: Some(tau) })
            .collect()
    }

    /// scipy 1.17.1 values (docs/validation.md "Delay distributions"), lognormal(1.5, 0.5).
    #[test]
    fn toy_log_likelihoods_match_reference() {
        let cases = [
            (false, false, -9.94277294),
            (false, true, -8.68783371),
            (true, false, -10.03099153),
            (true, true, -9.03193425),
        ];
        for (censored, truncated, want) in cases {
            let got = log_likelihood(Family::Lognormal, [1.5, 0.5], &toy(), censored, truncated);
            assert!((got - want).abs() < 1e-6, "censored={censored} truncated={truncated}: {got} vs {want}");
        }
    }

    #[test]
    fn grouped_equals_per_record() {
        let mut obs = toy();
        obs.extend(toy());
        obs.push(DelayObs { delay: 0, horizon: None });
        obs.push(DelayObs { delay: 12, horizon: Some(40) });
        let design = Design::new(obs.iter().map(|o| (o.delay, o.horizon)));
        assert_eq!(design.pairs().len(), 7);
        let mut scratch = Vec::new();
        for family in Family::ALL {
            let params = [1.3, 0.7];
            let dist = Dist::new(family, params).unwrap();
            let grouped = design.log_likelihood(&dist, &design.base_counts(), &mut scratch);
            let direct = log_likelihood(family, params, &obs, true, true);
            assert!((grouped - direct).abs() < 1e-9, "{family:?}");
        }
    }

    #[test]
    fn invalid_parameters_give_nan() {
        assert!(log_likelihood(Family::Gamma, [-1.0, 1.0], &toy(), true, true).is_nan());
    }
}
