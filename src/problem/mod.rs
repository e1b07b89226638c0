//! The problem interface that a user's 4D-Var code implements, evaluation counting, and the built-in
//! problems.
//!
//! Everything downstream (gradient test, minimisation, Hessian, samplers) works against [`Problem`]. A
//! problem is a cost function J(x) over the control vector x with its gradient; the posterior it defines
//! is π(x) ∝ exp(−J(x)). The sign flip to a log-density happens in one place only, the sampler's target.

pub mod batch;
pub mod builtin;
pub mod burgers;
pub mod check;
pub mod circulant;
pub mod counted;
pub mod linear_gaussian;
pub mod lorenz96;
pub mod memory;
pub mod prior;
pub mod replay;
pub mod settings;

pub use circulant::CirculantPrior;
pub use counted::{Counted, EvalCounts};
pub use prior::{DensePrior, DiagonalPrior, Prior};

use crate::error::EvalError;

/// The cost split into its background and observation terms, J = Jb + Jo.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct CostSplit {
    /// Jb = 1/2 (x − xb)ᵀ B⁻¹ (x − xb).
    pub background: f64,
    /// Jo = 1/2 Σ_k (y_k − H(M_k(x)))ᵀ R⁻¹ (y_k − H(M_k(x))).
    pub observation: f64,
}

/// A cost function J(x) with its gradient: the one thing a user must provide.
///
/// Implementations must be `Send + Sync` so that chains can evaluate in parallel; a code that cannot be
/// called concurrently guards itself (the subprocess adapter keeps one process per worker).
///
/// Every method returns failures as values: a non-finite cost is reported by the caller-side wrappers as
/// [`EvalError::NonFinite`], a crash of the user's code as [`EvalError::Failed`].
pub trait Problem: Send + Sync {
    /// Length of the control vector x.
    fn dim(&self) -> usize;

    /// Names of the control-vector components (e.g. "x[3]" or "T(lev=2,lat=10)"), if the code has them.
    fn component_names(&self) -> Option<Vec<String>> {
        None
    }

    /// The cost J(x) and its gradient ∇J(x), written into `grad` (length `dim()`), in one call: an
    /// adjoint run yields both.
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError>;

    /// The cost J(x) alone (a forward run). The default runs [`Problem::cost_grad`] and drops the gradient.
    fn cost(&self, x: &[f64]) -> Result<f64, EvalError> {
        let mut g = vec![0.0; self.dim()];
        self.cost_grad(x, &mut g)
    }

    /// The costs at several points (forward runs only), in the order given. Callers that have many
    /// independent points at once (importance draws, particles, multi-start) use this so that the
    /// evaluations can run side by side: the subprocess adapter spreads them over its workers and the
    /// built-in problems over threads. The default evaluates one after the other.
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<Result<f64, EvalError>> {
        xs.iter().map(|x| self.cost(x)).collect()
    }

    /// Whether [`Problem::hess_vec`] is offered (a second-order adjoint, or exact for a linear problem).
    fn has_hess_vec(&self) -> bool {
        false
    }

    /// The Hessian-vector product ∇²J(x) v, written into `out`.
    fn hess_vec(&self, _x: &[f64], _v: &[f64], _out: &mut [f64]) -> Result<(), EvalError> {
        Err(EvalError::Unsupported {
            capability: "Hessian-vector product",
        })
    }

    /// The cost split into Jb and Jo, where the code can report it.
    fn cost_split(&self, _x: &[f64]) -> Result<Option<CostSplit>, EvalError> {
        Ok(None)
    }

    /// The background (prior) distribution N(xb, B), where the tool is given it: needed for the low-rank
    /// Hessian and for prior-based diagnostics. `None` when the code keeps B to itself.
    fn prior(&self) -> Option<&dyn Prior> {
        None
    }
}

impl<P: Problem + ?Sized> Problem for Box<P> {
    fn dim(&self) -> usize {
        (**self).dim()
    }
    fn component_names(&self) -> Option<Vec<String>> {
        (**self).component_names()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        (**self).cost_grad(x, grad)
    }
    fn cost(&self, x: &[f64]) -> Result<f64, EvalError> {
        (**self).cost(x)
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<Result<f64, EvalError>> {
        (**self).cost_batch(xs)
    }
    fn has_hess_vec(&self) -> bool {
        (**self).has_hess_vec()
    }
    fn hess_vec(&self, x: &[f64], v: &[f64], out: &mut [f64]) -> Result<(), EvalError> {
        (**self).hess_vec(x, v, out)
    }
    fn cost_split(&self, x: &[f64]) -> Result<Option<CostSplit>, EvalError> {
        (**self).cost_split(x)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        (**self).prior()
    }
}

/// Checks that a vector has the problem's dimension.
pub fn check_len(what: &str, v: &[f64], expected: usize) -> Result<(), EvalError> {
    if v.len() != expected {
        return Err(EvalError::Dimension {
            what: what.to_string(),
            expected,
            got: v.len(),
        });
    }
    Ok(())
}

/// Checks that a cost and gradient are finite, naming the first bad gradient component.
pub fn check_finite(cost: f64, grad: Option<&[f64]>) -> Result<(), EvalError> {
    if !cost.is_finite() {
        return Err(EvalError::NonFinite {
            what: "cost".into(),
        });
    }
    if let Some(g) = grad {
        if let Some(i) = g.iter().position(|v| !v.is_finite()) {
            return Err(EvalError::NonFinite {
                what: format!("gradient component {i}"),
            });
        }
    }
    Ok(())
}
