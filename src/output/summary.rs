//! summary.json: the machine-readable record of a run (schema in the README).

use std::path::Path;

use super::write_atomic;
use crate::error::{Error, Result};
use crate::precond::{LaplaceInfo, LaplaceMethod};
use crate::problem::EvalCounts;

/// The caution every output carries.
pub const CAUTION: &str = "The spread reported here is conditional on the model, the background-error \
covariance B and the observation-error covariance R as given: errors in any of them are not represented.";

/// The minimisation, as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct MapSummary {
    pub cost: f64,
    pub cost_start: f64,
    /// Jb and Jo at the analysis, where the problem reports them.
    pub cost_background: Option<f64>,
    pub cost_observation: Option<f64>,
    pub grad_norm: f64,
    pub grad_norm_start: f64,
    pub iterations: u64,
    pub converged: bool,
    pub reason: String,
    /// Whether the minimisation ran in the prior-whitened control variable.
    pub whitened: bool,
    /// The analysis.
    pub x: Vec<f64>,
}

/// The gradient test, as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct CheckSummary {
    pub passed: bool,
    pub verdict: String,
    pub best_ratio_error: f64,
    pub remainder_slope: Option<f64>,
    pub fd_max_rel_error: Option<f64>,
}

/// The Laplace approximation at the analysis (the inverse Hessian there), as reported.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct LaplaceSummary {
    /// "dense", "low-rank", "lbfgs" or "diagonal".
    pub method: LaplaceMethod,
    /// Rank of the low-rank update of the prior (low-rank method only).
    pub rank: Option<usize>,
    /// diag of the Laplace covariance: the analysis-error variances.
    pub variance: Vec<f64>,
    /// log det of the Laplace covariance.
    pub log_det_cov: f64,
    /// Leading eigenvalues, descending, of `spectrum_of`.
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
    pub mean: Vec<f64>,
    pub variance: Vec<f64>,
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
    /// Every evaluation of the run.
    pub evaluations: EvalCounts,
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
        let text = std::fs::read_to_string(&p).map_err(|e| Error::io(&p, e))?;
        serde_json::from_str(&text)
            .map_err(|e| Error::format(&p, format!("not a varpost summary: {e}")))
    }
}
