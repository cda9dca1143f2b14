//! Mann–Whitney U test (Wilcoxon rank-sum) comparing the delays, or any other values, of two
//! groups, two-sided. Small samples without ties use the exact null distribution of U; larger
//! samples or samples with ties use the normal approximation with the tie-corrected variance
//! and a continuity correction. NaN values are dropped before ranking.

use statrs::function::erf::erfc;

/// Largest sample size (in each group) for which the exact distribution is used.
pub const EXACT_MAX: usize = 20;

/// How the p-value was computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Method {
    /// Exact null distribution of U (no ties, both samples at most [`EXACT_MAX`]).
    Exact,
    /// Normal approximation with the tie-corrected variance.
    Normal,
}

impl Method {
    pub fn name(self) -> &'static str {
        match self {
            Method::Exact => "exact",
            Method::Normal => "normal",
        }
    }
}

/// Result of a two-sided Mann–Whitney U test.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MannWhitney {
    /// U of the first sample: the number of pairs (x_i, y_j) with x_i > y_j, ties counting half.
    pub u1: f64,
    /// `n1 n2 - u1`.
    pub u2: f64,
    /// Two-sided p-value; NaN when a sample is empty.
    pub p_value: f64,
    pub method: Method,
}

/// The test with the method chosen automatically: exact when both samples have at most
/// [`EXACT_MAX`] values and there are no ties, otherwise the normal approximation with tie and
/// continuity corrections.
pub fn mann_whitney(x: &[f64], y: &[f64]) -> MannWhitney {
    exact(x, y).unwrap_or_else(|| normal(x, y, true))
}

/// The exact test, or `None` when there are ties, a sample is empty or larger than
/// [`EXACT_MAX`].
pub fn exact(x: &[f64], y: &[f64]) -> Option<MannWhitney> {
    let ranked = Ranked::new(x, y);
    let (n1, n2) = (ranked.n1, ranked.n2);
    let small = (1..=EXACT_MAX).contains(&n1) && (1..=EXACT_MAX).contains(&n2);
    if !small || ranked.has_ties() {
        return None;
    }
    let (u1, u2) = ranked.u();
    let counts = u_counts(n1, n2);
    let total: f64 = counts.iter().sum();
    // By symmetry P(U >= max) = P(U <= min); min(U1, U2) is a whole number without ties.
    let lower: f64 = counts[..=(u1.min(u2) as usize)].iter().sum();
    Some(MannWhitney { u1, u2, p_value: (2.0 * lower / total).min(1.0), method: Method::Exact })
}

/// The normal approximation, `z = (max(U1, U2) - n1 n2 / 2 - c) / sqrt(var)` with `c = 0.5`
/// when `continuity` is set and `var` from [`u_variance`]. A zero variance (every value tied)
/// gives p = 1.
pub fn normal(x: &[f64], y: &[f64], continuity: bool) -> MannWhitney {
    let ranked = Ranked::new(x, y);
    let (u1, u2) = ranked.u();
    let p_value = if ranked.n1 == 0 || ranked.n2 == 0 {
        f64::NAN
    } else {
        let variance = ranked.variance();
        let mean = (ranked.n1 * ranked.n2) as f64 / 2.0;
        let correction = if continuity { 0.5 } else { 0.0 };
        if variance > 0.0 {
            let z = (u1.max(u2) - mean - correction) / variance.sqrt();
            erfc(z / std::f64::consts::SQRT_2).min(1.0)
        } else {
            1.0
        }
    };
    MannWhitney { u1, u2, p_value, method: Method::Normal }
}

/// Variance of U under the null hypothesis, corrected for ties:
/// `n1 n2 / 12 * ((n + 1) - sum(t^3 - t) / (n (n - 1)))` over groups of `t` tied values.
pub fn u_variance(x: &[f64], y: &[f64]) -> f64 {
    Ranked::new(x, y).variance()
}

