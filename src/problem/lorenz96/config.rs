//! The settings of a Lorenz-96 4D-Var scenario: reading them from `--set key=value`, checking their
//! ranges and the memory they need, and the background-error covariance B they define.

use nalgebra::DMatrix;

use super::forcing::ForcingPrior;
use super::model::Lorenz96Model;
use super::obs::ObsOperator;
use crate::error::{Error, Result};
use crate::problem::circulant::soar;
use crate::problem::memory::{concurrent_evaluations, MemoryPlan, VEC_HEADER};
use crate::problem::prior::DensePrior;
use crate::problem::settings::{in_range, observation_schedule, positive, scale, Settings};

/// How a synthetic scenario was made (shared by the built-in 4D-Var problems).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum SynthMode {
    /// Truth from the problem's own recipe (Lorenz-96: a long model run); background = truth + a draw of
    /// the background error.
    Demo,
    /// Background as in `Demo`; truth drawn from N(xb, B); observations from that truth. Repeating it
    /// with many seeds is a calibration study: the truth is a draw from the prior the cost assumes.
    Calibration,
}

impl SynthMode {
    /// Reads the `synth` setting (default `demo`).
    pub fn from_settings(s: &Settings) -> Result<Self> {
        match s.get_str("synth").as_deref() {
            None | Some("demo") => Ok(SynthMode::Demo),
            Some("calibration") => Ok(SynthMode::Calibration),
            Some(o) => Err(Error::Config(format!(
                "setting synth={o}: use 'demo' (truth from the problem's own recipe) or \
                 'calibration' (truth drawn from the background distribution)"
            ))),
        }
    }
}

/// Settings that define a Lorenz-96 4D-Var scenario (what `scenario.json` holds).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Lorenz96Config {
    pub model: Lorenz96Model,
    /// Number of model steps in the assimilation window.
    pub window: usize,
    /// Background-error standard deviation σ_b.
    pub sigma_b: f64,
    /// Length scale of the SOAR correlation, in sites: c(d) = (1 + d/L) exp(−d/L).
    pub corr_len: f64,
    /// The observation operator.
    pub obs_op: ObsOperator,
    /// Synthetic generation: observations every `obs_every` steps (steps obs_every, 2 obs_every, …).
    pub obs_every: usize,
    /// Synthetic generation: every `obs_stride`-th site is observed, starting at site 0.
    pub obs_stride: usize,
    /// Synthetic generation: observation-error standard deviation σ_o.
    pub sigma_o: f64,
    /// Synthetic generation: spin-up steps of the truth run.
    pub spinup: usize,
    /// Synthetic generation: how the truth was made.
    pub synth: SynthMode,
    /// Synthetic generation: the seed.
    pub seed: u64,
    /// Joint estimation of the forcing: its prior N(F_b, σ_F²), or `None` when F is fixed at
    /// `model.forcing` and the control vector is x0 alone (absent from scenario files made without it).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub forcing_prior: Option<ForcingPrior>,
}

impl Default for Lorenz96Config {
    fn default() -> Self {
        Lorenz96Config {
            model: Lorenz96Model::default(),
            window: 8,
            sigma_b: 1.0,
            corr_len: 2.0,
            obs_op: ObsOperator::Linear,
            obs_every: 2,
            obs_stride: 2,
            sigma_o: 0.5,
            spinup: 1000,
            synth: SynthMode::Demo,
            seed: 96,
            forcing_prior: None,
        }
    }
}

impl Lorenz96Config {
    /// Reads the settings a user gave (`--set key=value`) over the defaults.
    pub fn from_settings(s: &Settings) -> Result<Self> {
        let d = Lorenz96Config::default();
        let model = Lorenz96Model {
            n: s.get("n", d.model.n)?,
            forcing: s.get("forcing", d.model.forcing)?,
            dt: scale("dt", s.get("dt", d.model.dt)?)?,
        };
        let synth = SynthMode::from_settings(s)?;
        let obs_op = match s.get_str("obs_op") {
            None => d.obs_op,
            Some(v) => ObsOperator::parse(&v)?,
        };
        let c = Lorenz96Config {
            model,
            window: s.get("window", d.window)?,
            sigma_b: scale("sigma_b", s.get("sigma_b", d.sigma_b)?)?,
            corr_len: scale("corr_len", s.get("corr_len", d.corr_len)?)?,
            obs_op,
            obs_every: s.get("obs_every", d.obs_every)?,
            obs_stride: s.get("obs_stride", d.obs_stride)?,
            sigma_o: scale("sigma_o", s.get("sigma_o", d.sigma_o)?)?,
            spinup: s.get("spinup", d.spinup)?,
            synth,
            seed: s.get("seed", d.seed)?,
            forcing_prior: ForcingPrior::from_settings(s, model.forcing)?,
        };
        c.validate()?;
        Ok(c)
    }

