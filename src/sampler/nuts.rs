//! The No-U-Turn sampler with multinomial sampling of the trajectory, in whitened coordinates.
//!
//! Each step draws a momentum p ~ N(0, S⁻¹) (S the inverse mass matrix, as in [`super::hmc`]) and
//! builds a leapfrog trajectory of H(u, p) = −log π(u) + ½ pᵀ S p by repeated doubling: at depth j a
//! direction (forward or backward in time, each with probability ½) is drawn and a new subtree of 2^j
//! leapfrog steps is grown from that end of the trajectory, so that after depth j the trajectory holds
//! 2^(j+1) points (the start included) and 2^(j+1) − 1 gradient evaluations were made. Doubling stops
//! at the first U-turn, divergence or failed evaluation, or after `max_depth` doublings; a step makes
//! at most 2^max_depth − 1 leapfrog steps (Hoffman & Gelman 2014, sections 3.1 and 3.1.1).
//!
//! - **Multinomial sampling** (Betancourt 2017, appendix A.3): every trajectory point z has weight
//!   w(z) = exp(H₀ − H(z)). Inside a subtree the two halves are merged with the point of the outer half
//!   kept with probability W_outer / (W_inner + W_outer) (W the sum of weights of a half), so that a
//!   subtree's point is a draw proportional to the weights. Between the trajectory so far (weight
//!   W_old) and a new subtree (W_new) the sampling is biased towards the new subtree: its point
//!   replaces the current one with probability min(1, W_new / W_old) (biased progressive sampling,
//!   Betancourt 2017, appendix A.3.2).
//! - **U-turn criterion** (Betancourt 2017, appendix A.4.2, the generalised criterion): with ρ the sum
//!   of the momenta of a (sub)trajectory and v = S p the velocity, the (sub)trajectory from z₋ to z₊
//!   (in time order) has turned when ρ · v(z₋) < 0 or ρ · v(z₊) < 0. It is checked each time two
//!   siblings L (earlier) and R (later) of the binary tree are merged: on the whole L ∪ R, and across
//!   the boundary on L plus the first point of R (ρ_L + p(R₋), ends L₋ and R₋) and on the last point
//!   of L plus R (p(L₊) + ρ_R, ends L₊ and R₊), which catches turns the check of the whole misses
//!   when a subtree spans more than one oscillation. A turn inside a new subtree discards that subtree
//!   (it is not sampled from); a turn of the whole trajectory keeps the point drawn so far. Every check
//!   depends only on the binary tree, which the reversed construction rebuilds, so the kernel stays
//!   reversible (Hoffman & Gelman 2014, section 3.1, for the argument).
//! - **Acceptance statistic** (the input of dual averaging; Hoffman & Gelman 2014, section 3.2, for
//!   multinomial sampling): the mean over every point the integrator produced in this step (also the
//!   points of a discarded last subtree) of min(1, exp(H₀ − H)), a failed or divergent point counting
//!   0. Its default target is 0.8 (common practice, no source).
//! - **Divergence**: a point with H − H₀ above [`DIVERGENCE_THRESHOLD`] or a non-finite H stops the
//!   doubling, and the subtree it belongs to is not sampled from (`divergent`). A failed evaluation
//!   (the model could not be run at a point) is handled the same way and reported as `nonfinite`.
//! - The step size is not jittered (the trajectory length adapts by itself); the first guess is
//!   d^(−1/4) as for HMC.
//!
//! The metric (inverse mass matrix) is touched only through the small helpers at the top of this file.
//!
//! References: Hoffman & Gelman 2014, "The No-U-Turn Sampler: adaptively setting path lengths in
//! Hamiltonian Monte Carlo", JMLR 15; Betancourt 2017, "A Conceptual Introduction to Hamiltonian Monte
//! Carlo", arXiv:1701.02434.

use rand::RngExt;

use super::hmc::DIVERGENCE_THRESHOLD;
use super::integrator::{leapfrog, Phase};
use super::{
    standard_normal, ChainRng, ChainState, Kernel, KernelSpec, Metric, StepInfo, StepSizeSpec,
    Target,
};
use crate::error::{Error, Result};

/// The largest tree depth accepted (2^20 − 1 leapfrog steps per iteration at most).
pub const MAX_TREE_DEPTH: u32 = 20;

/// p ~ N(0, S⁻¹).
fn draw_momentum(rng: &mut ChainRng, s: &Metric) -> Vec<f64> {
    s.momentum(&standard_normal(rng, s.dim()))
}

/// The velocity S p.
fn velocity(s: &Metric, p: &[f64]) -> Vec<f64> {
    s.mul(p)
}

