//! The background (prior) distribution N(xb, B), as far as the tool needs to see it.
//!
//! The low-rank Hessian works with the prior-preconditioned misfit Hessian B^{T/2} (∇²J) B^{1/2} − I,
//! so a prior must apply a square root S of B (B = S Sᵀ) and its transpose. Solving with S is optional
//! (it lets a preconditioner whiten an arbitrary point); the diagonal of B is needed for reporting.

use nalgebra::{DMatrix, DVector};

use crate::error::{Error, Result};

/// A Gaussian background N(xb, B) with a square root B = S Sᵀ.
pub trait Prior: Send + Sync {
    /// Dimension.
    fn dim(&self) -> usize;
    /// The background state xb.
    fn mean(&self) -> &[f64];
    /// out = S z.
    fn mul_sqrt(&self, z: &[f64], out: &mut [f64]);
    /// out = Sᵀ v.
    fn mul_sqrt_t(&self, v: &[f64], out: &mut [f64]);
    /// out = S⁻¹ x, where the prior can solve with its square root.
    fn solve_sqrt(&self, _x: &[f64], _out: &mut [f64]) -> bool {
        false
    }
    /// out = S⁻ᵀ x, where the prior can solve with its square root.
    fn solve_sqrt_t(&self, _x: &[f64], _out: &mut [f64]) -> bool {
        false
    }
    /// diag(B), the background-error variances.
    fn variance(&self) -> Vec<f64>;
    /// log det B.
    fn log_det(&self) -> f64;
}

/// B = diag(σ²).
#[derive(Debug, Clone)]
pub struct DiagonalPrior {
    mean: Vec<f64>,
    std: Vec<f64>,
}

impl DiagonalPrior {
    /// A diagonal prior from the background and the background-error standard deviations.
    pub fn new(mean: Vec<f64>, std: Vec<f64>) -> Result<Self> {
        if mean.len() != std.len() {
            return Err(Error::Config(format!(
                "background has {} components but {} standard deviations were given",
                mean.len(),
                std.len()
            )));
        }
        if let Some(i) = std.iter().position(|s| !(s.is_finite() && *s > 0.0)) {
            return Err(Error::Config(format!(
                "background-error standard deviation {i} is {}, it must be positive and finite",
                std[i]
            )));
        }
        Ok(DiagonalPrior { mean, std })
    }
    /// The standard deviations.
    pub fn std(&self) -> &[f64] {
        &self.std
    }
}

impl Prior for DiagonalPrior {
    fn dim(&self) -> usize {
        self.mean.len()
    }
    fn mean(&self) -> &[f64] {
        &self.mean
    }
    fn mul_sqrt(&self, z: &[f64], out: &mut [f64]) {
        for ((o, s), zi) in out.iter_mut().zip(&self.std).zip(z) {
            *o = s * zi;
        }
    }
    fn mul_sqrt_t(&self, v: &[f64], out: &mut [f64]) {
        self.mul_sqrt(v, out)
    }
    fn solve_sqrt(&self, x: &[f64], out: &mut [f64]) -> bool {
        for ((o, s), xi) in out.iter_mut().zip(&self.std).zip(x) {
            *o = xi / s;
        }
        true
    }
    fn solve_sqrt_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        self.solve_sqrt(x, out)
    }
    fn variance(&self) -> Vec<f64> {
        self.std.iter().map(|s| s * s).collect()
    }
    fn log_det(&self) -> f64 {
        self.std.iter().map(|s| 2.0 * s.ln()).sum()
    }
}

/// A dense B with its lower Cholesky factor S (B = S Sᵀ), for small and moderate n.
#[derive(Debug, Clone)]
pub struct DensePrior {
    mean: Vec<f64>,
    cov: DMatrix<f64>,
    chol: DMatrix<f64>,
}

impl DensePrior {
    /// Factorises B; fails with a clear message when B is not symmetric positive definite.
    pub fn new(mean: Vec<f64>, cov: DMatrix<f64>) -> Result<Self> {
        let n = mean.len();
        if cov.nrows() != n || cov.ncols() != n {
            return Err(Error::Config(format!(
                "B is {}x{} but the background has {n} components",
                cov.nrows(),
                cov.ncols()
            )));
        }
        let chol = nalgebra::Cholesky::new(cov.clone())
            .ok_or_else(|| {
                Error::Numerical(
                    "the background-error covariance B is not positive definite".into(),
                )
            })?
            .l();
        Ok(DensePrior { mean, cov, chol })
    }
    /// B itself.
    pub fn cov(&self) -> &DMatrix<f64> {
        &self.cov
    }
    /// out = B⁻¹ v (two triangular solves).
    pub fn solve(&self, v: &[f64], out: &mut [f64]) {
        let mut t = vec![0.0; v.len()];
        self.solve_sqrt(v, &mut t);
        self.solve_sqrt_t(&t, out);
    }
}

impl Prior for DensePrior {
    fn dim(&self) -> usize {
        self.mean.len()
    }
    fn mean(&self) -> &[f64] {
        &self.mean
    }
    fn mul_sqrt(&self, z: &[f64], out: &mut [f64]) {
        let r = &self.chol * DVector::from_column_slice(z);
        out.copy_from_slice(r.as_slice());
    }
    fn mul_sqrt_t(&self, v: &[f64], out: &mut [f64]) {
        let r = self.chol.tr_mul(&DVector::from_column_slice(v));
        out.copy_from_slice(r.as_slice());
    }
    fn solve_sqrt(&self, x: &[f64], out: &mut [f64]) -> bool {
        let mut b = DVector::from_column_slice(x);
        self.chol.solve_lower_triangular_mut(&mut b);
        out.copy_from_slice(b.as_slice());
        true
    }
    fn solve_sqrt_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        let mut b = DVector::from_column_slice(x);
        self.chol.tr_solve_lower_triangular_mut(&mut b);
        out.copy_from_slice(b.as_slice());
        true
    }
    fn variance(&self) -> Vec<f64> {
        self.cov.diagonal().iter().copied().collect()
    }
    fn log_det(&self) -> f64 {
        self.chol.diagonal().iter().map(|d| 2.0 * d.ln()).sum()
    }
}
