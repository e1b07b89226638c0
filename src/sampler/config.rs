//! The sampler's settings, their defaults and their validation.

use super::hmc::Hmc;
use super::laplace_mh::LaplaceMh;
use super::mala::Mala;
use super::nuts::{Nuts, MAX_TREE_DEPTH};
use super::Kernel;
use crate::error::{Error, Result};

/// Which kernel draws the ensemble. The one list of kernel names: options, outputs and run records
/// all spell them through this enum.
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
pub enum KernelKind {
    /// Chosen by the pipeline from the Laplace check (the default): the independence sampler where
    /// the Laplace Gaussian holds, HMC where it does not (see `pipeline::choose`). Without a check to
    /// choose from (the sampler called on its own, or `--laplace-draws 0`) it is HMC.
    #[default]
    Auto,
    /// Hamiltonian Monte Carlo with the leapfrog integrator.
    Hmc,
    /// Preconditioned Metropolis-adjusted Langevin.
    Mala,
    /// Independence Metropolis–Hastings with the Laplace Gaussian (or a Student-t) as proposal.
    LaplaceMh,
    /// The No-U-Turn sampler with multinomial sampling of the trajectory.
    Nuts,
}

impl KernelKind {
    /// The name used in options and outputs.
    pub fn name(&self) -> &'static str {
        match self {
            KernelKind::Auto => "auto",
            KernelKind::Mala => "mala",
            KernelKind::Hmc => "hmc",
            KernelKind::LaplaceMh => "laplace-mh",
            KernelKind::Nuts => "nuts",
        }
    }
}

impl std::str::FromStr for KernelKind {
    type Err = Error;
    /// Parses a kernel name through the one list of names (the enum's values).
    fn from_str(s: &str) -> Result<Self> {
        <KernelKind as clap::ValueEnum>::from_str(s, false).map_err(|_| {
            let names: Vec<String> = <KernelKind as clap::ValueEnum>::value_variants()
                .iter()
                .filter_map(|k| clap::ValueEnum::to_possible_value(k))
                .map(|v| v.get_name().to_string())
                .collect();
            Error::Config(format!(
                "unknown sampler kernel '{s}': choose one of {}",
                names.join(", ")
            ))
        })
    }
}

/// How the warm-up of the gradient kernels learns the metric.
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
pub enum MetricLearning {
    /// The kernel's own default (the default): pooled for HMC and NUTS; off for MALA, whose chains
    /// move too slowly in a warm-up window for its draws to describe the posterior's spread
    /// (measured on lorenz96: 48 to 117 bulk effective draws with the pooled metric against 200
    /// without).
    #[default]
    Auto,
    /// Pooled over all chains at barriers, dense or diagonal, shrunk towards the Laplace metric; the
    /// warm-up ends when it has settled (see [`crate::adapt::plan`]).
    Pooled,
    /// The Laplace metric as it is; the step size alone is adapted, over the whole warm-up.
    Off,
    /// Each chain its own diagonal refinement (the first release's `--adapt-metric`).
    PerChainDiagonal,
}

impl MetricLearning {
    /// The name used in options and outputs.
    pub fn name(&self) -> &'static str {
        match self {
            MetricLearning::Auto => "auto",
            MetricLearning::Pooled => "pooled",
            MetricLearning::Off => "off",
            MetricLearning::PerChainDiagonal => "per-chain-diagonal",
        }
    }
}

/// Settings of the HMC kernel.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct HmcSettings {
    /// Integration time in whitened units (default π/2).
    pub time: f64,
    /// Cap on leapfrog steps per iteration (default 1000).
    pub max_steps: u32,
}

impl Default for HmcSettings {
    fn default() -> Self {
        HmcSettings {
            time: std::f64::consts::FRAC_PI_2,
            max_steps: 1000,
        }
    }
}

/// Settings of the NUTS kernel.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct NutsSettings {
    /// Cap on the doublings of the trajectory per iteration, 1 to 20 (default 10: at most
    /// 2^10 − 1 = 1023 leapfrog steps).
    pub max_depth: u32,
}

impl Default for NutsSettings {
    fn default() -> Self {
        NutsSettings { max_depth: 10 }
    }
}

