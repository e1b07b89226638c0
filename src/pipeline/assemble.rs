//! The summary of a run (summary.json), assembled once from the stages' typed results.

use std::path::Path;

use super::load::Loaded;
use super::stages::{Analysis, LaplaceCheck};
use crate::diagnostics::{
    AnalysisReading, ChainDivergences, ComponentStats, GradientTest, SpreadFlag, Status, Verdict,
};
use crate::error::Result;
use crate::output::summary::{
    ChainReport, CheckSummary, DiagnosticsSummary, LaplaceCheckSummary, LaplaceSummary, MapSummary,
    PosteriorSummary, SamplingSummary,
};
use crate::output::{table, Summary};
use crate::precond::Laplace;
use crate::problem::check::GradientReport;
use crate::problem::{EvalCounts, Problem};
use crate::sampler::SampleResult;

/// What the sampling stage produced, with how it was run.
pub struct Sampled {
    pub result: SampleResult,
    /// The sampler's settings.
    pub config: crate::sampler::SampleConfig,
    /// The metric's name.
    pub metric: String,
    pub resumed: bool,
    /// Evaluations answered from the record instead of the model.
    pub replayed: u64,
    /// Why the chains stopped (`None` where not known).
    pub stop: Option<crate::sampler::StopReason>,
    /// The target ESS of the run (0: the fixed draws).
    pub target_ess: u64,
}

/// The diagnostics of an ensemble: per-component statistics, the E-BFMI of each chain where the draws
/// carry HMC energies, and the verdict.
pub struct Diagnosis {
    pub stats: Vec<ComponentStats>,
    pub ebfmi: Option<Vec<f64>>,
    pub verdict: Verdict,
}

/// The typed results of a run's stages, as far as it got.
#[derive(Default)]
pub struct StageResults {
    pub check: Option<GradientReport>,
    pub analysis: Option<Analysis>,
    pub laplace: Option<LaplaceSummary>,
    pub laplace_check: Option<LaplaceCheck>,
    pub sampling: Option<Sampled>,
    /// Why the kernel that samples was chosen (`--kernel auto`, or asked for).
    pub kernel_reason: Option<String>,
    pub diagnosis: Option<Diagnosis>,
}

/// The summary of `loaded` run as `command`, from `results`, with `evaluations` in all and split by
/// stage as `by_stage`.
pub fn summary(
    loaded: &Loaded,
    command: &str,
    results: &StageResults,
    evaluations: EvalCounts,
    by_stage: &std::collections::BTreeMap<String, EvalCounts>,
) -> Summary {
    let mut s = loaded.summary(command);
    s.check = results.check.as_ref().map(check_summary);
    s.map = results.analysis.as_ref().map(map_summary);
    s.laplace = results.laplace.clone();
    if let (Some(smp), Some(cfg)) = (&results.sampling, sampling_config(results)) {
        s.sampling = Some(cfg);
        s.chains = Some(chain_reports(smp, results.diagnosis.as_ref()));
        if let Some(d) = &results.diagnosis {
            s.posterior = Some(posterior_summary(&smp.result, &d.stats));
        }
    }
    s.laplace_check = results.laplace_check.as_ref().map(|c| {
        let sampled_var = results
            .sampling
            .as_ref()
            .map(|x| x.result.variance.as_slice());
        let lap_var = results.laplace.as_ref().map(|l| l.variance.as_slice());
        laplace_check_summary(c, sampled_var, lap_var)
    });
    let names = loaded.names();
    s.diagnostics = results
        .diagnosis
        .as_ref()
        .map(|d| diagnostics_summary(d, results.laplace_check.as_ref(), &names));
    s.evaluations = evaluations;
    s.evaluations_by_stage = by_stage.clone();
    s
}

fn sampling_config(r: &StageResults) -> Option<SamplingSummary> {
    let smp = r.sampling.as_ref()?;
    let c = &smp.config;
    Some(SamplingSummary {
        kernel: c.kernel.name().into(),
        metric: smp.metric.clone(),
        chains: c.chains,
        draws_per_chain: c.draws,
        warmup: c.warmup,
        thin: c.thin,
        seed: c.seed,
        learn_metric: c.learning().name().into(),
        kernel_reason: r.kernel_reason.clone(),
        warmup_done: smp.result.warmup_iterations,
        warmup_settled_at: smp.result.plan.as_ref().and_then(|p| p.settled),
        warmup_windows: smp
            .result
            .plan
            .as_ref()
            .map(|p| p.history.clone())
            .unwrap_or_default(),
        resumed: smp.resumed,
        replayed_evaluations: smp.replayed,
        target_ess: smp.target_ess,
        stop_reason: smp.stop.map(|s| s.name().to_string()),
        draws_reached: smp.result.chains.iter().map(|c| c.draws).min(),
    })
}

