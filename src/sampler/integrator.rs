//! The leapfrog (Störmer–Verlet) integrator for H(u, p) = −log π(u) + ½ pᵀ S p, with S = diag(s) the
//! inverse mass matrix in whitened coordinates (all ones: unit mass): a half step in momentum, a full
//! step in position, a half step in momentum. It is volume-preserving and time-reversible, which HMC's
//! acceptance step relies on.
//!
//! Reference: Neal 2011, "MCMC using Hamiltonian dynamics", Handbook of MCMC, section 2.3.

use super::{ChainState, Metric, Target};
use crate::error::Result;

/// A point in phase space: position state (with cached log-density and gradient) and momentum.
#[derive(Debug, Clone)]
pub struct Phase {
    /// Position, log π and ∇ log π.
    pub state: ChainState,
    /// Momentum.
    pub p: Vec<f64>,
}

impl Phase {
    /// H = −log π(u) + ½ pᵀ S p for the inverse mass matrix S.
    pub fn energy(&self, s: &Metric) -> f64 {
        -self.state.log_density + s.kinetic(&self.p)
    }
}

/// One leapfrog step of size `eps` with inverse mass matrix diag(`s`) (one gradient evaluation). Returns `false`, leaving `phase` partly
/// updated, where the new position could not be evaluated (recoverable failure).
pub fn leapfrog(target: &Target<'_>, phase: &mut Phase, eps: f64, s: &Metric) -> Result<bool> {
    let half = 0.5 * eps;
    for (p, g) in phase.p.iter_mut().zip(&phase.state.grad) {
        *p += half * g;
    }
    s.drift(&mut phase.state.u, &phase.p, eps);
    let Some(lp) = target.log_density_grad(&phase.state.u, &mut phase.state.grad)? else {
        return Ok(false);
    };
    phase.state.log_density = lp;
    for (p, g) in phase.p.iter_mut().zip(&phase.state.grad) {
        *p += half * g;
    }
    Ok(true)
}
