//! Test data with known truth: primary events during exponential growth, a continuous delay
//! drawn from a given distribution, whole-day dates, and an observation date that cuts off every
//! record whose second event has not happened yet (right truncation).

use rand::rngs::StdRng;
use rand::{RngExt, SeedableRng};
use rand_distr::Distribution;

use super::DelayObs;

/// An epidemic growing at `rate` per day over days `0..days`, observed at the end of the last
/// day, with `primaries` primary events in all (observed or not).
#[derive(Debug, Clone, Copy)]
pub(crate) struct Growth {
    pub rate: f64,
    pub days: i64,
    pub primaries: usize,
}

/// The records visible at the observation date.
pub(crate) fn observed(growth: &Growth, delay: &impl Distribution<f64>, seed: u64) -> Vec<DelayObs> {
    let mut rng = StdRng::seed_from_u64(seed);
    let last_day = growth.days - 1;
    let span = (growth.rate * growth.days as f64).exp_m1();
    (0..growth.primaries)
        .filter_map(|_| {
            // Inverse CDF of a density proportional to exp(rate t) on [0, days).
            let u: f64 = rng.random();
            let primary = (u * span).ln_1p() / growth.rate;
            let secondary = primary + delay.sample(&mut rng);
            let first_day = primary.floor() as i64;
            let record =
                DelayObs { delay: secondary.floor() as i64 - first_day, horizon: Some(last_day - first_day) };
            (record.delay <= last_day - first_day).then_some(record)
        })
        .collect()
}