/// The gradient test's record.
pub fn check_summary(r: &GradientReport) -> CheckSummary {
    CheckSummary {
        passed: r.passed,
        verdict: r.verdict.clone(),
        best_ratio_error: r.best_ratio_error,
        remainder_slope: r.remainder_slope,
        criterion: r.criterion,
        fd_max_rel_error: r.fd_max_rel_error,
        fd_worst: r.fd_worst.clone(),
    }
}

/// The analysis's record.
pub fn map_summary(a: &Analysis) -> MapSummary {
    let map = &a.map;
    MapSummary {
        cost: map.cost,
        cost_start: map.cost_start,
        cost_background: a.split.map(|s| s.background),
        cost_observation: a.split.map(|s| s.observation),
        grad_norm: map.grad_norm,
        grad_norm_start: map.grad_norm_start,
        iterations: map.iterations,
        converged: map.converged,
        reason: map.reason.to_string(),
        whitened: map.whitened,
        x: map.x.clone(),
    }
}

/// The Laplace approximation's record; writes DIR/variance.csv and, where the method has them,
/// DIR/eigenvectors.csv.
pub fn laplace_summary(
    loaded: &Loaded,
    lap: &Laplace<'_>,
    x: &[f64],
    out: &Path,
) -> Result<LaplaceSummary> {
    let names = loaded.names();
    let bg_var = loaded
        .problem
        .prior()
        .map(|p| p.variance())
        .unwrap_or_default();
    let std: Vec<f64> = lap.variance.iter().map(|v| v.sqrt()).collect();
    table::write_columns(
        &out.join("variance.csv"),
        &names,
        &[
            ("analysis", x),
            ("laplace_variance", &lap.variance),
            ("laplace_std", &std),
            ("background_variance", &bg_var),
        ],
    )?;
    let eigenvectors_file = match &lap.eigenvectors {
        Some(v) if v.ncols() > 0 => {
            let headers: Vec<String> = (0..v.ncols()).map(|j| format!("mode{j}")).collect();
            // Column-major storage: column j is the j-th run of nrows values.
            let cols: Vec<(&str, &[f64])> = headers
                .iter()
                .zip(v.as_slice().chunks(v.nrows()))
                .map(|(h, c)| (h.as_str(), c))
                .collect();
            table::write_columns(&out.join("eigenvectors.csv"), &names, &cols)?;
            Some("eigenvectors.csv".to_string())
        }
        _ => None,
    };
    Ok(LaplaceSummary {
        method: lap.method,
        rank: lap.rank,
        variance: lap.variance.clone(),
        log_det_cov: lap.precond.log_det_cov(),
        eigenvalues: lap.eigenvalues.clone(),
        eigenvectors_file,
        info: lap.info.clone(),
    })
}

fn laplace_check_summary(
    c: &LaplaceCheck,
    sampled_variance: Option<&[f64]>,
    laplace_variance: Option<&[f64]>,
) -> LaplaceCheckSummary {
    let ic = &c.check;
    LaplaceCheckSummary {
        draws: c.draws,
        failed: c.failed,
        khat: ic.khat,
        khat_threshold: ic.khat_threshold,
        khat_note: ic.khat_note.clone(),
        kish_ess: ic.kish_ess,
        kish_fraction: ic.kish_ess / c.draws as f64,
        variance_ratio: match (sampled_variance, laplace_variance) {
            (Some(s), Some(l)) => s.iter().zip(l).map(|(s, l)| s / l).collect(),
            _ => Vec::new(),
        },
    }
}

fn chain_reports(smp: &Sampled, d: Option<&Diagnosis>) -> Vec<ChainReport> {
    let ebfmi = d.and_then(|d| d.ebfmi.as_ref());
    smp.result
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
            ebfmi: ebfmi.and_then(|e| e.get(c.chain).copied()),
        })
        .collect()
}

