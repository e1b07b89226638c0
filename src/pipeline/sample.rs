//! The whole pipeline to a posterior ensemble: check the gradient at the start, find the analysis,
//! build the Hessian (Laplace) approximation there, check how far it holds, then run the chains and
//! diagnose them. `resume` continues a run from its folder.
//!
//! Crash safety: every evaluation before sampling is recorded in DIR/evaluations.vprec and replayed
//! on resume (those stages are deterministic), and the sampler checkpoints its own state; so a run
//! killed at any moment and resumed gives the same output and spends model runs only on what was lost.

use std::path::Path;
use std::sync::Arc;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use rayon::prelude::*;

use super::{analysis, check_summary, laplace_summary, Loaded, MapRunConfig};
use crate::config::{MetricKind, RunConfig};
use crate::diagnostics::{self, ComponentStats, Verdict};
use crate::error::{Error, Result};
use crate::interrupt::Interrupt;
use crate::output::summary::{
    ChainReport, DiagnosticsSummary, LaplaceCheckSummary, PosteriorSummary, SamplingSummary,
};
use crate::output::Summary;
use crate::precond::{laplace, IdentityPrecond, LaplaceOptions, Preconditioner};
use crate::problem::check::taylor_test;
use crate::problem::Problem;
use crate::sampler::checkpoint::checkpoint_path;
use crate::sampler::{self, Checkpoint, DrawsFile, Progress, SampleResult, Target};

const RECORD_FILE: &str = "evaluations.vprec";

/// Reads DIR/run.json.
pub fn read_run(dir: &Path) -> Result<RunConfig> {
    RunConfig::read(dir)
}

/// What a sampling run produced.
pub struct SampleOutcome {
    pub summary: Summary,
    pub result: SampleResult,
    pub stats: Vec<ComponentStats>,
    pub verdict: Verdict,
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
    cfg.validate()?;
    std::fs::create_dir_all(out).map_err(|e| Error::io(out, e))?;
    if !resume {
        if RunConfig::exists_in(out) || checkpoint_path(out).exists() {
            return Err(Error::Config(format!(
                "{} already holds a sampling run: continue it with `varpost resume {}`, or choose another --out",
                out.display(),
                out.display()
            )));
        }
        cfg.write(out)?;
    }
    let problem = &loaded.problem;
    let n = problem.dim();
    problem.inner().attach(&out.join(RECORD_FILE))?;
    let mut summary = loaded.summary(if resume { "resume" } else { "sample" });
    let mut stage_start = problem.counts();
    let mut stage = |summary: &mut Summary, name: &str| {
        let now = problem.counts();
        summary
            .evaluations_by_stage
            .insert(name.to_string(), now.since(&stage_start));
        stage_start = now;
    };

    // 1. The gradient at the start.
    let x0 = match &cfg.start {
        Some(p) => super::read_vector(p, n)?,
        None => loaded.default_start()?,
    };
    if !cfg.skip_check {
        let r = taylor_test(problem, &x0, cfg.check_seed)?;
        summary.check = Some(check_summary(&r));
        if !r.passed {
            return Err(Error::GradientCheck(format!(
                "{} (sampling needs a correct gradient; run `varpost check` for the full table)",
                r.verdict
            )));
        }
    }
    stage(&mut summary, "check");

    // 2. The analysis.
    let map = analysis(
        loaded,
        &MapRunConfig {
            start: cfg.start.clone(),
            lbfgs: cfg.lbfgs.clone(),
        },
        &mut summary,
    )?;
    stage(&mut summary, "map");

