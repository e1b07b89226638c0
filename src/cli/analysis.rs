//! `check`, `map` and `hessian`: the stages before the chains, each on its own, with its output folder,
//! its progress and its exit code.

use std::path::PathBuf;

use super::args::{HessianArgs, LbfgsArgs, ProblemArgs};
use super::print;
use super::watch::{run_watched, Watch};
use crate::error::{Error, ExitCode, Result};
use crate::output::progress::Progress;
use crate::pipeline::{self, CheckConfig, HessianRunConfig, Loaded};
use crate::problem::Problem;

/// Runs `work` on `loaded` with its model runs shown under `stage`.
fn watched<T>(
    progress: Progress,
    label: &str,
    stage: &str,
    loaded: &Loaded,
    work: impl FnOnce() -> Result<T>,
) -> Result<T> {
    let runs = || loaded.problem.counts().model_runs();
    let watch = Watch {
        label,
        stage,
        runs: Some(&runs),
        chains: None,
    };
    run_watched(progress, &watch, work)
}

/// `varpost check`: the Taylor test of the gradient; a wrong gradient is an error (exit code 3).
pub fn check(
    problem: &ProblemArgs,
    start: Option<PathBuf>,
    seed: u64,
    progress: Progress,
) -> Result<ExitCode> {
    let out = problem.out_dir("check");
    let _lock = super::lock_folder(&out, "check")?;
    let loaded = pipeline::load(&problem.source(&out)?)?;
    println!(
        "gradient test: {} (n = {})",
        loaded.description,
        loaded.problem.dim()
    );
    let config = CheckConfig { start, seed };
    let (r, _) = watched(progress, "varpost check", "gradient test", &loaded, || {
        pipeline::run_check(&loaded, &config, &out)
    })?;
    print::check(&r);
    println!("summary: {}", out.join("summary.json").display());
    if !r.passed {
        return Err(Error::GradientCheck(r.verdict));
    }
    Ok(ExitCode::Success)
}

/// `varpost map`: the analysis; not converging is exit code 4.
pub fn map(problem: &ProblemArgs, lbfgs: &LbfgsArgs, progress: Progress) -> Result<ExitCode> {
    let cfg = lbfgs.config();
    let out = problem.out_dir("map");
    let _lock = super::lock_folder(&out, "map")?;
    let loaded = pipeline::load(&problem.source(&out)?)?;
    println!(
        "analysis: {} (n = {})",
        loaded.description,
        loaded.problem.dim()
    );
    let (m, s) = watched(progress, "varpost map", "analysis", &loaded, || {
        pipeline::run_map(&loaded, &cfg, &out)
    })?;
    print::map(&m);
    if let Some(r) = &s.reference {
        let err = print::rel_err(&m.x, &r.mean);
        println!("  closed-form posterior mean: largest relative difference {err:.2e}");
    }
    println!(
        "evaluations: {} cost+gradient, {} cost only",
        s.evaluations.gradient, s.evaluations.cost
    );
    println!(
        "wrote {} and analysis.csv",
        out.join("summary.json").display()
    );
    Ok(converged(m.converged))
}

fn converged(yes: bool) -> ExitCode {
    if yes {
        ExitCode::Success
    } else {
        ExitCode::AnalysisNotConverged
    }
}

/// `varpost hessian`: the analysis, then the Laplace covariance there; not converging is exit code 4.
pub fn hessian(
    problem: &ProblemArgs,
    lbfgs: &LbfgsArgs,
    hessian: &HessianArgs,
    progress: Progress,
) -> Result<ExitCode> {
    let cfg = HessianRunConfig {
        map: lbfgs.config(),
        laplace: hessian.options(),
    };
    let out = problem.out_dir("hessian");
    let _lock = super::lock_folder(&out, "hessian")?;
    let source = problem.source(&out)?;
    let loaded = pipeline::load(&source)?;
    println!(
        "Hessian at the analysis: {} (n = {})",
        loaded.description,
        loaded.problem.dim()
    );
    let stage = "analysis, then the Hessian";
    let (m, s) = watched(progress, "varpost hessian", stage, &loaded, || {
        super::in_worker_pool(&source, 1, || pipeline::run_hessian(&loaded, &cfg, &out))
    })?;
    print::map(&m);
    if let Some(l) = &s.laplace {
        print::laplace(l);
        if let Some(r) = &s.reference {
            let err = l
                .variance
                .iter()
                .zip(&r.variance)
                .map(|(a, b)| (a - b).abs() / b.abs())
                .fold(0.0, f64::max);
            println!("  closed-form posterior variances: largest relative difference {err:.2e}");
        }
    }
    println!(
        "evaluations: {} cost+gradient, {} cost only, {} Hessian-vector",
        s.evaluations.gradient, s.evaluations.cost, s.evaluations.hessvec
    );
    let eigenvectors = s
        .laplace
        .as_ref()
        .is_some_and(|l| l.eigenvectors_file.is_some());
    println!(
        "wrote {}, analysis.csv, variance.csv{}",
        out.join("summary.json").display(),
        if eigenvectors {
            ", eigenvectors.csv"
        } else {
            ""
        }
    );
    Ok(converged(m.converged))
}
