//! A dense Hessian factorised by Cholesky (nalgebra), for small n (up to a few thousand).
//!
//! With H = R Rᵀ (R lower triangular), C = H⁻¹ = R⁻ᵀ R⁻¹, so L = R⁻ᵀ: applying L or Lᵀ is a triangular
//! solve, solving with L is a triangular product.

use nalgebra::{DMatrix, DVector};

use super::Preconditioner;
use crate::error::{Error, Result};

/// C = H⁻¹ for a dense symmetric positive definite H.
#[derive(Debug, Clone)]
pub struct DensePrecond {
    r: DMatrix<f64>,
    variance: Vec<f64>,
}

impl DensePrecond {
    /// From the Hessian H (symmetrised first); fails where H is not positive definite.
    pub fn from_hessian(h: &DMatrix<f64>) -> Result<Self> {
        if h.nrows() != h.ncols() {
            return Err(Error::Numerical(format!(
                "Hessian is {}x{}, not square",
                h.nrows(),
                h.ncols()
            )));
        }
        let sym = (h + h.transpose()) * 0.5;
        let chol = nalgebra::Cholesky::new(sym).ok_or_else(|| {
            Error::Numerical(
                "the Hessian at the analysis is not positive definite: the minimisation may not have \
                 converged, or the cost is not locally convex there"
                    .into(),
            )
        })?;
        let r = chol.l();
        // diag(H⁻¹)_i = Σ_j (R⁻¹)_{ji}², computed column by column of R⁻¹.
        let n = r.nrows();
        let mut rinv = DMatrix::<f64>::identity(n, n);
        r.solve_lower_triangular_mut(&mut rinv);
        let variance = (0..n).map(|i| rinv.column(i).norm_squared()).collect();
        Ok(DensePrecond { r, variance })
    }
}

impl Preconditioner for DensePrecond {
    fn dim(&self) -> usize {
        self.r.nrows()
    }
    fn kind(&self) -> &'static str {
        "dense"
    }
    fn mul_sqrt_cov(&self, u: &[f64], out: &mut [f64]) {
        let mut b = DVector::from_column_slice(u);
        self.r.tr_solve_lower_triangular_mut(&mut b);
        out.copy_from_slice(b.as_slice());
    }
    fn mul_sqrt_cov_t(&self, v: &[f64], out: &mut [f64]) {
        let mut b = DVector::from_column_slice(v);
        self.r.solve_lower_triangular_mut(&mut b);
        out.copy_from_slice(b.as_slice());
    }
    fn solve_sqrt_cov(&self, x: &[f64], out: &mut [f64]) -> bool {
        let r = self.r.tr_mul(&DVector::from_column_slice(x));
        out.copy_from_slice(r.as_slice());
        true
    }
    fn solve_sqrt_cov_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        let r = &self.r * DVector::from_column_slice(x);
        out.copy_from_slice(r.as_slice());
        true
    }
    fn log_det_cov(&self) -> f64 {
        -self.r.diagonal().iter().map(|d| 2.0 * d.ln()).sum::<f64>()
    }
    fn variance(&self) -> Vec<f64> {
        self.variance.clone()
    }
}
