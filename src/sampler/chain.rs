//! Running the chains: start points, warm-up, sampling, streaming of the draws, checkpoints.
//!
//! Chains run in parallel (rayon), each with its own random stream: chain c uses
//! `ChaCha8Rng::seed_from_u64(seed)` with `set_stream(c)`. Nothing a chain computes depends on another
//! chain or on the thread that runs it, so one seed gives bit-identical output whatever the thread
//! count, and a run resumed from a checkpoint continues exactly as the uninterrupted run would.
//!
//! The run advances in segments that end at multiples of `checkpoint_every` iterations and at the end
//! of the warm-up. After each segment every draws file is synced and the checkpoint rewritten; the
//! evaluation counts of a segment belong to its phase (warm-up or sampling), which segments never mix.
//! The interrupt flag and a fatal evaluation error stop the chains at the next iteration; the state is
//! saved before the error is returned.
//!
//! Start points: u = s·z with z ~ N(0, I) from the chain's stream and s = `init_scale` (default 2: a
//! draw from the Laplace approximation with doubled spread, over-dispersed as recommended by Gelman &
//! Rubin 1992, "Inference from iterative simulation using multiple sequences", Statistical Science 7(4)).
//! Where π cannot be evaluated there, s is halved (up to 20 times), then the analysis itself is used.

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Instant;

use rand::SeedableRng;
use rayon::prelude::*;

use super::checkpoint::{checkpoint_path, Checkpoint};
use super::config::{MetricLearning, SampleConfig};
use super::draws::{
    draws_path, DrawRecord, DrawsWriter, FLAG_ACCEPTED, FLAG_DIVERGENT, FLAG_NONFINITE,
};
use super::state::{ChainCheckpoint, RngState};
pub use super::state::{ChainStats, PhaseStats};
use super::welford::Welford;
use super::{standard_normal, ChainRng, ChainState, Kernel, Metric, Target};
use crate::adapt::{plan::pooled_step, Warmup, WarmupPlan};
use crate::error::{Error, Result};
use crate::interrupt::Interrupt;
use crate::problem::EvalCounts;

/// Told after every iteration of every chain (from the chains' threads).
pub trait Progress: Sync {
    /// Chain `chain` has done `done` of its `total` iterations (warm-up included).
    fn advance(&self, chain: usize, done: u64, total: u64);
}

impl<F: Fn(usize, u64, u64) + Sync> Progress for F {
    fn advance(&self, chain: usize, done: u64, total: u64) {
        self(chain, done, total)
    }
}

/// Where a run may stop before its planned end. Both are checked between segments (every
/// `checkpoint_every` iterations and at the warm-up's barriers), where every chain is at the same
/// iteration and the state is saved.
#[derive(Debug, Clone, Copy, Default)]
pub struct Limits {
    /// Stop at the first segment end after this instant.
    pub deadline: Option<Instant>,
    /// The model runs the chains may spend in all (warm-up, start points and sampling, over every
    /// block). Each segment is cut short so that, at the model runs per iteration measured so far,
    /// it stays within them.
    pub max_chain_runs: Option<u64>,
}

/// Why the chains stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ended {
    /// Every chain holds all its draws.
    Finished,
    /// [`Limits::max_chain_runs`] left no room for another iteration.
    MaxEvaluations,
    /// [`Limits::deadline`] had passed.
    TimeLimit,
}

/// What one chain reports.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ChainSummary {
    /// Chain index.
    pub chain: usize,
    /// Mean acceptance probability over the sampling iterations.
    pub acceptance: f64,
    /// Mean acceptance probability over the warm-up.
    pub warmup_acceptance: f64,
    /// The adapted step size used for sampling (`None` for kernels without one).
    pub step_size: Option<f64>,
    /// The refined diagonal metric (inverse mass matrix in whitened coordinates), where the warm-up
    /// refined it.
    pub metric: Option<Vec<f64>>,
    /// Divergent trajectories while sampling.
    pub divergences: u64,
    /// Proposals rejected as non-evaluable while sampling.
    pub rejected_nonfinite: u64,
    /// Counters by phase (warm-up numbers are reported here, apart from the kept draws).
    pub stats: ChainStats,
    /// Kept draws.
    pub draws: u64,
    /// Mean of the kept draws (model space).
    pub mean: Vec<f64>,
    /// Variance of the kept draws (model space).
    pub variance: Vec<f64>,
    /// The chain's draws file.
    pub draws_file: PathBuf,
}

