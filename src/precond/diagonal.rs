//! A diagonal covariance C = diag(v): from variances (e.g. the background-error variances), or from an
//! estimate of the Hessian diagonal (C = diag(1 / H_ii), the Jacobi approximation).
//!
//! L = diag(√v), so every operation is an elementwise product or quotient.

use super::Preconditioner;
use crate::error::{Error, Result};

/// C = diag(v) with every v_i positive and finite.
#[derive(Debug, Clone)]
pub struct DiagonalPrecond {
    variance: Vec<f64>,
    std: Vec<f64>,
}

impl DiagonalPrecond {
    /// From the variances v_i (the diagonal of C); fails on a non-positive or non-finite entry.
    pub fn from_variances(variance: Vec<f64>) -> Result<Self> {
        if let Some(i) = variance.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(Error::Numerical(format!(
                "variance {i} is {}; a diagonal covariance needs every variance positive and finite",
                variance[i]
            )));
        }
        let std = variance.iter().map(|v| v.sqrt()).collect();
        Ok(DiagonalPrecond { variance, std })
    }

    /// From the diagonal of the Hessian H_ii (C = diag(1 / H_ii)); fails where an entry is not positive,
    /// which at a converged minimum means the estimate is too noisy or the point is not a minimum.
    pub fn from_hessian_diagonal(h: &[f64]) -> Result<Self> {
        if let Some(i) = h.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(Error::Numerical(format!(
                "Hessian diagonal entry {i} is {}, not positive: the minimisation may not have converged, \
                 or the diagonal estimate needs more probe vectors",
                h[i]
            )));
        }
        DiagonalPrecond::from_variances(h.iter().map(|v| 1.0 / v).collect())
    }
}

impl Preconditioner for DiagonalPrecond {
    fn dim(&self) -> usize {
        self.std.len()
    }
    fn kind(&self) -> &'static str {
        "diagonal"
    }
    fn mul_sqrt_cov(&self, u: &[f64], out: &mut [f64]) {
        for ((o, s), x) in out.iter_mut().zip(&self.std).zip(u) {
            *o = s * x;
        }
    }
    fn mul_sqrt_cov_t(&self, v: &[f64], out: &mut [f64]) {
        self.mul_sqrt_cov(v, out)
    }
    fn solve_sqrt_cov(&self, x: &[f64], out: &mut [f64]) -> bool {
        for ((o, s), xi) in out.iter_mut().zip(&self.std).zip(x) {
            *o = xi / s;
        }
        true
    }
    fn solve_sqrt_cov_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        self.solve_sqrt_cov(x, out)
    }
    fn log_det_cov(&self) -> f64 {
        self.variance.iter().map(|v| v.ln()).sum()
    }
    fn variance(&self) -> Vec<f64> {
        self.variance.clone()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn square_root_and_inverse_are_elementwise() {
        // For C = diag(v): L = diag(√v), log det C = Σ log v_i (textbook linear algebra).
        let p = DiagonalPrecond::from_hessian_diagonal(&[4.0, 0.25, 1.0]).unwrap();
        assert_eq!(p.variance(), vec![0.25, 4.0, 1.0]);
        let mut out = vec![0.0; 3];
        p.mul_sqrt_cov(&[1.0, 1.0, 2.0], &mut out);
        assert_eq!(out, vec![0.5, 2.0, 2.0]);
        let mut back = vec![0.0; 3];
        assert!(p.solve_sqrt_cov(&out, &mut back));
        assert_eq!(back, vec![1.0, 1.0, 2.0]);
        assert!((p.log_det_cov() - 0.0).abs() < 1e-15);
        let mut h = vec![0.0; 3];
        assert!(p.mul_hess(&[1.0, 1.0, 1.0], &mut h));
        assert!((h[0] - 4.0).abs() < 1e-15 && (h[1] - 0.25).abs() < 1e-15);
    }

    #[test]
    fn rejects_non_positive_entries() {
        let e = DiagonalPrecond::from_hessian_diagonal(&[1.0, -2.0])
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("entry 1") && e.contains("not have converged"),
            "{e}"
        );
        assert!(DiagonalPrecond::from_variances(vec![f64::NAN]).is_err());
    }
}
