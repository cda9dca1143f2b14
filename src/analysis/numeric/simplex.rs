//! Small derivative-free optimisers for the two-parameter delay fits: Nelder–Mead on a box
//! (trial points are projected onto the box, so a maximum on the boundary is found and can be
//! reported), and a one-dimensional grid-then-golden-section search for likelihood profiles.

/// Where a minimisation ended.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Minimum {
    pub x: [f64; 2],
    pub value: f64,
}

/// A closed box `lower <= x <= upper`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Bounds {
    pub lower: [f64; 2],
    pub upper: [f64; 2],
}

impl Bounds {
    pub fn project(&self, x: [f64; 2]) -> [f64; 2] {
        [0, 1].map(|i| x[i].clamp(self.lower[i], self.upper[i]))
    }

    /// Coordinates within `tolerance` of a face of the box.
    pub fn touching(&self, x: [f64; 2], tolerance: f64) -> [bool; 2] {
        [0, 1].map(|i| x[i] - self.lower[i] < tolerance || self.upper[i] - x[i] < tolerance)
    }
}

/// Stopping rule for [`nelder_mead`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Settings {
    /// Initial simplex edge, in the units of `x`.
    pub step: f64,
    pub max_evaluations: usize,
    /// Stop when the spread of values across the simplex is below this times
    /// `1 + |best value|` ...
    pub value_tolerance: f64,
    /// ... and the simplex is smaller than this.
    pub size_tolerance: f64,
}

/// Minimises `f` over `bounds` from `start`; NaN counts as +infinity.
pub(crate) fn nelder_mead(
    mut f: impl FnMut([f64; 2]) -> f64,
    start: [f64; 2],
    bounds: &Bounds,
    settings: &Settings,
) -> Minimum {
    let mut eval = |x: [f64; 2]| {
        let x = bounds.project(x);
        let v = f(x);
        (x, if v.is_nan() { f64::INFINITY } else { v })
    };
    let start = bounds.project(start);
    let mut simplex = [
        eval(start),
        eval(offset(start, bounds, 0, settings.step)),
        eval(offset(start, bounds, 1, settings.step)),
    ];
    let mut evaluations = 3;
    while evaluations < settings.max_evaluations {
        simplex.sort_by(|a, b| a.1.total_cmp(&b.1));
        if converged(&simplex, settings) {
            break;
        }
        let (best, worst) = (simplex[0], simplex[2]);
        let centroid = mix(simplex[0].0, simplex[1].0, 0.5);
        let reflected = eval(along(centroid, worst.0, -1.0));
        evaluations += 1;
        if reflected.1 < best.1 {
            let expanded = eval(along(centroid, worst.0, -2.0));
            evaluations += 1;
            simplex[2] = if expanded.1 < reflected.1 { expanded } else { reflected };
        } else if reflected.1 < simplex[1].1 {
            simplex[2] = reflected;
        } else {
            let toward = if reflected.1 < worst.1 { reflected.0 } else { worst.0 };
            let contracted = eval(mix(centroid, toward, 0.5));
            evaluations += 1;
            if contracted.1 < worst.1.min(reflected.1) {
                simplex[2] = contracted;
            } else {
                for vertex in simplex.iter_mut().skip(1) {
                    *vertex = eval(mix(best.0, vertex.0, 0.5));
                }
                evaluations += 2;
            }
        }
    }
    simplex.sort_by(|a, b| a.1.total_cmp(&b.1));
    Minimum { x: simplex[0].0, value: simplex[0].1 }
}

/// A second vertex `step` away along axis `i`, turned back if it would leave the box.
fn offset(start: [f64; 2], bounds: &Bounds, i: usize, step: f64) -> [f64; 2] {
    let mut x = start;
    x[i] = if start[i] + step <= bounds.upper[i] { start[i] + step } else { start[i] - step };
    x
}

