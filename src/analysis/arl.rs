//! Average run lengths (ARL) of an upper CUSUM `S_t = max(0, S_{t-1} + X_t - k)`, signalling
//! when `S_t > h`, by Markov chains, and the calibration of a count CUSUM's decision interval
//! `h` to a chosen in-control ARL. Pure: a step distribution, `k` and `h` in, days out.
//!
//! - Normal steps (the standardised CUSUM of the published tables): the approximation of
//!   Brook & Evans (1972, Biometrika 59:539), `STATES` cells on `[0, h]`, state 0 a sum at or
//!   near zero, state `j` a sum in `((j - 1/2) w, (j + 1/2) w]` with `w = h / (STATES - 1/2)`.
//! - Counts: an exact chain on the lattice of `1/d` cases (integer counts and a `k` on the
//!   lattice keep every sum on it).
//!
//! With `Q` the transitions among the in-control states, the run lengths from each state
//! solve `(I - Q) L = 1`; the chart starts at 0.

/// Cells of the normal-step chain; 120 keep the values within 1% of the published table (see
/// the tests).
const STATES: usize = 120;

/// A normal step `X` (for the standardised CUSUM of the published tables).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NormalStep {
    pub mean: f64,
    pub sd: f64,
}

impl NormalStep {
    /// `P(X <= x)`.
    fn cdf(&self, x: f64) -> f64 {
        0.5 * statrs::function::erf::erfc(-(x - self.mean) / (self.sd * std::f64::consts::SQRT_2))
    }
}

/// Counts with a given mean and variance: Poisson when the variance is the mean (or less),
/// else negative binomial with size `mean^2 / (variance - mean)`. The probabilities are
/// tabulated on the integers up to 12 sds above the mean (the rest is negligible).
#[derive(Debug, Clone, PartialEq)]
pub struct CountStep {
    pmf: Vec<f64>,
    mean: f64,
    sd: f64,
}

impl CountStep {
    pub fn new(mean: f64, variance: f64) -> CountStep {
        let mean = mean.max(1e-9);
        CountStep { pmf: count_pmf(mean, variance).collect(), mean, sd: variance.max(mean).sqrt() }
    }

    fn mean_and_sd(&self) -> (f64, f64) {
        (self.mean, self.sd)
    }

    /// The probabilities of 0, 1, 2, ... counts (the tabulated range).
    fn pmf(&self) -> &[f64] {
        &self.pmf
    }
}

/// The probabilities of 0, 1, 2, ... counts, from their logarithms (so large means do not
/// underflow), up to 12 sds above the mean.
fn count_pmf(mean: f64, variance: f64) -> impl Iterator<Item = f64> {
    let size = (variance > mean * (1.0 + 1e-9)).then(|| mean * mean / (variance - mean));
    // ln p(x) for Poisson, or negative binomial of `size` with p = size / (size + mean).
    let ln_pmf = move |x: f64| match size {
        None => x * mean.ln() - mean - ln_gamma(x + 1.0),
        Some(r) => {
            ln_gamma(x + r) - ln_gamma(r) - ln_gamma(x + 1.0)
                + r * (r / (r + mean)).ln()
                + x * (mean / (r + mean)).ln()
        }
    };
    let sd = variance.max(mean).sqrt();
    let last = (mean + 12.0 * sd + 20.0).ceil() as usize;
    (0..=last).map(move |x| ln_pmf(x as f64).exp())
}

fn ln_gamma(x: f64) -> f64 {
    statrs::function::gamma::ln_gamma(x)
}

/// Average run length of the upper CUSUM on normal steps (in control or shifted, as `step`
/// says) with reference value `k` and decision interval `h > 0`, starting from zero.
pub fn upper_cusum_arl(step: &NormalStep, k: f64, h: f64) -> f64 {
    let m = STATES;
    let w = h / (m as f64 - 0.5);
    // G(d) = P(X - k <= d).
    let g = |d: f64| step.cdf(d + k);
    // Rows of I - Q, with the right-hand side 1 in the last column.
    let mut a = vec![vec![0.0; m + 1]; m];
    for (i, row) in a.iter_mut().enumerate() {
        let s = i as f64 * w;
        let mut below = g(0.5 * w - s);
        row[0] = -below;
        for (j, cell) in row.iter_mut().enumerate().take(m).skip(1) {
            let upper = g((j as f64 + 0.5) * w - s);
            *cell = -(upper - below);
            below = upper;
        }
        row[i] += 1.0;
        row[m] = 1.0;
    }
    solve(&mut a)[0]
}

