//! The command line's arguments, and their conversion into the stages' settings. Every number is
//! checked by its value parser ([`super::parse`]) as it is read; combinations are checked by
//! [`crate::config::RunConfig::validate`] and [`check_adapter_options`].

use std::path::{Path, PathBuf};
use std::time::Duration;

use clap::builder::RangedU64ValueParser;
use clap::parser::ValueSource;
use clap::{ArgMatches, Args, Parser, Subcommand};

use super::parse::{self, MethodChoice};
use crate::adapter::{AdapterConfig, EncodingChoice};
use crate::config::{LaplaceCheckConfig, MetricKind, ProblemSource};
use crate::error::{Error, Result};
use crate::optimize::MapConfig;
use crate::output::progress::LogFormat;
use crate::pipeline::MapRunConfig;
use crate::precond::LaplaceOptions;
use crate::sampler::config::{NutsSettings, MAX_CHAINS};
use crate::sampler::nuts::MAX_TREE_DEPTH;
use crate::sampler::stop::{StopRule, DEFAULT_TARGET_ESS};
use crate::sampler::{HmcSettings, IndependenceSettings, KernelKind, MetricLearning, SampleConfig};

/// Posterior uncertainty for strong-constraint 4D-Var: gradient check, L-BFGS analysis, Hessian at the
/// analysis, and preconditioned MCMC ensembles with convergence diagnostics.
#[derive(Debug, Parser)]
#[command(name = "varpost", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
    /// No progress output at all (the same as --log-format none, and stronger than it).
    #[arg(long, global = true)]
    pub quiet: bool,
    /// Progress on stderr: bar (progress bars), plain (a timestamped line at each stage change and
    /// every 30 s, for batch logs) or none. Default: bar on a terminal, plain otherwise.
    #[arg(long, global = true, value_enum, value_name = "bar|plain|none")]
    pub log_format: Option<LogFormat>,
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
    /// The whole pipeline: gradient check, analysis, Hessian, Laplace check, then MCMC chains and
    /// their diagnostics.
    Sample {
        #[command(flatten)]
        problem: ProblemArgs,
        #[command(flatten)]
        lbfgs: LbfgsArgs,
        #[command(flatten)]
        hessian: HessianArgs,
        #[command(flatten)]
        chains: ChainArgs,
    },
    /// Continue a sampling run from its folder (after a crash, a kill or a wall-clock limit).
    Resume {
        /// The run's output folder.
        dir: PathBuf,
        /// Run this adapter command instead of the one recorded in the run (e.g. after moving the
        /// code); the other adapter settings stay as recorded.
        #[arg(long)]
        adapter: Option<String>,
    },
    /// Diagnostics table, components.csv, ensemble.nc, PNG plots and report.html of a sampling run
    /// (finished or partial).
    Report {
        /// The run's output folder.
        dir: PathBuf,
        /// Rows of the table printed (worst-converged components first).
        #[arg(long, default_value_t = 10)]
        rows: usize,
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
    /// A built-in problem: lorenz96, linear-gaussian or burgers.
    #[arg(long, conflicts_with = "adapter")]
    pub problem: Option<String>,
    /// Your own code: a command that speaks the adapter protocol (adapters/PROTOCOL.md), split like a
    /// shell would but run without one, e.g. --adapter "python3 model.py --config run.nml".
    #[arg(long, value_name = "COMMAND")]
    pub adapter: Option<String>,
    #[command(flatten)]
    pub adapter_opts: AdapterArgs,
    /// Problem settings as key=value (repeatable), e.g. --set obs_op=square --set window=12.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    pub set: Vec<String>,
    /// Output folder, created if missing (default: varpost-<subcommand> in the working folder).
    #[arg(long)]
    pub out: Option<PathBuf>,
}

impl ProblemArgs {
    /// The output folder: --out, or `varpost-<subcommand>`. Printed, so that the user sees where the
    /// output goes.
    pub fn out_dir(&self, subcommand: &str) -> PathBuf {
        match &self.out {
            Some(d) => {
                println!("output folder: {}", d.display());
                d.clone()
            }
            None => {
                let d = PathBuf::from(format!("varpost-{subcommand}"));
                println!(
                    "output folder: {} (the default; choose another with --out DIR)",
                    d.display()
                );
                d
            }
        }
    }

