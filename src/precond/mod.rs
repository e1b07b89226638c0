//! Preconditioners: Gaussian approximations N(x*, H⁻¹) of the posterior at the analysis x*, used as the
//! metric (mass matrix) of every sampler and as the Laplace analysis-error covariance.
//!
//! Every kind is described by a square root L of the covariance, L Lᵀ = C = H⁻¹. Samplers work in
//! whitened coordinates u with x = x* + L u, where the preconditioned target is close to N(0, I): they
//! need L (to map a proposal to the model's space) and Lᵀ (to map the gradient back). Solving with L is
//! optional: it lets a point given in model space be whitened.

pub mod build;
pub mod dense;
pub mod diagonal;
pub mod identity;
pub mod lbfgs;
pub mod low_rank;
#[cfg(test)]
mod test_support;

pub use build::{laplace, Laplace, LaplaceInfo, LaplaceMethod, LaplaceOptions, SpectrumOf};
pub use dense::DensePrecond;
pub use diagonal::DiagonalPrecond;
pub use identity::IdentityPrecond;
pub use lbfgs::LbfgsPrecond;
pub use low_rank::{LowRankPrecond, PriorSqrt};

/// A Gaussian metric given by a square root L of its covariance C = H⁻¹ = L Lᵀ.
pub trait Preconditioner: Send + Sync {
    /// Dimension.
    fn dim(&self) -> usize;
    /// Short name of the kind ("identity", "diagonal", "dense", "low-rank", "lbfgs").
    fn kind(&self) -> &'static str;
    /// out = L u. With u ~ N(0, I) this draws from N(0, H⁻¹).
    fn mul_sqrt_cov(&self, u: &[f64], out: &mut [f64]);
    /// out = Lᵀ v.
    fn mul_sqrt_cov_t(&self, v: &[f64], out: &mut [f64]);
    /// out = L⁻¹ x; returns false where this kind cannot solve.
    fn solve_sqrt_cov(&self, x: &[f64], out: &mut [f64]) -> bool;
    /// out = L⁻ᵀ x; with x ~ N(0, I) this draws from N(0, H). Returns false where this kind cannot solve.
    fn solve_sqrt_cov_t(&self, x: &[f64], out: &mut [f64]) -> bool;
    /// log det C = −log det H.
    fn log_det_cov(&self) -> f64;
    /// diag(C): the Laplace analysis-error variances.
    fn variance(&self) -> Vec<f64>;

    /// out = C v = L Lᵀ v.
    fn mul_cov(&self, v: &[f64], out: &mut [f64]) {
        let mut t = vec![0.0; v.len()];
        self.mul_sqrt_cov_t(v, &mut t);
        self.mul_sqrt_cov(&t, out);
    }
    /// out = H v = L⁻ᵀ L⁻¹ v; returns false where this kind cannot solve.
    fn mul_hess(&self, v: &[f64], out: &mut [f64]) -> bool {
        let mut t = vec![0.0; v.len()];
        self.solve_sqrt_cov(v, &mut t) && self.solve_sqrt_cov_t(&t, out)
    }
}
