//! The warm-up schedule for the step size.
//!
//! Two stages of dual averaging. Chains start from over-dispersed points, far in the tails, where the
//! best step size differs from the one in the bulk; so the first stage (the first quarter of the warm-up,
//! at least one iteration) adapts from the initial guess, and the second stage restarts dual averaging
//! from the first stage's averaged step size, on draws that have reached the bulk. The step size kept for
//! sampling is the second stage's averaged iterate. (Restarting the controller between warm-up windows is
//! common practice, no source.)
//!
//! Kernels without a step size (independence Metropolis–Hastings) still go through the warm-up: its
//! draws are discarded as burn-in, and the schedule leaves the step size alone.

use super::dual_averaging::{DualAveraging, DualAveragingSettings};
use crate::error::{Error, Result};

/// Fraction of the warm-up spent in the first stage.
const FIRST_STAGE: f64 = 0.25;

/// The warm-up state of one chain.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Warmup {
    controller: Option<DualAveraging>,
    settings: DualAveragingSettings,
    first_stage_len: u64,
    total: u64,
    done: u64,
    fixed: f64,
}

impl Warmup {
    /// init: a schedule of `total` warm-up iterations, starting at step size `eps0` and aiming at the
    /// mean acceptance probability `target`. With `adapt_step = false` the step size stays `eps0`.
    pub fn init(total: u64, eps0: f64, target: f64, adapt_step: bool) -> Result<Self> {
        let settings = DualAveragingSettings::default();
        let controller = if adapt_step && total > 0 {
            Some(DualAveraging::new(eps0, target, settings)?)
        } else {
            None
        };
        let first_stage_len =
            ((total as f64 * FIRST_STAGE).ceil() as u64).clamp(1.min(total), total);
        Ok(Warmup {
            controller,
            settings,
            first_stage_len,
            total,
            done: 0,
            fixed: eps0,
        })
    }

    /// The step size to use for the next warm-up iteration.
    pub fn step_size(&self) -> f64 {
        self.controller
            .as_ref()
            .map_or(self.fixed, DualAveraging::current)
    }

    /// update: feeds the acceptance probability of one warm-up iteration.
    pub fn update(&mut self, accept_prob: f64) -> Result<()> {
        self.done += 1;
        if let Some(c) = self.controller.as_mut() {
            c.update(accept_prob);
            let (now, avg) = (c.current(), c.averaged());
            if !(now.is_normal() && avg.is_normal()) {
                return Err(Error::Numerical(format!(
                    "step-size adaptation ran away (step size {now:e}, acceptance {accept_prob}): \
                     the target may be improper (flat in some direction) or the preconditioner \
                     badly scaled; give an initial step size or check the Hessian"
                )));
            }
            if self.done == self.first_stage_len && self.done < self.total {
                let restart = c.averaged();
                *c = DualAveraging::new(restart, c.target(), self.settings)?;
            }
        }
        Ok(())
    }

    /// Whether all warm-up iterations have been fed.
    pub fn is_done(&self) -> bool {
        self.done >= self.total
    }

    /// finish: the step size to sample with.
    pub fn finish(&self) -> f64 {
        self.controller
            .as_ref()
            .map_or(self.fixed, DualAveraging::averaged)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Acceptance curve α(ε) = exp(−ε²) (ours); the target is met at ε = sqrt(−ln δ), the fixed point
    // of dual averaging (Hoffman & Gelman 2014, section 3.2).
    #[test]
    fn schedule_reaches_the_target_step() {
        let mut w = Warmup::init(2000, 0.01, 0.574, true).unwrap();
        while !w.is_done() {
            let e = w.step_size();
            w.update((-e * e).exp()).unwrap();
        }
        let want = (-(0.574f64).ln()).sqrt();
        assert!(
            (w.finish() - want).abs() < 0.02 * want,
            "{} vs {want}",
            w.finish()
        );
    }

    // A flat target accepts everything: the step grows without bound, which must end in an error,
    // not an infinite step size.
    #[test]
    fn a_runaway_step_size_is_an_error() {
        let mut w = Warmup::init(100_000, 1.0, 0.6, true).unwrap();
        let mut failed = false;
        while !w.is_done() {
            if w.update(1.0).is_err() {
                failed = true;
                break;
            }
        }
        assert!(failed);
    }

    #[test]
    fn no_adaptation_keeps_the_step() {
        let mut w = Warmup::init(10, 0.3, 0.5, false).unwrap();
        w.update(0.0).unwrap();
        assert_eq!(w.finish(), 0.3);
        let z = Warmup::init(0, 0.3, 0.5, true).unwrap();
        assert!(z.is_done());
        assert_eq!(z.finish(), 0.3);
    }
}
