//! The adapter as a [`Problem`]: each evaluation is one request to an idle worker; the reply becomes a
//! value or an [`EvalError`].

use super::AdapterProblem;
use crate::adapter::protocol::{Op, Reply, Request};
use crate::error::EvalError;
use crate::problem::{check_finite, check_len, CostSplit, Prior, Problem};

/// An error the adapter reported itself.
pub(super) fn reported(message: String, recoverable: bool) -> EvalError {
    EvalError::Failed {
        message: format!("the adapter reported: {message}"),
        recoverable,
    }
}

/// A reply of the wrong kind (the decoder makes this impossible; kept as an error, not a panic).
pub(super) fn unexpected(op: Op) -> EvalError {
    super::slots::fatal(format!(
        "the adapter's reply does not answer a {} request",
        op.name()
    ))
}

/// The cost in the reply to a `cost` request.
pub(super) fn cost_of(reply: Reply) -> Result<f64, EvalError> {
    match reply {
        Reply::Cost { cost } => {
            check_finite(cost, None)?;
            Ok(cost)
        }
        Reply::Error {
            message,
            recoverable,
        } => Err(reported(message, recoverable)),
        _ => Err(unexpected(Op::Cost)),
    }
}

impl Problem for AdapterProblem {
    fn dim(&self) -> usize {
        self.pool.hello.dim
    }

    fn component_names(&self) -> Option<Vec<String>> {
        self.pool.hello.names.clone()
    }

    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        let n = self.pool.hello.dim;
        check_len("control vector", x, n)?;
        check_len("gradient buffer", grad, n)?;
        match self.pool.call(&Request::new(Op::CostGrad, x, &[]))? {
            Reply::CostGrad { cost, grad: g } => {
                grad.copy_from_slice(&g);
                check_finite(cost, Some(grad))?;
                Ok(cost)
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::CostGrad)),
        }
    }

    fn cost(&self, x: &[f64]) -> Result<f64, EvalError> {
        check_len("control vector", x, self.pool.hello.dim)?;
        cost_of(self.pool.call(&Request::new(Op::Cost, x, &[]))?)
    }

    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<Result<f64, EvalError>> {
        super::batch::cost_batch(&self.pool, xs)
    }

    fn has_hess_vec(&self) -> bool {
        self.pool.hello.offers.hess_vec
    }

    fn hess_vec(&self, x: &[f64], v: &[f64], out: &mut [f64]) -> Result<(), EvalError> {
        self.need(Op::HessVec, "Hessian-vector product")?;
        let n = self.pool.hello.dim;
        check_len("control vector", x, n)?;
        check_len("direction", v, n)?;
        check_len("product buffer", out, n)?;
        match self.pool.call(&Request::new(Op::HessVec, x, v))? {
            Reply::HessVec { hv } => {
                out.copy_from_slice(&hv);
                check_finite(0.0, Some(out)).map_err(|_| EvalError::NonFinite {
                    what: "Hessian-vector product".into(),
                })
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::HessVec)),
        }
    }

    fn cost_split(&self, x: &[f64]) -> Result<Option<CostSplit>, EvalError> {
        if !self.pool.hello.offers.split {
            return Ok(None);
        }
        check_len("control vector", x, self.pool.hello.dim)?;
        match self.pool.call(&Request::new(Op::Split, x, &[]))? {
            Reply::Split { jb, jo } => {
                check_finite(jb + jo, None)?;
                Ok(Some(CostSplit {
                    background: jb,
                    observation: jo,
                }))
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::Split)),
        }
    }

    fn prior(&self) -> Option<&dyn Prior> {
        self.prior.as_ref().map(|p| p as &dyn Prior)
    }
}
