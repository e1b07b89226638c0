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
//! 3. a final stretch of 5 % of W (at least 5 iterations) adapts the step size for the last metric;
//!    at its end every chain samples with the pooled step size.
//!
//! The warm-up ends early when it has settled: from the second window on, when the pooled step size
//! changed by less than [`SETTLED_STEP`] and the metric's spread per component (the diagonal, root
//! mean square of the log ratios) by less than [`SETTLED_METRIC`] between the last two windows, the
//! remaining windows are dropped and the final stretch follows at once. Both tolerances are our
//! choice (a 20 % change of a step size or of a spread changes the cost of a draw by about as much).
//!
//! Everything here runs between segments, on one thread, in chain order, so the same seed gives the
//! same bits for any number of threads; the plan is saved in the checkpoint.

use super::pooled::{change, estimate};
use super::metric::Metric;

/// Largest relative change of the pooled step size between two windows for the warm-up to settle.
pub const SETTLED_STEP: f64 = 0.2;
/// Largest change of the metric (RMS log ratio of the spreads) for the warm-up to settle.
pub const SETTLED_METRIC: f64 = 0.2;

/// What one metric window found.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct WindowReport {
    /// Iteration at which the window closed.
    pub end: u64,
    /// Pooled draws it used.
    pub draws: usize,
    /// Shrinkage weight towards the Laplace metric.
    pub shrinkage: f64,
    /// Change of the metric from the one before (RMS log ratio of the spreads).
    pub change: f64,
    /// The pooled step size at the window's end.
    pub step_size: f64,
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
}

impl WarmupPlan {
    /// The schedule for at most `max` warm-up iterations in dimension `n`.
    pub fn new(max: u64, n: usize) -> Self {
        let frac = |f: f64, least: u64| ((max as f64 * f).ceil() as u64).max(least);
        let (start, first, tail) = (frac(0.075, 5), frac(0.05, 10), frac(0.05, 5));
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

    /// Closes the current window at `at` with the pooled `draws` (chain order) and the chains' averaged
    /// step sizes `steps`; returns the pooled step size to restart from.
    pub fn close_window(&mut self, at: u64, draws: &[&[f64]], steps: &[f64]) -> f64 {
        self.windows.remove(0);
        let step = pooled_step(steps);
        let n = self.metric.dim();
        let Some(e) = estimate(draws, n) else {
            return step;
        };
        let moved = change(&self.metric, &e.metric);
        let report = WindowReport {
            end: at,
            draws: e.draws,
            shrinkage: e.shrinkage,
            change: moved,
            step_size: step,
        };
        let settled = self.history.last().is_some_and(|prev| {
            (step / prev.step_size - 1.0).abs() < SETTLED_STEP && moved < SETTLED_METRIC
        });
        self.history.push(report);
        self.metric = e.metric;
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
        assert_eq!(p.windows, vec![125, 225, 425, 950]);
        assert_eq!((p.tail, p.end), (50, 1000));
        assert!(!p.collects(75) && p.collects(76) && p.collects(125));
        assert_eq!(p.next_barrier(0), Some(125));
        assert_eq!(p.next_barrier(950), Some(1000));
    }

    #[test]
    fn short_warmups_have_no_windows() {
        let p = WarmupPlan::new(15, 2);
        assert!(p.windows.is_empty());
        assert!(!p.collects(3));
        assert_eq!(p.next_barrier(0), Some(15));
        assert!(WarmupPlan::new(0, 2).finished);
    }

    #[test]
    fn a_settled_warmup_ends_after_the_final_stretch() {
        let mut p = WarmupPlan::new(1000, 1);
        let draws: Vec<Vec<f64>> = (0..400).map(|i| vec![((i % 20) as f64 - 9.5) / 3.0]).collect();
        let refs: Vec<&[f64]> = draws.iter().map(|v| v.as_slice()).collect();
        p.close_window(125, &refs, &[0.5, 0.5]);
        assert_eq!(p.end, 1000);
        let step = p.close_window(225, &refs, &[0.55, 0.5]);
        assert!((step - (0.55f64 * 0.5).sqrt()).abs() < 1e-15);
        assert_eq!((p.settled, p.end), (Some(225), 275));
        assert!(p.windows.is_empty());
        assert_eq!(p.next_barrier(225), Some(275));
        assert!(p.check(1000, 1).is_ok());
        assert!(p.check(999, 1).is_err());
    }

    #[test]
    fn a_moving_metric_keeps_the_warmup_going() {
        let mut p = WarmupPlan::new(1000, 1);
        let narrow: Vec<Vec<f64>> = (0..400).map(|i| vec![((i % 20) as f64 - 9.5) / 9.0]).collect();
        let wide: Vec<Vec<f64>> = (0..400).map(|i| vec![(i % 20) as f64 - 9.5]).collect();
        let r1: Vec<&[f64]> = narrow.iter().map(|v| v.as_slice()).collect();
        let r2: Vec<&[f64]> = wide.iter().map(|v| v.as_slice()).collect();
        p.close_window(125, &r1, &[0.5]);
        p.close_window(225, &r2, &[0.5]);
        assert_eq!((p.settled, p.end), (None, 1000));
        assert_eq!(p.windows, vec![425, 950]);
    }
}
