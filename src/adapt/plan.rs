//! The pooled warm-up: when every chain stops to share what it learned, and when the warm-up ends.
//!
//! Within at most W warm-up iterations (`--warmup`):
//! 1. an initial stretch of 7.5 % of W (at least 5 iterations) adapts the step size only, while the
//!    chains travel from their over-dispersed starts to the bulk;
//! 2. then metric windows of doubling length, the first 5 % of W (at least 10 iterations), the last
//!    stretched to the start of the final stretch (the schedule of general-purpose samplers, common
//!    practice, no source). At the end of each window every chain stops (a barrier); the draws of the
//!    window, pooled over all chains in chain order, give a new metric ([`super::pooled`]); every
//!    chain restarts dual averaging from the pooled step size, the geometric mean of the chains'
//!    averaged step sizes;
//! 3. a final stretch of 15 % of W (at least 20 iterations) adapts the step size for the last
//!    metric; at its end every chain samples with the pooled step size. (A shorter stretch leaves
//!    dual averaging's averaged step size short of its limit: the acceptance while sampling then
//!    overshoots the target.)
//!
//! The warm-up ends early when it has settled: from the second window on, when
//! - the chains agree: in the window's draws every component has a potential scale reduction
//!   (Gelman & Rubin 1992, "Inference from iterative simulation using multiple sequences",
//!   Statistical Science 7(4), without the split) below [`SETTLED_RHAT`], the classic threshold of
//!   Gelman et al. 2013, Bayesian Data Analysis, 3rd ed., section 11.4 — a slow kernel whose chains
//!   have not yet forgotten their over-dispersed starts does not settle, however stable its tuning;
//! - the pooled step size changed by less than [`SETTLED_STEP`], and
//! - the metric's spread per component (the diagonal, root mean square of the log ratios) by less
//!   than [`SETTLED_METRIC`] between the last two windows,
//!
//! the remaining windows are dropped and the final stretch follows at once. A kernel without step size
//! or metric (the independence sampler) only burns in ([`WarmupPlan::burn_in`]): its warm-up ends at
//! the first window in which the chains agree. A window whose chains
//! disagree does not change the metric either: its draws trace the chains' way to the posterior
//! (a trend within each chain), not the posterior's spread, and a metric learned from them can be
//! far worse than the Laplace one (measured: a slow kernel whose chains were still travelling lost
//! 90 % of its effective draws). The two tolerances are
//! our choice (a 20 % change of a step size or of a spread changes the cost of a draw by about as
//! much). With one chain the first condition is not checked.
//!
//! Everything here runs between segments, on one thread, in chain order, so the same seed gives the
//! same bits for any number of threads; the plan is saved in the checkpoint.

use super::metric::Metric;
use super::pooled::{change, estimate};

/// Largest relative change of the pooled step size between two windows for the warm-up to settle.
pub const SETTLED_STEP: f64 = 0.2;
/// Largest change of the metric (RMS log ratio of the spreads) for the warm-up to settle.
pub const SETTLED_METRIC: f64 = 0.2;
/// Largest potential scale reduction of any component in the window for the warm-up to settle.
pub const SETTLED_RHAT: f64 = 1.1;

/// What one metric window found.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct WindowReport {
    /// Iteration at which the window closed.
    pub end: u64,
    /// Pooled draws it used.
    pub draws: usize,
    /// Shrinkage weight towards the Laplace metric.
    pub shrinkage: f64,
    /// Change of the metric from the one before (RMS log ratio of the spreads); the metric is only
    /// taken where the chains agreed (`rhat_max` below [`SETTLED_RHAT`]).
    pub change: f64,
    /// The pooled step size at the window's end.
    pub step_size: f64,
    /// The largest potential scale reduction of a component across the chains' window draws (NaN
    /// with one chain).
    pub rhat_max: f64,
}

