//! Penalised Newton minimisation with backtracking (Armijo condition) for smooth convex
//! objectives that supply their gradient and a positive-definite Hessian; the Cholesky factor
//! at the minimum is returned for Laplace approximations.

use super::linalg::{Cholesky, Matrix, dot};

pub(crate) trait Objective {
    fn value(&self, x: &[f64]) -> f64;
    /// Gradient and Hessian (positive definite) of `value`.
    fn derivatives(&self, x: &[f64]) -> (Vec<f64>, Matrix);
}

#[derive(Debug)]
pub(crate) struct Minimum {
    pub(crate) x: Vec<f64>,
    pub(crate) value: f64,
    /// Cholesky factor of the Hessian at `x` (its inverse is the Laplace posterior
    /// covariance).
    pub(crate) hessian: Cholesky,
}

/// Newton's method with backtracking; returns the minimum and whether it converged. `None`
/// when the Hessian is not positive definite or the value is not finite.
pub(crate) fn minimise(objective: &impl Objective, mut x: Vec<f64>) -> Option<(Minimum, bool)> {
    const MAX_ITERATIONS: usize = 100;
    let mut value = objective.value(&x);
    if !value.is_finite() {
        return None;
    }
    let mut converged = false;
    // The factor of the Hessian at the current x, once the loop stops without moving.
    let mut factor_at_x = None;
    for _ in 0..MAX_ITERATIONS {
        let (gradient, hessian) = objective.derivatives(&x);
        let factor = hessian.cholesky()?;
        let step = factor.solve(&gradient);
        let decrement = dot(&gradient, &step);
        if !decrement.is_finite() {
            return None;
        }
        if decrement < 1e-6 * (1.0 + value.abs()).min(1e4) {
            converged = true;
            factor_at_x = Some(factor);
            break;
        }
        let Some((next, next_value)) = backtrack(objective, &x, &step, value, decrement) else {
            converged = decrement < 1e-4 * (1.0 + value.abs()).min(1e4);
            factor_at_x = Some(factor);
            break;
        };
        x = next;
        value = next_value;
    }
    let hessian = match factor_at_x {
        Some(factor) => factor,
        None => objective.derivatives(&x).1.cholesky()?,
    };
    Some((Minimum { x, value, hessian }, converged))
}

/// Halves the Newton step until the value decreases enough (Armijo condition).
pub(crate) fn backtrack(
    objective: &impl Objective,
    x: &[f64],
    step: &[f64],
    value: f64,
    decrement: f64,
) -> Option<(Vec<f64>, f64)> {
    let mut size = 1.0;
    for _ in 0..40 {
        let next: Vec<f64> = x.iter().zip(step).map(|(a, s)| a - size * s).collect();
        let next_value = objective.value(&next);
        if next_value.is_finite() && next_value <= value - 1e-4 * size * decrement {
            return Some((next, next_value));
        }
        size *= 0.5;
    }
    None
}
