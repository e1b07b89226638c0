//! Independence Metropolis–Hastings with the Laplace approximation as proposal.
//!
//! In whitened coordinates the Laplace approximation N(x*, H⁻¹) is N(0, I). Each step proposes
//! u' ~ q independently of the current point and accepts with probability
//! min(1, π(u') q(u) / (π(u) q(u'))). It needs no gradient: one forward run per step.
//!
//! With `t_dof = Some(ν)` the proposal is the multivariate Student-t with ν degrees of freedom and the
//! same centre and scale, u' = z √(ν / w), z ~ N(0, I), w ~ χ²_ν, and
//! log q(u) = −(ν + n)/2 · log(1 + |u|²/ν) + const: heavier tails than the posterior keep the importance ratio π/q bounded, which the Gaussian
//! proposal does not guarantee when the posterior is wider than its Laplace approximation.
//!
//! References: Tierney 1994, "Markov chains for exploring posterior distributions", Ann. Statist. 22(4)
//! (independence chains); Mengersen & Tweedie 1996, "Rates of convergence of the Hastings and Metropolis
//! algorithms", Ann. Statist. 24(1) (uniform ergodicity when π/q is bounded).

use rand_distr::{ChiSquared, Distribution};

use super::{
    mh_decide, standard_normal, ChainRng, ChainState, Kernel, KernelSpec, Metric, StepInfo, Target,
};
use crate::error::{Error, Result};
use crate::util::vector::dot;

/// The proposal of [`LaplaceMh`].
#[derive(Debug, Clone, Copy)]
enum Proposal {
    Gaussian,
    StudentT { nu: f64, chi2: ChiSquared<f64> },
}

/// Independence Metropolis–Hastings with a Gaussian or Student-t proposal in whitened coordinates.
#[derive(Debug, Clone, Copy)]
pub struct LaplaceMh {
    proposal: Proposal,
}

impl LaplaceMh {
    /// The Laplace Gaussian (`None`) or a Student-t with `t_dof` degrees of freedom.
    pub fn new(t_dof: Option<f64>) -> Result<Self> {
        let proposal = match t_dof {
            None => Proposal::Gaussian,
            Some(nu) => {
                let chi2 = ChiSquared::new(nu).map_err(|e| {
                    Error::Config(format!("Student-t degrees of freedom {nu}: {e}"))
                })?;
                Proposal::StudentT { nu, chi2 }
            }
        };
        Ok(LaplaceMh { proposal })
    }

    fn draw(&self, rng: &mut ChainRng, n: usize) -> Vec<f64> {
        let mut u = standard_normal(rng, n);
        if let Proposal::StudentT { nu, chi2 } = self.proposal {
            let w: f64 = chi2.sample(rng);
            let s = (nu / w).sqrt();
            u.iter_mut().for_each(|v| *v *= s);
        }
        u
    }

    /// log q(u) up to a constant.
    fn log_q(&self, u: &[f64]) -> f64 {
        let r2 = dot(u, u);
        match self.proposal {
            Proposal::Gaussian => -0.5 * r2,
            Proposal::StudentT { nu, .. } => -0.5 * (nu + u.len() as f64) * (r2 / nu).ln_1p(),
        }
    }
}

impl Kernel for LaplaceMh {
    fn spec(&self, _n: usize) -> KernelSpec {
        KernelSpec {
            name: "laplace-mh",
            uses_gradient: false,
            step_size: None,
        }
    }

    fn step(
        &self,
        target: &Target<'_>,
        rng: &mut ChainRng,
        state: &ChainState,
        _step_size: f64,
        _metric: &Metric,
    ) -> Result<(ChainState, StepInfo)> {
        let u_new = self.draw(rng, state.u.len());
        let Some(lp) = target.log_density(&u_new)? else {
            return Ok((state.clone(), StepInfo::nonfinite(f64::NAN, 0, f64::NAN)));
        };
        let log_ratio = lp - state.log_density + self.log_q(&state.u) - self.log_q(&u_new);
        let (accept_prob, accepted) = mh_decide(rng, log_ratio);
        let info = StepInfo::decided(accept_prob, accepted, f64::NAN, 0, f64::NAN);
        let next = if accepted {
            ChainState {
                u: u_new,
                log_density: lp,
                grad: Vec::new(),
            }
        } else {
            state.clone()
        };
        Ok((next, info))
    }
}
