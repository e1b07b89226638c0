//! Command-line arguments → validated run configurations → pipeline calls. One function per
//! subcommand; nothing here computes.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::error::{Error, Result};
use crate::optimize::MapConfig;
use crate::pipeline::{self, CheckConfig, HessianRunConfig, MapRunConfig, ProblemSource};
use crate::precond::{LaplaceMethod, LaplaceOptions, SpectrumOf};
use crate::problem::lorenz96::{Lorenz96Config, Scenario};
use crate::problem::settings::Settings;
use crate::problem::Problem;

/// Posterior uncertainty for strong-constraint 4D-Var: gradient check, L-BFGS analysis, Hessian at the
/// analysis, and preconditioned MCMC ensembles with convergence diagnostics.
#[derive(Debug, Parser)]
#[command(name = "varpost", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run every stage on the embedded Lorenz-96 demo scenario (no arguments needed).
    Demo {
        /// Output folder.
        #[arg(long, default_value = "varpost-demo")]
        out: PathBuf,
    },
    /// Taylor test of the gradient (and finite-difference comparison for small dimensions).
    Check {
        #[command(flatten)]
        problem: ProblemArgs,
        /// Test point (default: the background). Numbers separated by commas, spaces or newlines.
        #[arg(long)]
        start: Option<PathBuf>,
        /// Seed of the random test direction.
        #[arg(long, default_value_t = 1)]
        seed: u64,
    },
    /// Find the analysis (MAP) with L-BFGS.
    Map {
        #[command(flatten)]
        problem: ProblemArgs,
        #[command(flatten)]
        lbfgs: LbfgsArgs,
    },
    /// Find the analysis, then the Hessian there: the Laplace (analysis-error) covariance.
    Hessian {
        #[command(flatten)]
        problem: ProblemArgs,
        #[command(flatten)]
        lbfgs: LbfgsArgs,
        #[command(flatten)]
        hessian: HessianArgs,
    },
    /// Write a synthetic scenario of a built-in problem (truth, background, observations) to a folder.
    Synth {
        /// The built-in problem (only lorenz96 has scenario files).
        #[arg(long, default_value = "lorenz96")]
        problem: String,
        /// Problem settings as key=value (repeatable), e.g. --set seed=3 --set synth=calibration.
        #[arg(long = "set", value_name = "KEY=VALUE")]
        set: Vec<String>,
        /// Output folder.
        #[arg(long)]
        out: PathBuf,
    },
}

/// Which problem to run on, and where to write.
#[derive(Debug, Args)]
pub struct ProblemArgs {
    /// A built-in problem: lorenz96 or linear-gaussian.
    #[arg(long)]
    pub problem: Option<String>,
    /// Problem settings as key=value (repeatable), e.g. --set obs_op=square --set window=12.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub set: Vec<String>,
    /// Output folder (created if missing).
    #[arg(long)]
    pub out: PathBuf,
}

/// L-BFGS settings.
#[derive(Debug, Args)]
pub struct LbfgsArgs {
    /// Start of the minimisation (default: the background).
    #[arg(long)]
    pub start: Option<PathBuf>,
    /// Number of (s, y) pairs kept by L-BFGS.
    #[arg(long, default_value_t = MapConfig::default().history)]
    pub history: usize,
    /// Stop when the gradient norm has fallen by this factor.
    #[arg(long, default_value_t = MapConfig::default().grad_rtol)]
    pub grad_rtol: f64,
    /// Iteration limit.
    #[arg(long, default_value_t = MapConfig::default().max_iters)]
    pub max_iters: u64,
}

impl LbfgsArgs {
    fn config(&self) -> Result<MapRunConfig> {
        if self.history == 0 {
            return Err(Error::Config("--history must be at least 1".into()));
        }
        if !(self.grad_rtol > 0.0 && self.grad_rtol < 1.0) {
            return Err(Error::Config(format!(
                "--grad-rtol {} must lie strictly between 0 and 1",
                self.grad_rtol
            )));
        }
        if self.max_iters == 0 {
            return Err(Error::Config("--max-iters must be at least 1".into()));
        }
        Ok(MapRunConfig {
            start: self.start.clone(),
            lbfgs: MapConfig {
                history: self.history,
                grad_rtol: self.grad_rtol,
                max_iters: self.max_iters,
                ..Default::default()
            },
        })
    }
}