/// Solves the augmented system in place by Gaussian elimination with partial pivoting.
fn solve(a: &mut [Vec<f64>]) -> Vec<f64> {
    let m = a.len();
    for col in 0..m {
        let pivot = (col..m).max_by(|&x, &y| a[x][col].abs().total_cmp(&a[y][col].abs())).unwrap_or(col);
        a.swap(col, pivot);
        let lead = a[col][col];
        if lead.abs() < 1e-300 {
            return vec![f64::INFINITY; m];
        }
        let (upper, lower) = a.split_at_mut(col + 1);
        let pivot_row = &upper[col];
        for row in lower.iter_mut() {
            let factor = row[col] / lead;
            if factor != 0.0 {
                for (cell, &p) in row[col..].iter_mut().zip(&pivot_row[col..]) {
                    *cell -= factor * p;
                }
            }
        }
    }
    let mut x = vec![0.0; m];
    for row in (0..m).rev() {
        let tail: f64 = (row + 1..m).map(|c| a[row][c] * x[c]).sum();
        x[row] = (a[row][m] - tail) / a[row][row];
    }
    x
}

/// Lattice spacing of the count chain: `1/d` cases with `d` chosen so that about 40 lattice
/// steps make one standard deviation (a decision interval of a few sds is then a chain of
/// one to two hundred states).
fn lattice_divisions(step: &CountStep) -> usize {
    (40.0 / step.sd).round().max(1.0) as usize
}

/// A count CUSUM's reference value moved to the lattice of its chain, with the decision
/// interval calibrated on it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Calibrated {
    /// The reference value `k`, a multiple of `1/d` (within `1/(2d)` cases, about 1/80 of an
    /// sd, of the one asked for).
    pub reference: f64,
    /// The smallest decision interval on the lattice whose in-control ARL reaches the target.
    pub interval: f64,
    /// The in-control ARL of the chart with these `k` and `h` (at least the target).
    pub in_control_arl: f64,
}

/// In-control average run length of an upper count CUSUM with reference value `k / d` and
/// decision interval `n / d` cases, by an exact chain: with counts on the integers and `k` a
/// multiple of `1/d`, every sum is a multiple of `1/d`, so the states `0, 1/d, ..., n/d`
/// carry the chart exactly (the way Lucas 1985 computed his Poisson CUSUM tables, with
/// rational `k` and `h`).
fn lattice_arl(pmf: &[f64], d: usize, k: i64, n: usize) -> f64 {
    let m = n + 1;
    let mut a = vec![vec![0.0; m + 1]; m];
    for (i, row) in a.iter_mut().enumerate() {
        for (x, &p) in pmf.iter().enumerate() {
            let j = i as i64 + (x * d) as i64 - k;
            if j <= 0 {
                row[0] -= p;
            } else if j <= n as i64 {
                row[j as usize] -= p;
            }
        }
        row[i] += 1.0;
        row[m] = 1.0;
    }
    solve(&mut a)[0]
}

