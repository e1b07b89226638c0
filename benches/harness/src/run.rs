//! One benchmark configuration, run in its own process so that its peak memory is its own: the whole
//! pipeline of a varpost kernel (gradient check, analysis, preconditioner, warm-up, sampling) or a
//! nuts-rs run, every model evaluation counted by one `Counted` wrapper, then the same diagnostics on
//! the draws of either.

use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Instant;

use serde::{Deserialize, Serialize};
use varpost::diagnostics::component_stats;
use varpost::optimize::{find_map, MapConfig};
use varpost::precond::{laplace, IdentityPrecond, LaplaceMethod, LaplaceOptions, Preconditioner};
use varpost::problem::builtin;
use varpost::problem::check::gradient_test;
use varpost::problem::linear_gaussian::GaussianReference;
use varpost::problem::settings::Settings;
use varpost::problem::{CostSplit, Prior};
use varpost::sampler::{self, open_chains, KernelKind, SampleConfig, Target};
use varpost::Interrupt;
use varpost::{Counted, EvalError, Problem};

use crate::nuts::{self, Adaptation};

/// Number of chains of every run.
pub const CHAINS: usize = 4;

/// What to run.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Spec {
    /// Row label of the problem in the table.
    pub case: String,
    /// Built-in problem name.
    pub problem: String,
    /// Its settings, key=value.
    pub settings: Vec<(String, String)>,
    /// "mala", "hmc", "laplace-mh", "nuts-diag" or "nuts-lowrank".
    pub sampler: String,
    /// "identity", "diagonal", "lbfgs", "dense", "low-rank"; "-" for nuts-rs.
    pub precond: String,
    pub warmup: u64,
    pub draws: u64,
    pub seed: u64,
}

impl Spec {
    pub fn is_nuts(&self) -> bool {
        self.sampler.starts_with("nuts")
    }
}

/// What one run measured.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Outcome {
    pub min_ess_bulk: f64,
    pub min_ess_tail: f64,
    pub max_rhat: f64,
    /// Model runs over the whole run (cost-only and cost+gradient calls each count one).
    pub evaluations: u64,
    /// Of which before sampling (check, analysis, preconditioner); 0 for nuts-rs.
    pub evaluations_setup: u64,
    pub kept_draws: u64,
    pub wall_s: f64,
    pub peak_kb: u64,
    pub divergences: u64,
    /// Linear-Gaussian only: max |mean − μ| / σ over components, and max |var / Σ_ii − 1|.
    pub mean_err_sd: Option<f64>,
    pub var_rel_err: Option<f64>,
}

/// Hides a problem's own Hessian-vector product, so that Hessians come from finite differences of
/// gradients (counted as gradient calls), as they would for a code with an adjoint but no second-order
/// adjoint — the situation this comparison is about.
pub struct GradientOnly(Box<dyn Problem>);

impl Problem for GradientOnly {
    fn dim(&self) -> usize {
        self.0.dim()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        self.0.cost_grad(x, grad)
    }
    fn cost(&self, x: &[f64]) -> Result<f64, EvalError> {
        self.0.cost(x)
    }
    fn cost_split(&self, x: &[f64]) -> Result<Option<CostSplit>, EvalError> {
        self.0.cost_split(x)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        self.0.prior()
    }
}

/// Opens a built-in problem with settings.
pub fn open(
    name: &str,
    settings: &[(String, String)],
) -> Result<(Counted<GradientOnly>, Option<GaussianReference>), String> {
    let pairs: Vec<(&str, &str)> = settings
        .iter()
        .map(|(k, v)| (k.as_str(), v.as_str()))
        .collect();
    let b = builtin::open(name, &Settings::from_pairs(&pairs)).map_err(|e| e.to_string())?;
    Ok((Counted::new(GradientOnly(b.problem)), b.reference))
}

/// The background, where every run starts.
pub fn background(p: &dyn Problem) -> Result<Vec<f64>, String> {
    p.prior()
        .map(|pr| pr.mean().to_vec())
        .ok_or_else(|| "the problem gives no background to start from".to_string())
}

/// Runs one configuration in this process.
pub fn run(spec: &Spec) -> Result<Outcome, String> {
    let (problem, reference) = open(&spec.problem, &spec.settings)?;
    let start = background(&problem)?;
    let t0 = Instant::now();
    let (chains, setup, divergences) = if spec.is_nuts() {
        let adaptation = match spec.sampler.as_str() {
            "nuts-diag" => Adaptation::Diagonal,
            "nuts-lowrank" => Adaptation::LowRank,
            o => return Err(format!("unknown sampler '{o}'")),
        };
        let d = nuts::sample(
            &problem,
            adaptation,
            &start,
            CHAINS,
            spec.warmup,
            spec.draws,
            spec.seed,
        )?;
        (d.draws, 0, d.divergences)
    } else {
        let dir = scratch_dir();
        let r = run_varpost(spec, &problem, &start, &dir);
        let out = r.and_then(|(setup, div)| {
            let draws = read_draws(&dir)?;
            Ok((draws, setup, div))
        });
        std::fs::remove_dir_all(&dir).ok();
        out?
    };
    let evaluations = problem.counts().model_runs();
    let d = diagnose(&chains)?;
    let wall_s = t0.elapsed().as_secs_f64();
    let (mean_err_sd, var_rel_err) = match &reference {
        Some(r) => {
            let me = d
                .means
                .iter()
                .zip(&r.mean)
                .zip(&r.variance)
                .map(|((m, mu), v)| (m - mu).abs() / v.sqrt())
                .fold(0.0, f64::max);
            let ve = d
                .vars
                .iter()
                .zip(&r.variance)
                .map(|(s, v)| (s / v - 1.0).abs())
                .fold(0.0, f64::max);
            (Some(me), Some(ve))
        }
        None => (None, None),
    };
    Ok(Outcome {
        min_ess_bulk: d.bulk,
        min_ess_tail: d.tail,
        max_rhat: d.rhat,
        evaluations,
        evaluations_setup: setup,
        kept_draws: (chains.len() * chains.first().map_or(0, |c| c.len())) as u64,
        wall_s,
        peak_kb: peak_memory_kb(),
        divergences,
        mean_err_sd,
        var_rel_err,
    })
}

