//! Markov chain Monte Carlo in the whitened coordinates of the analysis.
//!
//! - [`target`]: log π(u) = −J(x* + L u), the one place where the sign flips;
//! - a kernel is an `init` and a `step(rng, state) -> (state, info)` ([`Kernel`]); the state
//!   ([`ChainState`]) caches position, log-density and gradient, the info ([`StepInfo`]) holds
//!   diagnostics only, and the step size is passed in so that the warm-up needs no rebuild:
//!   [`mala`], [`hmc`] (with [`integrator`]), [`laplace_mh`];
//! - [`chain`]: running the chains in parallel, with warm-up, streaming and checkpoints
//!   ([`run`], and [`run_extended`] for chains extended by more draws or stopped by [`Limits`]);
//!   [`stop`] (when a run stops: fixed draws or a target ESS, and the next block's size); [`draws`] (the per-chain draws files and their reader), [`welford`] (running moments),
//!   [`checkpoint`] and [`state`] (what a checkpoint saves of one chain).
//!
//! # Example
//!
//! ```
//! use std::sync::Arc;
//! use varpost::Interrupt;
//! use varpost::precond::IdentityPrecond;
//! use varpost::problem::linear_gaussian::{LinearGaussian, LinearGaussianConfig};
//! use varpost::problem::Counted;
//! use varpost::sampler::{open_chains, run, KernelKind, SampleConfig, Target};
//! # fn main() -> varpost::Result<()> {
//! let lg = LinearGaussian::new(LinearGaussianConfig { n: 4, m: 2, rank: 2, ..Default::default() })?;
//! let x_star = lg.reference()?.mean; // the analysis; here known in closed form
//! let problem = Counted::new(lg);
//! let precond = Arc::new(IdentityPrecond::new(4));
//! let target = Target::new(&problem, "linear-gaussian", x_star, precond)?;
//! let config = SampleConfig { kernel: KernelKind::Hmc, warmup: 100, draws: 100, ..Default::default() };
//! let dir = std::env::temp_dir().join(format!("varpost-doc-{}", std::process::id()));
//! # let _ = std::fs::remove_dir_all(&dir);
//! let result = run(&target, &config, &dir, None, &Interrupt::new(), &|_, _, _| {})?;
//! assert_eq!(result.draws, 4 * 100);
//! let files = open_chains(&dir, config.chains)?;
//! assert_eq!(files[0].records, 100);
//! # std::fs::remove_dir_all(&dir).ok();
//! # Ok(()) }
//! ```

pub mod chain;
pub mod checkpoint;
pub mod config;
pub mod draws;
pub mod ensemble;
pub mod hmc;
pub mod importance;
pub mod integrator;
pub mod laplace_mh;
pub mod mala;
pub mod nuts;
pub mod state;
pub mod stop;
pub mod target;
pub mod welford;

pub use crate::adapt::Metric;
pub use chain::{
    run, run_extended, ChainSummary, Ended, Extension, Limits, Progress, SampleResult,
};
pub use checkpoint::Checkpoint;
pub use config::{HmcSettings, IndependenceSettings, KernelKind, MetricLearning, SampleConfig};
pub use draws::{component_per_chain, open_chains, DrawRecord, DrawsFile};
pub use ensemble::{ChainDraws, Ensemble, WeightedDraws};
pub use stop::{StopReason, StopRule};
pub use target::{CountedProblem, Target};
pub use welford::Welford;

use rand::RngExt;
use rand_chacha::ChaCha8Rng;

use crate::error::Result;

/// The random number generator of one chain.
pub type ChainRng = ChaCha8Rng;

/// Where a chain is: position u (whitened), log π(u), and ∇_u log π(u) (empty for kernels that do not
/// use the gradient).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ChainState {
    /// Position in whitened coordinates.
    pub u: Vec<f64>,
    /// log π(u).
    pub log_density: f64,
    /// ∇_u log π(u); empty for gradient-free kernels.
    pub grad: Vec<f64>,
}

