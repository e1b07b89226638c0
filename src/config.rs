//! One run configuration: where the problem comes from and the settings of every stage, with their
//! defaults, their validation and the run record (DIR/run.json) that `resume` rebuilds a run from.
//!
//! Each stage owns the struct of its own settings ([`MapConfig`] for the analysis, [`LaplaceOptions`]
//! for the Hessian, [`SampleConfig`] for the chains, [`AdapterConfig`] for the subprocess workers);
//! this module composes them into a [`RunConfig`] and validates it once, for the library and the
//! command line alike. Names (kernels, metrics, Hessian methods, encodings) are enums parsed by the
//! command line directly.
//!
//! The run record carries a version ([`RUN_RECORD_VERSION`]); records of older versions are read and
//! brought up to date, so that a run started by an earlier release can still be resumed or reported.

use std::path::{Path, PathBuf};

use serde_json::Value;

pub use crate::adapter::AdapterConfig;
pub use crate::optimize::MapConfig;
pub use crate::precond::{LaplaceMethod, LaplaceOptions};
pub use crate::sampler::{HmcSettings, IndependenceSettings, KernelKind, SampleConfig, StopRule};

use crate::error::{Error, Result};
use crate::util::atomic::write_atomic;

/// Where the problem comes from.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ProblemSource {
    /// A built-in problem by name with its settings (`key=value`).
    Builtin { name: String, settings: Vec<String> },
    /// The user's code behind the subprocess adapter protocol.
    Adapter(AdapterConfig),
    /// A problem implemented in Rust and handed to the pipeline in-process
    /// ([`crate::pipeline::Loaded::from_problem`]); it cannot be reopened from a run record.
    InProcess { name: String },
}

/// Which metric (preconditioner) the chains run with.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    serde::Serialize,
    serde::Deserialize,
    clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
#[value(rename_all = "kebab-case")]
pub enum MetricKind {
    /// The Laplace approximation of the Hessian stage itself (the default).
    #[default]
    #[value(alias = "auto")]
    Laplace,
    /// No preconditioning.
    Identity,
    /// A diagonal Hessian estimate, built for the chains.
    Diagonal,
    /// A dense Hessian, built for the chains.
    Dense,
    /// A low-rank update of the prior, built for the chains.
    LowRank,
    /// The minimiser's L-BFGS pairs.
    Lbfgs,
}

impl MetricKind {
    /// The Hessian method this metric asks for beyond the Laplace stage's own, if any.
    pub fn method(&self) -> Option<LaplaceMethod> {
        match self {
            MetricKind::Laplace | MetricKind::Identity => None,
            MetricKind::Diagonal => Some(LaplaceMethod::Diagonal),
            MetricKind::Dense => Some(LaplaceMethod::Dense),
            MetricKind::LowRank => Some(LaplaceMethod::LowRank),
            MetricKind::Lbfgs => Some(LaplaceMethod::Lbfgs),
        }
    }
}

/// Settings of the Laplace check: cost-only evaluations at draws of the Laplace Gaussian, weighted by
/// the posterior.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct LaplaceCheckConfig {
    /// Draws (0 skips the check; otherwise at least [`LaplaceCheckConfig::MIN_DRAWS`]).
    pub draws: usize,
}

impl LaplaceCheckConfig {
    /// Fewest draws for which the Pareto tail fit of the weights means something.
    pub const MIN_DRAWS: usize = 50;
}

impl Default for LaplaceCheckConfig {
    fn default() -> Self {
        LaplaceCheckConfig { draws: 200 }
    }
}

/// The current version of the run record.
pub const RUN_RECORD_VERSION: u32 = 2;
const RUN_FILE: &str = "run.json";

/// Everything that decides a sampling run; written to DIR/run.json so that `resume` can rebuild it.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct RunConfig {
    /// Version of the record's layout ([`RUN_RECORD_VERSION`] when written by this release).
    #[serde(default = "first_version")]
    pub version: u32,
    pub source: ProblemSource,
    /// Start of the gradient test and of the minimisation (default: the background).
    #[serde(default)]
    pub start: Option<PathBuf>,
    #[serde(default)]
    pub lbfgs: MapConfig,
    #[serde(default)]
    pub laplace: LaplaceOptions,
    #[serde(default)]
    pub metric: MetricKind,
    #[serde(default)]
    pub sampler: SampleConfig,
    #[serde(default)]
    pub laplace_check: LaplaceCheckConfig,
    /// Seed of the gradient test direction and of the Laplace check draws.
    #[serde(default = "one")]
    pub check_seed: u64,
    /// Skip the gradient test at the start.
    #[serde(default)]
    pub skip_check: bool,
    /// When the chains stop: the fixed draws, or a target ESS within limits (records written before
    /// this setting existed keep the fixed draws).
    #[serde(default)]
    pub stop: StopRule,
}