/// The varpost pipeline: gradient check, analysis, preconditioner, sampling into `dir`. Returns the
/// evaluations before sampling and the divergences.
fn run_varpost(
    spec: &Spec,
    problem: &Counted<GradientOnly>,
    start: &[f64],
    dir: &Path,
) -> Result<(u64, u64), String> {
    let kernel: KernelKind = spec.sampler.parse().map_err(|e| format!("{e}"))?;
    let check = gradient_test(problem, start, 1).map_err(|e| e.to_string())?;
    if !check.passed {
        return Err(format!("gradient check failed: {}", check.verdict));
    }
    let map = find_map(problem, start, &MapConfig::default()).map_err(|e| e.to_string())?;
    let precond: Arc<dyn Preconditioner + '_> = if spec.precond == "identity" {
        Arc::new(IdentityPrecond::new(problem.dim()))
    } else {
        let method: LaplaceMethod = spec.precond.parse().map_err(|e| format!("{e}"))?;
        let opts = LaplaceOptions {
            method: Some(method),
            ..Default::default()
        };
        let lap = laplace(problem, &map.x, &map.pairs, &opts).map_err(|e| e.to_string())?;
        Arc::from(lap.precond)
    };
    let setup = problem.counts().model_runs();
    let target =
        Target::new(problem, &spec.problem, map.x.clone(), precond).map_err(|e| e.to_string())?;
    let config = SampleConfig {
        kernel,
        chains: CHAINS,
        warmup: spec.warmup,
        draws: spec.draws,
        seed: spec.seed,
        // One checkpoint at the end of each phase is enough here.
        checkpoint_every: spec.warmup.max(spec.draws),
        ..Default::default()
    };
    let result = sampler::run(
        &target,
        &config,
        dir,
        None,
        &Interrupt::new(),
        &|_, _, _| {},
    )
    .map_err(|e| e.to_string())?;
    let divergences = result.chains.iter().map(|c| c.divergences).sum();
    Ok((setup, divergences))
}

/// A fresh folder for one run's draws.
fn scratch_dir() -> PathBuf {
    std::env::temp_dir().join(format!("varpost-bench-{}", std::process::id()))
}

/// The draws of every chain, `[chain][draw][component]`.
fn read_draws(dir: &Path) -> Result<Vec<Vec<Vec<f64>>>, String> {
    let files = open_chains(dir, CHAINS).map_err(|e| e.to_string())?;
    files
        .iter()
        .map(|f| {
            let mut draws = Vec::with_capacity(f.records as usize);
            for r in f.iter().map_err(|e| e.to_string())? {
                draws.push(r.map_err(|e| e.to_string())?.x);
            }
            Ok(draws)
        })
        .collect()
}

/// Min bulk and tail ESS and max R-hat over components, and the pooled mean and variance of each
/// component, all from varpost's diagnostics.
fn diagnose(chains: &[Vec<Vec<f64>>]) -> Result<Diagnosis, String> {
    let n = chains
        .first()
        .and_then(|c| c.first())
        .map_or(0, |d| d.len());
    let mut d = Diagnosis {
        bulk: f64::INFINITY,
        tail: f64::INFINITY,
        rhat: 0.0,
        means: Vec::with_capacity(n),
        vars: Vec::with_capacity(n),
    };
    for i in 0..n {
        let per_chain: Vec<Vec<f64>> = chains
            .iter()
            .map(|c| c.iter().map(|x| x[i]).collect())
            .collect();
        let slices: Vec<&[f64]> = per_chain.iter().map(|c| c.as_slice()).collect();
        let s = component_stats(&slices).map_err(|e| format!("component {i}: {e}"))?;
        d.bulk = d.bulk.min(s.ess_bulk);
        d.tail = d.tail.min(s.ess_tail);
        d.rhat = d.rhat.max(s.rhat);
        d.means.push(s.mean);
        d.vars.push(s.sd * s.sd);
    }
    Ok(d)
}

struct Diagnosis {
    bulk: f64,
    tail: f64,
    rhat: f64,
    means: Vec<f64>,
    vars: Vec<f64>,
}

/// Peak resident memory of this process (VmHWM in /proc/self/status), in kB; 0 where unavailable.
pub fn peak_memory_kb() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|v| v.parse().ok())
        })
        .unwrap_or(0)
}