/// What one step did (diagnostics only).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepInfo {
    /// The Metropolis–Hastings acceptance probability min(1, ratio); 0 for a rejected non-finite or
    /// divergent proposal.
    pub accept_prob: f64,
    /// Whether the proposal was accepted.
    pub accepted: bool,
    /// HMC: the trajectory's energy error exceeded the divergence threshold.
    pub divergent: bool,
    /// The proposal (or a point on its trajectory) could not be evaluated (recoverable failure).
    pub nonfinite: bool,
    /// HMC: the Hamiltonian −log π(u) + |p|²/2 of the state after the step; NaN for other kernels.
    pub energy: f64,
    /// The step size used (after jitter); NaN for kernels without a step size.
    pub step_size: f64,
    /// Gradient evaluations (leapfrog steps) done for this step.
    pub n_steps: u32,
}

impl StepInfo {
    /// A Metropolis–Hastings decision.
    pub fn decided(
        accept_prob: f64,
        accepted: bool,
        step_size: f64,
        n_steps: u32,
        energy: f64,
    ) -> Self {
        StepInfo {
            accept_prob,
            accepted,
            divergent: false,
            nonfinite: false,
            energy,
            step_size,
            n_steps,
        }
    }
    /// A rejection caused by a failed evaluation.
    pub fn nonfinite(step_size: f64, n_steps: u32, energy: f64) -> Self {
        StepInfo {
            accept_prob: 0.0,
            accepted: false,
            divergent: false,
            nonfinite: true,
            energy,
            step_size,
            n_steps,
        }
    }
}

/// The step size of a kernel, as the warm-up needs to know it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepSizeSpec {
    /// A first step size before adaptation (it depends on the dimension).
    pub initial: f64,
    /// The default target mean acceptance probability of the adaptation.
    pub target_accept: f64,
}

/// What the chain runner needs to know about a kernel.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct KernelSpec {
    /// Short name ("mala", "hmc", "laplace-mh").
    pub name: &'static str,
    /// Whether steps use ∇ log π (and so the cached gradient in [`ChainState`]).
    pub uses_gradient: bool,
    /// The step size to adapt; `None` for kernels without one.
    pub step_size: Option<StepSizeSpec>,
}

/// One Markov kernel that leaves π(u) invariant.
pub trait Kernel: Send + Sync {
    /// Name, gradient use and step size, in dimension `n`.
    fn spec(&self, n: usize) -> KernelSpec;

    /// init: the state at `u`; `None` where π cannot be evaluated there (recoverable failure).
    fn init(&self, target: &Target<'_>, u: Vec<f64>) -> Result<Option<ChainState>> {
        if self.spec(u.len()).uses_gradient {
            let mut grad = vec![0.0; u.len()];
            let lp = target.log_density_grad(&u, &mut grad)?;
            Ok(lp.map(|log_density| ChainState {
                u,
                log_density,
                grad,
            }))
        } else {
            let lp = target.log_density(&u)?;
            Ok(lp.map(|log_density| ChainState {
                u,
                log_density,
                grad: Vec::new(),
            }))
        }
    }

    /// step: one transition from `state` with step size `step_size` and the inverse mass matrix
    /// `metric` (whitened coordinates; the unit metric means the preconditioner as it is; kernels
    /// without a step size ignore it). Errors are only the non-recoverable evaluation failures.
    fn step(
        &self,
        target: &Target<'_>,
        rng: &mut ChainRng,
        state: &ChainState,
        step_size: f64,
        metric: &Metric,
    ) -> Result<(ChainState, StepInfo)>;
}

/// The Metropolis–Hastings decision for log acceptance ratio `log_ratio`: returns (acceptance
/// probability, accepted). A NaN ratio is a rejection with probability 0.
pub(crate) fn mh_decide(rng: &mut ChainRng, log_ratio: f64) -> (f64, bool) {
    if log_ratio.is_nan() {
        return (0.0, false);
    }
    let prob = if log_ratio >= 0.0 {
        1.0
    } else {
        log_ratio.exp()
    };
    let v: f64 = rng.random();
    (prob, v.ln() < log_ratio)
}

/// A vector of independent standard normal draws.
pub(crate) fn standard_normal(rng: &mut ChainRng, n: usize) -> Vec<f64> {
    use rand_distr::{Distribution, StandardNormal};
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}
