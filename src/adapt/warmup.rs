//! The warm-up schedule: the step size, and optionally a diagonal metric refining the Hessian.
//!
//! Step size only (the default): two stages of dual averaging. Chains start from over-dispersed
//! points, far in the tails, where the best step size differs from the one in the bulk; so the first
//! stage (the first quarter of the warm-up, at least one iteration) adapts from the initial guess, and
//! the second stage restarts dual averaging from the first stage's averaged step size, on draws that
//! have reached the bulk. The step size kept for sampling is the last stage's averaged iterate.
//! (Restarting the controller between warm-up windows is common practice, no source.)
//!
//! With the metric refined: in whitened coordinates the Hessian at the analysis gives the metric I.
//! Where the posterior is not Gaussian its spread differs from the Laplace one; so the warm-up draws of
//! a middle window (15 % to 75 % of the warm-up) estimate the variance v_i of each whitened component,
//! and the kernels then use the diagonal inverse mass matrix S = diag(s), shrunk towards the Hessian's
//! value 1 by five pseudo-draws, s_i = (k v_i + 5) / (k + 5) with k the window's draws (shrinkage
//! towards a prior guess as in general-purpose samplers: common practice, no source). Dual averaging
//! restarts at 15 % and, with the new metric, at 75 %. Each chain estimates its own metric from its
//! own draws, and the metric is fixed before any kept draw, so the kept draws come from a fixed,
//! π-invariant kernel.
//!
//! Kernels without a step size (independence Metropolis–Hastings) still go through the warm-up: its
//! draws are discarded as burn-in, and the schedule leaves everything alone.

use super::dual_averaging::{DualAveraging, DualAveragingSettings};
use crate::error::{Error, Result};
use crate::util::moments::welford_push;

/// Fraction of the warm-up before the first restart (step size only).
const FIRST_STAGE: f64 = 0.25;
/// With the metric: the window of draws that estimate it.
const METRIC_WINDOW: (f64, f64) = (0.15, 0.75);
/// Fewest draws in the window for the metric to be estimated at all.
const METRIC_MIN_DRAWS: u64 = 20;
/// Pseudo-draws of the shrinkage towards the Hessian's metric.
const SHRINK: f64 = 5.0;

/// Running variance of the whitened position over the metric window.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
struct MetricWindow {
    start: u64,
    end: u64,
    n: u64,
    mean: Vec<f64>,
    m2: Vec<f64>,
}

impl MetricWindow {
    /// Checks a window read from a file: inside the warm-up, vectors of length `dim` with finite
    /// numbers, and as many draws as the `done` iterations put in it.
    fn check(&self, dim: usize, total: u64, done: u64) -> std::result::Result<(), String> {
        if !(self.start <= self.end && self.end <= total) {
            return Err(format!(
                "start {} and end {} do not lie within the {total} warm-up iterations",
                self.start, self.end
            ));
        }
        let expected = done.clamp(self.start, self.end) - self.start;
        if self.n != expected {
            return Err(format!(
                "n is {} draws, but {done} warm-up iterations put {expected} in the window",
                self.n
            ));
        }
        for (name, v) in [("mean", &self.mean), ("m2", &self.m2)] {
            if v.len() != dim {
                return Err(format!("{name} has {} entries, expected {dim}", v.len()));
            }
            if let Some(i) = v.iter().position(|x| !x.is_finite()) {
                return Err(format!("{name}[{i}] is {}, not a finite number", v[i]));
            }
        }
        Ok(())
    }
}

/// The warm-up state of one chain.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Warmup {
    controller: Option<DualAveraging>,
    settings: DualAveragingSettings,
    restarts: Vec<u64>,
    total: u64,
    done: u64,
    fixed: f64,
    window: Option<MetricWindow>,
    metric: Vec<f64>,
}

