//! The one place that wires the stages together: problem → check → analysis (MAP) → outputs.
//!
//! Each `run_*` function takes a validated configuration, runs its stages in order, writes the output
//! folder and returns the summary; the CLI only turns arguments into these calls and prints.

use std::path::{Path, PathBuf};

use crate::adapter::AdapterProblem;
use crate::error::{Error, Result};
use crate::optimize::{find_map, MapConfig, MapResult};
use crate::output::summary::{CheckSummary, LaplaceSummary, MapSummary, ReferenceSummary};
use crate::output::{table, Summary};
use crate::precond::{laplace, Laplace, LaplaceOptions};
use crate::problem::builtin::{self, Builtin};
use crate::problem::check::{gradient_test, GradientReport};
use crate::problem::replay::Replay;
use crate::problem::settings::Settings;
use crate::problem::{Counted, Problem};

pub mod report;
pub mod sample;

pub use report::{run_report, ReportOutcome};
pub use crate::config::{ProblemSource, RunConfig};
pub use sample::{read_run, run_sample, SampleOutcome};

/// A problem ready to run: counted, with what the tool knows about it.
pub struct Loaded {
    /// The problem, counting every evaluation.
    pub problem: Counted<Replay<Box<dyn Problem>>>,
    pub name: String,
    pub description: String,
    pub settings: serde_json::Value,
    pub reference: Option<ReferenceSummary>,
    pub truth: Option<Vec<f64>>,
}

impl Loaded {
    /// Component names: the problem's own, or x0, x1, ….
    pub fn names(&self) -> Vec<String> {
        self.problem
            .component_names()
            .filter(|v| v.len() == self.problem.dim())
            .unwrap_or_else(|| (0..self.problem.dim()).map(|i| format!("x{i}")).collect())
    }

    /// A summary carrying the problem's identity, its prior and its reference.
    pub fn summary(&self, command: &str) -> Summary {
        let mut s = Summary::new(
            command,
            &self.name,
            &self.description,
            self.problem.dim(),
            self.settings.clone(),
        );
        s.reference = self.reference.clone();
        s.component_names = Some(self.names());
        if let Some(p) = self.problem.prior() {
            s.background = Some(p.mean().to_vec());
            s.background_variance = Some(p.variance());
        }
        s
    }

    /// The default start of the minimisation and of the gradient test: the background.
    pub fn default_start(&self) -> Result<Vec<f64>> {
        self.problem.prior().map(|p| p.mean().to_vec()).ok_or_else(|| {
            Error::Config(
                "the problem does not give its background state; pass a start point with --start FILE".into(),
            )
        })
    }
}

/// Opens the problem a run works on.
pub fn load(source: &ProblemSource) -> Result<Loaded> {
    match source {
        ProblemSource::Builtin { name, settings } => {
            let s = Settings::parse(settings)?;
            let Builtin {
                problem,
                description,
                settings,
                reference,
                truth,
            } = builtin::open(name, &s)?;
            Ok(Loaded {
                problem: Counted::new(Replay::new(problem)),
                name: name.clone(),
                description,
                settings,
                reference: reference.map(|r| ReferenceSummary {
                    mean: r.mean,
                    variance: r.variance,
                }),
                truth,
            })
        }
        ProblemSource::Adapter(config) => {
            let p = AdapterProblem::start(config)?;
            let description = match p.label() {
                Some(l) => format!("{l} (adapter `{}`)", config.command),
                None => format!("adapter `{}`", config.command),
            };
            let settings = serde_json::json!({
                "adapter": config.command,
                "launcher": config.launcher,
                "workers": config.workers,
                "encoding": p.encoding().name(),
            });
            Ok(Loaded {
                problem: Counted::new(Replay::new(Box::new(p) as Box<dyn Problem>)),
                name: "adapter".into(),
                description,
                settings,
                reference: None,
                truth: None,
            })
        }
    }
}

/// Reads a start point: numbers separated by commas, spaces or newlines (lines starting with # are
/// comments), or a two-column CSV `component,value` with that header.
pub fn read_vector(path: &Path, dim: usize) -> Result<Vec<f64>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let mut lines: Vec<&str> = text
        .lines()
        .filter(|l| !l.trim().is_empty() && !l.trim_start().starts_with('#'))
        .collect();
    let two_col = lines
        .first()
        .is_some_and(|l| l.trim().starts_with("component"));
    if two_col {
        lines.remove(0);
    }
    let mut v = Vec::new();
    for (i, l) in lines.iter().enumerate() {
        let fields: Vec<&str> = l
            .split(|c: char| c == ',' || c.is_whitespace())
            .filter(|f| !f.is_empty())
            .collect();
        let fields = if two_col {
            fields.last().into_iter().copied().collect()
        } else {
            fields
        };
        for f in fields {
            let x: f64 = f.parse().map_err(|_| {
                Error::format(path, format!("line {}: '{f}' is not a number", i + 1))
            })?;
            if !x.is_finite() {
                return Err(Error::format(
                    path,
                    format!("line {}: value {x} is not finite", i + 1),
                ));
            }
            v.push(x);
        }
    }
    if v.len() != dim {
        return Err(Error::format(
            path,
            format!("{} values, but the problem has dimension {dim}", v.len()),
        ));
    }
    Ok(v)
}

/// Settings of the gradient test.
#[derive(Debug, Clone)]
pub struct CheckConfig {
    pub start: Option<PathBuf>,
    pub seed: u64,
}

