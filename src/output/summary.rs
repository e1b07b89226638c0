//! summary.json: the machine-readable record of a run (schema in the README).

use std::path::Path;

use super::write_atomic;
use crate::diagnostics::{Reason, Status};
use crate::error::{Error, Result};
use crate::precond::{LaplaceInfo, LaplaceMethod};
use crate::problem::check::{Criterion, FdComponent};
use crate::problem::EvalCounts;

/// The caution every output carries.
pub const CAUTION: &str = crate::diagnostics::CONDITIONAL_CAUTION;

/// JSON has no NaN or infinity: serde_json writes them as `null`. These read `null` back as NaN, so
/// that a summary with a diagnostic that could not be computed (a constant component's R-hat, say)
/// still reads back.
mod nullable {
    use serde::{Deserialize, Deserializer};

    pub fn f64<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
        Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
    }

    pub fn vec<'de, D: Deserializer<'de>>(d: D) -> Result<Vec<f64>, D::Error> {
        Ok(Vec::<Option<f64>>::deserialize(d)?
            .into_iter()
            .map(|v| v.unwrap_or(f64::NAN))
            .collect())
    }
}

/// The minimisation, as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct MapSummary {
    #[serde(deserialize_with = "nullable::f64")]
    pub cost: f64,
    #[serde(deserialize_with = "nullable::f64")]
    pub cost_start: f64,
    /// Jb and Jo at the analysis, where the problem reports them.
    pub cost_background: Option<f64>,
    pub cost_observation: Option<f64>,
    #[serde(deserialize_with = "nullable::f64")]
    pub grad_norm: f64,
    #[serde(deserialize_with = "nullable::f64")]
    pub grad_norm_start: f64,
    pub iterations: u64,
    pub converged: bool,
    pub reason: String,
    /// Whether the minimisation ran in the prior-whitened control variable.
    pub whitened: bool,
    /// The analysis.
    #[serde(deserialize_with = "nullable::vec")]
    pub x: Vec<f64>,
}

/// The gradient test, as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct CheckSummary {
    pub passed: bool,
    pub verdict: String,
    #[serde(deserialize_with = "nullable::f64")]
    pub best_ratio_error: f64,
    pub remainder_slope: Option<f64>,
    /// What judged the gradient: "ratio" (r(alpha) reaching 1, with the remainder's order),
    /// "remainder-order" (the remainder's order alone: h.grad J too small, e.g. at a minimum) or "undecided".
    /// Summaries written before this field judged by the ratio, which is what a missing field reads as.
    #[serde(default)]
    pub criterion: Criterion,
    pub fd_max_rel_error: Option<f64>,
    /// The components with the largest finite-difference differences, worst first.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub fd_worst: Vec<FdComponent>,
}

/// The Laplace approximation at the analysis (the inverse Hessian there), as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct LaplaceSummary {
    /// "dense", "low-rank", "lbfgs" or "diagonal".
    pub method: LaplaceMethod,
    /// Rank of the low-rank update of the prior (low-rank method only).
    pub rank: Option<usize>,
    /// diag of the Laplace covariance: the analysis-error variances.
    #[serde(deserialize_with = "nullable::vec")]
    pub variance: Vec<f64>,
    /// log det of the Laplace covariance.
    #[serde(deserialize_with = "nullable::f64")]
    pub log_det_cov: f64,
    /// Leading eigenvalues, descending, of `spectrum_of`.
    #[serde(deserialize_with = "nullable::vec")]
    pub eigenvalues: Vec<f64>,
    /// File (in the output folder) holding the matching eigen-directions in model space, one per column.
    pub eigenvectors_file: Option<String>,
    /// What the spectrum is of, the cost, and accuracy indicators.
    #[serde(flatten)]
    pub info: LaplaceInfo,
}

/// The closed-form posterior, where the problem has one.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct ReferenceSummary {
    #[serde(deserialize_with = "nullable::vec")]
    pub mean: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub variance: Vec<f64>,
}

/// The posterior ensemble, per component.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct PosteriorSummary {
    /// Kept draws over all chains.
    pub draws: u64,
    #[serde(deserialize_with = "nullable::vec")]
    pub mean: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub variance: Vec<f64>,
    /// Monte Carlo standard error of the mean.
    #[serde(deserialize_with = "nullable::vec")]
    pub mcse_mean: Vec<f64>,
    /// Monte Carlo standard error of the standard deviation.
    #[serde(deserialize_with = "nullable::vec")]
    pub mcse_sd: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub ess_bulk: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub ess_tail: Vec<f64>,
    /// Rank-normalised split R-hat.
    #[serde(deserialize_with = "nullable::vec")]
    pub rhat: Vec<f64>,
    /// 5% and 95% quantiles and their Monte Carlo standard errors.
    #[serde(deserialize_with = "nullable::vec")]
    pub q05: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub q95: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub mcse_q05: Vec<f64>,
    #[serde(deserialize_with = "nullable::vec")]
    pub mcse_q95: Vec<f64>,
}