fn first_version() -> u32 {
    1
}
fn one() -> u64 {
    1
}

impl RunConfig {
    /// A run of `source` with every other setting at its default.
    pub fn new(source: ProblemSource) -> Self {
        RunConfig {
            version: RUN_RECORD_VERSION,
            source,
            start: None,
            lbfgs: MapConfig::default(),
            laplace: LaplaceOptions::default(),
            metric: MetricKind::default(),
            sampler: SampleConfig::default(),
            laplace_check: LaplaceCheckConfig::default(),
            check_seed: 1,
            skip_check: false,
            stop: StopRule::default(),
        }
    }

    /// Checks every setting of every stage, naming the first bad one and how to fix it.
    pub fn validate(&self) -> Result<()> {
        if let ProblemSource::Adapter(a) = &self.source {
            a.validate()?;
        }
        self.lbfgs.validate()?;
        validate_laplace(&self.laplace)?;
        self.sampler.validate()?;
        self.stop.validate()?;
        let d = self.laplace_check.draws;
        if d != 0 && d < LaplaceCheckConfig::MIN_DRAWS {
            return Err(Error::Config(format!(
                "--laplace-draws {d}: the Laplace check needs at least {} draws for its Pareto tail fit (or 0 to skip it)",
                LaplaceCheckConfig::MIN_DRAWS
            )));
        }
        if d > 10_000_000 {
            return Err(Error::Config(format!(
                "--laplace-draws {d}: at most 10,000,000"
            )));
        }
        Ok(())
    }

    /// Writes DIR/run.json (atomically).
    pub fn write(&self, dir: &Path) -> Result<()> {
        let text = serde_json::to_string_pretty(self)
            .map_err(|e| Error::Numerical(format!("cannot encode the run record: {e}")))?;
        write_atomic(&dir.join(RUN_FILE), text.as_bytes())
    }

    /// Whether `dir` holds a run record.
    pub fn exists_in(dir: &Path) -> bool {
        dir.join(RUN_FILE).exists()
    }

    /// Reads DIR/run.json, bringing a record of an older version up to date.
    pub fn read(dir: &Path) -> Result<RunConfig> {
        let p = dir.join(RUN_FILE);
        if !p.exists() {
            return Err(Error::Config(format!(
                "{} holds no varpost sampling run (no {RUN_FILE}); start one with `varpost sample --out {}`",
                dir.display(),
                dir.display()
            )));
        }
        let text = crate::resources::read_bounded(&p, 64 << 20)?;
        RunConfig::from_text(&text, &p)
    }

    /// Decodes the text of a run record (`p` names it in errors).
    fn from_text(text: &str, p: &Path) -> Result<RunConfig> {
        let mut v: Value = serde_json::from_str(text)
            .map_err(|e| Error::format(p, format!("not a varpost run record: {e}")))?;
        let version = v.get("version").and_then(Value::as_u64).unwrap_or(1);
        if version > RUN_RECORD_VERSION as u64 {
            return Err(Error::format(
                p,
                format!(
                    "run record version {version} was written by a newer varpost (this one reads up to {RUN_RECORD_VERSION}): use that release"
                ),
            ));
        }
        if version < 2 {
            upgrade_v1(&mut v);
        }
        let mut cfg: RunConfig = serde_json::from_value(v)
            .map_err(|e| Error::format(p, format!("not a varpost run record: {e}")))?;
        cfg.version = RUN_RECORD_VERSION;
        cfg.validate()
            .map_err(|e| Error::format(p, format!("the recorded settings are not valid: {e}")))?;
        Ok(cfg)
    }
}

