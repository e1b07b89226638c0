//! varpost: posterior uncertainty for strong-constraint 4D-Var.
//!
//! Wraps an existing cost function and adjoint gradient ([`problem::Problem`]), checks the gradient,
//! finds the analysis (MAP) with L-BFGS, builds a Hessian-based preconditioner at the analysis, and runs
//! preconditioned MALA / HMC chains from there, with convergence diagnostics.

pub mod adapt;
pub mod adapter;
pub mod cli;
pub mod diagnostics;
pub mod error;
pub mod hash;
pub mod interrupt;
pub mod optimize;
pub mod output;
pub mod pipeline;
pub mod precond;
pub mod problem;
pub mod resources;
pub mod sampler;
pub(crate) mod util;

pub use error::{Error, EvalError, Result};
pub use problem::{Counted, EvalCounts, Problem};