/// The outcome of a sampling run.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct SampleResult {
    /// The kernel's name.
    pub kernel: &'static str,
    /// Per chain.
    pub chains: Vec<ChainSummary>,
    /// Posterior mean over all chains' kept draws (model space).
    pub mean: Vec<f64>,
    /// Posterior variance over all chains' kept draws.
    pub variance: Vec<f64>,
    /// Kept draws over all chains.
    pub draws: u64,
    /// Evaluations during the warm-up (start points included).
    pub counts_warmup: EvalCounts,
    /// Evaluations while sampling.
    pub counts_sampling: EvalCounts,
    /// Warm-up iterations each chain did.
    pub warmup_iterations: u64,
    /// The pooled warm-up: its windows, the learned metric, where it settled.
    pub plan: Option<WarmupPlan>,
}

struct Runner {
    index: usize,
    rng: ChainRng,
    state: ChainState,
    iteration: u64,
    warmup: Warmup,
    step_size: f64,
    stats: ChainStats,
    moments: Welford,
    writer: DrawsWriter,
    /// Whitened positions of the current window of the pooled warm-up.
    window: Vec<Vec<f64>>,
}

/// What a chain needs besides its own state.
struct Ctx<'t, 'a> {
    target: &'t Target<'a>,
    kernel: &'t dyn Kernel,
    config: &'t SampleConfig,
    interrupt: &'t Interrupt,
    abort: &'t AtomicBool,
    progress: &'t dyn Progress,
    /// Draws per chain beyond `config.draws` (the blocks added by an extension).
    extra_draws: u64,
}

impl Runner {
    fn start(index: usize, ctx: &Ctx<'_, '_>, out_dir: &Path) -> Result<Runner> {
        let (target, kernel, config) = (ctx.target, ctx.kernel, ctx.config);
        let n = target.dim();
        let mut rng = ChainRng::seed_from_u64(config.seed);
        rng.set_stream(index as u64);
        let mut state = None;
        let mut scale = config.init_scale;
        for _ in 0..20 {
            let z = standard_normal(&mut rng, n);
            if let Some(s) = kernel.init(target, z.iter().map(|v| scale * v).collect())? {
                state = Some(s);
                break;
            }
            scale *= 0.5;
        }
        let state = match state {
            Some(s) => s,
            None => kernel.init(target, vec![0.0; n])?.ok_or_else(|| {
                Error::Numerical(format!(
                    "chain {index}: the cost cannot be evaluated at the analysis nor at 20 start points \
                     near it; check the problem at the analysis"
                ))
            })?,
        };
        let warmup = match kernel.spec(n).step_size {
            Some(spec) if config.learning() == MetricLearning::Pooled => Warmup::pooled(
                config.warmup,
                n,
                config.initial_step_size.unwrap_or(spec.initial),
                config.target_accept.unwrap_or(spec.target_accept),
            )?,
            Some(spec) => Warmup::init(
                config.warmup,
                n,
                config.initial_step_size.unwrap_or(spec.initial),
                config.target_accept.unwrap_or(spec.target_accept),
                true,
                config.learning() == MetricLearning::PerChainDiagonal,
            )?,
            // No step size: the schedule only counts the burn-in iterations.
            None => Warmup::init(config.warmup, n, 1.0, 0.5, false, false)?,
        };
        let writer = DrawsWriter::create(&draws_path(out_dir, index), n, index)?;
        Ok(Runner {
            index,
            rng,
            state,
            iteration: 0,
            step_size: warmup.finish(),
            warmup,
            stats: ChainStats::default(),
            moments: Welford::new(n),
            writer,
            window: Vec::new(),
        })
    }

    fn restore(index: usize, c: &ChainCheckpoint, n: usize, out_dir: &Path) -> Result<Runner> {
        let writer = DrawsWriter::resume(&draws_path(out_dir, index), n, index, c.records)?;
        Ok(Runner {
            index,
            rng: c.rng.restore(),
            state: c.state.clone(),
            iteration: c.iteration,
            warmup: c.warmup.clone(),
            step_size: c.step_size,
            stats: c.stats.clone(),
            moments: c.moments.clone(),
            writer,
            window: c.window.clone(),
        })
    }

    fn save(&self) -> ChainCheckpoint {
        ChainCheckpoint {
            iteration: self.iteration,
            records: self.writer.records(),
            state: self.state.clone(),
            rng: RngState::save(&self.rng),
            warmup: self.warmup.clone(),
            step_size: self.step_size,
            stats: self.stats.clone(),
            moments: self.moments.clone(),
            window: self.window.clone(),
        }
    }

