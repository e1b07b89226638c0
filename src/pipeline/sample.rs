//! The whole pipeline to a posterior ensemble: check the gradient at the start, find the analysis,
//! build the Hessian (Laplace) approximation there, check how far it holds, then run the chains and
//! diagnose them. `resume` continues a run from its folder.
//!
//! Crash safety: every evaluation before sampling is recorded in DIR/evaluations.vprec and replayed
//! on resume (those stages are deterministic), and the sampler checkpoints its own state; so a run
//! killed at any moment and resumed gives the same output and spends model runs only on what was lost.

use std::path::Path;
use std::sync::Arc;
use std::time::Instant;

use super::assemble::{self, laplace_summary, Diagnosis, Sampled, StageResults};
use super::choose::choose_kernel;
use super::diagnose::diagnose;
use super::extend::{run_chains, Before, Chained};
use super::load::Loaded;
use super::stages::{self, StageCounter};
use crate::config::RunConfig;
use crate::diagnostics::{LaplaceFacts, RunFacts, RunProgress, TargetFacts, Verdict};
use crate::error::{Error, Result};
use crate::interrupt::Interrupt;
use crate::output::Summary;
use crate::precond::Preconditioner;
use crate::problem::EvalCounts;
use crate::sampler::checkpoint::checkpoint_path;
use crate::sampler::{
    ChainDraws, Checkpoint, Ensemble, Progress, SampleConfig, SampleResult, StopReason, Target,
};

const RECORD_FILE: &str = "evaluations.vprec";

/// Reads DIR/run.json.
pub fn read_run(dir: &Path) -> Result<RunConfig> {
    RunConfig::read(dir)
}

/// What a sampling run produced: its summary, the sampler's result and the diagnostics, which the
/// report reuses instead of computing them again.
pub struct SampleOutcome {
    pub summary: Summary,
    pub result: SampleResult,
    pub diagnosis: Diagnosis,
}

/// Runs (or, with `resume`, continues) the pipeline into `out`.
pub fn run_sample(
    loaded: &Loaded,
    cfg: &RunConfig,
    out: &Path,
    resume: bool,
    interrupt: &Interrupt,
    progress: &dyn Progress,
) -> Result<SampleOutcome> {
    let started = Instant::now();
    cfg.validate()?;
    prepare_folder(cfg, out, resume)?;
    let problem = &loaded.problem;
    problem.inner().attach(&out.join(RECORD_FILE))?;
    let command = if resume { "resume" } else { "sample" };
    let mut counter = StageCounter::new(problem);
    let mut results = StageResults::default();
    let x0 = stages::start_point(loaded, cfg)?;
    if !cfg.skip_check {
        let r = stages::gradient_stage(problem, &x0, cfg.check_seed)?;
        stages::require_gradient(&r)?;
        results.check = Some(r);
    }
    counter.end("check");
    let analysis = stages::analysis_stage(problem, &x0, &cfg.lbfgs)?;
    counter.end("map");
    let lap = stages::laplace_stage(problem, &analysis.map, &cfg.laplace)?;
    results.laplace = Some(laplace_summary(loaded, &lap, &analysis.map.x, out)?);
    let lap_method = lap.method;
    let lap_precond: Arc<dyn Preconditioner + '_> = Arc::from(lap.precond);
    let metric = stages::metric_stage(problem, &analysis.map, &lap_precond, lap_method, cfg)?;
    counter.end("hessian");
    let cfg = &check_and_choose(loaded, &analysis.map, lap_precond, cfg, &mut results)?;
    counter.end("laplace_check");
    let x_star = analysis.map.x.clone();
    results.analysis = Some(analysis);
    let pre_sampling = problem.counts();
    problem.inner().detach()?;
    // What is known before the chains run, so that `report` can work on a partial run.
    assemble::summary(loaded, command, &results, pre_sampling, &counter.by_stage).write(out)?;

    let target = Target::new(problem, &loaded.name, x_star, metric.clone())?;
    let ctx = Before {
        started,
        runs: pre_sampling.model_runs(),
    };
    let Chained { result, stop } =
        chains_stage(&target, cfg, out, resume, ctx, interrupt, progress)?;
    let mut by_stage = counter.by_stage.clone();
    by_stage.insert("warmup".into(), result.counts_warmup);
    by_stage.insert("sampling".into(), result.counts_sampling);
    let evaluations = pre_sampling
        .plus(&result.counts_warmup)
        .plus(&result.counts_sampling);
    let diagnosis = diagnosis_stage(out, loaded, cfg, &results, &result, stop, evaluations)?;
    results.sampling = Some(Sampled {
        result,
        config: cfg.sampler.clone(),
        metric: metric.kind().into(),
        resumed: resume,
        replayed: problem.inner().replayed(),
        stop: Some(stop),
        target_ess: cfg.stop.target_ess,
    });
    results.diagnosis = Some(diagnosis);
    let summary = assemble::summary(loaded, command, &results, evaluations, &by_stage);
    summary.write(out)?;
    let sampled = results.sampling.take().map(|s| s.result);
    let diagnosis = results.diagnosis.take();
    match (sampled, diagnosis) {
        (Some(result), Some(diagnosis)) => Ok(SampleOutcome {
            summary,
            result,
            diagnosis,
        }),
        _ => Err(Error::Internal("the sampling results went missing".into())),
    }
}