/// Both samples ranked together (average ranks for ties).
#[derive(Debug)]
struct Ranked {
    n1: usize,
    n2: usize,
    /// Sum of the ranks of the first sample.
    rank_sum_x: f64,
    /// Sizes of the groups of tied values (groups of one included).
    tie_groups: Vec<usize>,
}

impl Ranked {
    fn new(x: &[f64], y: &[f64]) -> Ranked {
        let mut values: Vec<(f64, bool)> = x
            .iter()
            .map(|&v| (v, true))
            .chain(y.iter().map(|&v| (v, false)))
            .filter(|(v, _)| !v.is_nan())
            .collect();
        values.sort_by(|a, b| a.0.total_cmp(&b.0));
        let n1 = values.iter().filter(|v| v.1).count();
        let mut ranked = Ranked { n1, n2: values.len() - n1, rank_sum_x: 0.0, tie_groups: Vec::new() };
        let mut start = 0;
        while start < values.len() {
            let end = start + values[start..].iter().take_while(|v| v.0 == values[start].0).count();
            // Ranks start+1 ..= end share their average.
            let average = (start + 1 + end) as f64 / 2.0;
            let from_x = values[start..end].iter().filter(|v| v.1).count();
            ranked.rank_sum_x += average * from_x as f64;
            ranked.tie_groups.push(end - start);
            start = end;
        }
        ranked
    }

    fn has_ties(&self) -> bool {
        self.tie_groups.iter().any(|&t| t > 1)
    }

    fn u(&self) -> (f64, f64) {
        let n1 = self.n1 as f64;
        let u1 = self.rank_sum_x - n1 * (n1 + 1.0) / 2.0;
        (u1, n1 * self.n2 as f64 - u1)
    }

    fn variance(&self) -> f64 {
        let (n1, n2) = (self.n1 as f64, self.n2 as f64);
        let n = n1 + n2;
        if n < 2.0 {
            return 0.0;
        }
        let ties: f64 = self.tie_groups.iter().map(|&t| (t as f64).powi(3) - t as f64).sum();
        n1 * n2 / 12.0 * ((n + 1.0) - ties / (n * (n - 1.0)))
    }
}

/// Number of arrangements of `m` and `n` values giving each U = 0 ..= m n, by the recurrence
/// `c(u; m, n) = c(u - n; m - 1, n) + c(u; m, n - 1)` (the largest value is from the first
/// sample, adding n to U, or from the second). Exact in f64 for the sizes used here.
fn u_counts(m: usize, n: usize) -> Vec<f64> {
    // table[j] holds the counts for (i, j) while i runs from 0 to m.
    let mut table: Vec<Vec<f64>> = (0..=n).map(|_| vec![1.0]).collect();
    for i in 1..=m {
        let mut row: Vec<Vec<f64>> = Vec::with_capacity(n + 1);
        row.push(vec![1.0]);
        for j in 1..=n {
            let mut counts = vec![0.0; i * j + 1];
            for (u, &c) in table[j].iter().enumerate() {
                counts[u + j] += c;
            }
            for (u, &c) in row[j - 1].iter().enumerate() {
                counts[u] += c;
            }
            row.push(counts);
        }
        table = row;
    }
    table.swap_remove(n)
}

#[cfg(test)]
mod tests {
    use super::*;

    const SHIER_X: [f64; 5] = [19.0, 22.0, 16.0, 29.0, 24.0];
    const SHIER_Y: [f64; 4] = [20.0, 11.0, 17.0, 12.0];
    const TIES_X: [f64; 7] = [1.0, 2.0, 3.0, 3.0, 4.0, 5.0, 5.0];
    const TIES_Y: [f64; 8] = [3.0, 4.0, 5.0, 6.0, 6.0, 7.0, 8.0, 8.0];

    fn close(got: f64, want: f64, tolerance: f64) -> bool {
        (got - want).abs() < tolerance
    }