fn diagnostics_summary(
    d: &Diagnosis,
    check: Option<&LaplaceCheck>,
    names: &[String],
) -> DiagnosticsSummary {
    let stats = &d.stats;
    let v = &d.verdict;
    let named = |flag| {
        v.spread_components(flag)
            .into_iter()
            .map(|i| names.get(i).cloned().unwrap_or_else(|| format!("x{i}")))
            .collect()
    };
    DiagnosticsSummary {
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
        khat: check.map(|c| c.check.khat),
        converged: v.status == Status::Converged,
        status: Some(v.status),
        reasons: v.reasons.clone(),
        exit_code: Some(v.exit_code().code()),
        laplace_adequate: v.laplace_adequate,
        khat_threshold: v.khat_threshold,
        divergent_fraction: v.divergent_fraction,
        sd_ratio: v.spread.as_ref().map_or(Vec::new(), |s| s.ratio.clone()),
        sd_ratio_mcse: v
            .spread
            .as_ref()
            .map_or(Vec::new(), |s| s.ratio_mcse.clone()),
        laplace_understates: named(SpreadFlag::Understated),
        laplace_overstates: named(SpreadFlag::Overstated),
        verdict: v.text(),
    }
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

/// The gradient test as the verdict reads it: its result where it ran, skipped where the run skipped
/// it; `None` when neither is known.
pub fn gradient_reading(passed: Option<bool>, skipped: bool) -> Option<GradientTest> {
    match (passed, skipped) {
        (Some(true), _) => Some(GradientTest::Passed),
        (Some(false), _) => Some(GradientTest::Failed),
        (None, true) => Some(GradientTest::Skipped),
        (None, false) => None,
    }
}

/// The analysis as the verdict reads it.
pub fn analysis_reading(m: &MapSummary) -> AnalysisReading {
    AnalysisReading {
        converged: m.converged,
        reason: m.reason.clone(),
        iterations: m.iterations,
    }
}

/// Divergences and sampling transitions (kept draws × `thin`) per chain, from (divergences, kept
/// draws) of each chain.
pub fn chain_divergences(
    chains: impl IntoIterator<Item = (u64, u64)>,
    thin: u64,
) -> Vec<ChainDivergences> {
    chains
        .into_iter()
        .map(|(divergences, draws)| ChainDivergences {
            divergences,
            transitions: draws.saturating_mul(thin.max(1)),
        })
        .collect()
}

/// Standard deviations of the Laplace approximation per component.
pub fn laplace_sd(l: &LaplaceSummary) -> Vec<f64> {
    l.variance.iter().map(|v| v.sqrt()).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnostics::{LaplaceFacts, RunFacts};

    fn stats(sd: f64) -> ComponentStats {
        ComponentStats {
            mean: 0.0,
            sd,
            rhat: 1.001,
            ess_bulk: 2000.0,
            ess_tail: 1500.0,
            mcse_mean: 0.01,
            mcse_sd: 0.01,
            q05: -sd,
            q95: sd,
            mcse_q05: 0.02,
            mcse_q95: 0.02,
        }
    }

    #[test]
    fn the_summary_names_the_components_whose_spread_the_inverse_hessian_misstates() {
        // The rule (ratio outside [0.9, 1.1] by more than 2 MCSE) is this crate's: common practice,
        // no source.
        let s = vec![stats(1.5), stats(1.0), stats(0.7)];
        let sd = [1.0, 1.0, 1.0];
        let names: Vec<String> = ["a", "b", "c"].iter().map(|n| n.to_string()).collect();
        let facts = RunFacts {
            laplace: Some(LaplaceFacts {
                khat: None,
                sd: &sd,
            }),
            names: Some(&names),
            ..Default::default()
        };
        let verdict = Verdict::judge(&s, 4, &facts);
        let d = Diagnosis {
            stats: s,
            ebfmi: None,
            verdict,
        };
        let summary = diagnostics_summary(&d, None, &names);
        assert_eq!(summary.laplace_understates, vec!["a".to_string()]);
        assert_eq!(summary.laplace_overstates, vec!["c".to_string()]);
        assert_eq!(summary.sd_ratio, vec![1.5, 1.0, 0.7]);
        assert_eq!(summary.laplace_adequate, Some(false));
        assert_eq!(summary.status, Some(Status::ConvergedWithWarnings));
        assert_eq!(summary.exit_code, Some(6));
        assert!(!summary.converged);
        assert!(
            summary.verdict.contains("a (1.50 ± 0.01)"),
            "{}",
            summary.verdict
        );
    }
}