/// Calibrates an upper count CUSUM for counts distributed as `step`: the reference value
/// `k` is moved to the nearest multiple of `1/d` (about 40 lattice steps to one sd, so the
/// chain has one to two hundred states), and the decision interval is the smallest multiple
/// of `1/d` whose in-control ARL reaches `target` days, found by doubling and bisection (the
/// run length grows with `h`). The chart run with these values has exactly that ARL.
pub fn calibrate_count_cusum(step: &CountStep, k: f64, target: f64) -> Calibrated {
    let d = lattice_divisions(step);
    let lattice_k = (k * d as f64).round() as i64;
    let pmf = step.pmf();
    let arl = |n: usize| lattice_arl(pmf, d, lattice_k, n);
    let (mut lo, mut hi) = (0usize, 1usize);
    while arl(hi) < target {
        if hi >= MAX_LATTICE_STATES {
            return calibrate_on_normal_steps(step, k, target);
        }
        (lo, hi) = (hi, (hi * 2).min(MAX_LATTICE_STATES));
    }
    while hi - lo > 1 {
        let mid = (lo + hi) / 2;
        if arl(mid) < target {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let w = 1.0 / d as f64;
    Calibrated { reference: lattice_k as f64 * w, interval: hi as f64 * w, in_control_arl: arl(hi) }
}

/// Most states of the lattice chain (a solve of this size takes tens of milliseconds). A
/// chart that needs more (very large or very over-dispersed counts, whose decision interval
/// spans hundreds of cases) is designed on normal steps of the same mean and sd instead.
const MAX_LATTICE_STATES: usize = 512;

/// The normal approximation: `h` by bisection on the Brook & Evans chain of standardised
/// steps, to a relative 0.5% in the run length.
fn calibrate_on_normal_steps(step: &CountStep, k: f64, target: f64) -> Calibrated {
    let (mean, sd) = step.mean_and_sd();
    let standard = NormalStep { mean: 0.0, sd: 1.0 };
    let k_standard = (k - mean) / sd;
    let arl = |h: f64| upper_cusum_arl(&standard, k_standard, h);
    let (mut lo, mut hi) = (0.0, 1.0);
    while arl(hi) < target && hi < 1e3 {
        (lo, hi) = (hi, hi * 2.0);
    }
    for _ in 0..40 {
        let mid = 0.5 * (lo + hi);
        if arl(mid) < target {
            lo = mid;
        } else {
            hi = mid;
        }
        if hi - lo < 1e-3 {
            break;
        }
    }
    Calibrated { reference: k, interval: hi * sd, in_control_arl: arl(hi) }
}

/// Quantised mean, quantised variance ratio, shift and target (as bits) of a design.
type DesignKey = (i64, i64, u64, u64);

/// Quantisation of the baseline mean (2% steps of its logarithm) and of the variance-to-mean
/// ratio (4% steps) before a count CUSUM is designed, so that nearby baselines share one
/// calibration (the estimate's own error is far larger) and [`design_count_cusum`] can cache.
fn design_key(mu0: f64, variance: f64, shift_sds: f64, target: f64) -> DesignKey {
    let ratio = (variance / mu0).max(1.0);
    (
        (mu0.ln() * 50.0).round() as i64,
        (ratio.ln() * 25.0).round() as i64,
        shift_sds.to_bits(),
        target.to_bits(),
    )
}

/// Designs the count CUSUM for a baseline of mean `mu0` and variance `variance` (Poisson when
/// it is not above the mean): `k` for a rise of `shift_sds` sds (Lucas's Poisson value, or
/// the negative-binomial one), and `h` for an in-control ARL of `target` days. The inputs are
/// quantised first (see [`design_key`]) and designs are cached, so a series of similar
/// baselines costs one calibration.
pub fn design_count_cusum(mu0: f64, variance: f64, shift_sds: f64, target: f64) -> Calibrated {
    use std::collections::HashMap;
    use std::sync::{Mutex, OnceLock};
    static DESIGNS: OnceLock<Mutex<HashMap<DesignKey, Calibrated>>> = OnceLock::new();
    let key = design_key(mu0, variance, shift_sds, target);
    let cache = DESIGNS.get_or_init(|| Mutex::new(HashMap::new()));
    if let Some(found) = cache.lock().ok().and_then(|c| c.get(&key).copied()) {
        return found;
    }
    let mu0 = (key.0 as f64 / 50.0).exp();
    let variance = mu0 * (key.1 as f64 / 25.0).exp();
    let sd0 = variance.sqrt();
    let mu1 = mu0 + shift_sds * sd0;
    let k = if key.1 > 0 {
        crate::analysis::aberration::negative_binomial_reference_value(mu0, mu1, mu0 * mu0 / (variance - mu0))
    } else {
        crate::analysis::aberration::poisson_reference_value(mu0, mu1)
    };
    let design = calibrate_count_cusum(&CountStep::new(mu0, variance), k, target);
    if let Ok(mut c) = cache.lock() {
        if c.len() > 100_000 {
            c.clear();
        }
        c.insert(key, design);
    }
    design
}
