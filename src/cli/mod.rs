//! Command-line arguments → validated run configurations → pipeline calls. One function per
//! subcommand; nothing here computes.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::config::{LaplaceCheckConfig, MetricKind, RunConfig};
use crate::error::{Error, Result};
use crate::interrupt::Interrupt;
use crate::optimize::MapConfig;
use crate::output::progress::Progress as ProgressBars;
use crate::pipeline::{self, CheckConfig, HessianRunConfig, MapRunConfig, ProblemSource};
use crate::precond::{LaplaceMethod, LaplaceOptions, SpectrumOf};
use crate::problem::lorenz96::{Lorenz96Config, Scenario};
use crate::problem::settings::Settings;
use crate::problem::Problem;
use crate::sampler::{HmcSettings, IndependenceSettings, KernelKind, SampleConfig};

/// Posterior uncertainty for strong-constraint 4D-Var: gradient check, L-BFGS analysis, Hessian at the
/// analysis, and preconditioned MCMC ensembles with convergence diagnostics.
#[derive(Debug, Parser)]
#[command(name = "varpost", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
    /// No progress bars (they are also off when stderr is not a terminal).
    #[arg(long, global = true)]
    pub quiet: bool,
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
    /// Output folder (created if missing).
    #[arg(long)]
    pub out: PathBuf,
}

/// Settings of the chains.
#[derive(Debug, Args)]
pub struct ChainArgs {
    /// Sampler kernel.
    #[arg(long, value_enum, default_value_t = KernelKind::default())]
    pub kernel: KernelKind,
    /// Metric (preconditioner) of the chains: laplace (the Hessian approximation above), or another
    /// Hessian approximation built for the chains.
    #[arg(long, value_enum, default_value_t = MetricKind::default())]
    pub metric: MetricKind,
    /// Number of chains.
    #[arg(long, default_value_t = SampleConfig::default().chains)]
    pub chains: usize,
    /// Draws kept per chain.
    #[arg(long, default_value_t = SampleConfig::default().draws)]
    pub draws: u64,
    /// Warm-up iterations per chain (discarded).
    #[arg(long, default_value_t = SampleConfig::default().warmup)]
    pub warmup: u64,
    /// Seed of every random stream (chain c uses stream c).
    #[arg(long, default_value_t = SampleConfig::default().seed)]
    pub seed: u64,
    /// Keep one draw in this many iterations.
    #[arg(long, default_value_t = SampleConfig::default().thin)]
    pub thin: u64,
    /// Write a checkpoint every this many iterations.
    #[arg(long, default_value_t = SampleConfig::default().checkpoint_every)]
    pub checkpoint_every: u64,
    /// Target acceptance of the step-size adaptation (default: 0.574 for MALA, 0.651 for HMC).
    #[arg(long)]
    pub target_accept: Option<f64>,
    /// HMC integration time in whitened units.
    #[arg(long, default_value_t = SampleConfig::default().hmc.time)]
    pub hmc_time: f64,
    /// Laplace-MH: degrees of freedom of a Student-t proposal (default: the Laplace Gaussian).
    #[arg(long)]
    pub t_dof: Option<f64>,
    /// Refine the metric during the warm-up from the warm-up draws (diagonal, MALA and HMC).
    #[arg(long)]
    pub adapt_metric: bool,
    /// Laplace draws for the check of how far the Gaussian approximation holds (0 skips it).
    #[arg(long, default_value_t = LaplaceCheckConfig::default().draws)]
    pub laplace_draws: usize,
    /// Skip the gradient test at the start.
    #[arg(long)]
    pub skip_check: bool,
}

impl ChainArgs {
    fn config(&self) -> SampleConfig {
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
            adapt_metric: self.adapt_metric,
            ..Default::default()
        }
    }
}

/// How adapter processes are run (with --adapter).
#[derive(Debug, Args)]
pub struct AdapterArgs {
    /// Number of adapter processes; each serves one evaluation at a time.
    #[arg(long, default_value_t = 1, value_name = "K")]
    pub workers: usize,
    /// Words put before the adapter command, e.g. --launcher "mpirun -n 4".
    #[arg(long, value_name = "PREFIX")]
    pub launcher: Option<String>,
    /// Seconds one evaluation may take before the adapter is killed and restarted (0: no limit).
    #[arg(long, default_value_t = 600.0, value_name = "SECS")]
    pub eval_timeout: f64,
    /// Seconds an adapter may take to start and send its hello line.
    #[arg(long, default_value_t = 60.0, value_name = "SECS")]
    pub handshake_timeout: f64,
    /// Restarts of a crashed or hung adapter allowed per evaluation before the run stops.
    #[arg(long, default_value_t = 3, value_name = "N")]
    pub restarts: u32,
    /// Encoding after the handshake: auto, text or binary.
    #[arg(long, default_value = "auto", value_name = "auto|text|binary")]
    pub encoding: String,
}