    /// Runs iterations until `until`, an interrupt or an abort. On error the chain is left as it was
    /// before the failed iteration (random stream included), so that a checkpoint written afterwards
    /// resumes that iteration exactly.
    fn advance(&mut self, until: u64, ctx: &Ctx<'_, '_>, plan: Option<&WarmupPlan>) -> Result<()> {
        let cfg = ctx.config;
        let warmup_end = plan.map_or(cfg.warmup, |p| p.end);
        let total = warmup_end + (cfg.draws + ctx.extra_draws) * cfg.thin;
        let fixed_metric = match plan {
            Some(p) => p.metric.clone(),
            None => Metric::unit(self.state.u.len()),
        };
        while self.iteration < until {
            if ctx.interrupt.is_set() || ctx.abort.load(Ordering::Relaxed) {
                break;
            }
            let in_warmup = self.iteration < warmup_end;
            let eps = if in_warmup {
                self.warmup.step_size()
            } else {
                self.step_size
            };
            let rng_before = self.rng.clone();
            let own;
            let metric = if self.warmup.adapts_metric() {
                own = Metric::diagonal(self.warmup.metric());
                &own
            } else {
                &fixed_metric
            };
            let step = ctx
                .kernel
                .step(ctx.target, &mut self.rng, &self.state, eps, metric);
            let (next, info) = match step {
                Ok(r) => r,
                Err(e) => {
                    self.rng = rng_before;
                    return Err(e);
                }
            };
            if in_warmup {
                let mut w = self.warmup.clone();
                if let Err(e) = w.update(info.accept_prob, &next.u) {
                    self.rng = rng_before;
                    return Err(e);
                }
                if plan.is_none() && w.is_done() {
                    self.step_size = w.finish();
                }
                if plan.is_some_and(|p| p.collects(w.done())) {
                    self.window.push(next.u.clone());
                }
                self.warmup = w;
                self.stats.warmup.add(&info);
            } else {
                if (self.iteration - warmup_end + 1).is_multiple_of(cfg.thin) {
                    let mut x = vec![0.0; next.u.len()];
                    ctx.target.to_model(&next.u, &mut x);
                    let flags = if info.accepted { FLAG_ACCEPTED } else { 0 }
                        | if info.divergent { FLAG_DIVERGENT } else { 0 }
                        | if info.nonfinite { FLAG_NONFINITE } else { 0 };
                    let rec = DrawRecord {
                        x,
                        log_density: next.log_density,
                        accept_prob: info.accept_prob,
                        energy: info.energy,
                        step_size: info.step_size,
                        flags,
                        n_steps: info.n_steps,
                    };
                    if let Err(e) = self.writer.append(&rec) {
                        self.rng = rng_before;
                        return Err(e);
                    }
                    self.moments.push(&rec.x);
                }
                self.stats.sampling.add(&info);
            }
            self.state = next;
            self.iteration += 1;
            ctx.progress.advance(self.index, self.iteration, total);
        }
        Ok(())
    }

    fn summary(&self, has_step: bool, out_dir: &Path) -> ChainSummary {
        ChainSummary {
            chain: self.index,
            acceptance: self.stats.sampling.acceptance(),
            warmup_acceptance: self.stats.warmup.acceptance(),
            step_size: has_step.then_some(self.step_size),
            metric: self
                .warmup
                .adapts_metric()
                .then(|| self.warmup.metric().to_vec()),
            divergences: self.stats.sampling.divergences,
            rejected_nonfinite: self.stats.sampling.rejected_nonfinite,
            stats: self.stats.clone(),
            draws: self.moments.count(),
            mean: self.moments.mean().to_vec(),
            variance: self.moments.variance(),
            draws_file: draws_path(out_dir, self.index),
        }
    }
}

/// Samples `target` with the settings `config`, streaming the draws into `out_dir` (one
/// `chain-<c>.draws` file per chain, see [`super::draws`]) and keeping `checkpoint.vpck` there up to
/// date.
///
/// - `resume`: the checkpoint of an earlier run in the same folder ([`Checkpoint::load`]); it must
///   match the target and settings. Without it the folder must not hold a checkpoint already.
/// - `interrupt`: polled every iteration; when set, the state is saved and
///   [`Error::Interrupted`] returned.
/// - `progress`: told after every iteration.
///
/// A non-recoverable evaluation error stops all chains; the state before the failed iteration is saved
/// and the error returned.
pub fn run(
    target: &Target<'_>,
    config: &SampleConfig,
    out_dir: &Path,
    resume: Option<Checkpoint>,
    interrupt: &Interrupt,
    progress: &dyn Progress,
) -> Result<SampleResult> {
    let plan = Extension::default();
    run_extended(target, config, out_dir, resume, &plan, interrupt, progress).map(|(r, _)| r)
}

