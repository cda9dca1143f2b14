//! Small dense linear algebra for the penalised fits: a row-major square matrix, its Cholesky
//! factor (solve, inverse, log determinant), and the few vector helpers the fits share (dot
//! product, log-sum-exp, softmax). Sizes are tens to a few hundred, so nothing here is blocked
//! or parallel.

use rand::Rng;
use rand_distr::{Distribution, StandardNormal};

/// A dense square matrix, row-major.
#[derive(Debug, Clone)]
pub(crate) struct Matrix {
    pub(crate) n: usize,
    pub(crate) a: Vec<f64>,
}

impl Matrix {
    pub(crate) fn zeros(n: usize) -> Matrix {
        Matrix { n, a: vec![0.0; n * n] }
    }

    pub(crate) fn at(&self, i: usize, j: usize) -> f64 {
        self.a[i * self.n + j]
    }

    pub(crate) fn add(&mut self, i: usize, j: usize, v: f64) {
        self.a[i * self.n + j] += v;
    }

    /// Adds `weight * v v^T` for a sparse vector v given as (index, value) pairs.
    pub(crate) fn add_outer(&mut self, v: &[(usize, f64)], weight: f64) {
        for &(i, a) in v {
            for &(j, b) in v {
                self.add(i, j, weight * a * b);
            }
        }
    }

    pub(crate) fn scale(&mut self, factor: f64) {
        self.a.iter_mut().for_each(|v| *v *= factor);
    }

    pub(crate) fn times(&self, x: &[f64]) -> Vec<f64> {
        self.a.chunks(self.n.max(1)).map(|row| dot(row, x)).collect()
    }

    pub(crate) fn quadratic(&self, x: &[f64]) -> f64 {
        dot(x, &self.times(x))
    }

    pub(crate) fn submatrix(&self, indices: &[usize]) -> Matrix {
        let mut sub = Matrix::zeros(indices.len());
        for (si, &i) in indices.iter().enumerate() {
            for (sj, &j) in indices.iter().enumerate() {
                sub.a[si * sub.n + sj] = self.at(i, j);
            }
        }
        sub
    }

    /// Cholesky factor; retries with a small diagonal jitter before giving up.
    pub(crate) fn cholesky(&self) -> Option<Cholesky> {
        let scale = (0..self.n).map(|i| self.at(i, i).abs()).fold(0.0, f64::max).max(1e-300);
        [0.0, 1e-10, 1e-7].into_iter().find_map(|jitter| Cholesky::factor(self, jitter * scale))
    }
}

/// Lower-triangular Cholesky factor L of a symmetric positive definite matrix, `A = L L^T`.
#[derive(Debug)]
pub(crate) struct Cholesky {
    pub(crate) n: usize,
    pub(crate) l: Vec<f64>,
}

impl Cholesky {
    pub(crate) fn factor(m: &Matrix, jitter: f64) -> Option<Cholesky> {
        let n = m.n;
        let mut l = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..=i {
                let partial = dot(&l[i * n..i * n + j], &l[j * n..j * n + j]);
                let v = m.at(i, j) - partial;
                if i == j {
                    let diag = v + jitter;
                    if !(diag.is_finite() && diag > 0.0) {
                        return None;
                    }
                    l[i * n + i] = diag.sqrt();
                } else {
                    l[i * n + j] = v / l[j * n + j];
                }
            }
        }
        Some(Cholesky { n, l })
    }

    pub(crate) fn log_det(&self) -> f64 {
        (0..self.n).map(|i| 2.0 * self.l[i * self.n + i].ln()).sum()
    }

    /// Solves `A x = b`.
    pub(crate) fn solve(&self, b: &[f64]) -> Vec<f64> {
        let n = self.n;
        let mut y = b.to_vec();
        for i in 0..n {
            y[i] = (y[i] - dot(&self.l[i * n..i * n + i], &y[..i])) / self.l[i * n + i];
        }
        for i in (0..n).rev() {
            let s: f64 = (i + 1..n).map(|k| self.l[k * n + i] * y[k]).sum();
            y[i] = (y[i] - s) / self.l[i * n + i];
        }
        y
    }

    /// `A^-1`, column by column.
    pub(crate) fn inverse(&self) -> Matrix {
        let n = self.n;
        let mut inv = Matrix::zeros(n);
        let mut unit = vec![0.0; n];
        for j in 0..n {
            unit[j] = 1.0;
            let column = self.solve(&unit);
            unit[j] = 0.0;
            for (i, v) in column.into_iter().enumerate() {
                inv.a[i * n + j] = v;
            }
        }
        inv
    }

    /// `L z` for standard normal z: a draw from N(0, A).
    pub(crate) fn times_normal(&self, rng: &mut impl Rng) -> Vec<f64> {
        let z: Vec<f64> = (0..self.n).map(|_| StandardNormal.sample(rng)).collect();
        (0..self.n).map(|i| dot(&self.l[i * self.n..i * self.n + i + 1], &z[..=i])).collect()
    }
}

/// Dot product over the common length, in four interleaved partial sums (which lets the
/// compiler vectorise the loop: the Cholesky factor spends its time here).
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
    let len = a.len().min(b.len());
    let (a, b) = (&a[..len], &b[..len]);
    let mut lanes = [0.0; 4];
    let (a4, b4) = (a.chunks_exact(4), b.chunks_exact(4));
    let tail: f64 = a4.remainder().iter().zip(b4.remainder()).map(|(x, y)| x * y).sum();
    for (x, y) in a4.zip(b4) {
        for lane in 0..4 {
            lanes[lane] += x[lane] * y[lane];
        }
    }
    (lanes[0] + lanes[2]) + (lanes[1] + lanes[3]) + tail
}

pub(crate) fn log_sum_exp(w: &[f64]) -> f64 {
    let max = w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !max.is_finite() {
        return max;
    }
    max + w.iter().map(|v| (v - max).exp()).sum::<f64>().ln()
}

pub(crate) fn softmax(w: &[f64]) -> Vec<f64> {
    let lse = log_sum_exp(w);
    w.iter().map(|v| (v - lse).exp()).collect()
}