    /// Checks every setting's range, then that a problem of this size fits in this machine's memory
    /// (see [`Lorenz96Config::memory_plan`]). Settings read from a scenario file pass through here too.
    pub fn validate(&self) -> Result<()> {
        if self.model.n < 4 {
            return Err(Error::Config(format!(
                "setting n={}: Lorenz-96 needs at least 4 sites",
                self.model.n
            )));
        }
        in_range(
            "forcing",
            self.model.forcing,
            -1e6,
            1e6,
            "the standard value is 8; the model blows up long before these bounds",
        )?;
        positive("dt", self.model.dt)?;
        for (key, v) in [
            ("dt", self.model.dt),
            ("sigma_b", self.sigma_b),
            ("corr_len", self.corr_len),
            ("sigma_o", self.sigma_o),
        ] {
            scale(key, v)?;
        }
        observation_schedule(self.window, self.obs_every, self.obs_stride, self.model.n)?;
        if let Some(p) = &self.forcing_prior {
            p.validate()?;
        }
        if self.spinup > MAX_SPINUP {
            return Err(Error::Config(format!(
                "setting spinup={}: at most {MAX_SPINUP} steps (the truth reaches the attractor within \
                 a few hundred steps; more only costs time)",
                self.spinup
            )));
        }
        self.memory_plan().check(&format!(
            "lorenz96 with n = {} and window = {}",
            self.model.n, self.window
        ))
    }

    /// The memory a problem of these settings holds at its peak: B with the copy and Cholesky factor made
    /// while factorising it, the true trajectory, the observations, and the trajectory and adjoint
    /// forcing kept by each evaluation running at once.
    pub fn memory_plan(&self) -> MemoryPlan {
        let n = self.model.n as u128;
        let steps = self.window as u128 + 1;
        let row = (8 * n).saturating_add(VEC_HEADER);
        let trajectory = steps.saturating_mul(row);
        let n_obs = (self.window / self.obs_every.max(1)) as u128
            * n.div_ceil(self.obs_stride.max(1) as u128);
        // An Observation (4 numbers) and its grouped copy (site, value, weight), one list per step.
        let obs = n_obs
            .saturating_mul(32 + 24)
            .saturating_add(steps.saturating_mul(VEC_HEADER));
        let threads = concurrent_evaluations();
        // The prior's matrix covers the whole control vector (n + 1 with the forcing estimated).
        let nc = self.control_dim() as u128;
        MemoryPlan::new()
            .part(
                "the background-error covariance B, its copy and its Cholesky factor (3 n^2 numbers)",
                nc.saturating_mul(nc).saturating_mul(24),
                "lower n",
            )
            .part(
                "the true trajectory over the window ((window + 1) n numbers)",
                trajectory,
                "lower window or n",
            )
            .part(
                format!("the {n_obs} observations"),
                obs,
                "raise obs_every or obs_stride, or lower window",
            )
            .part(
                format!(
                    "the trajectories and adjoint forcings of {threads} evaluations running at once \
                     (2 (window + 1) n numbers each)"
                ),
                trajectory.saturating_mul(2 * threads),
                "lower window or n",
            )
    }

    /// N(mean, B) with B factorised; a B that is not positive definite is reported with the settings
    /// that made it.
    pub(super) fn dense_prior(&self, mean: Vec<f64>) -> Result<DensePrior> {
        DensePrior::new(mean, self.background_cov()).map_err(|e| {
            Error::Config(format!(
                "settings corr_len={} and n={}: {e}; use a shorter corr_len",
                self.corr_len, self.model.n
            ))
        })
    }

    /// The background-error covariance B: σ_b² times a SOAR correlation in the distance along the ring.
    pub fn background_cov(&self) -> DMatrix<f64> {
        let n = self.model.n;
        DMatrix::from_fn(n, n, |i, j| {
            let d = i.abs_diff(j);
            let d = d.min(n - d) as f64 / self.corr_len;
            self.sigma_b * self.sigma_b * soar(d)
        })
    }
}

/// Most spin-up steps of a synthetic truth run.
pub const MAX_SPINUP: usize = 10_000_000;
