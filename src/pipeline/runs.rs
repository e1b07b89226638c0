//! The shorter runs: the gradient test alone, the analysis alone, and the analysis with the Hessian.

use std::path::{Path, PathBuf};

use super::assemble::{self, laplace_summary, StageResults};
use super::load::Loaded;
use super::stages;
use crate::error::Result;
use crate::optimize::{MapConfig, MapResult};
use crate::output::{table, Summary};
use crate::precond::LaplaceOptions;
use crate::problem::check::{gradient_test, GradientReport};
use crate::problem::Problem;

/// Settings of the gradient test.
#[derive(Debug, Clone)]
pub struct CheckConfig {
    pub start: Option<PathBuf>,
    pub seed: u64,
}

/// Runs the gradient test (with the finite-difference comparison for small dimensions) and writes
/// DIR/summary.json.
pub fn run_check(
    loaded: &Loaded,
    config: &CheckConfig,
    out: &Path,
) -> Result<(GradientReport, Summary)> {
    let x = loaded.start(config.start.as_deref())?;
    let report = gradient_test(&loaded.problem, &x, config.seed)?;
    let mut summary = loaded.summary("check");
    summary.check = Some(assemble::check_summary(&report));
    summary.evaluations = loaded.problem.counts();
    summary.write(out)?;
    Ok((report, summary))
}

/// Settings of the minimisation run.
#[derive(Debug, Clone, Default)]
pub struct MapRunConfig {
    pub start: Option<PathBuf>,
    pub lbfgs: MapConfig,
}

/// Finds the analysis, writes DIR/summary.json and DIR/analysis.csv.
pub fn run_map(loaded: &Loaded, config: &MapRunConfig, out: &Path) -> Result<(MapResult, Summary)> {
    let (results, map) = analysis_only(loaded, config, out)?;
    let summary = finish(loaded, "map", &results, out)?;
    Ok((map, summary))
}

/// Settings of the Hessian run: the minimisation, then the Laplace approximation at its result.
#[derive(Debug, Clone, Default)]
pub struct HessianRunConfig {
    pub map: MapRunConfig,
    pub laplace: LaplaceOptions,
}

/// Finds the analysis, estimates the Hessian there, and writes DIR/summary.json, DIR/analysis.csv,
/// DIR/variance.csv (analysis, Laplace and background variances per component) and, where the method
/// gives eigen-directions, DIR/eigenvectors.csv (one column per direction, in model space).
pub fn run_hessian(
    loaded: &Loaded,
    config: &HessianRunConfig,
    out: &Path,
) -> Result<(MapResult, Summary)> {
    let (mut results, map) = analysis_only(loaded, &config.map, out)?;
    let lap = stages::laplace_stage(&loaded.problem, &map, &config.laplace)?;
    results.laplace = Some(laplace_summary(loaded, &lap, &map.x, out)?);
    let summary = finish(loaded, "hessian", &results, out)?;
    Ok((map, summary))
}

/// The analysis stage and DIR/analysis.csv.
fn analysis_only(
    loaded: &Loaded,
    config: &MapRunConfig,
    out: &Path,
) -> Result<(StageResults, MapResult)> {
    let x0 = loaded.start(config.start.as_deref())?;
    let analysis = stages::analysis_stage(&loaded.problem, &x0, &config.lbfgs)?;
    let map = analysis.map.clone();
    write_analysis(loaded, &map, out)?;
    let results = StageResults {
        analysis: Some(analysis),
        ..Default::default()
    };
    Ok((results, map))
}

/// The summary of a short run, written to DIR/summary.json.
fn finish(loaded: &Loaded, command: &str, results: &StageResults, out: &Path) -> Result<Summary> {
    let summary = assemble::summary(
        loaded,
        command,
        results,
        loaded.problem.counts(),
        &Default::default(),
    );
    summary.write(out)?;
    Ok(summary)
}

fn write_analysis(loaded: &Loaded, map: &MapResult, out: &Path) -> Result<()> {
    let names = loaded.names();
    let bg = loaded
        .problem
        .prior()
        .map(|p| p.mean().to_vec())
        .unwrap_or_default();
    table::write_columns(
        &out.join("analysis.csv"),
        &names,
        &[("analysis", &map.x), ("background", &bg)],
    )
}
