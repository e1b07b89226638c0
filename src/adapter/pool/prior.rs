//! The background N(xb, B) an adapter offers with the `prior` capability, as a [`Prior`]: xb and diag(B)
//! are fetched once, products with B^{1/2} (and its inverse) are requests to the adapter.

use std::sync::{Arc, Mutex};

use super::problem::{reported, unexpected};
use super::slots::Pool;
use crate::adapter::protocol::{Op, Reply, Request};
use crate::error::{Error, EvalError, Result};
use crate::problem::{check_finite, Prior};

/// The background N(xb, B) as the adapter gives it; products with B^{1/2} are requests to the adapter.
pub struct AdapterPrior {
    pool: Arc<Pool>,
    xb: Vec<f64>,
    var: Vec<f64>,
    log_det: f64,
    solve: bool,
    last_error: Mutex<Option<String>>,
}

impl AdapterPrior {
    /// Asks the adapter for its background and checks it.
    pub(super) fn fetch(pool: &Arc<Pool>) -> Result<AdapterPrior> {
        let reply = pool
            .call(&Request::new(Op::Background, &[], &[]))
            .map_err(|e| Error::eval("fetching the background from the adapter", e))?;
        let Reply::Background { xb, var, log_det } = reply else {
            return Err(Error::Adapter(
                "the adapter answered the background request with another reply".into(),
            ));
        };
        if let Some(i) = var.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(Error::Adapter(format!(
                "the adapter's background variance {i} is {}; variances must be positive and finite",
                var[i]
            )));
        }
        if xb.iter().any(|v| !v.is_finite()) || !log_det.is_finite() {
            return Err(Error::Adapter(
                "the adapter's background xb or log det B is not finite".into(),
            ));
        }
        Ok(AdapterPrior {
            pool: pool.clone(),
            xb,
            var,
            log_det,
            solve: pool.hello.offers.prior_solve,
            last_error: Mutex::new(None),
        })
    }

    /// Applies one of the prior operators through the adapter: out = S v, Sᵀ v, S⁻¹ v or S⁻ᵀ v.
    pub fn apply(&self, op: Op, v: &[f64], out: &mut [f64]) -> std::result::Result<(), EvalError> {
        if !matches!(
            op,
            Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve
        ) || !self.pool.hello.offers.allows(op)
        {
            return Err(EvalError::Unsupported {
                capability: "prior operator",
            });
        }
        let n = self.pool.hello.dim;
        crate::problem::check_len("prior operand", v, n)?;
        crate::problem::check_len("prior product buffer", out, n)?;
        match self.pool.call(&Request::new(op, &[], v))? {
            Reply::Vector { out: r } => {
                out.copy_from_slice(&r);
                check_finite(0.0, Some(out)).map_err(|_| EvalError::NonFinite {
                    what: format!("{} result", op.name()),
                })
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(op)),
        }
    }

    /// The error of the last failed prior product, if any, taken (cleared). [`Prior`]'s products cannot
    /// return errors: a failed one fills its output with NaN and records the error here.
    pub fn take_error(&self) -> Option<String> {
        self.last_error.lock().ok().and_then(|mut e| e.take())
    }

    fn apply_or_nan(&self, op: Op, v: &[f64], out: &mut [f64]) {
        if let Err(e) = self.apply(op, v, out) {
            out.iter_mut().for_each(|o| *o = f64::NAN);
            if let Ok(mut last) = self.last_error.lock() {
                *last = Some(e.to_string());
            }
        }
    }
}

impl Prior for AdapterPrior {
    fn dim(&self) -> usize {
        self.xb.len()
    }
    fn mean(&self) -> &[f64] {
        &self.xb
    }
    fn mul_sqrt(&self, z: &[f64], out: &mut [f64]) {
        self.apply_or_nan(Op::BHalf, z, out)
    }
    fn mul_sqrt_t(&self, v: &[f64], out: &mut [f64]) {
        self.apply_or_nan(Op::BHalfT, v, out)
    }
    fn solve_sqrt(&self, x: &[f64], out: &mut [f64]) -> bool {
        if !self.solve {
            return false;
        }
        self.apply_or_nan(Op::BHalfSolve, x, out);
        true
    }
    fn solve_sqrt_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        if !self.solve {
            return false;
        }
        self.apply_or_nan(Op::BHalfTSolve, x, out);
        true
    }
    fn variance(&self) -> Vec<f64> {
        self.var.clone()
    }
    fn log_det(&self) -> f64 {
        self.log_det
    }
}