/// The pooled warm-up's schedule and state.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct WarmupPlan {
    /// The most warm-up iterations (W).
    pub max: u64,
    /// First iteration whose draw goes into a window.
    pub start: u64,
    /// Ends of the metric windows still to close, ascending.
    pub windows: Vec<u64>,
    /// Length of the final stretch.
    pub tail: u64,
    /// Where the warm-up ends (W until it settles).
    pub end: u64,
    /// The metric every chain uses now.
    pub metric: Metric,
    /// The windows closed so far.
    pub history: Vec<WindowReport>,
    /// Iteration at which the warm-up settled, if it did.
    pub settled: Option<u64>,
    /// Whether the chains were given the pooled sampling step size (at `end`).
    pub finished: bool,
    /// Whether the kernel has a step size and metric to learn; a kernel without (the independence
    /// sampler) only burns in, and its warm-up settles as soon as the chains agree.
    #[serde(default = "yes")]
    pub adapts: bool,
}

fn yes() -> bool {
    true
}

impl WarmupPlan {
    /// The schedule for at most `max` warm-up iterations in dimension `n`.
    pub fn new(max: u64, n: usize) -> Self {
        let frac = |f: f64, least: u64| ((max as f64 * f).ceil() as u64).max(least);
        let (start, first, tail) = (frac(0.075, 5), frac(0.05, 10), frac(0.15, 20));
        let mut windows = Vec::new();
        if start + first + tail <= max {
            let last = max - tail;
            let (mut s, mut w) = (start, first);
            loop {
                let e = s + w;
                if e + 2 * w > last {
                    windows.push(last);
                    break;
                }
                windows.push(e);
                s = e;
                w *= 2;
            }
        }
        WarmupPlan {
            max,
            start: if windows.is_empty() { max } else { start },
            windows,
            tail,
            end: max,
            metric: Metric::unit(n),
            history: Vec::new(),
            settled: None,
            finished: max == 0,
            adapts: true,
        }
    }

    /// The burn-in of a kernel without step size or metric (at most `max` iterations in dimension
    /// `n`): the same windows, ended as soon as the chains agree in one of them.
    pub fn burn_in(max: u64, n: usize) -> Self {
        WarmupPlan {
            adapts: false,
            ..WarmupPlan::new(max, n)
        }
    }

    /// Whether the draw left by iteration `done` (1-based count) goes into the current window.
    pub fn collects(&self, done: u64) -> bool {
        done > self.start && self.windows.first().is_some_and(|&e| done <= e)
    }

    /// The next barrier after iteration count `lowest`: a window's end or the warm-up's end.
    pub fn next_barrier(&self, lowest: u64) -> Option<u64> {
        self.windows
            .iter()
            .copied()
            .chain((!self.finished).then_some(self.end))
            .find(|&b| b > lowest)
    }

    /// Whether `at` is the end of the current window.
    pub fn window_ends_at(&self, at: u64) -> bool {
        self.windows.first() == Some(&at)
    }

    /// Closes the current window at `at` with each chain's window draws `chains` (in chain order) and
    /// the chains' averaged step sizes `steps`; returns the pooled step size to restart from.
    pub fn close_window(&mut self, at: u64, chains: &[&[Vec<f64>]], steps: &[f64]) -> f64 {
        self.windows.remove(0);
        let step = pooled_step(steps);
        let n = self.metric.dim();
        let rhat_max = rhat_max(chains, n);
        let Some(e) = estimate(chains, n) else {
            return step;
        };
        let moved = change(&self.metric, &e.metric);
        let report = WindowReport {
            end: at,
            draws: e.draws,
            shrinkage: e.shrinkage,
            change: moved,
            step_size: step,
            rhat_max,
        };
        let agree = rhat_max.is_nan() || rhat_max < SETTLED_RHAT;
        let tuned = !self.adapts
            || self.history.last().is_some_and(|prev| {
                (step / prev.step_size - 1.0).abs() < SETTLED_STEP && moved < SETTLED_METRIC
            });
        let settled = agree && tuned;
        self.history.push(report);
        if agree && self.adapts {
            self.metric = e.metric;
        }
        if settled && !self.windows.is_empty() {
            self.windows.clear();
            self.settled = Some(at);
            self.end = (at + self.tail).min(self.max);
        }
        step
    }