/// Settings of the Hessian estimate at the analysis.
#[derive(Debug, Args)]
pub struct HessianArgs {
    /// auto, dense, low-rank, lbfgs or diagonal. auto: dense for small n, low-rank where the prior is
    /// known, else the minimiser's L-BFGS pairs.
    #[arg(long, default_value = "auto")]
    pub method: String,
    /// Low-rank: keep eigenvalues of the prior-preconditioned misfit Hessian with |λ| above this.
    #[arg(long, default_value_t = LaplaceOptions::default().eigen_threshold)]
    pub threshold: f64,
    /// Low-rank: largest rank (default min(n, 1000)).
    #[arg(long)]
    pub max_rank: Option<usize>,
    /// Largest n for which auto chooses the dense method.
    #[arg(long, default_value_t = LaplaceOptions::default().dense_max_dim)]
    pub dense_max_dim: usize,
    /// Seed of the randomized eigensolver.
    #[arg(long, default_value_t = LaplaceOptions::default().seed)]
    pub hessian_seed: u64,
}

impl HessianArgs {
    fn options(&self) -> Result<LaplaceOptions> {
        let method = match self.method.as_str() {
            "auto" => None,
            m => Some(m.parse::<LaplaceMethod>().map_err(|_| {
                Error::Config(format!(
                    "--method {m}: choose auto, dense, low-rank, lbfgs or diagonal"
                ))
            })?),
        };
        if !(self.threshold.is_finite() && self.threshold >= 0.0) {
            return Err(Error::Config(format!(
                "--threshold {} must be a finite number >= 0",
                self.threshold
            )));
        }
        if self.max_rank == Some(0) {
            return Err(Error::Config("--max-rank must be at least 1".into()));
        }
        Ok(LaplaceOptions {
            method,
            eigen_threshold: self.threshold,
            max_rank: self.max_rank,
            dense_max_dim: self.dense_max_dim,
            seed: self.hessian_seed,
            ..Default::default()
        })
    }
}

impl ProblemArgs {
    fn source(&self) -> Result<ProblemSource> {
        match &self.problem {
            Some(name) => Ok(ProblemSource::Builtin {
                name: name.clone(),
                settings: self.set.clone(),
            }),
            None => Err(Error::Config(format!(
                "say which problem to run: --problem NAME (built-in: {})",
                crate::problem::builtin::NAMES.join(", ")
            ))),
        }
    }
}

/// Runs a parsed command line; returns the process exit code for a completed run.
pub fn run(cli: Cli) -> Result<i32> {
    match cli.command {
        Command::Demo { out } => demo(&out),
        Command::Check {
            problem,
            start,
            seed,
        } => {
            let loaded = pipeline::load(&problem.source()?)?;
            println!(
                "gradient test: {} (n = {})",
                loaded.description,
                loaded.problem.dim()
            );
            let (r, _) = pipeline::run_check(&loaded, &CheckConfig { start, seed }, &problem.out)?;
            print_check(&r);
            println!("summary: {}", problem.out.join("summary.json").display());
            if !r.passed {
                return Err(Error::GradientCheck(r.verdict));
            }
            Ok(0)
        }
        Command::Map { problem, lbfgs } => {
            let cfg = lbfgs.config()?;
            let loaded = pipeline::load(&problem.source()?)?;
            println!(
                "analysis: {} (n = {})",
                loaded.description,
                loaded.problem.dim()
            );
            let (m, s) = pipeline::run_map(&loaded, &cfg, &problem.out)?;
            print_map(&m);
            if let Some(r) = &s.reference {
                let err = rel_err(&m.x, &r.mean);
                println!("  closed-form posterior mean: largest relative difference {err:.2e}");
            }
            println!(
                "evaluations: {} cost+gradient, {} cost only",
                s.evaluations.gradient, s.evaluations.cost
            );
            println!(
                "wrote {} and analysis.csv",
                problem.out.join("summary.json").display()
            );
            Ok(if m.converged { 0 } else { 4 })
        }
        Command::Hessian {
            problem,
            lbfgs,
            hessian,
        } => {
            let cfg = HessianRunConfig {
                map: lbfgs.config()?,
                laplace: hessian.options()?,
            };
            let loaded = pipeline::load(&problem.source()?)?;
            println!(
                "Hessian at the analysis: {} (n = {})",
                loaded.description,
                loaded.problem.dim()
            );
            let (m, s) = pipeline::run_hessian(&loaded, &cfg, &problem.out)?;
            print_map(&m);
            if let Some(l) = &s.laplace {
                print_laplace(l);
                if let Some(r) = &s.reference {
                    let err = l
                        .variance
                        .iter()
                        .zip(&r.variance)
                        .map(|(a, b)| (a - b).abs() / b.abs())
                        .fold(0.0, f64::max);
                    println!(
                        "  closed-form posterior variances: largest relative difference {err:.2e}"
                    );
                }
            }
            println!(
                "evaluations: {} cost+gradient, {} cost only, {} Hessian-vector",
                s.evaluations.gradient, s.evaluations.cost, s.evaluations.hessvec
            );
            println!(
                "wrote {}, analysis.csv, variance.csv{}",
                problem.out.join("summary.json").display(),
                if s.laplace
                    .as_ref()
                    .is_some_and(|l| l.eigenvectors_file.is_some())
                {
                    ", eigenvectors.csv"
                } else {
                    ""
                }
            );
            Ok(if m.converged { 0 } else { 4 })
        }
        Command::Synth { problem, set, out } => {
            if problem != "lorenz96" {
                return Err(Error::Config(format!(
                    "--problem {problem}: only lorenz96 has scenario files (linear-gaussian is regenerated from its seed)"
                )));
            }
            let s = Settings::parse(&set)?;
            let config = Lorenz96Config::from_settings(&s)?;
            s.finish("lorenz96")?;
            let sc = Scenario::synthesize(&config)?;
            sc.write(&out)?;
            println!(
                "wrote scenario.json, background.csv, observations.csv, truth.csv to {}",
                out.display()
            );
            Ok(0)
        }
    }
}