impl Warmup {
    /// init: a schedule of `total` warm-up iterations in dimension `dim`, starting at step size `eps0`
    /// and aiming at the mean acceptance probability `target`. With `adapt_step = false` the step size
    /// stays `eps0` and nothing is adapted; `adapt_metric` also refines the diagonal metric (where the
    /// warm-up is long enough for its window to hold 20 draws).
    pub fn init(
        total: u64,
        dim: usize,
        eps0: f64,
        target: f64,
        adapt_step: bool,
        adapt_metric: bool,
    ) -> Result<Self> {
        let settings = DualAveragingSettings::default();
        let controller = if adapt_step && total > 0 {
            Some(DualAveraging::new(eps0, target, settings)?)
        } else {
            None
        };
        let at = |f: f64| (total as f64 * f).ceil() as u64;
        let (start, end) = (at(METRIC_WINDOW.0), at(METRIC_WINDOW.1));
        let window = (controller.is_some() && adapt_metric && end - start >= METRIC_MIN_DRAWS)
            .then(|| MetricWindow {
                start,
                end,
                n: 0,
                mean: vec![0.0; dim],
                m2: vec![0.0; dim],
            });
        let restarts = match &window {
            Some(w) => vec![w.start, w.end],
            None => vec![at(FIRST_STAGE).max(1)],
        };
        Ok(Warmup {
            controller,
            settings,
            restarts,
            total,
            done: 0,
            fixed: eps0,
            window,
            metric: vec![1.0; dim],
        })
    }

    /// init for the pooled warm-up ([`super::plan`]): `total` iterations adapting the step size from
    /// `eps0` towards the mean acceptance `target`, restarted only from outside ([`Warmup::restart`]).
    pub fn pooled(total: u64, dim: usize, eps0: f64, target: f64) -> Result<Self> {
        let settings = DualAveragingSettings::default();
        Ok(Warmup {
            controller: Some(DualAveraging::new(eps0, target, settings)?),
            settings,
            restarts: Vec::new(),
            total,
            done: 0,
            fixed: eps0,
            window: None,
            metric: vec![1.0; dim],
        })
    }

    /// Restarts dual averaging from step size `eps` (at a barrier of the pooled warm-up), shrinking
    /// towards `eps` itself rather than towards 10 `eps` as at the start: the pooled step size of all
    /// chains is already a good guess, and a short window cannot afford to explore far from it.
    pub fn restart(&mut self, eps: f64) -> Result<()> {
        if let Some(c) = self.controller.as_mut() {
            let centred = DualAveragingSettings {
                mu_factor: 1.0,
                ..self.settings
            };
            *c = DualAveraging::new(eps, c.target(), centred)?;
        }
        Ok(())
    }

    /// The step size to use for the next warm-up iteration.
    pub fn step_size(&self) -> f64 {
        self.controller
            .as_ref()
            .map_or(self.fixed, DualAveraging::current)
    }

    /// The diagonal inverse mass matrix (whitened coordinates) for the next iteration: all ones until
    /// the metric window closes.
    pub fn metric(&self) -> &[f64] {
        &self.metric
    }

    /// update: feeds the acceptance probability of one warm-up iteration and the position it left the
    /// chain at.
    pub fn update(&mut self, accept_prob: f64, u: &[f64]) -> Result<()> {
        self.done += 1;
        let Some(c) = self.controller.as_mut() else {
            return Ok(());
        };
        c.update(accept_prob);
        let (now, avg) = (c.current(), c.averaged());
        if !(now.is_normal() && avg.is_normal()) {
            return Err(Error::Numerical(format!(
                "step-size adaptation ran away (step size {now:e}, acceptance {accept_prob}): the \
                 target may be improper (flat in some direction) or the preconditioner badly scaled; \
                 give an initial step size or check the Hessian"
            )));
        }
        if let Some(w) = self.window.as_mut() {
            // Draws after iteration `start` up to iteration `end`.
            if self.done > w.start && self.done <= w.end {
                w.n += 1;
                welford_push(w.n, &mut w.mean, &mut w.m2, u);
            }
            if self.done == w.end {
                let k = w.n as f64;
                for (s, m2) in self.metric.iter_mut().zip(&w.m2) {
                    let v = m2 / (k - 1.0);
                    let shrunk = (k * v + SHRINK) / (k + SHRINK);
                    *s = if shrunk.is_finite() {
                        shrunk.clamp(1e-8, 1e8)
                    } else {
                        1.0
                    };
                }
            }
        }
        if self.restarts.contains(&self.done) && self.done < self.total {
            *c = DualAveraging::new(avg, c.target(), self.settings)?;
        }
        Ok(())
    }