    /// Where the problem comes from; adapter logs go to `out`.
    pub fn source(&self, out: &Path) -> Result<ProblemSource> {
        if let Some(cmd) = &self.adapter {
            if !self.set.is_empty() {
                return Err(Error::Config(
                    "--set configures built-in problems; pass settings to your adapter in its command"
                        .into(),
                ));
            }
            return Ok(ProblemSource::Adapter(self.adapter_opts.config(cmd, out)));
        }
        match &self.problem {
            Some(name) => Ok(ProblemSource::Builtin {
                name: name.clone(),
                settings: self.set.clone(),
            }),
            None => Err(Error::Config(format!(
                "say which problem to run: --problem NAME (built-in: {}) or --adapter \"COMMAND\"",
                crate::problem::builtin::NAMES.join(", ")
            ))),
        }
    }
}

/// The ids of the options that only apply to `--adapter` (the field names of [`AdapterArgs`]).
const ADAPTER_ONLY: [&str; 6] = [
    "workers",
    "launcher",
    "eval_timeout",
    "handshake_timeout",
    "restarts",
    "encoding",
];

/// Refuses adapter options given on the command line without `--adapter` (they would be ignored):
/// returns the message naming the first such option.
pub fn check_adapter_options(matches: &ArgMatches) -> std::result::Result<(), String> {
    let Some((name, sub)) = matches.subcommand() else {
        return Ok(());
    };
    if !matches!(name, "check" | "map" | "hessian" | "sample") || sub.contains_id("adapter") {
        return Ok(());
    }
    let given = ADAPTER_ONLY
        .iter()
        .find(|id| sub.value_source(id) == Some(ValueSource::CommandLine));
    match given {
        Some(id) => Err(format!(
            "--{} applies only to --adapter (your own code run as a subprocess); built-in \
             problems run inside varpost: drop the option, or use --adapter \"COMMAND\"",
            id.replace('_', "-")
        )),
        None => Ok(()),
    }
}

/// How adapter processes are run (with --adapter only).
#[derive(Debug, Args)]
pub struct AdapterArgs {
    /// Number of adapter processes; each serves one evaluation at a time.
    #[arg(long, default_value_t = 1, value_name = "K",
          value_parser = RangedU64ValueParser::<usize>::new().range(1..=1024))]
    pub workers: usize,
    /// Words put before the adapter command, e.g. --launcher "mpirun -n 4".
    #[arg(long, value_name = "PREFIX")]
    pub launcher: Option<String>,
    /// Seconds one evaluation may take before the adapter is killed and restarted (0: no limit; at
    /// most 1e9).
    #[arg(long, default_value = "600", value_name = "SECS", allow_negative_numbers = true,
          value_parser = parse::seconds_or_none)]
    pub eval_timeout: Duration,
    /// Seconds an adapter may take to start and send its hello line (above 0, at most 1e9).
    #[arg(long, default_value = "60", value_name = "SECS", allow_negative_numbers = true,
          value_parser = parse::seconds)]
    pub handshake_timeout: Duration,
    /// Restarts of a crashed or hung adapter allowed per evaluation before the run stops.
    #[arg(long, default_value_t = 3, value_name = "N",
          value_parser = clap::value_parser!(u32).range(0..=1000))]
    pub restarts: u32,
    /// Encoding after the handshake: auto, text or binary.
    #[arg(long, default_value = "auto", value_name = "auto|text|binary", value_parser = parse::encoding)]
    pub encoding: EncodingChoice,
}

impl AdapterArgs {
    fn config(&self, command: &str, log_dir: &Path) -> AdapterConfig {
        let mut c = AdapterConfig::new(command);
        c.workers = self.workers;
        c.launcher = self.launcher.clone();
        c.eval_timeout = (!self.eval_timeout.is_zero()).then_some(self.eval_timeout);
        c.handshake_timeout = self.handshake_timeout;
        c.max_restarts = self.restarts;
        c.log_dir = Some(log_dir.to_path_buf());
        c.encoding = self.encoding;
        c
    }
}