    // 3. The Laplace approximation, and the metric of the chains.
    let lap = laplace(problem, &map.x, &map.pairs, &cfg.laplace)?;
    summary.laplace = Some(laplace_summary(loaded, &lap, &map, out)?);
    let laplace_method = lap.method;
    let laplace_variance = lap.variance.clone();
    let lap_precond: Arc<dyn Preconditioner + '_> = Arc::from(lap.precond);
    let metric: Arc<dyn Preconditioner + '_> = match (cfg.metric, cfg.metric.method()) {
        (MetricKind::Identity, _) => Arc::new(IdentityPrecond::new(n)),
        (_, None) => lap_precond.clone(),
        (_, Some(m)) if m == laplace_method => lap_precond.clone(),
        (_, Some(m)) => {
            let o = LaplaceOptions {
                method: Some(m),
                ..cfg.laplace.clone()
            };
            Arc::from(laplace(problem, &map.x, &map.pairs, &o)?.precond)
        }
    };
    stage(&mut summary, "hessian");

    // 4. How far the Laplace Gaussian holds.
    let check = if cfg.laplace_check.draws > 0 {
        Some(laplace_weights(
            problem,
            &map.x,
            lap_precond.as_ref(),
            cfg.laplace_check.draws,
            cfg.check_seed,
        )?)
    } else {
        None
    };
    stage(&mut summary, "laplace_check");
    let pre_sampling = problem.counts();
    problem.inner().detach()?;
    // What is known before the chains run, so that `report` can work on a partial run.
    summary.evaluations = pre_sampling;
    summary.write(out)?;

    // 5. The chains.
    let target = Target::new(problem, &loaded.name, map.x.clone(), metric.clone())?;
    let ck = if resume && checkpoint_path(out).exists() {
        Some(Checkpoint::load(out)?)
    } else {
        None
    };
    let result = sampler::run(&target, &cfg.sampler, out, ck, interrupt, progress)?;
    summary
        .evaluations_by_stage
        .insert("warmup".into(), result.counts_warmup);
    summary
        .evaluations_by_stage
        .insert("sampling".into(), result.counts_sampling);
    summary.evaluations = pre_sampling
        .plus(&result.counts_warmup)
        .plus(&result.counts_sampling);

    // 6. Diagnostics.
    let (stats, ebfmi) = diagnose(out, cfg.sampler.chains, n)?;
    let khat = check.as_ref().map(|c| c.0.khat);
    let verdict = Verdict::from_components(&stats, cfg.sampler.chains, khat);
    summary.sampling = Some(SamplingSummary {
        kernel: cfg.sampler.kernel.name().into(),
        metric: metric.kind().into(),
        chains: cfg.sampler.chains,
        draws_per_chain: cfg.sampler.draws,
        warmup: cfg.sampler.warmup,
        thin: cfg.sampler.thin,
        seed: cfg.sampler.seed,
        resumed: resume,
        replayed_evaluations: problem.inner().replayed(),
    });
    summary.posterior = Some(posterior_summary(&result, &stats));
    summary.chains = Some(
        result
            .chains
            .iter()
            .map(|c| ChainReport {
                chain: c.chain,
                acceptance: c.acceptance,
                warmup_acceptance: c.warmup_acceptance,
                step_size: c.step_size,
                divergences: c.divergences,
                rejected_nonfinite: c.rejected_nonfinite,
                warmup_divergences: c.stats.warmup.divergences,
                warmup_rejected_nonfinite: c.stats.warmup.rejected_nonfinite,
                draws: c.draws,
                ebfmi: ebfmi.as_ref().and_then(|e| e.get(c.chain).copied()),
            })
            .collect(),
    );
    summary.laplace_check = check.map(|(ic, failed, draws)| LaplaceCheckSummary {
        draws,
        failed,
        khat: ic.khat,
        khat_threshold: ic.khat_threshold,
        kish_ess: ic.kish_ess,
        kish_fraction: ic.kish_ess / draws as f64,
        variance_ratio: result
            .variance
            .iter()
            .zip(&laplace_variance)
            .map(|(s, l)| s / l)
            .collect(),
    });
    summary.diagnostics = Some(DiagnosticsSummary {
        rhat_max: stats
            .iter()
            .map(|s| s.rhat)
            .fold(f64::NEG_INFINITY, nan_max),
        ess_bulk_min: stats
            .iter()
            .map(|s| s.ess_bulk)
            .fold(f64::INFINITY, nan_min),
        ess_tail_min: stats
            .iter()
            .map(|s| s.ess_tail)
            .fold(f64::INFINITY, nan_min),
        khat,
        converged: verdict.status == diagnostics::Status::Converged,
        laplace_adequate: verdict.laplace_adequate,
        verdict: verdict.text(),
    });
    summary.write(out)?;
    Ok(SampleOutcome {
        summary,
        result,
        stats,
        verdict,
    })
}

/// Largest value, NaN winning (a diagnostic that could not be computed is the worst case).
fn nan_max(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        a.max(b)
    }
}

fn nan_min(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        a.min(b)
    }
}