    /// Checks a schedule read from a file against the run: `total` warm-up iterations in dimension
    /// `dim`, of which `done` have been fed. The message names the first bad field.
    pub fn check(&self, dim: usize, total: u64, done: u64) -> std::result::Result<(), String> {
        if self.total != total {
            return Err(format!(
                "total is {}, the run's warm-up is {total}",
                self.total
            ));
        }
        if self.done != done {
            return Err(format!(
                "done is {}, expected {done} warm-up iterations",
                self.done
            ));
        }
        if !(self.fixed.is_finite() && self.fixed > 0.0) {
            return Err(format!(
                "fixed step size {} is not positive and finite",
                self.fixed
            ));
        }
        if self.metric.len() != dim {
            return Err(format!(
                "metric has {} entries, expected {dim}",
                self.metric.len()
            ));
        }
        if let Some(i) = self
            .metric
            .iter()
            .position(|v| !(v.is_finite() && *v > 0.0))
        {
            return Err(format!(
                "metric[{i}] is {}, not positive and finite",
                self.metric[i]
            ));
        }
        if let Some(c) = &self.controller {
            c.check(done).map_err(|m| format!("controller: {m}"))?;
        }
        match &self.window {
            Some(w) => w
                .check(dim, total, done)
                .map_err(|m| format!("window: {m}")),
            None => Ok(()),
        }
    }

    /// Whether all warm-up iterations have been fed.
    pub fn is_done(&self) -> bool {
        self.done >= self.total
    }

    /// Iterations fed so far.
    pub fn done(&self) -> u64 {
        self.done
    }

    /// Whether the metric is being refined.
    pub fn adapts_metric(&self) -> bool {
        self.window.is_some()
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
        let mut w = Warmup::init(2000, 1, 0.01, 0.574, true, false).unwrap();
        while !w.is_done() {
            let e = w.step_size();
            w.update((-e * e).exp(), &[0.0]).unwrap();
        }
        let want = (-(0.574f64).ln()).sqrt();
        assert!(
            (w.finish() - want).abs() < 0.02 * want,
            "{} vs {want}",
            w.finish()
        );
    }

    // Positions fed in the window with alternating ±2 (variance 4·k/(k−1)) and 0 in the second
    // component: the metric is the shrunk variance (k v + 5)/(k + 5), computed here by hand.
    #[test]
    fn metric_is_the_shrunk_window_variance() {
        let mut w = Warmup::init(1000, 2, 0.5, 0.6, true, true).unwrap();
        assert!(w.adapts_metric());
        let mut sign = 1.0;
        while !w.is_done() {
            w.update(0.6, &[2.0 * sign, 0.0]).unwrap();
            sign = -sign;
        }
        let k = 600.0;
        let v = 4.0 * k / (k - 1.0);
        assert!((w.metric()[0] - (k * v + 5.0) / (k + 5.0)).abs() < 1e-12);
        assert!((w.metric()[1] - 5.0 / (k + 5.0)).abs() < 1e-12);
        assert!(!Warmup::init(30, 2, 0.5, 0.6, true, true)
            .unwrap()
            .adapts_metric());
    }

    // A flat target accepts everything: the step grows without bound, which must end in an error,
    // not an infinite step size.
    #[test]
    fn a_runaway_step_size_is_an_error() {
        let mut w = Warmup::init(100_000, 1, 1.0, 0.6, true, false).unwrap();
        let mut failed = false;
        while !w.is_done() {
            if w.update(1.0, &[0.0]).is_err() {
                failed = true;
                break;
            }
        }
        assert!(failed);
    }

    #[test]
    fn no_adaptation_keeps_the_step() {
        let mut w = Warmup::init(10, 1, 0.3, 0.5, false, true).unwrap();
        w.update(0.0, &[1.0]).unwrap();
        assert_eq!(w.finish(), 0.3);
        assert_eq!(w.metric(), &[1.0]);
        let z = Warmup::init(0, 1, 0.3, 0.5, true, false).unwrap();
        assert!(z.is_done());
        assert_eq!(z.finish(), 0.3);
    }
}