/// How far [`run_extended`] takes the chains.
#[derive(Debug, Clone, Copy, Default)]
pub struct Extension {
    /// Draws per chain beyond `config.draws`, in all; `None` keeps the checkpoint's (0 for a new
    /// run). It may not be below what the checkpoint already asked for.
    pub extra_draws: Option<u64>,
    /// Where to stop before the end.
    pub limits: Limits,
}

/// [`run`] with an extension: the chains run to `config.draws + extra_draws` draws each (continuing
/// from `resume`, which may be a finished run), or until a limit of `ext` stops them, their state
/// saved. Returns the result of the draws held and why the chains stopped.
pub fn run_extended(
    target: &Target<'_>,
    config: &SampleConfig,
    out_dir: &Path,
    resume: Option<Checkpoint>,
    ext: &Extension,
    interrupt: &Interrupt,
    progress: &dyn Progress,
) -> Result<(SampleResult, Ended)> {
    let kernel = config.build_kernel()?;
    std::fs::create_dir_all(out_dir).map_err(|e| Error::io(out_dir, e))?;
    let saved_extra = resume.as_ref().map_or(0, |c| c.extra_draws);
    let extra_draws = ext.extra_draws.unwrap_or(saved_extra);
    if extra_draws < saved_extra {
        return Err(Error::Config(format!(
            "the run in {} already extends its chains by {saved_extra} draws; an extension cannot \
             take back draws (asked for {extra_draws})",
            out_dir.display()
        )));
    }
    let abort = AtomicBool::new(false);
    let ctx = Ctx {
        target,
        kernel: kernel.as_ref(),
        config,
        interrupt,
        abort: &abort,
        progress,
        extra_draws,
    };
    let mut chains = match resume {
        Some(ck) => Chains::restore(ck, &ctx, out_dir)?,
        None => Chains::start(&ctx, out_dir)?,
    };
    chains.extra_draws = extra_draws;
    chains.save(&ctx, out_dir, false)?;
    let ended = chains.run_segments(&ctx, out_dir, &ext.limits)?;
    if ended == Ended::Finished {
        chains.save(&ctx, out_dir, true)?;
    }
    Ok((chains.result(&ctx, out_dir), ended))
}

/// All chains of a run and the evaluations spent so far, by phase.
struct Chains {
    runners: Vec<Runner>,
    counts_warmup: EvalCounts,
    counts_sampling: EvalCounts,
    /// The pooled warm-up (`None` for the other ways of learning the metric, and kernels without a
    /// step size).
    plan: Option<WarmupPlan>,
    /// Draws per chain beyond `config.draws`.
    extra_draws: u64,
}

impl Chains {
    /// New chains at their start points, in a folder that holds no checkpoint.
    fn start(ctx: &Ctx<'_, '_>, out_dir: &Path) -> Result<Chains> {
        let ck = checkpoint_path(out_dir);
        if ck.exists() {
            return Err(Error::Config(format!(
                "{} holds the checkpoint of an earlier run: resume that run, or sample into an \
                 empty folder",
                out_dir.display()
            )));
        }
        let before = ctx.target.counts();
        let runners = (0..ctx.config.chains)
            .into_par_iter()
            .map(|c| Runner::start(c, ctx, out_dir))
            .collect::<Result<Vec<_>>>()?;
        let n = ctx.target.dim();
        let pooled = ctx.config.learning() == MetricLearning::Pooled;
        let has_step = ctx.kernel.spec(n).step_size.is_some();
        Ok(Chains {
            runners,
            counts_warmup: ctx.target.counts().since(&before),
            counts_sampling: EvalCounts::default(),
            plan: match (pooled, has_step) {
                (true, true) => Some(WarmupPlan::new(ctx.config.warmup, n)),
                (true, false) => Some(WarmupPlan::burn_in(ctx.config.warmup, n)),
                (false, _) => None,
            },
            extra_draws: 0,
        })
    }