/// H = −log π(u) + ½ pᵀ S p.
fn hamiltonian(z: &Phase, s: &Metric) -> f64 {
    z.energy(s)
}

/// One leapfrog step of signed size `eps`; `false` where the new position could not be evaluated.
fn leapfrog_step(target: &Target<'_>, z: &mut Phase, eps: f64, s: &Metric) -> Result<bool> {
    leapfrog(target, z, eps, s)
}

/// ρ · v(z₋) ≥ 0 and ρ · v(z₊) ≥ 0: the trajectory with momentum sum `rho` from `minus` to `plus` has
/// not turned.
fn no_u_turn(s: &Metric, rho: &[f64], minus: &[f64], plus: &[f64]) -> bool {
    let dot = |p: &[f64]| -> f64 { velocity(s, p).iter().zip(rho).map(|(v, r)| v * r).sum() };
    dot(minus) >= 0.0 && dot(plus) >= 0.0
}

/// The No-U-Turn sampler with multinomial sampling; the step size is passed to each step.
#[derive(Debug, Clone, Copy)]
pub struct Nuts {
    max_depth: u32,
}

impl Nuts {
    /// At most `max_depth` doublings (1 to [`MAX_TREE_DEPTH`]) per iteration.
    pub fn new(max_depth: u32) -> Result<Self> {
        if !(1..=MAX_TREE_DEPTH).contains(&max_depth) {
            return Err(Error::Config(format!(
                "NUTS maximum tree depth {max_depth} must lie between 1 and {MAX_TREE_DEPTH} \
                 (option --nuts-max-depth)"
            )));
        }
        Ok(Nuts { max_depth })
    }

    /// The cap on doublings.
    pub fn max_depth(&self) -> u32 {
        self.max_depth
    }
}

/// The point a (sub)trajectory has drawn.
#[derive(Debug, Clone)]
struct Pick {
    state: ChainState,
    energy: f64,
    is_start: bool,
}

/// A valid (sub)trajectory: its earliest and latest points, momentum sum, log of the summed weights
/// exp(H₀ − H), and its drawn point.
#[derive(Debug, Clone)]
struct Tree {
    minus: Phase,
    plus: Phase,
    rho: Vec<f64>,
    log_w: f64,
    pick: Pick,
}

impl Tree {
    fn leaf(z: Phase, energy: f64, h0: f64, is_start: bool) -> Tree {
        let pick = Pick {
            state: z.state.clone(),
            energy,
            is_start,
        };
        Tree {
            rho: z.p.clone(),
            minus: z.clone(),
            plus: z,
            log_w: h0 - energy,
            pick,
        }
    }

    /// The end the trajectory grows from in direction `forward`.
    fn end(&self, forward: bool) -> &Phase {
        if forward {
            &self.plus
        } else {
            &self.minus
        }
    }
}

/// log(exp(a) + exp(b)).
fn log_add_exp(a: f64, b: f64) -> f64 {
    let m = a.max(b);
    m + ((a - m).exp() + (b - m).exp()).ln()
}

/// How the point of a merged tree is drawn.
#[derive(Clone, Copy, PartialEq)]
enum Draw {
    /// In proportion to the weights of the two halves (inside a subtree).
    Uniform,
    /// The new subtree's point with probability min(1, W_new / W_old) (between old and new).
    Biased,
}

/// Merges the tree `inner` with `outer`, grown from it in direction `forward`; `None` when the merged
/// tree has turned (by any of the three checks). The draw uses `rng` only when it is not certain.
fn merge(
    rng: &mut ChainRng,
    s: &Metric,
    inner: Tree,
    outer: Tree,
    forward: bool,
    draw: Draw,
) -> (Tree, bool) {
    let log_w = log_add_exp(inner.log_w, outer.log_w);
    let log_prob = match draw {
        Draw::Uniform => outer.log_w - log_w,
        Draw::Biased => outer.log_w - inner.log_w,
    };
    let take_outer = log_prob >= 0.0 || rng.random::<f64>() < log_prob.exp();
    let (left, right) = if forward {
        (inner, outer)
    } else {
        (outer, inner)
    };
    let rho: Vec<f64> = left
        .rho
        .iter()
        .zip(&right.rho)
        .map(|(a, b)| a + b)
        .collect();
    let cross_left: Vec<f64> = left
        .rho
        .iter()
        .zip(&right.minus.p)
        .map(|(a, b)| a + b)
        .collect();
    let cross_right: Vec<f64> = left
        .plus
        .p
        .iter()
        .zip(&right.rho)
        .map(|(a, b)| a + b)
        .collect();
    let turned = !no_u_turn(s, &rho, &left.minus.p, &right.plus.p)
        || !no_u_turn(s, &cross_left, &left.minus.p, &right.minus.p)
        || !no_u_turn(s, &cross_right, &left.plus.p, &right.plus.p);
    let pick = match (take_outer, forward) {
        (true, true) | (false, false) => right.pick,
        (true, false) | (false, true) => left.pick,
    };
    let tree = Tree {
        minus: left.minus,
        plus: right.plus,
        rho,
        log_w,
        pick,
    };
    (tree, turned)
}

