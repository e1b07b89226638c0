//! The L-BFGS method: the inverse-Hessian approximation of the minimiser's (s, y) pairs
//! ([`LbfgsPrecond`]), on top of the prior where the problem gives it; no extra evaluations.

use super::{Inputs, Laplace, LaplaceMethod};
use crate::error::Result;
use crate::precond::{LbfgsPrecond, PriorSqrt};
use crate::problem::Problem;

/// Builds the L-BFGS Laplace approximation from `inp.pairs`, oldest first.
pub(super) fn build<'a, P: Problem + ?Sized>(inp: &Inputs<'_, 'a, P>) -> Result<Laplace<'a>> {
    let eps = inp.opts.curvature_eps;
    let p = match inp.prior {
        Some(prior) => LbfgsPrecond::with_prior(inp.pairs, PriorSqrt::Borrowed(prior), eps)?,
        None => LbfgsPrecond::new(inp.pairs, eps)?,
    };
    let skipped = p.pairs_skipped();
    let mut l = Laplace::from_precond(LaplaceMethod::Lbfgs, Box::new(p));
    l.info.pairs_skipped = skipped;
    Ok(l)
}