    /// The chains of checkpoint `ck`, after checking that it belongs to this target and settings.
    fn restore(ck: Checkpoint, ctx: &Ctx<'_, '_>, out_dir: &Path) -> Result<Chains> {
        ck.check_matches(ctx.target, ctx.config)?;
        let n = ctx.target.dim();
        let runners = ck
            .chains
            .iter()
            .enumerate()
            .map(|(c, cc)| Runner::restore(c, cc, n, out_dir))
            .collect::<Result<Vec<_>>>()?;
        Ok(Chains {
            runners,
            counts_warmup: ck.counts_warmup,
            counts_sampling: ck.counts_sampling,
            plan: ck.plan,
            extra_draws: ck.extra_draws,
        })
    }

    /// Syncs every draws file, then rewrites the checkpoint.
    fn save(&mut self, ctx: &Ctx<'_, '_>, out_dir: &Path, complete: bool) -> Result<()> {
        for r in self.runners.iter_mut() {
            r.writer.sync()?;
        }
        let target = ctx.target;
        Checkpoint {
            crate_version: env!("CARGO_PKG_VERSION").to_string(),
            problem: target.name().to_string(),
            dim: target.dim(),
            precond: target.precond().kind().to_string(),
            target_fingerprint: target.fingerprint(),
            config: ctx.config.clone(),
            chains: self.runners.iter().map(Runner::save).collect(),
            counts_warmup: self.counts_warmup,
            counts_sampling: self.counts_sampling,
            plan: self.plan.clone(),
            extra_draws: self.extra_draws,
            complete,
        }
        .save(out_dir)
    }

    /// Advances all chains segment by segment to the end of the run, saving after each segment. Stops
    /// with the first chain's error or at an interrupt, after saving; stops early (and says why)
    /// where `limits` leave no room.
    fn run_segments(
        &mut self,
        ctx: &Ctx<'_, '_>,
        out_dir: &Path,
        limits: &Limits,
    ) -> Result<Ended> {
        let config = ctx.config;
        loop {
            let total = self.total(config);
            let lowest = self.lowest_iteration().unwrap_or(total);
            if lowest >= total {
                return Ok(Ended::Finished);
            }
            if limits.deadline.is_some_and(|d| Instant::now() >= d) {
                return Ok(Ended::TimeLimit);
            }
            let mut until = self.segment_end(lowest, config);
            if let Some(max) = limits.max_chain_runs {
                match self.affordable(max) {
                    Some(0) => return Ok(Ended::MaxEvaluations),
                    Some(n) => until = until.min(lowest.saturating_add(n)),
                    None => {}
                }
            }
            let outcomes = self.advance_all(until, ctx);
            self.barrier()?;
            self.save(ctx, out_dir, false)?;
            if let Some((c, Err(e))) = outcomes.into_iter().enumerate().find(|(_, o)| o.is_err()) {
                return Err(chain_failed(c, self.runners[c].iteration, e, out_dir));
            }
            if ctx.interrupt.is_set() {
                return Err(Error::Interrupted(format!(
                    "sampling stopped at iteration {} of {total}; the state is saved in {} and the \
                     run can be resumed from there",
                    self.lowest_iteration().unwrap_or(0),
                    out_dir.display()
                )));
            }
        }
    }

    /// Model runs spent by the chains so far (start points, warm-up and sampling).
    fn chain_runs(&self) -> u64 {
        self.counts_warmup.model_runs() + self.counts_sampling.model_runs()
    }

    /// How many more iterations every chain can do within `max` model runs for the chains, at the
    /// model runs per iteration measured so far: one before any iteration (to measure), `Some(0)`
    /// when the budget is spent.
    fn affordable(&self, max: u64) -> Option<u64> {
        let used = self.chain_runs();
        if used >= max {
            return Some(0);
        }
        let done: u64 = self.runners.iter().map(|r| r.iteration).sum();
        if done == 0 {
            return Some(1);
        }
        let per_iteration = used as f64 / done as f64;
        let chains = self.runners.len().max(1) as f64;
        let room = (max - used) as f64 / (per_iteration * chains);
        Some(if room.is_finite() {
            room.floor() as u64
        } else {
            u64::MAX
        })
    }

    /// Where the warm-up ends: fixed, or where the pooled warm-up settled.
    fn warmup_end(&self, config: &SampleConfig) -> u64 {
        self.plan.as_ref().map_or(config.warmup, |p| p.end)
    }

    /// Total iterations per chain.
    fn total(&self, config: &SampleConfig) -> u64 {
        self.warmup_end(config) + (config.draws + self.extra_draws) * config.thin
    }