/// Draws `k` points from the Laplace Gaussian N(x*, L Lᵀ), evaluates the cost at each (in parallel),
/// and returns the importance check of the weights π(x) / q(x), the number of failed evaluations and
/// the number of draws. log q(x) = −½ |z|² up to a constant that cancels in the normalised weights.
fn laplace_weights(
    problem: &dyn Problem,
    x_map: &[f64],
    precond: &dyn Preconditioner,
    k: usize,
    seed: u64,
) -> Result<(diagnostics::ImportanceCheck, usize, usize)> {
    let n = x_map.len();
    let evals: Vec<std::result::Result<(f64, f64), Error>> = (0..k)
        .into_par_iter()
        .map(|i| {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            rng.set_stream(1_000 + i as u64);
            let z: Vec<f64> = (0..n).map(|_| StandardNormal.sample(&mut rng)).collect();
            let mut x = vec![0.0; n];
            precond.mul_sqrt_cov(&z, &mut x);
            x.iter_mut().zip(x_map).for_each(|(a, b)| *a += b);
            let log_q = -0.5 * z.iter().map(|v| v * v).sum::<f64>();
            match problem.cost(&x) {
                Ok(j) => Ok((-j, log_q)),
                Err(e) if e.is_recoverable() => Ok((f64::NEG_INFINITY, log_q)),
                Err(e) => Err(Error::eval("evaluating the cost at a Laplace draw", e)),
            }
        })
        .collect();
    let mut log_t = Vec::with_capacity(k);
    let mut log_q = Vec::with_capacity(k);
    for e in evals {
        let (t, q) = e?;
        log_t.push(t);
        log_q.push(q);
    }
    let failed = log_t.iter().filter(|t| **t == f64::NEG_INFINITY).count();
    Ok((diagnostics::importance_check(&log_t, &log_q)?, failed, k))
}

/// Per-component diagnostics from the chains' draws files (the complete records of every chain, cut
/// to the shortest chain), and the E-BFMI of each chain where the draws carry HMC energies.
pub fn diagnose(
    out: &Path,
    chains: usize,
    n: usize,
) -> Result<(Vec<ComponentStats>, Option<Vec<f64>>)> {
    let files: Vec<DrawsFile> = sampler::open_chains(out, chains)?;
    let len = files
        .iter()
        .map(|f| f.iter().map(|it| it.count()).unwrap_or(0))
        .min()
        .unwrap_or(0);
    if len < 4 {
        return Err(Error::Config(format!(
            "the chains in {} hold {len} draws each; diagnostics need at least 4",
            out.display()
        )));
    }
    // Components in blocks so that memory stays at block × draws × chains.
    const BLOCK: usize = 256;
    let mut stats = Vec::with_capacity(n);
    for start in (0..n).step_by(BLOCK) {
        let which: Vec<usize> = (start..(start + BLOCK).min(n)).collect();
        let per_chain: Vec<Vec<Vec<f64>>> = files
            .iter()
            .map(|f| {
                f.components(&which).map(|mut c| {
                    c.iter_mut().for_each(|v| v.truncate(len));
                    c
                })
            })
            .collect::<Result<_>>()?;
        let block: Vec<ComponentStats> = (0..which.len())
            .into_par_iter()
            .map(|j| {
                let slices: Vec<&[f64]> = per_chain.iter().map(|c| c[j].as_slice()).collect();
                diagnostics::component_stats(&slices)
            })
            .collect::<Result<_>>()?;
        stats.extend(block);
    }
    let mut energies = Vec::with_capacity(files.len());
    for f in &files {
        let mut e = Vec::with_capacity(len);
        for r in f.iter()?.take(len) {
            e.push(r?.energy);
        }
        energies.push(e);
    }
    let ebfmi = if energies.iter().all(|e| e.iter().all(|v| v.is_finite())) {
        let slices: Vec<&[f64]> = energies.iter().map(|e| e.as_slice()).collect();
        diagnostics::bfmi(&slices).ok()
    } else {
        None
    };
    Ok((stats, ebfmi))
}

fn posterior_summary(r: &SampleResult, stats: &[ComponentStats]) -> PosteriorSummary {
    let col = |f: fn(&ComponentStats) -> f64| stats.iter().map(f).collect::<Vec<f64>>();
    PosteriorSummary {
        draws: r.draws,
        mean: r.mean.clone(),
        variance: r.variance.clone(),
        mcse_mean: col(|s| s.mcse_mean),
        mcse_sd: col(|s| s.mcse_sd),
        ess_bulk: col(|s| s.ess_bulk),
        ess_tail: col(|s| s.ess_tail),
        rhat: col(|s| s.rhat),
        q05: col(|s| s.q05),
        q95: col(|s| s.q95),
        mcse_q05: col(|s| s.mcse_q05),
        mcse_q95: col(|s| s.mcse_q95),
    }
}