/// L-BFGS settings.
#[derive(Debug, Args)]
pub struct LbfgsArgs {
    /// Start of the minimisation (default: the background).
    #[arg(long)]
    pub start: Option<PathBuf>,
    /// Number of (s, y) pairs kept by L-BFGS (1 to 10,000).
    #[arg(long, default_value_t = MapConfig::default().history,
          value_parser = RangedU64ValueParser::<usize>::new().range(1..=10_000))]
    pub history: usize,
    /// Stop when the gradient norm has fallen by this factor (strictly between 0 and 1).
    #[arg(long, default_value_t = MapConfig::default().grad_rtol, allow_negative_numbers = true,
          value_parser = parse::open_unit)]
    pub grad_rtol: f64,
    /// Iteration limit.
    #[arg(long, default_value_t = MapConfig::default().max_iters,
          value_parser = clap::value_parser!(u64).range(1..))]
    pub max_iters: u64,
}

impl LbfgsArgs {
    pub fn config(&self) -> MapRunConfig {
        MapRunConfig {
            start: self.start.clone(),
            lbfgs: MapConfig {
                history: self.history,
                grad_rtol: self.grad_rtol,
                max_iters: self.max_iters,
                ..Default::default()
            },
        }
    }
}

/// Settings of the Hessian estimate at the analysis.
#[derive(Debug, Args)]
pub struct HessianArgs {
    /// auto, dense, low-rank, lbfgs or diagonal. auto: dense for small n, low-rank where the prior is
    /// known, else the minimiser's L-BFGS pairs.
    #[arg(long, default_value = "auto", value_parser = parse::method)]
    pub method: MethodChoice,
    /// Low-rank: keep eigenvalues of the prior-preconditioned misfit Hessian with |λ| above this
    /// (finite, 0 or more).
    #[arg(long, default_value_t = LaplaceOptions::default().eigen_threshold,
          allow_negative_numbers = true, value_parser = parse::non_negative)]
    pub threshold: f64,
    /// Low-rank: largest rank (default min(n, 1000)).
    #[arg(long, value_parser = RangedU64ValueParser::<usize>::new().range(1..))]
    pub max_rank: Option<usize>,
    /// Largest n for which auto chooses the dense method.
    #[arg(long, default_value_t = LaplaceOptions::default().dense_max_dim)]
    pub dense_max_dim: usize,
    /// Seed of the randomized eigensolver.
    #[arg(long, default_value_t = LaplaceOptions::default().seed)]
    pub hessian_seed: u64,
}

impl HessianArgs {
    pub fn options(&self) -> LaplaceOptions {
        LaplaceOptions {
            method: self.method.0,
            eigen_threshold: self.threshold,
            max_rank: self.max_rank,
            dense_max_dim: self.dense_max_dim,
            seed: self.hessian_seed,
            ..Default::default()
        }
    }
}