/// Version 1 (the first release) kept HMC and Laplace-MH settings flat in the sampler, the metric as
/// `{"method": NAME}` for Hessian-built metrics and the Laplace check's draws at the top level.
fn upgrade_v1(v: &mut Value) {
    if let Some(s) = v.get_mut("sampler").and_then(Value::as_object_mut) {
        let mut hmc = serde_json::Map::new();
        if let Some(t) = s.remove("hmc_time") {
            hmc.insert("time".into(), t);
        }
        if let Some(m) = s.remove("hmc_max_steps") {
            hmc.insert("max_steps".into(), m);
        }
        s.insert("hmc".into(), Value::Object(hmc));
        let mut ind = serde_json::Map::new();
        if let Some(t) = s.remove("t_dof") {
            ind.insert("t_dof".into(), t);
        }
        s.insert("independence".into(), Value::Object(ind));
    }
    if let Some(m) = v.get("metric").and_then(|m| m.get("method")).cloned() {
        v["metric"] = m;
    }
    if let Some(obj) = v.as_object_mut() {
        if let Some(d) = obj.remove("laplace_draws") {
            obj.insert("laplace_check".into(), serde_json::json!({ "draws": d }));
        }
        obj.insert("version".into(), Value::from(RUN_RECORD_VERSION));
    }
}

/// Checks the Hessian stage's settings.
pub fn validate_laplace(o: &LaplaceOptions) -> Result<()> {
    let bad = |m: String| Err(Error::Config(m));
    if !(o.eigen_threshold.is_finite() && o.eigen_threshold >= 0.0) {
        return bad(format!(
            "--threshold {} must be a finite number >= 0",
            o.eigen_threshold
        ));
    }
    if o.max_rank == Some(0) {
        return bad("--max-rank must be at least 1".into());
    }
    if o.initial_rank == 0 || o.diagonal_probes == 0 {
        return bad(
            "the first sketch rank and the number of diagonal probes must be at least 1".into(),
        );
    }
    if let Some(d) = o.fd_step {
        if !(d.is_finite() && d > 0.0 && d < 1.0) {
            return bad(format!("finite-difference step {d} must lie in (0, 1)"));
        }
    }
    if !(o.curvature_eps.is_finite() && o.curvature_eps >= 0.0) {
        return bad(format!(
            "curvature threshold {} must be finite and >= 0",
            o.curvature_eps
        ));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_validate_and_round_trip() {
        let c = RunConfig::new(ProblemSource::Builtin {
            name: "lorenz96".into(),
            settings: vec![],
        });
        c.validate().unwrap();
        let dir = std::env::temp_dir().join(format!("varpost-config-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        c.write(&dir).unwrap();
        let back = serde_json::to_value(RunConfig::read(&dir).unwrap()).unwrap();
        assert_eq!(back, serde_json::to_value(&c).unwrap());
        std::fs::remove_dir_all(&dir).ok();
    }

    #[test]
    fn too_few_laplace_draws_are_refused() {
        let mut c = RunConfig::new(ProblemSource::Builtin {
            name: "lorenz96".into(),
            settings: vec![],
        });
        c.laplace_check.draws = 20;
        assert!(c
            .validate()
            .unwrap_err()
            .to_string()
            .contains("at least 50"));
    }

    /// Run records: the first release's record and the current one, mutated, must never panic the
    /// decoder (ignored by default; `bash benches/fuzz.sh`).
    #[test]
    #[ignore]
    fn fuzz_run_record_reader() {
        use rand::SeedableRng;
        let v1 = include_bytes!("../tests/it/fixtures/run-v1.json").to_vec();
        let mut current = RunConfig::new(ProblemSource::Builtin {
            name: "lorenz96".into(),
            settings: vec!["n=40".into()],
        });
        current.sampler.independence.t_dof = Some(5.0);
        let v2 = serde_json::to_vec_pretty(&current).unwrap();
        let corpus = vec![v1, v2];
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(20);
        let p = Path::new("run.json");
        crate::util::fuzz::run(
            "run record",
            crate::util::fuzz::INPUTS,
            &mut rng,
            |r| {
                let base = &corpus[rand::RngExt::random_range(r, 0..corpus.len())];
                crate::util::fuzz::mutate(r, base, &corpus)
            },
            |b| {
                let text = String::from_utf8_lossy(b);
                RunConfig::from_text(&text, p).is_ok()
            },
        );
    }
}
