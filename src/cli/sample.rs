//! `sample` and `resume`: the whole pipeline to an ensemble, with its progress, its interrupt handling
//! and the report at the end.

use std::path::Path;

use super::args::{ChainArgs, HessianArgs, LbfgsArgs, ProblemArgs};
use super::fault::Fault;
use super::print;
use super::watch::{run_watched, ChainProgress, Watch};
use crate::config::{LaplaceCheckConfig, ProblemSource, RunConfig};
use crate::error::{Error, ExitCode, Result};
use crate::output::progress::Progress;
use crate::pipeline::{self, Loaded};
use crate::problem::Problem;
use crate::Interrupt;

/// `varpost sample`: a new run into its output folder.
pub fn sample(
    problem: &ProblemArgs,
    lbfgs: &LbfgsArgs,
    hessian: &HessianArgs,
    chains: &ChainArgs,
    progress: Progress,
) -> Result<ExitCode> {
    let out = problem.out_dir("sample");
    let _lock = super::lock_folder(&out, "sample")?;
    let map = lbfgs.config();
    let cfg = RunConfig {
        start: map.start,
        lbfgs: map.lbfgs,
        laplace: hessian.options(),
        metric: chains.metric,
        sampler: chains.config(),
        laplace_check: LaplaceCheckConfig {
            draws: chains.laplace_draws,
        },
        skip_check: chains.skip_check,
        stop: chains.stop(),
        ..RunConfig::new(problem.source(&out)?)
    };
    cfg.validate()?;
    let loaded = pipeline::load(&cfg.source)?;
    println!(
        "sampling: {} (n = {})",
        loaded.description,
        loaded.problem.dim()
    );
    run(&loaded, &cfg, &out, false, progress)
}

/// `varpost resume DIR`: continues the run recorded in DIR, optionally with another adapter command.
pub fn resume(dir: &Path, adapter: Option<String>, progress: Progress) -> Result<ExitCode> {
    let _lock = super::lock_folder(dir, "resume")?;
    let mut cfg = pipeline::read_run(dir)?;
    println!("resuming the run in {}", dir.display());
    match (&mut cfg.source, adapter) {
        (ProblemSource::Adapter(a), Some(cmd)) => {
            println!(
                "  adapter command overridden: {cmd} (recorded: {})",
                a.command
            );
            a.command = cmd;
        }
        (ProblemSource::Adapter(a), None) => {
            println!("  running the recorded adapter command: {}", a.command);
        }
        (ProblemSource::Builtin { .. } | ProblemSource::InProcess { .. }, Some(_)) => {
            return Err(Error::Config(
                "--adapter: this run did not use an adapter".into(),
            ));
        }
        (ProblemSource::Builtin { .. } | ProblemSource::InProcess { .. }, None) => {}
    }
    let loaded = pipeline::load(&cfg.source)?;
    run(&loaded, &cfg, dir, true, progress)
}

/// Runs (or continues) the pipeline into `out` with its progress shown, then writes the report. The
/// verdict decides the exit code (`Verdict::exit_code`: 0, 3, 4, 5 or 6).
fn run(
    loaded: &Loaded,
    cfg: &RunConfig,
    out: &Path,
    resume: bool,
    progress: Progress,
) -> Result<ExitCode> {
    let fault = Fault::from_env()?;
    let interrupt = Interrupt::from_signals()?;
    let s = &cfg.sampler;
    let chains = ChainProgress::new(s.chains, s.warmup, s.iterations());
    let advance = |chain: usize, done: u64, total: u64| {
        Fault::in_sampling(fault);
        chains.advance(chain, done, total);
    };
    let runs = || loaded.problem.counts().model_runs();
    let watch = Watch {
        label: if resume {
            "varpost resume"
        } else {
            "varpost sample"
        },
        stage: "before the chains (gradient test, analysis, Hessian, Laplace check)",
        runs: Some(&runs),
        chains: Some(&chains),
    };
    let outcome = run_watched(progress, &watch, || {
        super::in_worker_pool(&cfg.source, s.chains, || {
            pipeline::run_sample(loaded, cfg, out, resume, &interrupt, &advance)
        })
    })
    .map_err(|e| match e {
        Error::Interrupted(m) => Error::Interrupted(format!(
            "{m}; continue with `varpost resume {}`",
            out.display()
        )),
        other => other,
    })?;
    print::sample(&outcome);
    let r = pipeline::report_after_sample(out, &outcome, &super::command_line())?;
    println!("report: {}", r.html.display());
    println!(
        "output: {} (summary.json, components.csv, ensemble.nc)",
        out.display()
    );
    Ok(outcome.diagnosis.verdict.exit_code())
}