/// Settings of the independence (Laplace-MH) kernel.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct IndependenceSettings {
    /// Degrees of freedom of a Student-t proposal; `None`: the Laplace Gaussian itself.
    pub t_dof: Option<f64>,
}

/// Everything that decides a sampling run (and so must match when it is resumed). Fields added later
/// take their defaults when an older record is read.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct SampleConfig {
    /// The kernel (default HMC, as on the command line).
    pub kernel: KernelKind,
    /// Number of chains (default 4).
    pub chains: usize,
    /// Draws kept per chain, after thinning (default 1000).
    pub draws: u64,
    /// Warm-up iterations per chain, discarded (default 1000).
    pub warmup: u64,
    /// Seed of all random streams (default 0); chain c uses stream c of this seed.
    pub seed: u64,
    /// Keep one draw in `thin` sampling iterations (default 1).
    pub thin: u64,
    /// Write a checkpoint every this many iterations (default 100).
    pub checkpoint_every: u64,
    /// Target mean acceptance of the step-size adaptation; `None`: the kernel's default (MALA 0.574,
    /// HMC 0.651, NUTS 0.8).
    pub target_accept: Option<f64>,
    /// HMC settings.
    pub hmc: HmcSettings,
    /// Independence-sampler settings.
    pub independence: IndependenceSettings,
    /// NUTS settings.
    pub nuts: NutsSettings,
    /// Chains start at u = init_scale · z, z ~ N(0, I): a draw from the Laplace approximation with its
    /// spread widened by this factor (default 2, so over-dispersed as Gelman & Rubin 1992 recommend).
    pub init_scale: f64,
    /// Initial step size before adaptation; `None`: the kernel's dimension-based guess.
    pub initial_step_size: Option<f64>,
    /// MALA and HMC: refine the Hessian metric during the warm-up by a diagonal one estimated from the
    /// warm-up draws (default off: the Hessian at the analysis as it is). See [`crate::adapt::warmup`].
    pub adapt_metric: bool,
    /// How the warm-up learns the metric. `None` in records written before this setting existed,
    /// which keep their meaning: `adapt_metric` decides (see [`SampleConfig::learning`]).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub learn_metric: Option<MetricLearning>,
}

impl Default for SampleConfig {
    fn default() -> Self {
        SampleConfig {
            kernel: KernelKind::default(),
            chains: 4,
            draws: 1000,
            warmup: 1000,
            seed: 0,
            thin: 1,
            checkpoint_every: 100,
            target_accept: None,
            hmc: HmcSettings::default(),
            independence: IndependenceSettings::default(),
            nuts: NutsSettings::default(),
            init_scale: 2.0,
            initial_step_size: None,
            adapt_metric: false,
            learn_metric: Some(MetricLearning::Auto),
        }
    }
}

/// The largest number of chains accepted (each chain holds its state and a draws file).
pub const MAX_CHAINS: usize = 4096;

