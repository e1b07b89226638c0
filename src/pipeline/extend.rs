//! Running the chains until the answer is good enough: the first block (warm-up and `draws`), then,
//! with a target effective sample size, blocks of more draws until every component's bulk and tail
//! ESS reach it and R-hat is below the verdict's limit, within the run's budget of model runs and of
//! wall-clock time ([`crate::sampler::stop`]).
//!
//! Between blocks the draws files are diagnosed; the next block's size depends only on those draws and
//! on the evaluation counts of the checkpoint, so a run killed during a block and resumed chooses the
//! same blocks and writes the same files as an uninterrupted one.

use std::path::Path;
use std::time::{Duration, Instant};

use super::diagnose::diagnose;
use crate::config::RunConfig;
use crate::diagnostics::{ComponentStats, RHAT_LIMIT};
use crate::error::{Error, Result};
use crate::interrupt::Interrupt;
use crate::sampler::stop::{next_block, StopReason};
use crate::sampler::{
    run_extended, ChainDraws, Checkpoint, Ended, Ensemble, Extension, Limits, Progress,
    SampleResult, Target,
};

/// The chains of a run and why they stopped.
pub struct Chained {
    pub result: SampleResult,
    pub stop: StopReason,
}

/// Where the run stands when the chains start.
#[derive(Debug, Clone, Copy)]
pub struct Before {
    /// When this invocation began (the time limit counts from there).
    pub started: Instant,
    /// The model runs the stages before the chains needed.
    pub runs: u64,
}

/// Runs the chains of `cfg` into `out` (continuing from `resume`) until the stop rule of `cfg` ends
/// them.
pub fn run_chains(
    target: &Target<'_>,
    cfg: &RunConfig,
    out: &Path,
    resume: Option<Checkpoint>,
    before: Before,
    interrupt: &Interrupt,
    progress: &dyn Progress,
) -> Result<Chained> {
    let limits = limits(cfg, before.started, before.runs)?;
    let mut ck = resume;
    let mut extra = None;
    loop {
        let ext = Extension {
            extra_draws: extra,
            limits,
        };
        let (result, ended) = run_extended(
            target,
            &cfg.sampler,
            out,
            ck.take(),
            &ext,
            interrupt,
            progress,
        )?;
        let stop = match ended {
            Ended::MaxEvaluations => Some(StopReason::MaxEvaluations),
            Ended::TimeLimit => Some(StopReason::TimeLimit),
            Ended::Finished if cfg.stop.target_ess == 0 => Some(StopReason::Draws),
            Ended::Finished => None,
        };
        if let Some(stop) = stop {
            // A limit that stopped a block after its draws had already met the target did not end
            // the run short of it.
            let met = stop.cut_short()
                && draws_per_chain(&result) >= 4
                && cfg.stop.target_ess > 0
                && target_met(out, cfg)?;
            return done(result, if met { StopReason::TargetMet } else { stop }, out);
        }
        let (min_ess, rhat_ok) = reading(out, cfg.sampler.chains)?;
        if rhat_ok && min_ess >= cfg.stop.target_ess as f64 {
            return done(result, StopReason::TargetMet, out);
        }
        if limits.deadline.is_some_and(|d| Instant::now() >= d) {
            return done(result, StopReason::TimeLimit, out);
        }
        let per_chain = draws_per_chain(&result);
        let affordable = limits
            .max_chain_runs
            .map(|max| affordable_draws(&result, max, cfg.sampler.thin));
        let Some(block) = next_block(per_chain, min_ess, cfg.stop.target_ess, affordable) else {
            return done(result, StopReason::MaxEvaluations, out);
        };
        let saved = Checkpoint::load(out)?;
        extra = Some(saved.extra_draws + block);
        ck = Some(saved);
    }
}

/// The limits of the chains: the deadline of this invocation and the model runs left for the chains
/// after the stages before them. A budget those stages already spent is an error.
fn limits(cfg: &RunConfig, started: Instant, runs_before: u64) -> Result<Limits> {
    let max_chain_runs = match cfg.stop.max_evaluations {
        Some(m) if m <= runs_before => {
            return Err(Error::Config(format!(
                "--max-evaluations {m}: the stages before the chains (gradient test, analysis, \
                 Hessian, Laplace check) already needed {runs_before} model runs, leaving none for \
                 the chains; raise it well above {runs_before}"
            )))
        }
        Some(m) => Some(m - runs_before),
        None => None,
    };
    Ok(Limits {
        deadline: cfg
            .stop
            .time_limit
            .and_then(|t| started.checked_add(Duration::from_secs_f64(t))),
        max_chain_runs,
    })
}

/// The chains' result, after checking that they hold enough draws to be diagnosed.
fn done(result: SampleResult, stop: StopReason, out: &Path) -> Result<Chained> {
    let held = draws_per_chain(&result);
    if held < 4 && stop == StopReason::MaxEvaluations {
        return Err(Error::Config(format!(
            "--max-evaluations: the budget ended the run before the chains held 4 draws each (they \
             hold {held}, after {} model runs for the chains, warm-up included); run again with a \
             larger budget",
            result.counts_warmup.plus(&result.counts_sampling).model_runs()
        )));
    }
    if held < 4 {
        return Err(Error::Interrupted(format!(
            "the {} ended the run before the chains held 4 draws each (they hold {held}); the state \
             is saved in {}",
            stop.name(),
            out.display()
        )));
    }
    Ok(Chained { result, stop })
}

/// The fewest draws any chain holds.
pub fn draws_per_chain(result: &SampleResult) -> u64 {
    result.chains.iter().map(|c| c.draws).min().unwrap_or(0)
}

/// Whether the draws in `out` meet the run's target.
fn target_met(out: &Path, cfg: &RunConfig) -> Result<bool> {
    let (min_ess, rhat_ok) = reading(out, cfg.sampler.chains)?;
    Ok(rhat_ok && min_ess >= cfg.stop.target_ess as f64)
}

/// The smallest bulk or tail ESS over the components (NaN when one is NaN), and whether every R-hat
/// is below its limit.
fn reading(out: &Path, chains: usize) -> Result<(f64, bool)> {
    let ensemble = Ensemble::Chains(ChainDraws::open(out, chains)?);
    let (stats, _) = diagnose(&ensemble)?;
    Ok((min_ess(&stats), stats.iter().all(|s| s.rhat < RHAT_LIMIT)))
}

/// The smallest bulk or tail ESS over the components; NaN when any is NaN or there are none.
pub fn min_ess(stats: &[ComponentStats]) -> f64 {
    stats
        .iter()
        .flat_map(|s| [s.ess_bulk, s.ess_tail])
        .try_fold(f64::INFINITY, |m, v| (!v.is_nan()).then(|| m.min(v)))
        .filter(|m| m.is_finite())
        .unwrap_or(f64::NAN)
}

/// Draws per chain the chains can still afford within `max` model runs for the chains, at the model
/// runs per sampling iteration measured so far.
fn affordable_draws(result: &SampleResult, max: u64, thin: u64) -> u64 {
    let used = result.counts_warmup.model_runs() + result.counts_sampling.model_runs();
    if used >= max {
        return 0;
    }
    let iterations: u64 = result
        .chains
        .iter()
        .map(|c| c.stats.sampling.iterations)
        .sum();
    if iterations == 0 {
        return 0;
    }
    let per_iteration = result.counts_sampling.model_runs() as f64 / iterations as f64;
    let per_draw = per_iteration * thin as f64 * result.chains.len().max(1) as f64;
    let room = (max - used) as f64 / per_draw;
    if room.is_finite() {
        room.floor() as u64
    } else {
        u64::MAX
    }
}
