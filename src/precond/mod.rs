//! Preconditioners: Gaussian approximations N(x*, H⁻¹) of the posterior at the analysis x*, used as the
//! metric (mass matrix) of every sampler and as the Laplace analysis-error covariance.
//!
//! Every kind is described by a square root L of the covariance, L Lᵀ = C = H⁻¹. Samplers work in
//! whitened coordinates u with x = x* + L u, where the preconditioned target is close to N(0, I): they
//! need L (to map a proposal to the model's space) and Lᵀ (to map the gradient back). Solving with L is
//! optional: it lets a point given in model space be whitened.
//!
//! Two lists, one file per entry:
//! - the kinds of preconditioner (`kinds!` below): a new kind is one new file here implementing
//!   [`Preconditioner`] (identity.rs is the smallest example) and one line `module => Type;` in that
//!   list. Any [`Preconditioner`] can be given to the sampler's [`crate::sampler::Target`] at once;
//!   offering it as a `--metric` name is the command line's business;
//! - the methods that estimate the Hessian at the analysis ([`hessian`], entry point [`laplace`]): a
//!   new method is one new file in `hessian/` with its `build` and one line in the `methods!` list of
//!   `hessian/mod.rs`.

/// Declares each kind's module and re-exports its public types.
macro_rules! kinds {
    ($($module:ident => $($ty:ident),+;)+) => {
        $(pub mod $module; pub use $module::{$($ty),+};)+
    };
}

kinds! {
    identity => IdentityPrecond;
    diagonal => DiagonalPrecond;
    dense => DensePrecond;
    low_rank => LowRankPrecond, PriorSqrt;
    lbfgs => LbfgsPrecond;
}

pub mod hessian;
#[cfg(test)]
mod test_support;

pub use hessian::{
    laplace, DiagonalSource, Laplace, LaplaceInfo, LaplaceMethod, LaplaceOptions, SpectrumOf,
    DENSE_LIMIT,
};

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