impl SampleConfig {
    /// Checks every setting, naming the first bad one and its allowed range.
    pub fn validate(&self) -> Result<()> {
        let bad = |m: String| Err(Error::Config(m));
        if self.chains == 0 || self.chains > MAX_CHAINS {
            return bad(format!(
                "the number of chains {} must lie between 1 and {MAX_CHAINS}",
                self.chains
            ));
        }
        if self.draws == 0 {
            return bad("the number of draws per chain must be at least 1".into());
        }
        if self.thin == 0 {
            return bad("thin must be at least 1 (1 keeps every draw)".into());
        }
        if self.checkpoint_every == 0 {
            return bad("checkpoint_every must be at least 1 iteration".into());
        }
        if self
            .draws
            .checked_mul(self.thin)
            .and_then(|s| s.checked_add(self.warmup))
            .and_then(|s| s.checked_mul(self.chains as u64))
            .is_none_or(|total| total > 1 << 48)
        {
            return bad(
                "warmup + draws × thin (times the chains) is too large: ask for fewer iterations"
                    .into(),
            );
        }
        if let Some(t) = self.target_accept {
            if !(t > 0.0 && t < 1.0) {
                return bad(format!(
                    "target acceptance {t} must lie strictly between 0 and 1"
                ));
            }
        }
        if !(self.hmc.time.is_finite() && self.hmc.time > 0.0 && self.hmc.time <= 1e6) {
            return bad(format!(
                "HMC integration time {} must be positive and at most 1e6",
                self.hmc.time
            ));
        }
        if self.hmc.max_steps == 0 {
            return bad("the HMC cap on leapfrog steps must be at least 1".into());
        }
        if !(1..=MAX_TREE_DEPTH).contains(&self.nuts.max_depth) {
            return bad(format!(
                "NUTS maximum tree depth {} must lie between 1 and {MAX_TREE_DEPTH} \
                 (option --nuts-max-depth)",
                self.nuts.max_depth
            ));
        }
        if let Some(nu) = self.independence.t_dof {
            if !(nu.is_finite() && nu > 0.0) {
                return bad(format!(
                    "Student-t degrees of freedom {nu} must be positive and finite"
                ));
            }
        }
        if !(self.init_scale.is_finite() && (0.0..=1e6).contains(&self.init_scale)) {
            return bad(format!(
                "init_scale {} must be finite, not negative and at most 1e6",
                self.init_scale
            ));
        }
        if let Some(e) = self.initial_step_size {
            if !(e.is_finite() && e > 0.0) {
                return bad(format!("initial step size {e} must be positive and finite"));
            }
        }
        Ok(())
    }

    /// How the warm-up learns the metric: `adapt_metric` (the first release's option) asks for the
    /// per-chain diagonal; otherwise `learn_metric` with `auto` resolved for the kernel, and for
    /// records from before it, no learning.
    pub fn learning(&self) -> MetricLearning {
        if self.adapt_metric {
            return MetricLearning::PerChainDiagonal;
        }
        match self.learn_metric.unwrap_or(MetricLearning::Off) {
            MetricLearning::Auto if self.kernel == KernelKind::Mala => MetricLearning::Off,
            MetricLearning::Auto => MetricLearning::Pooled,
            other => other,
        }
    }

    /// Total iterations per chain: warm-up plus draws × thin.
    pub fn iterations(&self) -> u64 {
        self.warmup + self.draws * self.thin
    }

    /// The kernel these settings describe.
    pub fn build_kernel(&self) -> Result<Box<dyn Kernel>> {
        self.validate()?;
        Ok(match self.kernel {
            KernelKind::Mala => Box::new(Mala),
            KernelKind::Hmc | KernelKind::Auto => {
                Box::new(Hmc::new(self.hmc.time, self.hmc.max_steps))
            }
            KernelKind::LaplaceMh => Box::new(LaplaceMh::new(self.independence.t_dof)?),
            KernelKind::Nuts => Box::new(Nuts::new(self.nuts.max_depth)?),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_validate_and_bad_values_are_named() {
        SampleConfig::default().validate().unwrap();
        let e = SampleConfig {
            thin: 0,
            ..Default::default()
        }
        .validate()
        .unwrap_err();
        assert!(e.to_string().contains("thin"));
        let e = SampleConfig {
            target_accept: Some(1.5),
            ..Default::default()
        }
        .validate();
        assert!(e.unwrap_err().to_string().contains("target acceptance"));
        use clap::ValueEnum;
        assert!(KernelKind::from_str("nut", false).is_err());
        assert_eq!(
            KernelKind::from_str("nuts", false).unwrap(),
            KernelKind::Nuts
        );
        for depth in [0, 21] {
            let e = SampleConfig {
                nuts: NutsSettings { max_depth: depth },
                ..Default::default()
            }
            .validate()
            .unwrap_err();
            assert!(e.to_string().contains("--nuts-max-depth"), "{e}");
        }
        assert_eq!(
            KernelKind::from_str("laplace-mh", false).unwrap(),
            KernelKind::LaplaceMh
        );
        assert_eq!(SampleConfig::default().kernel, KernelKind::Auto);
        let auto = SampleConfig::default().build_kernel().unwrap();
        assert_eq!(
            auto.spec(3).name,
            "hmc",
            "auto with nothing to choose from is HMC"
        );
    }
}