fn converged(simplex: &[([f64; 2], f64); 3], settings: &Settings) -> bool {
    let spread = simplex[2].1 - simplex[0].1;
    let size = simplex[1..]
        .iter()
        .flat_map(|v| [0, 1].map(|i| (v.0[i] - simplex[0].0[i]).abs()))
        .fold(0.0, f64::max);
    let scale = 1.0 + simplex[0].1.abs();
    (spread <= settings.value_tolerance * scale && size <= settings.size_tolerance)
        || (spread == 0.0 && simplex[0].1.is_infinite())
}

/// `a + t (b - a)`.
fn mix(a: [f64; 2], b: [f64; 2], t: f64) -> [f64; 2] {
    [0, 1].map(|i| a[i] + t * (b[i] - a[i]))
}

/// `c + t (p - c)`: t = -1 reflects `p` through `c`.
fn along(c: [f64; 2], p: [f64; 2], t: f64) -> [f64; 2] {
    mix(c, p, t)
}

/// Minimum of `f` on `[lo, hi]`: the best of `grid` equally spaced points, refined by golden
/// section within its neighbours.
pub(crate) fn minimize_1d(mut f: impl FnMut(f64) -> f64, lo: f64, hi: f64, grid: usize) -> f64 {
    let mut f = |x: f64| {
        let v = f(x);
        if v.is_nan() { f64::INFINITY } else { v }
    };
    let h = (hi - lo) / (grid - 1) as f64;
    let values: Vec<f64> = (0..grid).map(|i| f(lo + h * i as f64)).collect();
    let best = (0..grid).min_by(|&a, &b| values[a].total_cmp(&values[b])).unwrap_or(0);
    let (mut a, mut b) = (lo + h * best.saturating_sub(1) as f64, lo + h * (best + 1).min(grid - 1) as f64);
    let ratio = (5f64.sqrt() - 1.0) / 2.0;
    let mut c = b - ratio * (b - a);
    let mut d = a + ratio * (b - a);
    let (mut fc, mut fd) = (f(c), f(d));
    for _ in 0..60 {
        if fc < fd {
            b = d;
            d = c;
            fd = fc;
            c = b - ratio * (b - a);
            fc = f(c);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + ratio * (b - a);
            fd = f(d);
        }
        if b - a < 1e-9 {
            break;
        }
    }
    fc.min(fd).min(values[best])
}

#[cfg(test)]
mod tests {
    use super::*;

    const SETTINGS: Settings =
        Settings { step: 0.5, max_evaluations: 2000, value_tolerance: 1e-12, size_tolerance: 1e-8 };

    #[test]
    fn finds_interior_and_boundary_minima() {
        let wide = Bounds { lower: [-10.0, -10.0], upper: [10.0, 10.0] };
        let rosenbrock = |x: [f64; 2]| (1.0 - x[0]).powi(2) + 100.0 * (x[1] - x[0] * x[0]).powi(2);
        let m = nelder_mead(rosenbrock, [-1.2, 1.0], &wide, &SETTINGS);
        assert!((m.x[0] - 1.0).abs() < 1e-4 && (m.x[1] - 1.0).abs() < 1e-4, "{m:?}");

        let boxed = Bounds { lower: [-1.0, -1.0], upper: [1.0, 0.5] };
        let bowl = |x: [f64; 2]| (x[0] - 0.2).powi(2) + (x[1] - 3.0).powi(2);
        let m = nelder_mead(bowl, [0.0, 0.0], &boxed, &SETTINGS);
        assert!((m.x[0] - 0.2).abs() < 1e-5 && m.x[1] == 0.5, "{m:?}");
        assert_eq!(boxed.touching(m.x, 1e-3), [false, true]);
    }

    #[test]
    fn one_dimensional_search() {
        let v = minimize_1d(|x| (x - 0.3).powi(2) + 2.0, -2.0, 2.0, 20);
        assert!((v - 2.0).abs() < 1e-12);
    }
}
