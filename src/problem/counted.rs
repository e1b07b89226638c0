//! Evaluation counting: the one place where cost, gradient and Hessian-vector evaluations are counted,
//! and where every result is checked for length and finiteness before anything else sees it.

use std::sync::atomic::{AtomicU64, Ordering};

use super::{check_finite, check_len, CostSplit, Prior, Problem};
use crate::error::EvalError;

/// Evaluation counts, as reported in every output.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct EvalCounts {
    /// Cost-only evaluations (forward runs).
    pub cost: u64,
    /// Cost-and-gradient evaluations (forward + adjoint runs).
    pub gradient: u64,
    /// Hessian-vector products asked of the problem itself (second-order adjoint or exact).
    pub hessvec: u64,
    /// Evaluations that failed or came back non-finite (included in the counts above).
    pub failed: u64,
}

impl EvalCounts {
    /// Model runs in the sense of the benchmarks: a cost-only and a cost+gradient call each count one.
    pub fn model_runs(&self) -> u64 {
        self.cost + self.gradient + self.hessvec
    }
    /// The sum of two counts (of two stages or two segments of a run).
    pub fn plus(&self, other: &EvalCounts) -> EvalCounts {
        EvalCounts {
            cost: self.cost + other.cost,
            gradient: self.gradient + other.gradient,
            hessvec: self.hessvec + other.hessvec,
            failed: self.failed + other.failed,
        }
    }
    /// The difference `self − earlier`, for splitting counts by stage.
    pub fn since(&self, earlier: &EvalCounts) -> EvalCounts {
        EvalCounts {
            cost: self.cost - earlier.cost,
            gradient: self.gradient - earlier.gradient,
            hessvec: self.hessvec - earlier.hessvec,
            failed: self.failed - earlier.failed,
        }
    }
}

/// Wraps a problem, counts every evaluation, and turns wrong lengths and non-finite values into errors.
pub struct Counted<P: ?Sized> {
    cost: AtomicU64,
    gradient: AtomicU64,
    hessvec: AtomicU64,
    failed: AtomicU64,
    inner: P,
}

impl<P: Problem> Counted<P> {
    /// Starts counting from zero.
    pub fn new(inner: P) -> Self {
        Counted {
            cost: AtomicU64::new(0),
            gradient: AtomicU64::new(0),
            hessvec: AtomicU64::new(0),
            failed: AtomicU64::new(0),
            inner,
        }
    }
}

impl<P: ?Sized> Counted<P> {
    /// The counts so far.
    pub fn counts(&self) -> EvalCounts {
        EvalCounts {
            cost: self.cost.load(Ordering::Relaxed),
            gradient: self.gradient.load(Ordering::Relaxed),
            hessvec: self.hessvec.load(Ordering::Relaxed),
            failed: self.failed.load(Ordering::Relaxed),
        }
    }
    /// Sets the counts (when a run is resumed from a checkpoint).
    pub fn restore_counts(&self, c: &EvalCounts) {
        self.cost.store(c.cost, Ordering::Relaxed);
        self.gradient.store(c.gradient, Ordering::Relaxed);
        self.hessvec.store(c.hessvec, Ordering::Relaxed);
        self.failed.store(c.failed, Ordering::Relaxed);
    }
    /// The wrapped problem.
    pub fn inner(&self) -> &P {
        &self.inner
    }
    fn tally<T>(&self, r: Result<T, EvalError>) -> Result<T, EvalError> {
        if r.is_err() {
            self.failed.fetch_add(1, Ordering::Relaxed);
        }
        r
    }
}

impl<P: Problem + ?Sized> Problem for Counted<P> {
    fn dim(&self) -> usize {
        self.inner.dim()
    }
    fn component_names(&self) -> Option<Vec<String>> {
        self.inner.component_names()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        let n = self.inner.dim();
        check_len("control vector", x, n)?;
        check_len("gradient buffer", grad, n)?;
        self.gradient.fetch_add(1, Ordering::Relaxed);
        let r = self
            .inner
            .cost_grad(x, grad)
            .and_then(|c| check_finite(c, Some(grad)).map(|_| c));
        self.tally(r)
    }
    fn cost(&self, x: &[f64]) -> Result<f64, EvalError> {
        check_len("control vector", x, self.inner.dim())?;
        self.cost.fetch_add(1, Ordering::Relaxed);
        let r = self
            .inner
            .cost(x)
            .and_then(|c| check_finite(c, None).map(|_| c));
        self.tally(r)
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<Result<f64, EvalError>> {
        let n = self.inner.dim();
        if let Some(bad) = xs.iter().find(|x| x.len() != n) {
            let e = check_len("control vector", bad, n).unwrap_err();
            return xs.iter().map(|_| Err(e.clone())).collect();
        }
        self.cost.fetch_add(xs.len() as u64, Ordering::Relaxed);
        self.inner
            .cost_batch(xs)
            .into_iter()
            .map(|r| self.tally(r.and_then(|c| check_finite(c, None).map(|_| c))))
            .collect()
    }
    fn has_hess_vec(&self) -> bool {
        self.inner.has_hess_vec()
    }
    fn hess_vec(&self, x: &[f64], v: &[f64], out: &mut [f64]) -> Result<(), EvalError> {
        let n = self.inner.dim();
        check_len("control vector", x, n)?;
        check_len("direction", v, n)?;
        check_len("product buffer", out, n)?;
        if !self.inner.has_hess_vec() {
            return Err(EvalError::Unsupported {
                capability: "Hessian-vector product",
            });
        }
        self.hessvec.fetch_add(1, Ordering::Relaxed);
        let r = self
            .inner
            .hess_vec(x, v, out)
            .and_then(|_| check_finite(0.0, Some(out)));
        self.tally(r)
    }
    fn cost_split(&self, x: &[f64]) -> Result<Option<CostSplit>, EvalError> {
        check_len("control vector", x, self.inner.dim())?;
        self.inner.cost_split(x)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        self.inner.prior()
    }
}