/// One iteration's integration: the target, metric, step size, starting energy, and what was done.
struct Walk<'w, 'a> {
    target: &'w Target<'a>,
    s: &'w Metric,
    eps: f64,
    h0: f64,
    n_steps: u32,
    accept_sum: f64,
    divergent: bool,
    nonfinite: bool,
}

impl Walk<'_, '_> {
    /// One leapfrog step from `edge` in direction `forward`: a leaf, or `None` (counted) when the
    /// evaluation failed or the energy error diverged.
    fn leaf(&mut self, edge: &Phase, forward: bool) -> Result<Option<Tree>> {
        let mut z = edge.clone();
        let eps = if forward { self.eps } else { -self.eps };
        self.n_steps += 1;
        if !leapfrog_step(self.target, &mut z, eps, self.s)? {
            self.nonfinite = true;
            return Ok(None);
        }
        let h = hamiltonian(&z, self.s);
        if !h.is_finite() || h - self.h0 > DIVERGENCE_THRESHOLD {
            self.divergent = true;
            self.nonfinite |= !h.is_finite();
            return Ok(None);
        }
        self.accept_sum += (self.h0 - h).exp().min(1.0);
        Ok(Some(Tree::leaf(z, h, self.h0, false)))
    }

    /// A subtree of 2^depth leapfrog steps grown from `edge` in direction `forward`; `None` when it
    /// diverged, failed or turned inside (it is then not sampled from). Stops at the first such event,
    /// so no evaluation is spent beyond it.
    fn build(
        &mut self,
        rng: &mut ChainRng,
        edge: &Phase,
        forward: bool,
        depth: u32,
    ) -> Result<Option<Tree>> {
        if depth == 0 {
            return self.leaf(edge, forward);
        }
        let Some(inner) = self.build(rng, edge, forward, depth - 1)? else {
            return Ok(None);
        };
        let Some(outer) = self.build(rng, inner.end(forward), forward, depth - 1)? else {
            return Ok(None);
        };
        let (tree, turned) = merge(rng, self.s, inner, outer, forward, Draw::Uniform);
        Ok((!turned).then_some(tree))
    }
}

impl Kernel for Nuts {
    /// Target 0.8 for the acceptance statistic of the module docs (common practice for NUTS, no
    /// source; the option `target_accept` overrides it); ε₀ = d^(−1/4) as for HMC.
    fn spec(&self, n: usize) -> KernelSpec {
        KernelSpec {
            name: "nuts",
            uses_gradient: true,
            step_size: Some(StepSizeSpec {
                initial: (n.max(1) as f64).powf(-0.25),
                target_accept: 0.8,
            }),
        }
    }

    fn step(
        &self,
        target: &Target<'_>,
        rng: &mut ChainRng,
        state: &ChainState,
        eps: f64,
        s: &Metric,
    ) -> Result<(ChainState, StepInfo)> {
        let z0 = Phase {
            state: state.clone(),
            p: draw_momentum(rng, s),
        };
        let h0 = hamiltonian(&z0, s);
        let mut walk = Walk {
            target,
            s,
            eps,
            h0,
            n_steps: 0,
            accept_sum: 0.0,
            divergent: false,
            nonfinite: false,
        };
        let mut traj = Tree::leaf(z0, h0, h0, true);
        for depth in 0..self.max_depth {
            let forward = rng.random::<bool>();
            let Some(new) = walk.build(rng, traj.end(forward), forward, depth)? else {
                break;
            };
            let (merged, turned) = merge(rng, s, traj, new, forward, Draw::Biased);
            traj = merged;
            if turned {
                break;
            }
        }
        let info = StepInfo {
            accept_prob: walk.accept_sum / f64::from(walk.n_steps.max(1)),
            accepted: !traj.pick.is_start,
            divergent: walk.divergent,
            nonfinite: walk.nonfinite,
            energy: traj.pick.energy,
            step_size: eps,
            n_steps: walk.n_steps,
        };
        Ok((traj.pick.state, info))
    }
}

#[cfg(test)]
mod tests;