    /// Checks a plan read from a file against the run: at most `max` iterations in dimension `n`.
    pub fn check(&self, max: u64, n: usize) -> std::result::Result<(), String> {
        if self.max != max {
            return Err(format!("max is {}, the run's warm-up is {max}", self.max));
        }
        if self.end > self.max || self.windows.iter().any(|&w| w > self.end) {
            return Err(format!(
                "end {} or a window lies beyond the warm-up of {max}",
                self.end
            ));
        }
        if !self.windows.windows(2).all(|w| w[0] < w[1]) {
            return Err("windows are not in ascending order".into());
        }
        self.metric.check(n).map_err(|m| format!("metric: {m}"))
    }
}

/// The largest potential scale reduction sqrt(((m−1)/m W + B/m) / W) over the components, with m
/// draws per chain (the shortest chain's), W the mean within-chain variance and B/m the variance of
/// the chain means (Gelman & Rubin 1992); NaN with fewer than two chains or two draws, +∞ where a
/// component does not move within the chains but differs between them.
fn rhat_max(chains: &[&[Vec<f64>]], n: usize) -> f64 {
    let m = chains.iter().map(|c| c.len()).min().unwrap_or(0);
    if chains.len() < 2 || m < 2 {
        return f64::NAN;
    }
    let (k, mf) = (chains.len() as f64, m as f64);
    let mut worst: f64 = 1.0;
    for i in 0..n {
        let stats: Vec<(f64, f64)> = chains
            .iter()
            .map(|c| {
                let mean = c[..m].iter().map(|x| x[i]).sum::<f64>() / mf;
                let var = c[..m].iter().map(|x| (x[i] - mean).powi(2)).sum::<f64>() / (mf - 1.0);
                (mean, var)
            })
            .collect();
        let w = stats.iter().map(|s| s.1).sum::<f64>() / k;
        let grand = stats.iter().map(|s| s.0).sum::<f64>() / k;
        let b_over_m = stats.iter().map(|s| (s.0 - grand).powi(2)).sum::<f64>() / (k - 1.0);
        let r = if w > 0.0 {
            (((mf - 1.0) / mf * w + b_over_m) / w).sqrt()
        } else if b_over_m > 0.0 {
            f64::INFINITY
        } else {
            1.0
        };
        worst = worst.max(r);
    }
    worst
}