impl AdapterArgs {
    fn config(
        &self,
        command: &str,
        log_dir: &std::path::Path,
    ) -> Result<crate::adapter::AdapterConfig> {
        use crate::adapter::{AdapterConfig, EncodingChoice};
        let secs = |name: &str, v: f64| -> Result<f64> {
            if v.is_finite() && v >= 0.0 {
                Ok(v)
            } else {
                Err(Error::Config(format!(
                    "--{name} {v}: give a number of seconds, 0 or more"
                )))
            }
        };
        let mut c = AdapterConfig::new(command);
        c.workers = self.workers;
        c.launcher = self.launcher.clone();
        let t = secs("eval-timeout", self.eval_timeout)?;
        c.eval_timeout = (t > 0.0).then(|| std::time::Duration::from_secs_f64(t));
        let h = secs("handshake-timeout", self.handshake_timeout)?;
        if h == 0.0 {
            return Err(Error::Config("--handshake-timeout must be positive".into()));
        }
        c.handshake_timeout = std::time::Duration::from_secs_f64(h);
        c.max_restarts = self.restarts;
        c.log_dir = Some(log_dir.to_path_buf());
        c.encoding = match self.encoding.as_str() {
            "auto" => EncodingChoice::Auto,
            "text" => EncodingChoice::Text,
            "binary" => EncodingChoice::Binary,
            o => {
                return Err(Error::Config(format!(
                    "--encoding {o}: use auto, text or binary"
                )))
            }
        };
        Ok(c)
    }
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
        if let Some(cmd) = &self.adapter {
            if !self.set.is_empty() {
                return Err(Error::Config(
                    "--set configures built-in problems; pass settings to your adapter in its command"
                        .into(),
                ));
            }
            return Ok(ProblemSource::Adapter(
                self.adapter_opts.config(cmd, &self.out)?,
            ));
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

/// Runs a parsed command line; returns the process exit code for a completed run.
pub fn run(cli: Cli) -> Result<i32> {
    match cli.command {
        Command::Demo { out } => demo(&out, cli.quiet),
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
            let source = problem.source()?;
            let loaded = pipeline::load(&source)?;
            println!(
                "Hessian at the analysis: {} (n = {})",
                loaded.description,
                loaded.problem.dim()
            );
            let (m, s) = in_worker_pool(&source, 1, || {
                pipeline::run_hessian(&loaded, &cfg, &problem.out)
            })?;
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
        Command::Sample {
            problem,
            lbfgs,
            hessian,
            chains,
        } => {
            let map = lbfgs.config()?;
            let cfg = RunConfig {
                start: map.start.clone(),
                lbfgs: map.lbfgs,
                laplace: hessian.options()?,
                metric: chains.metric,
                sampler: chains.config(),
                laplace_check: LaplaceCheckConfig {
                    draws: chains.laplace_draws,
                },
                skip_check: chains.skip_check,
                ..RunConfig::new(problem.source()?)
            };
            cfg.validate()?;
            let loaded = pipeline::load(&cfg.source)?;
            println!(
                "sampling: {} (n = {})",
                loaded.description,
                loaded.problem.dim()
            );
            sample(&loaded, &cfg, &problem.out, false, cli.quiet)
        }
        Command::Resume { dir, adapter } => {
            let mut cfg = pipeline::read_run(&dir)?;
            println!("resuming the run in {}", dir.display());
            if let ProblemSource::Adapter(a) = &mut cfg.source {
                if let Some(cmd) = adapter {
                    println!(
                        "  adapter command overridden: {cmd} (recorded: {})",
                        a.command
                    );
                    a.command = cmd;
                } else {
                    println!("  running the recorded adapter command: {}", a.command);
                }
            } else if adapter.is_some() {
                return Err(Error::Config(
                    "--adapter: this run used a built-in problem, not an adapter".into(),
                ));
            }
            let loaded = pipeline::load(&cfg.source)?;
            sample(&loaded, &cfg, &dir, true, cli.quiet)
        }
        Command::Report { dir, rows } => {
            let r = pipeline::run_report(&dir, &command_line())?;
            print_report(&r, rows);
            Ok(0)
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

/// Runs `f` with one thread per adapter worker (at least `min_threads`) where the problem is an adapter
/// with several workers: its evaluations wait on I/O, so K chains or K Hessian-vector products then run
/// on K workers at once. Results do not depend on the number of threads.
fn in_worker_pool<T: Send>(
    source: &ProblemSource,
    min_threads: usize,
    f: impl FnOnce() -> Result<T> + Send,
) -> Result<T> {
    match source {
        ProblemSource::Adapter(a) if a.workers > 1 => {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(a.workers.max(min_threads))
                .build()
                .map_err(|e| {
                    Error::Config(format!(
                        "cannot start threads for {} adapter workers: {e}",
                        a.workers
                    ))
                })?;
            pool.install(f)
        }
        _ => f(),
    }
}

fn command_line() -> String {
    std::env::args().collect::<Vec<_>>().join(" ")
}

/// Runs the sampling pipeline with progress bars: one counting model runs (with their rate) over the
/// whole run, one for the chains' iterations with an ETA; then writes the report.
fn sample(
    loaded: &pipeline::Loaded,
    cfg: &RunConfig,
    out: &std::path::Path,
    resume: bool,
    quiet: bool,
) -> Result<i32> {
    use std::sync::atomic::{AtomicBool, Ordering};
    let interrupt = Interrupt::from_signals()?;
    let bars = ProgressBars::new(quiet);
    let evals = bars.stage("model runs", "runs", None);
    let total = cfg.sampler.chains as u64 * cfg.sampler.iterations();
    let iters = bars.stage("chains", "iterations", Some(total));
    let progress = |_c: usize, _d: u64, _t: u64| iters.inc(1);
    let done = AtomicBool::new(false);
    let o = std::thread::scope(|scope| {
        scope.spawn(|| {
            while !done.load(Ordering::Relaxed) {
                evals.set_position(loaded.problem.counts().model_runs());
                std::thread::sleep(std::time::Duration::from_millis(100));
            }
        });
        let r = in_worker_pool(&cfg.source, cfg.sampler.chains, || {
            pipeline::run_sample(loaded, cfg, out, resume, &interrupt, &progress)
        });
        done.store(true, Ordering::Relaxed);
        r
    });
    evals.finish();
    iters.finish();
    let o = o.map_err(|e| match e {
        Error::Interrupted(m) => Error::Interrupted(format!(
            "{m}; continue with `varpost resume {}`",
            out.display()
        )),
        other => other,
    })?;
    print_sample(&o);
    let r = pipeline::report_after_sample(out, &o, &command_line())?;
    println!("report: {}", r.html.display());
    println!(
        "output: {} (summary.json, components.csv, ensemble.nc)",
        out.display()
    );
    let converged = o.summary.diagnostics.as_ref().is_some_and(|d| d.converged);
    Ok(if converged { 0 } else { 5 })
}

fn print_report(r: &pipeline::ReportOutcome, rows: usize) {
    println!(
        "{} components, {} draws per chain; worst-converged first:",
        r.stats.len(),
        r.draws_per_chain
    );
    println!(
        "  {:<14} {:>12} {:>11} {:>11} {:>8} {:>9} {:>9} {:>10}",
        "component", "mean", "sd", "Laplace sd", "R-hat", "bulk ESS", "tail ESS", "MCSE mean"
    );
    for &i in r.order.iter().take(rows) {
        let s = &r.stats[i];
        let lsd = r
            .laplace_std
            .as_ref()
            .map_or("-".to_string(), |l| format!("{:.4e}", l[i]));
        println!(
            "  {:<14} {:>12.5e} {:>11.4e} {:>11} {:>8.4} {:>9.0} {:>9.0} {:>10.3e}",
            r.names[i], s.mean, s.sd, lsd, s.rhat, s.ess_bulk, s.ess_tail, s.mcse_mean
        );
    }
    if r.order.len() > rows {
        println!("  ... {} more in components.csv", r.order.len() - rows);
    }
    println!("{}", r.verdict.text());
    println!("report: {}", r.html.display());
}

fn print_sample(o: &pipeline::SampleOutcome) {
    let s = &o.summary;
    if let Some(m) = &s.map {
        println!(
            "  analysis: cost {:.6e} -> {:.6e} in {} iterations{}",
            m.cost_start,
            m.cost,
            m.iterations,
            if m.converged { "" } else { " (NOT converged)" }
        );
    }
    if let Some(l) = &s.laplace {
        println!(
            "  Laplace covariance: {} ({} Hessian-vector products)",
            l.method, l.info.products
        );
    }
    if let Some(c) = &s.laplace_check {
        println!(
            "  Laplace check: k-hat {:.2} (reliable below {:.2}), Kish ESS {:.0} of {} draws",
            c.khat, c.khat_threshold, c.kish_ess, c.draws
        );
    }
    if let (Some(sm), Some(ch)) = (&s.sampling, &s.chains) {
        println!(
            "  {} chains of {} draws, kernel {}, metric {}",
            sm.chains, sm.draws_per_chain, sm.kernel, sm.metric
        );
        for c in ch {
            println!(
                "    chain {}: acceptance {:.3}, step size {}, divergences {}, rejected (non-finite) {}",
                c.chain,
                c.acceptance,
                c.step_size.map_or("-".into(), |v| format!("{v:.3}")),
                c.divergences,
                c.rejected_nonfinite
            );
        }
    }
    if let Some(d) = &s.diagnostics {
        println!(
            "  R-hat max {:.4}, bulk ESS min {:.0}, tail ESS min {:.0}",
            d.rhat_max, d.ess_bulk_min, d.ess_tail_min
        );
        println!("  {}", d.verdict);
    }
    let by = &s.evaluations_by_stage;
    let runs = |k: &str| by.get(k).map_or(0, |c| c.model_runs());
    println!(
        "evaluations: {} in all (check {}, analysis {}, Hessian {}, Laplace check {}, warm-up {}, sampling {})",
        s.evaluations.model_runs(),
        runs("check"),
        runs("map"),
        runs("hessian"),
        runs("laplace_check"),
        runs("warmup"),
        runs("sampling")
    );
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

fn demo(out: &std::path::Path, quiet: bool) -> Result<i32> {
    println!("varpost demo: the embedded Lorenz-96 scenario (invented; see demo-data/README.md)");
    let bars = ProgressBars::new(quiet);
    let iters = bars.stage("chains", "iterations", Some(4 * 2000));
    let progress = |_c: usize, _d: u64, _t: u64| iters.inc(1);
    let r = pipeline::run_demo(out, &progress)?;
    iters.finish();
    let s = &r.sample.summary;
    println!("{}", s.description);
    println!("1. gradient test at the background: {}", r.check.verdict);
    println!("2. analysis (L-BFGS):");
    if let Some(m) = &s.map {
        println!(
            "  cost {:.6e} -> {:.6e}; |grad J| {:.3e} -> {:.3e} in {} iterations ({})",
            m.cost_start, m.cost, m.grad_norm_start, m.grad_norm, m.iterations, m.reason
        );
    }
    if let (Some(b), Some(a)) = (r.rmse_background, r.rmse_analysis) {
        println!(
            "   error against the truth (RMSE over {} sites): background {b:.3}, analysis {a:.3}",
            s.dim
        );
    }
    if let (Some(l), Some(bv), Some(p)) = (&s.laplace, &s.background_variance, &s.posterior) {
        println!(
            "3. Hessian at the analysis ({}), and 4. {} chains ({}): standard deviations per site",
            l.method,
            s.sampling.as_ref().map_or(0, |x| x.chains),
            s.sampling.as_ref().map_or("", |x| x.kernel.as_str())
        );
        println!(
            "   {:>6} {:>10} {:>10} {:>10}",
            "site", "background", "Laplace", "posterior"
        );
        for i in (0..s.dim).step_by((s.dim / 10).max(1)) {
            println!(
                "   {:>6} {:>10.3} {:>10.3} {:>10.3}",
                r.report.names[i],
                bv[i].sqrt(),
                l.variance[i].sqrt(),
                p.variance[i].sqrt()
            );
        }
        let mean = |v: &[f64]| v.iter().map(|x| x.sqrt()).sum::<f64>() / v.len() as f64;
        println!(
            "   mean over sites: background {:.3}, Laplace {:.3}, posterior {:.3} (the observations cut the \
             background error by {:.0}%)",
            mean(bv),
            mean(&l.variance),
            mean(&p.variance),
            100.0 * (1.0 - mean(&l.variance) / mean(bv))
        );
    }
    if let Some(c) = &s.laplace_check {
        println!(
            "   Laplace check: Pareto k-hat {:.2}, Kish ESS {:.0} of {} draws",
            c.khat, c.kish_ess, c.draws
        );
    }
    if let Some(d) = &s.diagnostics {
        println!(
            "5. diagnostics: R-hat max {:.4}, bulk ESS min {:.0}, tail ESS min {:.0}",
            d.rhat_max, d.ess_bulk_min, d.ess_tail_min
        );
        println!("verdict: {}", d.verdict);
    }
    println!(
        "evaluations: {} model runs in all",
        s.evaluations.model_runs()
    );
    println!("report: {}", r.report.html.display());
    println!(
        "output: {} (summary.json, components.csv, ensemble.nc, report.html)",
        out.display()
    );
    Ok(0)
}