    /// The end of the segment that starts at iteration `lowest`: the next multiple of the checkpoint
    /// interval, the next barrier of the warm-up, or the end of the run, whichever comes first.
    fn segment_end(&self, lowest: u64, config: &SampleConfig) -> u64 {
        let every = config.checkpoint_every;
        let mut until = (lowest / every + 1)
            .saturating_mul(every)
            .min(self.total(config));
        let end = self.warmup_end(config);
        if lowest < end {
            until = until.min(end);
        }
        if let Some(b) = self.plan.as_ref().and_then(|p| p.next_barrier(lowest)) {
            until = until.min(b);
        }
        until
    }

    /// At a barrier of the pooled warm-up (every chain at the same iteration): closes the metric
    /// window that ends there, in chain order, and restarts every chain's step size from the pooled
    /// one; at the warm-up's end gives every chain the pooled sampling step size.
    fn barrier(&mut self) -> Result<()> {
        let Some(plan) = self.plan.as_mut() else {
            return Ok(());
        };
        let at = self.runners[0].iteration;
        if self.runners.iter().any(|r| r.iteration != at) {
            return Ok(());
        }
        let steps: Vec<f64> = self.runners.iter().map(|r| r.warmup.finish()).collect();
        if plan.window_ends_at(at) {
            let windows: Vec<&[Vec<f64>]> =
                self.runners.iter().map(|r| r.window.as_slice()).collect();
            let step = plan.close_window(at, &windows, &steps);
            for r in self.runners.iter_mut() {
                r.window.clear();
                r.warmup.restart(step)?;
            }
        } else if at == plan.end && !plan.finished {
            let step = pooled_step(&steps);
            for r in self.runners.iter_mut() {
                r.step_size = step;
            }
            plan.finished = true;
        }
        Ok(())
    }

    /// The fewest iterations any chain has done (`None` without chains).
    fn lowest_iteration(&self) -> Option<u64> {
        self.runners.iter().map(|r| r.iteration).min()
    }

    /// Runs every chain in parallel up to iteration `until` and books the evaluations to the
    /// segment's phase; returns each chain's outcome. A failing chain makes the others stop early.
    fn advance_all(&mut self, until: u64, ctx: &Ctx<'_, '_>) -> Vec<Result<()>> {
        let before = ctx.target.counts();
        let warmup_end = self.warmup_end(ctx.config);
        let plan = self.plan.as_ref();
        let outcomes: Vec<Result<()>> = self
            .runners
            .par_iter_mut()
            .map(|r| {
                let out = r.advance(until, ctx, plan);
                if out.is_err() {
                    ctx.abort.store(true, Ordering::Relaxed);
                }
                out
            })
            .collect();
        let spent = ctx.target.counts().since(&before);
        if until <= warmup_end {
            self.counts_warmup = self.counts_warmup.plus(&spent);
        } else {
            self.counts_sampling = self.counts_sampling.plus(&spent);
        }
        outcomes
    }

    /// The summaries and the pooled moments of the finished run.
    fn result(&self, ctx: &Ctx<'_, '_>, out_dir: &Path) -> SampleResult {
        let n = ctx.target.dim();
        let spec = ctx.kernel.spec(n);
        let has_step = spec.step_size.is_some();
        let chains: Vec<ChainSummary> = self
            .runners
            .iter()
            .map(|r| r.summary(has_step, out_dir))
            .collect();
        let pooled = self
            .runners
            .iter()
            .fold(Welford::new(n), |acc, r| acc.merge(&r.moments));
        SampleResult {
            kernel: spec.name,
            chains,
            mean: pooled.mean().to_vec(),
            variance: pooled.variance(),
            draws: pooled.count(),
            counts_warmup: self.counts_warmup,
            counts_sampling: self.counts_sampling,
            warmup_iterations: self.warmup_end(ctx.config),
            plan: self.plan.clone(),
        }
    }
}

/// The error of chain `c` that stopped the run at `iteration`, saying that the state is saved.
fn chain_failed(c: usize, iteration: u64, e: Error, out_dir: &Path) -> Error {
    let saved = format!(
        "chain {c}, iteration {iteration} (the sampler state is saved in {}; the run can be \
         resumed once the cause is fixed)",
        out_dir.display()
    );
    match e {
        Error::Eval { context, source } => Error::Eval {
            context: format!("{context}, {saved}"),
            source,
        },
        other => other,
    }
}
