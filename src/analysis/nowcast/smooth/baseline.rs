//! The smooth nowcast's delay baseline: knots of the log stretch over the window's reference
//! dates, and the baseline pmf over delays read as a smooth cdf (monotone cubic Hermite within
//! each day) that a stretch factor rescales.

use super::*;

/// Knots of the log stretch over the window's reference dates: every `spacing` rows counted
/// back from the last row, plus the first row; a row's log stretch interpolates linearly
/// between the two knots around it.
#[derive(Debug)]
pub(super) struct Knots {
    pub(super) positions: Vec<usize>,
    /// For each window row: (lower knot, its weight, upper knot, its weight).
    pub(super) weights: Vec<(usize, f64, usize, f64)>,
}

impl Knots {
    pub(super) fn new(rows: usize, spacing: usize) -> Knots {
        let spacing = spacing.max(1);
        let mut positions: Vec<usize> =
            (0..).map(|i| i * spacing).take_while(|&back| back < rows).map(|back| rows - 1 - back).collect();
        if positions.last() != Some(&0) {
            positions.push(0);
        }
        positions.reverse();
        let weights = (0..rows).map(|r| Knots::interpolate(&positions, r)).collect();
        Knots { positions, weights }
    }

    pub(super) fn interpolate(positions: &[usize], r: usize) -> (usize, f64, usize, f64) {
        let upper = positions.partition_point(|&p| p < r).min(positions.len() - 1);
        if upper == 0 || positions[upper] == r {
            return (upper, 1.0, upper, 0.0);
        }
        let (lo, hi) = (positions[upper - 1], positions[upper]);
        let u = (r - lo) as f64 / (hi - lo) as f64;
        (upper - 1, 1.0 - u, upper, u)
    }

    pub(super) fn len(&self) -> usize {
        self.positions.len()
    }
}

/// The baseline delay distribution as a smooth cdf G: at whole days it is the sum of the
/// pmf below the day, within each day a monotone cubic (Hermite, with the harmonic mean of
/// the two neighbouring days' masses as the density at the day boundary, and density 0 at
/// delay 0), beyond day D + 1 the last density decaying by e^-1 per day (a little mass, so
/// that a shrunk distribution keeps a small chance of reports at its longest delays). The
/// density is continuous, so the likelihood is smooth in the stretch.
#[derive(Debug)]
pub(super) struct Baseline {
    pub(super) pmf: Vec<f64>,
    /// `prefix[j]`: the baseline cdf at day j (the sum of the pmf below j), j = 0..=D+1.
    pub(super) prefix: Vec<f64>,
    /// `slope[j]`: the density at day boundary j, j = 0..=D+1.
    pub(super) slope: Vec<f64>,
}

/// Cubic Hermite basis on [0, 1] for the end value, start slope and end slope, and their
/// derivatives.
pub(super) fn hermite(t: f64) -> [f64; 3] {
    [t * t * (3.0 - 2.0 * t), t * (1.0 - t) * (1.0 - t), t * t * (t - 1.0)]
}

pub(super) fn hermite_derivative(t: f64) -> [f64; 3] {
    [6.0 * t * (1.0 - t), (1.0 - t) * (1.0 - 3.0 * t), t * (3.0 * t - 2.0)]
}

impl Baseline {
    pub(super) fn new(log_weights: &[f64]) -> Baseline {
        let pmf = softmax(log_weights);
        let mut prefix = Vec::with_capacity(pmf.len() + 1);
        prefix.push(0.0);
        for p in &pmf {
            prefix.push(prefix.last().copied().unwrap_or(0.0) + p);
        }
        let last = pmf.len() - 1;
        let slope = (0..=pmf.len())
            .map(|j| match j {
                0 => 0.0,
                j if j > last => 0.5 * pmf[last],
                j => 2.0 * pmf[j - 1] * pmf[j] / (pmf[j - 1] + pmf[j]),
            })
            .collect();
        Baseline { pmf, prefix, slope }
    }

    /// D + 1: where the pmf ends.
    pub(super) fn end(&self) -> f64 {
        self.pmf.len() as f64
    }

    /// The whole day containing u (D + 1 for the tail) and the position within it.
    pub(super) fn day(&self, u: f64) -> (usize, f64) {
        let u = u.max(0.0);
        if u >= self.end() {
            (self.pmf.len(), u - self.end())
        } else {
            let j = u.floor() as usize;
            (j, u - j as f64)
        }
    }

    pub(super) fn cdf(&self, u: f64) -> f64 {
        let (j, t) = self.day(u);
        self.prefix[j] + self.within(j, t)
    }

    /// The cdf's increase from the start of day j to position t within it.
    pub(super) fn within(&self, j: usize, t: f64) -> f64 {
        if j == self.pmf.len() {
            return self.slope[j] * -(-t).exp_m1();
        }
        let [h01, h10, h11] = hermite(t);
        self.pmf[j] * h01 + self.slope[j] * h10 + self.slope[j + 1] * h11
    }

    pub(super) fn density(&self, u: f64) -> f64 {
        if u <= 0.0 {
            return 0.0;
        }
        let (j, t) = self.day(u);
        if j == self.pmf.len() {
            return self.slope[j] * (-t).exp();
        }
        let [d01, d10, d11] = hermite_derivative(t);
        self.pmf[j] * d01 + self.slope[j] * d10 + self.slope[j + 1] * d11
    }

    /// `pi_i d slope_j / d pi_i` for the (at most two) days the boundary slope depends on.
    pub(super) fn slope_gradient(&self, j: usize) -> [(usize, f64); 2] {
        let last = self.pmf.len() - 1;
        match j {
            0 => [(0, 0.0), (0, 0.0)],
            j if j > last => [(last, self.slope[j]), (last, 0.0)],
            j => {
                let (a, b) = (self.pmf[j - 1], self.pmf[j]);
                let s2 = (a + b) * (a + b);
                [(j - 1, 2.0 * a * b * b / s2), (j, 2.0 * b * a * a / s2)]
            }
        }
    }

    /// `pi_i d/dpi_i` of `within(j, t)`, as (day, value) pairs.
    pub(super) fn within_gradient(&self, j: usize, t: f64, out: &mut Vec<(usize, f64)>, sign: f64) {
        if j == self.pmf.len() {
            out.push((j - 1, sign * self.within(j, t)));
            return;
        }
        let [h01, h10, h11] = hermite(t);
        out.push((j, sign * self.pmf[j] * h01));
        for (i, v) in self.slope_gradient(j) {
            out.push((i, sign * h10 * v));
        }
        for (i, v) in self.slope_gradient(j + 1) {
            out.push((i, sign * h11 * v));
        }
    }

    /// The baseline mass of `[u0, u1)` and `pi_i dmass/dpi_i` for the days it depends on
    /// (unsorted, possibly repeated). The mass is homogeneous of degree 1 in the pmf.
    pub(super) fn mass_gradient(&self, u0: f64, u1: f64, gradient: &mut Vec<(usize, f64)>) -> f64 {
        let (j0, t0) = self.day(u0);
        let (j1, t1) = self.day(u1);
        gradient.clear();
        gradient.extend((j0..j1).map(|i| (i, self.pmf[i])));
        self.within_gradient(j1, t1, gradient, 1.0);
        self.within_gradient(j0, t0, gradient, -1.0);
        self.prefix[j1] - self.prefix[j0] + self.within(j1, t1) - self.within(j0, t0)
    }
}