/// The Laplace check at the analysis `map` (drawn on the problem whitened by `lap_precond`) and the
/// kernel it chooses for `--kernel auto` ([`choose_kernel`], which may grow the check); both go into
/// `results`. Returns the run's settings with the kernel that samples.
fn check_and_choose<'p>(
    loaded: &'p Loaded,
    map: &crate::optimize::MapResult,
    lap_precond: Arc<dyn Preconditioner + 'p>,
    cfg: &RunConfig,
    results: &mut StageResults,
) -> Result<RunConfig> {
    let problem = &loaded.problem;
    results.laplace_check = stages::laplace_check_stage(
        problem,
        &loaded.name,
        map,
        lap_precond.clone(),
        cfg.laplace_check.draws,
        cfg.check_seed,
    )?;
    let check_target = Target::new(problem, &loaded.name, map.x.clone(), lap_precond)?;
    let lap_var = results
        .laplace
        .as_ref()
        .map(|l| l.variance.clone())
        .unwrap_or_default();
    let choice = choose_kernel(
        cfg.sampler.kernel,
        &mut results.laplace_check,
        Some(&check_target),
        &lap_var,
        cfg.check_seed,
    )?;
    results.kernel_reason = Some(choice.reason);
    Ok(RunConfig {
        sampler: SampleConfig {
            kernel: choice.kernel,
            ..cfg.sampler.clone()
        },
        ..cfg.clone()
    })
}

/// Creates the folder; a new run refuses a folder that already holds one, and records its settings.
fn prepare_folder(cfg: &RunConfig, out: &Path, resume: bool) -> Result<()> {
    std::fs::create_dir_all(out).map_err(|e| Error::io(out, e))?;
    if resume {
        return Ok(());
    }
    if RunConfig::exists_in(out) || checkpoint_path(out).exists() {
        return Err(Error::Config(format!(
            "{} already holds a sampling run: continue it with `varpost resume {}`, or choose another --out",
            out.display(),
            out.display()
        )));
    }
    cfg.write(out)
}

/// The chains, continued from the checkpoint when resuming, until the run's stop rule ends them;
/// `before`: when this invocation began and the model runs before the chains.
fn chains_stage(
    target: &Target<'_>,
    cfg: &RunConfig,
    out: &Path,
    resume: bool,
    before: Before,
    interrupt: &Interrupt,
    progress: &dyn Progress,
) -> Result<Chained> {
    let ck = if resume && checkpoint_path(out).exists() {
        Some(Checkpoint::load(out)?)
    } else {
        None
    };
    run_chains(target, cfg, out, ck, before, interrupt, progress)
}

/// Diagnostics of the chains' draws and the verdict on the whole run: the gradient test, the analysis,
/// the Laplace check (k-hat judged against the sample-size threshold of its own draws, the one
/// threshold) and the chains' divergences.
fn diagnosis_stage(
    out: &Path,
    loaded: &Loaded,
    cfg: &RunConfig,
    results: &StageResults,
    sampled: &SampleResult,
    stop: StopReason,
    evaluations: EvalCounts,
) -> Result<Diagnosis> {
    let ensemble = Ensemble::Chains(ChainDraws::open(out, cfg.sampler.chains)?);
    let (stats, ebfmi) = diagnose(&ensemble)?;
    let names = loaded.names();
    let lap_sd = results.laplace.as_ref().map(assemble::laplace_sd);
    let facts = RunFacts {
        gradient: assemble::gradient_reading(
            results.check.as_ref().map(|c| c.passed),
            cfg.skip_check,
        ),
        analysis: results
            .analysis
            .as_ref()
            .map(|a| assemble::analysis_reading(&assemble::map_summary(a))),
        laplace: lap_sd.as_deref().map(|sd| LaplaceFacts {
            khat: results.laplace_check.as_ref().map(|c| (&c.check).into()),
            sd,
        }),
        names: Some(&names),
        divergences: assemble::chain_divergences(
            sampled.chains.iter().map(|c| (c.divergences, c.draws)),
            cfg.sampler.thin,
        ),
        // Fixed draws a limit kept the chains from: the run is partial, and `resume` continues it.
        partial: (cfg.stop.target_ess == 0 && stop.cut_short()).then(|| RunProgress {
            draws_per_chain: sampled.chains.iter().map(|c| c.draws).collect(),
            planned: cfg.sampler.draws,
            model_runs: evaluations.model_runs(),
        }),
        target: (cfg.stop.target_ess > 0).then_some(TargetFacts {
            target_ess: cfg.stop.target_ess,
            stop: stop.name(),
            cut_short: stop.cut_short(),
        }),
    };
    let verdict = Verdict::judge(&stats, cfg.sampler.chains, &facts);
    Ok(Diagnosis {
        stats,
        ebfmi,
        verdict,
    })
}
