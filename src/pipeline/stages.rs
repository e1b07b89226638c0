//! The stages of a run, each a function that takes what it needs and returns its own typed result:
//! gradient test, analysis, Laplace approximation (and the chains' metric), Laplace check, sampling.
//! [`StageCounter`] splits the model runs by stage. The summary is assembled from the results once
//! ([`super::assemble`]).

use std::collections::BTreeMap;
use std::sync::Arc;

use super::load::Loaded;
use crate::config::{MetricKind, RunConfig};
use crate::diagnostics::{self, ImportanceCheck};
use crate::error::{Error, Result};
use crate::optimize::{find_map, MapConfig, MapResult};
use crate::precond::{laplace, IdentityPrecond, Laplace, LaplaceOptions, Preconditioner};
use crate::problem::check::{taylor_test, GradientReport};
use crate::problem::{CostSplit, Counted, EvalCounts, Problem};
use crate::sampler::importance::{laplace_draws, ImportanceDraws};
use crate::sampler::{CountedProblem, Target};

/// Model runs spent per stage, in the order the stages ran.
pub struct StageCounter<'a> {
    problem: &'a dyn CountedProblem,
    last: EvalCounts,
    /// Counts per stage name.
    pub by_stage: BTreeMap<String, EvalCounts>,
}

impl<'a> StageCounter<'a> {
    /// Starts counting at the problem's current counts.
    pub fn new(problem: &'a dyn CountedProblem) -> Self {
        StageCounter {
            problem,
            last: problem.counts(),
            by_stage: BTreeMap::new(),
        }
    }

    /// Ends stage `name`: what was spent since the previous stage ended.
    pub fn end(&mut self, name: &str) {
        let now = self.problem.counts();
        self.by_stage
            .insert(name.to_string(), now.since(&self.last));
        self.last = now;
    }
}

/// The gradient test at the start point; an error when the gradient is wrong.
pub fn gradient_stage(problem: &dyn Problem, x0: &[f64], seed: u64) -> Result<GradientReport> {
    taylor_test(problem, x0, seed)
}

/// What the analysis stage found.
pub struct Analysis {
    /// The minimisation's result.
    pub map: MapResult,
    /// Jb and Jo at the analysis, where the problem reports them.
    pub split: Option<CostSplit>,
}

/// The analysis: L-BFGS from `x0`.
pub fn analysis_stage(problem: &dyn Problem, x0: &[f64], config: &MapConfig) -> Result<Analysis> {
    let map = find_map(problem, x0, config)?;
    let split = problem.cost_split(&map.x).ok().flatten();
    Ok(Analysis { map, split })
}

/// The Laplace approximation at the analysis.
pub fn laplace_stage<'p, P: Problem + ?Sized>(
    problem: &'p Counted<P>,
    map: &MapResult,
    options: &LaplaceOptions,
) -> Result<Laplace<'p>> {
    laplace(problem, &map.x, &map.pairs, options)
}

/// The metric of the chains: the Laplace preconditioner itself, the identity, or another Hessian
/// approximation built at the analysis.
pub fn metric_stage<'p, P: Problem + ?Sized>(
    problem: &'p Counted<P>,
    map: &MapResult,
    laplace_precond: &Arc<dyn Preconditioner + 'p>,
    laplace_method: crate::precond::LaplaceMethod,
    cfg: &RunConfig,
) -> Result<Arc<dyn Preconditioner + 'p>> {
    Ok(match (cfg.metric, cfg.metric.method()) {
        (MetricKind::Identity, _) => Arc::new(IdentityPrecond::new(map.x.len())),
        (_, None) => laplace_precond.clone(),
        (_, Some(m)) if m == laplace_method => laplace_precond.clone(),
        (_, Some(m)) => {
            let o = LaplaceOptions {
                method: Some(m),
                ..cfg.laplace.clone()
            };
            Arc::from(laplace(problem, &map.x, &map.pairs, &o)?.precond)
        }
    })
}

/// What the Laplace check found.
pub struct LaplaceCheck {
    /// k-hat, its threshold and the Kish ESS of the weights.
    pub check: ImportanceCheck,
    /// Draws whose evaluation failed (weight 0).
    pub failed: usize,
    /// Draws made.
    pub draws: usize,
    /// The weighted draws themselves.
    pub sample: ImportanceDraws,
}

impl LaplaceCheck {
    /// The check of the weighted draws `d`.
    pub fn of(d: ImportanceDraws) -> Result<LaplaceCheck> {
        let check = diagnostics::importance_check(&d.log_target, &d.log_proposal)?;
        Ok(LaplaceCheck {
            check,
            failed: d.failed,
            draws: d.len(),
            sample: d,
        })
    }
}

/// How far the Laplace Gaussian holds: `draws` cost-only evaluations at its draws, weighted by the
/// posterior (the importance sampler on the target whitened by the Laplace preconditioner). `None` when
/// `draws` is 0.
pub fn laplace_check_stage<'p>(
    problem: &'p dyn CountedProblem,
    name: &str,
    map: &MapResult,
    laplace_precond: Arc<dyn Preconditioner + 'p>,
    draws: usize,
    seed: u64,
) -> Result<Option<LaplaceCheck>> {
    if draws == 0 {
        return Ok(None);
    }
    let target = Target::new(problem, name, map.x.clone(), laplace_precond)?;
    LaplaceCheck::of(laplace_draws(&target, draws, seed)?).map(Some)
}

/// The start point of a run from its configuration.
pub fn start_point(loaded: &Loaded, cfg: &RunConfig) -> Result<Vec<f64>> {
    loaded.start(cfg.start.as_deref())
}

/// Refuses to go on after a failed gradient test, saying what to do.
pub fn require_gradient(r: &GradientReport) -> Result<()> {
    if r.passed {
        return Ok(());
    }
    Err(Error::GradientCheck(format!(
        "{} (sampling needs a correct gradient; run `varpost check` for the full table)",
        r.verdict
    )))
}