/// Runs the gradient test and writes DIR/summary.json.
pub fn run_check(
    loaded: &Loaded,
    config: &CheckConfig,
    out: &Path,
) -> Result<(GradientReport, Summary)> {
    let x = match &config.start {
        Some(p) => read_vector(p, loaded.problem.dim())?,
        None => loaded.default_start()?,
    };
    let report = gradient_test(&loaded.problem, &x, config.seed)?;
    let mut summary = loaded.summary("check");
    summary.check = Some(check_summary(&report));
    summary.evaluations = loaded.problem.counts();
    summary.write(out)?;
    Ok((report, summary))
}

pub(crate) fn check_summary(r: &GradientReport) -> CheckSummary {
    CheckSummary {
        passed: r.passed,
        verdict: r.verdict.clone(),
        best_ratio_error: r.best_ratio_error,
        remainder_slope: r.remainder_slope,
        fd_max_rel_error: r.fd_max_rel_error,
    }
}

/// Settings of the minimisation run.
#[derive(Debug, Clone, Default)]
pub struct MapRunConfig {
    pub start: Option<PathBuf>,
    pub lbfgs: MapConfig,
}

/// Finds the analysis, writes DIR/summary.json and DIR/analysis.csv.
pub fn run_map(loaded: &Loaded, config: &MapRunConfig, out: &Path) -> Result<(MapResult, Summary)> {
    let mut summary = loaded.summary("map");
    let map = analysis(loaded, config, &mut summary)?;
    write_analysis(loaded, &map, out)?;
    summary.evaluations = loaded.problem.counts();
    summary.write(out)?;
    Ok((map, summary))
}

/// The analysis stage: minimise, and record it in the summary.
pub fn analysis(
    loaded: &Loaded,
    config: &MapRunConfig,
    summary: &mut Summary,
) -> Result<MapResult> {
    let x0 = match &config.start {
        Some(p) => read_vector(p, loaded.problem.dim())?,
        None => loaded.default_start()?,
    };
    let map = find_map(&loaded.problem, &x0, &config.lbfgs)?;
    let split = loaded.problem.cost_split(&map.x).ok().flatten();
    summary.map = Some(MapSummary {
        cost: map.cost,
        cost_start: map.cost_start,
        cost_background: split.map(|s| s.background),
        cost_observation: split.map(|s| s.observation),
        grad_norm: map.grad_norm,
        grad_norm_start: map.grad_norm_start,
        iterations: map.iterations,
        converged: map.converged,
        reason: map.reason.clone(),
        whitened: map.whitened,
        x: map.x.clone(),
    });
    Ok(map)
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
    let mut summary = loaded.summary("hessian");
    let map = analysis(loaded, &config.map, &mut summary)?;
    write_analysis(loaded, &map, out)?;
    let lap = laplace(&loaded.problem, &map.x, &map.pairs, &config.laplace)?;
    summary.laplace = Some(laplace_summary(loaded, &lap, &map, out)?);
    summary.evaluations = loaded.problem.counts();
    summary.write(out)?;
    Ok((map, summary))
}

pub(crate) fn laplace_summary(
    loaded: &Loaded,
    lap: &Laplace<'_>,
    map: &MapResult,
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
            ("analysis", &map.x),
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

/// What the demo found, for printing.
pub struct DemoReport {
    pub check: GradientReport,
    pub sample: SampleOutcome,
    pub report: ReportOutcome,
    /// Root-mean-square error against the truth of the background and of the analysis.
    pub rmse_background: Option<f64>,
    pub rmse_analysis: Option<f64>,
}

/// The demo: the embedded Lorenz-96 scenario through every stage, into `out`. A folder left by an
/// earlier demo is replaced; any other non-empty folder is refused.
pub fn run_demo(out: &Path, progress: &dyn crate::sampler::Progress) -> Result<DemoReport> {
    if out.exists()
        && std::fs::read_dir(out)
            .map(|mut d| d.next().is_some())
            .unwrap_or(false)
    {
        match Summary::read(out) {
            Ok(s) if s.command == "demo" || s.command == "sample" && s.problem == "lorenz96" && out.join("demo.txt").exists() => {
                std::fs::remove_dir_all(out).map_err(|e| Error::io(out, e))?;
            }
            _ => {
                return Err(Error::Config(format!(
                    "{} is not empty and does not hold an earlier demo; give the demo another folder with --out",
                    out.display()
                )))
            }
        }
    }
    std::fs::create_dir_all(out).map_err(|e| Error::io(out, e))?;
    std::fs::write(
        out.join("demo.txt"),
        "written by `varpost demo`; the folder is replaced when the demo runs again\n",
    )
    .map_err(|e| Error::io(out.join("demo.txt"), e))?;
    let source = ProblemSource::Builtin {
        name: "lorenz96".into(),
        settings: Vec::new(),
    };
    let loaded = load(&source)?;
    let x0 = loaded.default_start()?;
    let check = gradient_test(&loaded.problem, &x0, 1)?;
    if !check.passed {
        return Err(Error::GradientCheck(check.verdict));
    }
    let cfg = RunConfig {
        skip_check: true,
        ..RunConfig::new(source)
    };
    let interrupt = crate::interrupt::Interrupt::from_signals()?;
    let mut sample = run_sample(&loaded, &cfg, out, false, &interrupt, progress)?;
    sample.summary.command = "demo".into();
    sample.summary.check = Some(check_summary(&check));
    sample.summary.write(out)?;
    let report = run_report(out, "varpost demo")?;
    let rmse = |a: &[f64]| {
        loaded.truth.as_ref().map(|t| {
            (t.iter().zip(a).map(|(p, q)| (p - q).powi(2)).sum::<f64>() / t.len() as f64).sqrt()
        })
    };
    let xa = sample
        .summary
        .map
        .as_ref()
        .map(|m| m.x.clone())
        .unwrap_or_default();
    Ok(DemoReport {
        rmse_background: rmse(&x0),
        rmse_analysis: rmse(&xa),
        check,
        sample,
        report,
    })
}
