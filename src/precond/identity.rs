//! The identity metric: no preconditioning (C = I).

use super::Preconditioner;

/// C = H = I.
#[derive(Debug, Clone)]
pub struct IdentityPrecond {
    n: usize,
}

impl IdentityPrecond {
    /// The identity in dimension `n`.
    pub fn new(n: usize) -> Self {
        IdentityPrecond { n }
    }
}

impl Preconditioner for IdentityPrecond {
    fn dim(&self) -> usize {
        self.n
    }
    fn kind(&self) -> &'static str {
        "identity"
    }
    fn mul_sqrt_cov(&self, u: &[f64], out: &mut [f64]) {
        out.copy_from_slice(u)
    }
    fn mul_sqrt_cov_t(&self, v: &[f64], out: &mut [f64]) {
        out.copy_from_slice(v)
    }
    fn solve_sqrt_cov(&self, x: &[f64], out: &mut [f64]) -> bool {
        out.copy_from_slice(x);
        true
    }
    fn solve_sqrt_cov_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        out.copy_from_slice(x);
        true
    }
    fn log_det_cov(&self) -> f64 {
        0.0
    }
    fn variance(&self) -> Vec<f64> {
        vec![1.0; self.n]
    }
}