/// The geometric mean of the chains' step sizes (the pooled step size).
pub fn pooled_step(steps: &[f64]) -> f64 {
    let k = steps.len().max(1) as f64;
    (steps.iter().map(|s| s.ln()).sum::<f64>() / k).exp()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn schedule_of_a_thousand_iterations() {
        let p = WarmupPlan::new(1000, 3);
        assert_eq!(p.start, 75);
        assert_eq!(p.windows, vec![125, 225, 425, 850]);
        assert_eq!((p.tail, p.end), (150, 1000));
        assert!(!p.collects(75) && p.collects(76) && p.collects(125));
        assert_eq!(p.next_barrier(0), Some(125));
        assert_eq!(p.next_barrier(850), Some(1000));
    }

    #[test]
    fn short_warmups_have_no_windows() {
        let p = WarmupPlan::new(20, 2);
        assert!(p.windows.is_empty());
        assert!(!p.collects(3));
        assert_eq!(p.next_barrier(0), Some(20));
        assert!(WarmupPlan::new(0, 2).finished);
    }

    #[test]
    fn a_settled_warmup_ends_after_the_final_stretch() {
        let mut p = WarmupPlan::new(1000, 1);
        let draws: Vec<Vec<f64>> = (0..200)
            .map(|i| vec![((i % 20) as f64 - 9.5) / 3.0])
            .collect();
        let refs: Vec<&[Vec<f64>]> = vec![&draws, &draws];
        p.close_window(125, &refs, &[0.5, 0.5]);
        assert_eq!(p.end, 1000);
        let step = p.close_window(225, &refs, &[0.55, 0.5]);
        assert!((step - (0.55f64 * 0.5).sqrt()).abs() < 1e-15);
        assert_eq!((p.settled, p.end), (Some(225), 375));
        assert!(p.windows.is_empty());
        assert_eq!(p.next_barrier(225), Some(375));
        assert!(p.check(1000, 1).is_ok());
        assert!(p.check(999, 1).is_err());
    }

    #[test]
    fn a_moving_metric_keeps_the_warmup_going() {
        let mut p = WarmupPlan::new(1000, 1);
        let narrow: Vec<Vec<f64>> = (0..400)
            .map(|i| vec![((i % 20) as f64 - 9.5) / 9.0])
            .collect();
        let wide: Vec<Vec<f64>> = (0..400).map(|i| vec![(i % 20) as f64 - 9.5]).collect();
        p.close_window(125, &[&narrow], &[0.5]);
        p.close_window(225, &[&wide], &[0.5]);
        assert_eq!((p.settled, p.end), (None, 1000));
        assert_eq!(p.windows, vec![425, 850]);
    }

    #[test]
    fn chains_that_disagree_keep_the_warmup_going() {
        // Two chains around 0 and around 5 with unit spread: W = 35/12 ≈ 2.9 (the variance of
        // 0.5·(1…20 mod 20) is 33.25/4·…, any spread well below the gap will do), B/m = 12.5, so the
        // potential scale reduction is far above 1.1.
        let mut p = WarmupPlan::new(1000, 1);
        let a: Vec<Vec<f64>> = (0..100)
            .map(|i| vec![((i % 7) as f64 - 3.0) / 2.0])
            .collect();
        let b: Vec<Vec<f64>> = a.iter().map(|x| vec![x[0] + 5.0]).collect();
        p.close_window(125, &[&a, &b], &[0.5, 0.5]);
        p.close_window(225, &[&a, &b], &[0.5, 0.5]);
        assert!(p.history[1].rhat_max > 2.0, "{}", p.history[1].rhat_max);
        assert_eq!((p.settled, p.end), (None, 1000));
        assert!(
            p.metric.is_unit(),
            "a window of disagreeing chains leaves the metric alone"
        );
        // The same draws in both chains agree exactly (R = sqrt((m−1)/m) < 1, reported as 1).
        let mut q = WarmupPlan::new(1000, 1);
        q.close_window(125, &[&a, &a], &[0.5, 0.5]);
        q.close_window(225, &[&a, &a], &[0.5, 0.5]);
        assert_eq!(q.history[1].rhat_max, 1.0);
        assert_eq!(q.settled, Some(225));
    }
}

#[cfg(test)]
mod burn_in_tests {
    use super::*;

    #[test]
    fn a_burn_in_ends_at_the_first_window_where_the_chains_agree() {
        let mut p = WarmupPlan::burn_in(1000, 1);
        let a: Vec<Vec<f64>> = (0..50)
            .map(|i| vec![((i % 7) as f64 - 3.0) / 2.0])
            .collect();
        let b: Vec<Vec<f64>> = a.iter().map(|x| vec![x[0] + 5.0]).collect();
        p.close_window(125, &[&a, &b], &[1.0, 1.0]);
        assert_eq!((p.settled, p.end), (None, 1000), "chains apart: not yet");
        p.close_window(225, &[&a, &a], &[1.0, 1.0]);
        assert_eq!((p.settled, p.end), (Some(225), 375));
        assert!(p.metric.is_unit(), "nothing is learned for such a kernel");
    }
}
