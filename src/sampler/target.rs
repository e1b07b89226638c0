//! The sampling target in whitened coordinates: the one place where the cost becomes a log-density.
//!
//! With the analysis x* and a square root L of the preconditioner's covariance (L Lᵀ = H⁻¹), a point u
//! in whitened coordinates stands for x = x* + L u, and
//!
//! ```text
//! log π(u)   = −J(x* + L u)          (+ a constant: the Jacobian of x ↦ u is constant)
//! ∇_u log π  = −Lᵀ ∇J(x* + L u)
//! ```
//!
//! Near a Gaussian posterior whose Hessian the preconditioner matches, π(u) is close to N(0, I).
//!
//! An evaluation that fails recoverably ([`EvalError::is_recoverable`]: a non-finite cost, a model
//! blow-up) is returned as `None`, which the kernels turn into a rejected proposal; every other failure
//! is an [`Error`] that stops the run.

use std::sync::Arc;

use crate::error::{Error, EvalError, Result};
pub use crate::hash::Fnv64;
use crate::precond::Preconditioner;
use crate::problem::{Counted, EvalCounts, Problem};

/// A problem whose evaluations are counted: what a [`Target`] evaluates, so that the sampler can split
/// the counts by stage. Implemented by [`Counted`].
pub trait CountedProblem: Problem {
    /// The evaluation counts so far.
    fn counts(&self) -> EvalCounts;
}

impl<P: Problem + ?Sized> CountedProblem for Counted<P> {
    fn counts(&self) -> EvalCounts {
        Counted::counts(self)
    }
}

/// π(u) ∝ exp(−J(x* + L u)).
pub struct Target<'a> {
    problem: &'a dyn CountedProblem,
    name: String,
    x_star: Vec<f64>,
    precond: Arc<dyn Preconditioner + 'a>,
}

impl<'a> Target<'a> {
    /// A target from a counted problem, its analysis `x_star` and a preconditioner built there. `name`
    /// identifies the problem in checkpoints (a checkpoint of another problem is refused).
    pub fn new(
        problem: &'a dyn CountedProblem,
        name: impl Into<String>,
        x_star: Vec<f64>,
        precond: Arc<dyn Preconditioner + 'a>,
    ) -> Result<Self> {
        let n = problem.dim();
        if n == 0 {
            return Err(Error::Config(
                "the problem has dimension 0: there is nothing to sample".into(),
            ));
        }
        if x_star.len() != n {
            return Err(Error::Config(format!(
                "the analysis has {} components but the problem has dimension {n}",
                x_star.len()
            )));
        }
        if precond.dim() != n {
            return Err(Error::Config(format!(
                "the {} preconditioner has dimension {} but the problem has dimension {n}",
                precond.kind(),
                precond.dim()
            )));
        }
        if let Some(i) = x_star.iter().position(|v| !v.is_finite()) {
            return Err(Error::Config(format!(
                "component {i} of the analysis is not finite"
            )));
        }
        Ok(Target {
            problem,
            name: name.into(),
            x_star,
            precond,
        })
    }

    /// Dimension.
    pub fn dim(&self) -> usize {
        self.x_star.len()
    }

    /// The problem's name, as given.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// The analysis x*.
    pub fn analysis(&self) -> &[f64] {
        &self.x_star
    }

    /// The preconditioner.
    pub fn precond(&self) -> &dyn Preconditioner {
        self.precond.as_ref()
    }

    /// The evaluation counts of the underlying problem so far.
    pub fn counts(&self) -> EvalCounts {
        self.problem.counts()
    }

    /// x = x* + L u.
    pub fn to_model(&self, u: &[f64], x: &mut [f64]) {
        self.precond.mul_sqrt_cov(u, x);
        for (xi, si) in x.iter_mut().zip(&self.x_star) {
            *xi += si;
        }
    }

    /// log π(u) without its gradient (one forward run); `None` where the evaluation failed recoverably.
    pub fn log_density(&self, u: &[f64]) -> Result<Option<f64>> {
        let mut x = vec![0.0; self.dim()];
        self.to_model(u, &mut x);
        classify(self.problem.cost(&x).map(|j| -j))
    }

    /// log π at several whitened points at once (forward runs only, through [`Problem::cost_batch`], so
    /// that the problem can evaluate them side by side); `None` where an evaluation failed recoverably.
    pub fn log_density_batch(&self, us: &[Vec<f64>]) -> Result<Vec<Option<f64>>> {
        let xs: Vec<Vec<f64>> = us
            .iter()
            .map(|u| {
                let mut x = vec![0.0; self.dim()];
                self.to_model(u, &mut x);
                x
            })
            .collect();
        let refs: Vec<&[f64]> = xs.iter().map(|x| x.as_slice()).collect();
        self.problem
            .cost_batch(&refs)
            .into_iter()
            .map(|r| classify(r.map(|j| -j)))
            .collect()
    }

    /// log π(u), writing ∇_u log π(u) into `grad` (one forward and adjoint run); `None` where the
    /// evaluation failed recoverably.
    pub fn log_density_grad(&self, u: &[f64], grad: &mut [f64]) -> Result<Option<f64>> {
        let n = self.dim();
        let mut x = vec![0.0; n];
        self.to_model(u, &mut x);
        let mut gx = vec![0.0; n];
        let r = self.problem.cost_grad(&x, &mut gx);
        let out = classify(r.map(|j| -j))?;
        if out.is_some() {
            self.precond.mul_sqrt_cov_t(&gx, grad);
            for g in grad.iter_mut() {
                *g = -*g;
            }
        }
        Ok(out)
    }

    /// A 64-bit fingerprint of the problem name, dimension, analysis and preconditioner (applied to a
    /// fixed vector), so that a checkpoint made for another target is recognised.
    pub fn fingerprint(&self) -> u64 {
        let n = self.dim();
        let mut h = Fnv64::new();
        h.write(self.name.as_bytes());
        h.write(&(n as u64).to_le_bytes());
        h.write(self.precond.kind().as_bytes());
        for v in &self.x_star {
            h.write(&v.to_bits().to_le_bytes());
        }
        let probe: Vec<f64> = (0..n).map(|i| 1.0 + (i % 7) as f64 / 7.0).collect();
        let mut lp = vec![0.0; n];
        self.precond.mul_sqrt_cov(&probe, &mut lp);
        for v in &lp {
            h.write(&v.to_bits().to_le_bytes());
        }
        h.finish()
    }
}

/// Recoverable failures become `None`; the rest stop the run.
fn classify(r: std::result::Result<f64, EvalError>) -> Result<Option<f64>> {
    match r {
        Ok(v) if v.is_finite() => Ok(Some(v)),
        Ok(_) => Ok(None),
        Err(e) if e.is_recoverable() => Ok(None),
        Err(e) => Err(Error::eval(
            "sampling: evaluating the cost at a proposed point",
            e,
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // FNV-1a 64 test vectors: "" -> cbf29ce484222325, "a" -> af63dc4c8601ec8c (from the FNV reference
    // page by Noll, from memory).
    #[test]
    fn fnv1a_vectors() {
        assert_eq!(Fnv64::new().finish(), 0xcbf29ce484222325);
        let mut h = Fnv64::new();
        h.write(b"a");
        assert_eq!(h.finish(), 0xaf63dc4c8601ec8c);
    }
}
