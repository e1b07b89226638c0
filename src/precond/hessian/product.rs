//! Hessian-vector products at the analysis, the one operation every estimation method is built on.
//!
//! A product comes from the problem's own `hess_vec` where offered, otherwise from a central difference
//! of two gradients,
//! H v ≈ (∇J(x + h v) − ∇J(x − h v)) / (2h),  h = δ · max(1, ‖x‖_∞) / ‖v‖_∞,  δ = ε^{1/3} ≈ 6.1e-6,
//! the step balancing the O(h²) truncation error against the O(ε/h) round-off (Nocedal & Wright 2006,
//! "Numerical Optimization", §8.1, from memory). Products are issued in batches over rayon, so a pool
//! of adapter processes evaluates them in parallel; every product is counted.

use std::sync::atomic::{AtomicUsize, Ordering};

use rayon::prelude::*;

use crate::error::{Error, Result};
use crate::problem::{Counted, Prior, Problem};

/// v ↦ ∇²J(x*) v, exact or by central differences of gradients.
pub(super) struct HessOp<'p, P: ?Sized> {
    problem: &'p Counted<P>,
    /// The analysis x*.
    pub(super) x: &'p [f64],
    /// Whether the products are the problem's own.
    pub(super) exact: bool,
    /// Absolute step numerator δ · max(1, ‖x‖_∞).
    step: f64,
    products: AtomicUsize,
}

impl<'p, P: Problem + ?Sized> HessOp<'p, P> {
    /// Products at `x`; `fd_step` is the relative finite-difference step δ (default ε^{1/3}).
    pub(super) fn new(problem: &'p Counted<P>, x: &'p [f64], fd_step: Option<f64>) -> Result<Self> {
        let delta = fd_step.unwrap_or(f64::EPSILON.cbrt());
        if !(delta.is_finite() && delta > 0.0) {
            return Err(Error::Config(format!(
                "the finite-difference step is {delta}; it must be positive (default 6.1e-6)"
            )));
        }
        let xmax = x.iter().fold(1.0_f64, |m, v| m.max(v.abs()));
        Ok(HessOp {
            problem,
            x,
            exact: problem.has_hess_vec(),
            step: delta * xmax,
            products: AtomicUsize::new(0),
        })
    }

    /// Products formed so far.
    pub(super) fn products(&self) -> usize {
        self.products.load(Ordering::Relaxed)
    }

    /// H v.
    pub(super) fn apply(&self, v: &[f64]) -> Result<Vec<f64>> {
        let n = v.len();
        self.products.fetch_add(1, Ordering::Relaxed);
        let ctx = "Hessian-vector product at the analysis";
        let mut out = vec![0.0; n];
        if self.exact {
            self.problem
                .hess_vec(self.x, v, &mut out)
                .map_err(|e| Error::eval(ctx, e))?;
            return Ok(out);
        }
        let vmax = v.iter().fold(0.0_f64, |m, a| m.max(a.abs()));
        if vmax == 0.0 {
            return Ok(out);
        }
        let h = self.step / vmax;
        let xp: Vec<f64> = self.x.iter().zip(v).map(|(x, d)| x + h * d).collect();
        let xm: Vec<f64> = self.x.iter().zip(v).map(|(x, d)| x - h * d).collect();
        let mut gm = vec![0.0; n];
        self.problem
            .cost_grad(&xp, &mut out)
            .map_err(|e| Error::eval(ctx, e))?;
        self.problem
            .cost_grad(&xm, &mut gm)
            .map_err(|e| Error::eval(ctx, e))?;
        for (o, m) in out.iter_mut().zip(&gm) {
            *o = (*o - m) / (2.0 * h);
        }
        if let Some(i) = out.iter().position(|v| !v.is_finite()) {
            return Err(Error::Numerical(format!(
                "{ctx}: component {i} of the finite-difference product is not finite"
            )));
        }
        Ok(out)
    }

    /// Products for a batch of directions, evaluated in parallel.
    pub(super) fn apply_batch(&self, vs: &[Vec<f64>]) -> Result<Vec<Vec<f64>>> {
        vs.par_iter().map(|v| self.apply(v)).collect()
    }

    /// Products w ↦ Sᵀ H S w − w of the prior-preconditioned misfit Hessian, in parallel.
    pub(super) fn apply_whitened_batch(
        &self,
        prior: &dyn Prior,
        ws: &[Vec<f64>],
    ) -> Result<Vec<Vec<f64>>> {
        ws.par_iter()
            .map(|w| {
                let mut sw = vec![0.0; w.len()];
                prior.mul_sqrt(w, &mut sw);
                let hsw = self.apply(&sw)?;
                let mut out = vec![0.0; w.len()];
                prior.mul_sqrt_t(&hsw, &mut out);
                for (o, wi) in out.iter_mut().zip(w) {
                    *o -= wi;
                }
                Ok(out)
            })
            .collect()
    }
}

/// The unit vector e_i of length n.
pub(super) fn unit(n: usize, i: usize) -> Vec<f64> {
    let mut e = vec![0.0; n];
    e[i] = 1.0;
    e
}