/// One chain, as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct ChainReport {
    pub chain: usize,
    /// Mean acceptance probability while sampling, and during the warm-up.
    #[serde(deserialize_with = "nullable::f64")]
    pub acceptance: f64,
    #[serde(deserialize_with = "nullable::f64")]
    pub warmup_acceptance: f64,
    /// The adapted step size (whitened units), for kernels that have one.
    pub step_size: Option<f64>,
    pub divergences: u64,
    pub rejected_nonfinite: u64,
    pub warmup_divergences: u64,
    pub warmup_rejected_nonfinite: u64,
    pub draws: u64,
    /// E-BFMI (HMC only).
    pub ebfmi: Option<f64>,
}

/// The convergence diagnostics and the plain-language verdict.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct DiagnosticsSummary {
    #[serde(deserialize_with = "nullable::f64")]
    pub rhat_max: f64,
    #[serde(deserialize_with = "nullable::f64")]
    pub ess_bulk_min: f64,
    #[serde(deserialize_with = "nullable::f64")]
    pub ess_tail_min: f64,
    /// Pareto k-hat of the Laplace importance weights, where the check ran.
    pub khat: Option<f64>,
    /// Whether the status is `converged` (every check passed).
    pub converged: bool,
    /// The verdict's status: converged, converged_with_warnings, not_converged or partial (absent in
    /// summaries written before it was recorded).
    #[serde(default)]
    pub status: Option<Status>,
    /// Every reason the status is not `converged`.
    #[serde(default)]
    pub reasons: Vec<Reason>,
    /// The exit code the verdict gives.
    #[serde(default)]
    pub exit_code: Option<i32>,
    /// Whether the inverse Hessian is a usable description of the posterior: k-hat below its threshold
    /// and every component's sd ratio agreeing (`null`: not established).
    pub laplace_adequate: Option<bool>,
    /// The k-hat threshold the Laplace check was judged against: min(1 − 1/log10 S, 0.7).
    #[serde(default)]
    pub khat_threshold: Option<f64>,
    /// Divergent sampling transitions over all chains, as a fraction.
    #[serde(default)]
    pub divergent_fraction: Option<f64>,
    /// Per component: posterior sd / Laplace sd and its Monte Carlo standard error (components are
    /// judged on them only once the chains have converged).
    #[serde(default, deserialize_with = "nullable::vec")]
    pub sd_ratio: Vec<f64>,
    #[serde(default, deserialize_with = "nullable::vec")]
    pub sd_ratio_mcse: Vec<f64>,
    /// Components whose spread the inverse Hessian understates (ratio above 1.1 by more than two
    /// MCSE) and overstates (below 0.9 by more than two MCSE).
    #[serde(default)]
    pub laplace_understates: Vec<String>,
    #[serde(default)]
    pub laplace_overstates: Vec<String>,
    /// The verdict in plain words, ending with the caution.
    pub verdict: String,
}

/// How far the Laplace Gaussian holds: importance weights of Laplace draws under the true posterior.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct LaplaceCheckSummary {
    /// Laplace draws evaluated (cost only).
    pub draws: usize,
    /// Draws whose cost could not be evaluated (weight 0).
    pub failed: usize,
    #[serde(deserialize_with = "nullable::f64")]
    pub khat: f64,
    /// k-hat below this is reliable: min(1 − 1/log10(S), 0.7).
    #[serde(deserialize_with = "nullable::f64")]
    pub khat_threshold: f64,
    /// Why k-hat is −∞ or could not be estimated, in words.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub khat_note: Option<String>,
    /// Kish effective sample size of the weights, and as a fraction of the draws.
    #[serde(deserialize_with = "nullable::f64")]
    pub kish_ess: f64,
    #[serde(deserialize_with = "nullable::f64")]
    pub kish_fraction: f64,
    /// Per component: posterior (sampled) variance / Laplace variance.
    #[serde(deserialize_with = "nullable::vec")]
    pub variance_ratio: Vec<f64>,
}