/// Settings of the chains.
#[derive(Debug, Args)]
pub struct ChainArgs {
    /// Sampler kernel. auto (the default) chooses from the Laplace check: laplace-mh where the
    /// Laplace Gaussian holds (k-hat and every component's spread), hmc where it does not.
    #[arg(long, value_enum, default_value_t = KernelKind::default())]
    pub kernel: KernelKind,
    /// Metric (preconditioner) of the chains: laplace (the Hessian approximation above), or another
    /// Hessian approximation built for the chains.
    #[arg(long, value_enum, default_value_t = MetricKind::default())]
    pub metric: MetricKind,
    /// Number of chains (1 to 4096).
    #[arg(long, default_value_t = SampleConfig::default().chains,
          value_parser = RangedU64ValueParser::<usize>::new().range(1..=MAX_CHAINS as u64))]
    pub chains: usize,
    /// Draws kept per chain.
    #[arg(long, default_value_t = SampleConfig::default().draws,
          value_parser = clap::value_parser!(u64).range(1..))]
    pub draws: u64,
    /// Warm-up iterations per chain (discarded); with the pooled metric learning, the most: the
    /// warm-up ends earlier once step size and metric have settled.
    #[arg(long, default_value_t = SampleConfig::default().warmup)]
    pub warmup: u64,
    /// Seed of every random stream (chain c uses stream c).
    #[arg(long, default_value_t = SampleConfig::default().seed)]
    pub seed: u64,
    /// Keep one draw in this many iterations.
    #[arg(long, default_value_t = SampleConfig::default().thin,
          value_parser = clap::value_parser!(u64).range(1..))]
    pub thin: u64,
    /// Write a checkpoint every this many iterations.
    #[arg(long, default_value_t = SampleConfig::default().checkpoint_every,
          value_parser = clap::value_parser!(u64).range(1..))]
    pub checkpoint_every: u64,
    /// Target acceptance of the step-size adaptation, strictly between 0 and 1 (default: 0.574 for
    /// MALA, 0.651 for HMC, 0.8 for NUTS).
    #[arg(long, allow_negative_numbers = true, value_parser = parse::open_unit)]
    pub target_accept: Option<f64>,
    /// HMC integration time in whitened units (above 0, at most 1e6).
    #[arg(long, default_value_t = SampleConfig::default().hmc.time, allow_negative_numbers = true,
          value_parser = parse::integration_time)]
    pub hmc_time: f64,
    /// NUTS: cap on the doublings of the trajectory per iteration, 1 to 20 (at most 2^depth − 1
    /// leapfrog steps, each a model and adjoint run).
    #[arg(long, default_value_t = SampleConfig::default().nuts.max_depth,
          allow_negative_numbers = true,
          value_parser = clap::value_parser!(u32).range(1..=i64::from(MAX_TREE_DEPTH)))]
    pub nuts_max_depth: u32,
    /// Laplace-MH: degrees of freedom of a Student-t proposal, above 0 (default: the Laplace
    /// Gaussian).
    #[arg(long, allow_negative_numbers = true, value_parser = parse::positive)]
    pub t_dof: Option<f64>,
    /// How the warm-up learns the metric: pooled over all chains and ended once settled, off (the
    /// Laplace metric as it is), per-chain-diagonal (each chain its own diagonal, over the whole
    /// warm-up), or auto (the default: pooled for HMC and NUTS, off for MALA).
    #[arg(long, value_enum, default_value_t = MetricLearning::Auto)]
    pub learn_metric: MetricLearning,
    /// The first release's name for --learn-metric per-chain-diagonal.
    #[arg(long, conflicts_with = "learn_metric")]
    pub adapt_metric: bool,
    /// Laplace draws for the check of how far the Gaussian approximation holds (0 skips it; otherwise
    /// 50 to 10,000,000).
    #[arg(long, default_value_t = LaplaceCheckConfig::default().draws)]
    pub laplace_draws: usize,
    /// Skip the gradient test at the start.
    #[arg(long)]
    pub skip_check: bool,
    /// Extend the chains in blocks until every component's bulk and tail ESS reach this and R-hat is
    /// below 1.01 (--draws is then the first block per chain); 0 keeps the fixed --draws.
    #[arg(long, default_value_t = DEFAULT_TARGET_ESS, allow_negative_numbers = true,
          value_parser = parse::target_ess)]
    pub target_ess: u64,
    /// The most model runs for the whole run, every stage counted (default: no limit). The chains
    /// stop before they would exceed it, at the model runs per iteration measured so far.
    #[arg(long, allow_negative_numbers = true, value_parser = parse::max_evaluations)]
    pub max_evaluations: Option<u64>,
    /// Wall-clock seconds for this invocation (default: no limit); checked at every checkpoint. The
    /// run saves its state, writes its outputs from the draws so far, and `varpost resume`
    /// continues it (with the same limit, counted anew).
    #[arg(long, allow_negative_numbers = true, value_parser = parse::time_limit)]
    pub time_limit: Option<f64>,
}

impl ChainArgs {
    /// When the chains stop.
    pub fn stop(&self) -> StopRule {
        StopRule {
            target_ess: self.target_ess,
            max_evaluations: self.max_evaluations,
            time_limit: self.time_limit,
        }
    }

    pub fn config(&self) -> SampleConfig {
        SampleConfig {
            kernel: self.kernel,
            chains: self.chains,
            draws: self.draws,
            warmup: self.warmup,
            seed: self.seed,
            thin: self.thin,
            checkpoint_every: self.checkpoint_every,
            target_accept: self.target_accept,
            hmc: HmcSettings {
                time: self.hmc_time,
                ..Default::default()
            },
            independence: IndependenceSettings { t_dof: self.t_dof },
            nuts: NutsSettings {
                max_depth: self.nuts_max_depth,
            },
            adapt_metric: self.adapt_metric,
            learn_metric: Some(self.learn_metric),
            ..Default::default()
        }
    }
}