fn rel_err(a: &[f64], b: &[f64]) -> f64 {
    let scale = b
        .iter()
        .map(|v| v.abs())
        .fold(0.0, f64::max)
        .max(f64::MIN_POSITIVE);
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs() / scale)
        .fold(0.0, f64::max)
}

fn print_check(r: &crate::problem::check::GradientReport) {
    println!(
        "  J = {:.6e}, |grad J| = {:.3e}, h.grad J = {:.3e}",
        r.cost, r.grad_norm, r.directional
    );
    println!("  {:>8}  {:>22}  {:>12}", "alpha", "r(alpha)", "remainder");
    for row in &r.rows {
        println!(
            "  {:>8.0e}  {:>22.15}  {:>12.3e}",
            row.alpha, row.ratio, row.remainder
        );
    }
    if let Some(e) = r.fd_max_rel_error {
        println!("  central finite differences: largest relative difference {e:.2e}");
    }
    println!("  {}", r.verdict);
}

fn print_map(m: &crate::optimize::MapResult) {
    println!(
        "  cost {:.6e} -> {:.6e}; |grad J| {:.3e} -> {:.3e} in {} iterations ({})",
        m.cost_start, m.cost, m.grad_norm_start, m.grad_norm, m.iterations, m.reason
    );
    println!(
        "  {}",
        if m.converged {
            "converged"
        } else {
            "NOT converged: the analysis may be inaccurate"
        }
    );
}

fn print_laplace(l: &crate::output::summary::LaplaceSummary) {
    let rank = l.rank.map(|r| format!(", rank {r}")).unwrap_or_default();
    let products = match (l.info.products, l.info.exact_products) {
        (0, _) => "no extra evaluations".to_string(),
        (k, true) => format!("{k} exact Hessian-vector products"),
        (k, false) => format!("{k} Hessian-vector products by differences of gradients"),
    };
    println!(
        "  Laplace covariance: {} method{rank}, {products}",
        l.method
    );
    if !l.eigenvalues.is_empty() {
        let lead: Vec<String> = l
            .eigenvalues
            .iter()
            .take(5)
            .map(|v| format!("{v:.4e}"))
            .collect();
        println!(
            "  leading eigenvalues {}: {}",
            match l.info.spectrum_of {
                Some(SpectrumOf::Hessian) => "of the Hessian",
                _ => "of the prior-preconditioned misfit Hessian",
            },
            lead.join(", ")
        );
    }
    if l.info.rank_truncated {
        println!("  the maximum rank was reached with eigenvalues still above the threshold: raise --max-rank");
    }
    if l.info.pairs_skipped > 0 {
        println!(
            "  {} L-BFGS pairs skipped (curvature condition)",
            l.info.pairs_skipped
        );
    }
    let (lo, hi) = l
        .variance
        .iter()
        .fold((f64::INFINITY, 0.0_f64), |(a, b), v| (a.min(*v), b.max(*v)));
    println!(
        "  analysis-error standard deviations from {:.4e} to {:.4e}",
        lo.sqrt(),
        hi.sqrt()
    );
}

fn demo(out: &std::path::Path) -> Result<i32> {
    println!("varpost demo: the embedded Lorenz-96 scenario (invented; see demo-data/README.md)");
    let r = pipeline::run_demo(out)?;
    println!("{}", r.summary.description);
    println!("1. gradient test at the background: {}", r.check.verdict);
    println!("2. analysis (L-BFGS):");
    print_map(&r.map);
    if let (Some(b), Some(a)) = (r.rmse_background, r.rmse_analysis) {
        println!(
            "   error against the truth (RMSE over {} sites): background {b:.3}, analysis {a:.3}",
            r.summary.dim
        );
    }
    println!(
        "evaluations: {} cost+gradient, {} cost only",
        r.summary.evaluations.gradient, r.summary.evaluations.cost
    );
    println!("{}", crate::output::summary::CAUTION);
    println!("output: {}", out.display());
    Ok(0)
}