/// How the chains were run.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct SamplingSummary {
    pub kernel: String,
    /// The metric (preconditioner) the chains ran with.
    pub metric: String,
    pub chains: usize,
    pub draws_per_chain: u64,
    /// The warm-up asked for (with the pooled metric learning, the most).
    pub warmup: u64,
    pub thin: u64,
    pub seed: u64,
    /// Why this kernel samples: chosen by `--kernel auto` from the Laplace check (with the numbers
    /// that decided), or asked for.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub kernel_reason: Option<String>,
    /// How the warm-up learned the metric (pooled, off, per-chain-diagonal).
    #[serde(default)]
    pub learn_metric: String,
    /// Warm-up iterations each chain did.
    #[serde(default)]
    pub warmup_done: u64,
    /// The pooled warm-up: the iteration at which step size and metric had settled, if they did.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub warmup_settled_at: Option<u64>,
    /// The pooled warm-up's metric windows: pooled draws, shrinkage towards the Laplace metric,
    /// change from the metric before, pooled step size.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub warmup_windows: Vec<crate::adapt::WindowReport>,
    /// Whether this summary was written by a resumed run.
    pub resumed: bool,
    /// Evaluations served from the evaluation record on resume instead of the model.
    pub replayed_evaluations: u64,
    /// The target bulk and tail ESS of every component (0: the fixed `draws_per_chain`).
    #[serde(default)]
    pub target_ess: u64,
    /// What ended the chains: "target met", "max evaluations", "time limit" or "draws".
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stop_reason: Option<String>,
    /// Draws per chain reached (the fewest over the chains; `draws_per_chain` is the first block).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub draws_reached: Option<u64>,
}

/// Everything a run reports. Stages that did not run are absent.
#[derive(Debug, Clone, Default, serde::Serialize, serde::Deserialize)]
pub struct Summary {
    pub varpost_version: String,
    /// The subcommand that wrote it.
    pub command: String,
    pub problem: String,
    pub description: String,
    pub dim: usize,
    /// Names of the control-vector components.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub component_names: Option<Vec<String>>,
    pub settings: serde_json::Value,
    pub caution: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub check: Option<CheckSummary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub map: Option<MapSummary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub laplace: Option<LaplaceSummary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub reference: Option<ReferenceSummary>,
    /// The background state and its error variances, where the problem gives its prior.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub background: Option<Vec<f64>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub background_variance: Option<Vec<f64>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub sampling: Option<SamplingSummary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub posterior: Option<PosteriorSummary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub chains: Option<Vec<ChainReport>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub diagnostics: Option<DiagnosticsSummary>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub laplace_check: Option<LaplaceCheckSummary>,
    /// Every evaluation of the run.
    pub evaluations: EvalCounts,
    /// The evaluations split by stage (check, map, hessian, laplace_check, warmup, sampling).
    #[serde(default, skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub evaluations_by_stage: std::collections::BTreeMap<String, EvalCounts>,
}

impl Summary {
    /// A summary with the identifying fields filled.
    pub fn new(
        command: &str,
        problem: &str,
        description: &str,
        dim: usize,
        settings: serde_json::Value,
    ) -> Self {
        Summary {
            varpost_version: env!("CARGO_PKG_VERSION").to_string(),
            command: command.into(),
            problem: problem.into(),
            description: description.into(),
            dim,
            settings,
            caution: CAUTION.into(),
            ..Default::default()
        }
    }

    /// Writes DIR/summary.json atomically.
    pub fn write(&self, dir: &Path) -> Result<()> {
        let text = serde_json::to_string_pretty(self)
            .map_err(|e| Error::Numerical(format!("cannot encode the summary: {e}")))?;
        write_atomic(&dir.join("summary.json"), text.as_bytes())
    }

    /// Reads DIR/summary.json.
    pub fn read(dir: &Path) -> Result<Self> {
        let p = dir.join("summary.json");
        let text = crate::resources::read_bounded(&p, 1 << 30)?;
        serde_json::from_str(&text)
            .map_err(|e| Error::format(&p, format!("not a varpost summary: {e}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_summary_with_non_finite_diagnostics_reads_back() {
        // JSON (RFC 8259) has no NaN or infinity; serde_json writes null, which must read back as NaN.
        let dir = std::env::temp_dir().join(format!("varpost-summary-nan-{}", std::process::id()));
        let mut s = Summary::new("sample", "p", "d", 2, serde_json::Value::Null);
        s.diagnostics = Some(DiagnosticsSummary {
            rhat_max: f64::NAN,
            ess_bulk_min: 10.0,
            ess_tail_min: f64::INFINITY,
            khat: Some(f64::NEG_INFINITY),
            converged: false,
            status: Some(Status::NotConverged),
            reasons: vec![Reason::ChainsNotConverged],
            exit_code: Some(5),
            laplace_adequate: None,
            khat_threshold: Some(0.7),
            divergent_fraction: None,
            sd_ratio: vec![1.0, f64::NAN],
            sd_ratio_mcse: vec![0.1, f64::NAN],
            laplace_understates: vec![],
            laplace_overstates: vec![],
            verdict: String::new(),
        });
        s.write(&dir).unwrap();
        let r = Summary::read(&dir).unwrap();
        let d = r.diagnostics.unwrap();
        assert!(d.rhat_max.is_nan() && d.ess_tail_min.is_nan() && d.ess_bulk_min == 10.0);
        assert_eq!(d.khat, None);
        assert!(d.sd_ratio[0] == 1.0 && d.sd_ratio[1].is_nan());
        assert_eq!(d.status, Some(Status::NotConverged));
        let _ = std::fs::remove_dir_all(&dir);
    }
}
