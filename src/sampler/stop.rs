//! When a sampling run stops: after the fixed `--draws`, or, with a target effective sample size, once
//! every component's bulk and tail ESS reach it and R-hat is below its limit, the chains extended in
//! blocks until then, within a budget of model runs and of wall-clock time.
//!
//! The size of the next block is a pure function of the draws so far and of the diagnostics computed
//! from them ([`next_block`]), so that a resumed run chooses the same blocks as an uninterrupted one.

use crate::error::{Error, Result};

/// The target effective sample size of the command line's default (the verdict's own limit,
/// [`crate::diagnostics::verdict::ESS_LIMIT`]).
pub const DEFAULT_TARGET_ESS: u64 = 400;

/// The smallest extension block, as a fraction of the draws per chain so far (common practice, no
/// source: blocks much smaller than this spend more on diagnostics than they gain).
pub const MIN_BLOCK_FRACTION: f64 = 0.25;

/// Settings of when the chains stop. They change the result, so they belong to the run record.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct StopRule {
    /// Extend the chains until every component's bulk and tail ESS reach this and R-hat is below
    /// the verdict's limit; 0 keeps the fixed `draws`.
    pub target_ess: u64,
    /// Model runs for the whole run, every stage counted; `None`: no limit.
    pub max_evaluations: Option<u64>,
    /// Wall-clock seconds of each invocation (`sample`, and each `resume`); `None`: no limit.
    pub time_limit: Option<f64>,
}

impl Default for StopRule {
    /// The fixed draws, no limits: what runs recorded before these settings existed did.
    fn default() -> Self {
        StopRule {
            target_ess: 0,
            max_evaluations: None,
            time_limit: None,
        }
    }
}

/// Why the chains of a run stopped, as the summary and the printed output name it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum StopReason {
    /// The fixed draws were reached (`--target-ess 0`).
    Draws,
    /// Every component reached the target ESS, with R-hat below its limit.
    TargetMet,
    /// The budget of model runs left no room for more.
    MaxEvaluations,
    /// The wall-clock limit passed.
    TimeLimit,
}

impl StopReason {
    /// The reason in words (the summary's spelling).
    pub fn name(self) -> &'static str {
        match self {
            StopReason::Draws => "draws",
            StopReason::TargetMet => "target met",
            StopReason::MaxEvaluations => "max evaluations",
            StopReason::TimeLimit => "time limit",
        }
    }

    /// Whether a limit ended the run before the target was met.
    pub fn cut_short(self) -> bool {
        matches!(self, StopReason::MaxEvaluations | StopReason::TimeLimit)
    }
}

impl StopRule {
    /// Checks the settings, naming the bad one.
    pub fn validate(&self) -> Result<()> {
        if self.target_ess > 1_000_000_000 {
            return Err(Error::Config(format!(
                "--target-ess {}: at most 1,000,000,000 (or 0 to keep the fixed --draws)",
                self.target_ess
            )));
        }
        if self.max_evaluations == Some(0) {
            return Err(Error::Config(
                "--max-evaluations 0: give a positive number of model runs, or leave the option \
                 out for no limit"
                    .into(),
            ));
        }
        if let Some(t) = self.time_limit {
            if !(t.is_finite() && t > 0.0 && t <= 1e9) {
                return Err(Error::Config(format!(
                    "--time-limit {t}: give seconds above 0 and at most 1e9, or leave the option \
                     out for no limit"
                )));
            }
        }
        Ok(())
    }
}

/// The draws per chain of the next block: enough to reach `target` at the rate measured so far
/// (`draws` per chain gave `min_ess`), at least [`MIN_BLOCK_FRACTION`] of `draws` (and 1), at most
/// `affordable` (what the budget allows). `Some(0)` never: `None` when nothing is affordable.
pub fn next_block(draws: u64, min_ess: f64, target: u64, affordable: Option<u64>) -> Option<u64> {
    let d = draws as f64;
    let needed = if min_ess.is_finite() && min_ess > 0.0 {
        (d * (target as f64 / min_ess) - d).ceil()
    } else {
        // Nothing measured to extrapolate from: double the draws.
        d
    };
    let floor = (d * MIN_BLOCK_FRACTION).ceil().max(1.0);
    // Never more than 100 times the draws so far in one block: a rate measured on few draws is rough.
    let block = needed.max(floor).min(d * 100.0 + 1.0) as u64;
    let block = affordable.map_or(block, |a| block.min(a));
    (block > 0).then_some(block)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn blocks_follow_the_measured_rate() {
        // 100 draws gave ESS 50: 400 needs 800 draws, so 700 more.
        assert_eq!(next_block(100, 50.0, 400, None), Some(700));
        // Nearly there: the block is at least a quarter of the draws.
        assert_eq!(next_block(100, 390.0, 400, None), Some(25));
        // The budget caps it, and nothing affordable ends the run.
        assert_eq!(next_block(100, 50.0, 400, Some(30)), Some(30));
        assert_eq!(next_block(100, 50.0, 400, Some(0)), None);
        // No rate measured (NaN ESS): double.
        assert_eq!(next_block(100, f64::NAN, 400, None), Some(100));
        assert_eq!(next_block(100, 0.0, 400, None), Some(100));
        // A wild rate is capped at 100 times the draws so far.
        assert_eq!(next_block(10, 0.001, 400, None), Some(1001));
    }

    #[test]
    fn bad_settings_are_refused_by_name() {
        let bad = |r: StopRule, what: &str| {
            let e = r.validate().unwrap_err().to_string();
            assert!(e.contains(what), "{e}");
        };
        bad(
            StopRule {
                max_evaluations: Some(0),
                ..Default::default()
            },
            "--max-evaluations",
        );
        for t in [f64::NAN, -1.0, 0.0, f64::INFINITY] {
            bad(
                StopRule {
                    time_limit: Some(t),
                    ..Default::default()
                },
                "--time-limit",
            );
        }
        StopRule::default().validate().unwrap();
    }
}
