//! Quantiles of a sample given as a histogram of (value, count) pairs, so that a store can
//! aggregate with `GROUP BY value` and never hand over one row per record. Pure.

/// The `p` quantile (0..=1) of the sample the histogram describes, by linear interpolation
/// between order statistics (Hyndman & Fan 1996, type 7, the default of R's `quantile`).
/// `None` for an empty sample. The histogram need not be sorted.
pub fn quantile_of_counts(histogram: &[(f64, u64)], p: f64) -> Option<f64> {
    let mut bins: Vec<(f64, u64)> = histogram.iter().copied().filter(|(_, n)| *n > 0).collect();
    bins.sort_by(|a, b| a.0.total_cmp(&b.0));
    let total: u64 = bins.iter().map(|(_, n)| n).sum();
    if total == 0 {
        return None;
    }
    let h = (total - 1) as f64 * p.clamp(0.0, 1.0);
    let lo = h.floor() as u64;
    let frac = h - lo as f64;
    let at = |rank: u64| -> f64 {
        let mut seen = 0;
        for (value, n) in &bins {
            seen += n;
            if rank < seen {
                return *value;
            }
        }
        bins[bins.len() - 1].0
    };
    let low = at(lo);
    Some(if frac > 0.0 { low + frac * (at(lo + 1) - low) } else { low })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Expands a histogram and applies type 7 directly, as a second computation.
    fn direct(values: &[f64], p: f64) -> f64 {
        let mut v = values.to_vec();
        v.sort_by(f64::total_cmp);
        let h = (v.len() - 1) as f64 * p;
        let lo = h.floor() as usize;
        let hi = (lo + 1).min(v.len() - 1);
        v[lo] + (h - lo as f64) * (v[hi] - v[lo])
    }

    #[test]
    fn matches_r_type_7() {
        // R: quantile(c(1, 2, 3, 4, 10), c(0.5, 0.9)) gives 3 and 7.6 (type 7 default;
        // values worked by hand from the definition, h = (n-1)p).
        let hist = [(10.0, 1), (1.0, 1), (2.0, 1), (3.0, 1), (4.0, 1)];
        assert_eq!(quantile_of_counts(&hist, 0.5), Some(3.0));
        assert!((quantile_of_counts(&hist, 0.9).unwrap() - 7.6).abs() < 1e-12);
        assert_eq!(quantile_of_counts(&[], 0.5), None);
        assert_eq!(quantile_of_counts(&[(4.0, 0)], 0.5), None);
    }

    #[test]
    fn histogram_equals_expanded_sample() {
        let hist = [(0.0, 3), (2.0, 5), (3.0, 1), (7.0, 2), (14.0, 1)];
        let expanded: Vec<f64> =
            hist.iter().flat_map(|(v, n)| std::iter::repeat_n(*v, *n as usize)).collect();
        for p in [0.0, 0.1, 0.25, 0.5, 0.75, 0.9, 1.0] {
            assert!((quantile_of_counts(&hist, p).unwrap() - direct(&expanded, p)).abs() < 1e-12, "p={p}");
        }
    }
}