    /// scipy documentation example after Shier 2004 (published in the scipy docs; scipy 1.17.1),
    /// via docs/validation.md "Mann-Whitney U".
    #[test]
    fn shier_example_matches_scipy() {
        let auto = mann_whitney(&SHIER_X, &SHIER_Y);
        assert_eq!((auto.u1, auto.u2, auto.method), (17.0, 3.0, Method::Exact));
        let cases = [
            (auto.p_value, 0.1111111111),
            (normal(&SHIER_X, &SHIER_Y, true).p_value, 0.1113468865),
            (normal(&SHIER_X, &SHIER_Y, false).p_value, 0.0864107330),
        ];
        for (got, want) in cases {
            assert!(close(got, want, 1e-9), "{got} vs {want}");
        }
    }

    /// scipy 1.17.1 values (docs/validation.md "Mann-Whitney U", ties).
    #[test]
    fn ties_use_the_corrected_normal_approximation() {
        let auto = mann_whitney(&TIES_X, &TIES_Y);
        assert_eq!((auto.u1, auto.u2, auto.method), (7.5, 48.5, Method::Normal));
        assert!(exact(&TIES_X, &TIES_Y).is_none());
        assert!(close(u_variance(&TIES_X, &TIES_Y), 73.2, 1e-12));
        let cases =
            [(auto.p_value, 0.019406818355), (normal(&TIES_X, &TIES_Y, false).p_value, 0.016572219751)];
        for (got, want) in cases {
            assert!(close(got, want, 1e-11), "{got} vs {want}");
        }
    }

    #[test]
    fn swapping_samples_swaps_u_and_keeps_p() {
        for (x, y) in [(&SHIER_X[..], &SHIER_Y[..]), (&TIES_X[..], &TIES_Y[..])] {
            let (a, b) = (mann_whitney(x, y), mann_whitney(y, x));
            assert_eq!((a.u1, a.u2), (b.u2, b.u1));
            assert!(close(a.p_value, b.p_value, 1e-15));
        }
    }

    /// The counts of every U add up to the number of arrangements, C(m + n, m), and are
    /// symmetric; a hand count for m = 2, n = 2 is 1 1 2 1 1.
    #[test]
    fn exact_distribution_is_a_distribution() {
        assert_eq!(u_counts(2, 2), vec![1.0, 1.0, 2.0, 1.0, 1.0]);
        let counts = u_counts(20, 20);
        let total: f64 = counts.iter().sum();
        assert_eq!(total, 137_846_528_820.0); // C(40, 20)
        assert!((0..=400).all(|u| counts[u] == counts[400 - u]));
    }

    /// Without ties at the size limit the exact and normal p-values nearly agree.
    #[test]
    fn exact_and_normal_agree_for_larger_samples() {
        let x: Vec<f64> = (0..20).map(|i| (i * 7 % 40) as f64 + 0.5).collect();
        let y: Vec<f64> = (0..20).map(|i| (i * 11 % 40) as f64 + 3.25).collect();
        let e = exact(&x, &y).unwrap();
        let z = normal(&x, &y, true);
        assert!(close(e.p_value, z.p_value, 0.01), "{e:?} {z:?}");
        let big: Vec<f64> = (0..21).map(f64::from).collect();
        assert_eq!(mann_whitney(&big, &y).method, Method::Normal);
    }

    #[test]
    fn degenerate_samples() {
        let empty = mann_whitney(&[], &SHIER_Y);
        assert!(empty.p_value.is_nan());
        let tied = mann_whitney(&[2.0, 2.0, 2.0], &[2.0, 2.0]);
        assert_eq!((tied.u1, tied.p_value), (3.0, 1.0));
        let with_nan = mann_whitney(&[19.0, 22.0, f64::NAN, 16.0, 29.0, 24.0], &SHIER_Y);
        assert_eq!(with_nan, mann_whitney(&SHIER_X, &SHIER_Y));
    }
}
