//! Strong-constraint 4D-Var on the Lorenz-96 model.
//!
//! Model (Lorenz 1996, "Predictability: a problem partly solved"): dx_i/dt = (x_{i+1} − x_{i−2}) x_{i−1}
//! − x_i + F on a ring of N sites, integrated with the classical fourth-order Runge–Kutta scheme. The
//! defaults N = 40, F = 8, dt = 0.05 (taken as 6 hours, Lorenz & Emanuel 1998) are the standard setting.
//!
//! Cost over the control vector x0 (the state at the start of the window):
//! J(x0) = ½ (x0 − xb)ᵀ B⁻¹ (x0 − xb) + ½ Σ_k Σ_s (y_{k,s} − h(x_k[s]))² / σ_{k,s}²,
//! with x_k = M_k(x0) the model state after k steps, h the observation operator (identity, or the square
//! x² where the posterior stops being Gaussian), B a SOAR correlation on the ring times σ_b², and a
//! diagonal R. The gradient comes from the hand-written adjoint of the RK4 step (tangent-linear and
//! adjoint are tested against each other and against finite differences).

use std::path::Path;

use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::batch::parallel_costs;
use super::circulant::soar;
use super::memory::{concurrent_evaluations, MemoryPlan, VEC_HEADER};
use super::prior::{DensePrior, Prior};
use super::settings::{in_range, observation_schedule, positive, scale, Settings};
use super::{check_len, CostSplit, Problem};
use crate::error::{Error, EvalError, Result};

/// The Lorenz-96 model with an RK4 step, its tangent-linear and its adjoint.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Lorenz96Model {
    /// Number of sites on the ring.
    pub n: usize,
    /// Forcing F.
    pub forcing: f64,
    /// Time step (0.05 ≈ 6 hours).
    pub dt: f64,
}

impl Default for Lorenz96Model {
    fn default() -> Self {
        Lorenz96Model {
            n: 40,
            forcing: 8.0,
            dt: 0.05,
        }
    }
}

/// The three intermediate RK4 stage states of one step, kept for the tangent-linear and adjoint.
struct Stages {
    x: Vec<f64>,
    x2: Vec<f64>,
    x3: Vec<f64>,
    x4: Vec<f64>,
}

impl Lorenz96Model {
    fn tendency(&self, x: &[f64], out: &mut [f64]) {
        let n = self.n;
        for i in 0..n {
            let ip1 = x[(i + 1) % n];
            let im1 = x[(i + n - 1) % n];
            let im2 = x[(i + n - 2) % n];
            out[i] = (ip1 - im2) * im1 - x[i] + self.forcing;
        }
    }

    /// d f(x) applied to dx.
    fn tendency_tl(&self, x: &[f64], dx: &[f64], out: &mut [f64]) {
        let n = self.n;
        for i in 0..n {
            let (ip1, im1, im2) = ((i + 1) % n, (i + n - 1) % n, (i + n - 2) % n);
            out[i] = (dx[ip1] - dx[im2]) * x[im1] + (x[ip1] - x[im2]) * dx[im1] - dx[i];
        }
    }

    /// Adds (d f(x))ᵀ a to acc.
    fn tendency_adj(&self, x: &[f64], a: &[f64], acc: &mut [f64]) {
        let n = self.n;
        for i in 0..n {
            let (ip1, im1, im2) = ((i + 1) % n, (i + n - 1) % n, (i + n - 2) % n);
            acc[ip1] += a[i] * x[im1];
            acc[im2] -= a[i] * x[im1];
            acc[im1] += a[i] * (x[ip1] - x[im2]);
            acc[i] -= a[i];
        }
    }

    fn stages(&self, x: &[f64]) -> (Stages, Vec<f64>) {
        let n = self.n;
        let h = self.dt;
        let mut k1 = vec![0.0; n];
        let mut k2 = vec![0.0; n];
        let mut k3 = vec![0.0; n];
        let mut k4 = vec![0.0; n];
        self.tendency(x, &mut k1);
        let x2: Vec<f64> = (0..n).map(|i| x[i] + 0.5 * h * k1[i]).collect();
        self.tendency(&x2, &mut k2);
        let x3: Vec<f64> = (0..n).map(|i| x[i] + 0.5 * h * k2[i]).collect();
        self.tendency(&x3, &mut k3);
        let x4: Vec<f64> = (0..n).map(|i| x[i] + h * k3[i]).collect();
        self.tendency(&x4, &mut k4);
        let next = (0..n)
            .map(|i| x[i] + h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]))
            .collect();
        (
            Stages {
                x: x.to_vec(),
                x2,
                x3,
                x4,
            },
            next,
        )
    }

    /// One RK4 step.
    pub fn step(&self, x: &[f64]) -> Vec<f64> {
        self.stages(x).1
    }

    /// The tangent-linear of one RK4 step at x, applied to dx.
    pub fn step_tl(&self, x: &[f64], dx: &[f64]) -> Vec<f64> {
        let (s, _) = self.stages(x);
        self.step_tl_stages(&s, dx)
    }

    fn step_tl_stages(&self, s: &Stages, dx: &[f64]) -> Vec<f64> {
        let n = self.n;
        let h = self.dt;
        let mut d1 = vec![0.0; n];
        let mut d2 = vec![0.0; n];
        let mut d3 = vec![0.0; n];
        let mut d4 = vec![0.0; n];
        self.tendency_tl(&s.x, dx, &mut d1);
        let w2: Vec<f64> = (0..n).map(|i| dx[i] + 0.5 * h * d1[i]).collect();
        self.tendency_tl(&s.x2, &w2, &mut d2);
        let w3: Vec<f64> = (0..n).map(|i| dx[i] + 0.5 * h * d2[i]).collect();
        self.tendency_tl(&s.x3, &w3, &mut d3);
        let w4: Vec<f64> = (0..n).map(|i| dx[i] + h * d3[i]).collect();
        self.tendency_tl(&s.x4, &w4, &mut d4);
        (0..n)
            .map(|i| dx[i] + h / 6.0 * (d1[i] + 2.0 * d2[i] + 2.0 * d3[i] + d4[i]))
            .collect()
    }

    /// The adjoint of one RK4 step at x, applied to a (the adjoint of the step's output).
    pub fn step_adj(&self, x: &[f64], a: &[f64]) -> Vec<f64> {
        let (s, _) = self.stages(x);
        self.step_adj_stages(&s, a)
    }

    fn step_adj_stages(&self, s: &Stages, a: &[f64]) -> Vec<f64> {
        let n = self.n;
        let h = self.dt;
        let mut ax = a.to_vec();
        let a_k4: Vec<f64> = a.iter().map(|v| h / 6.0 * v).collect();
        let mut a_k3: Vec<f64> = a.iter().map(|v| h / 3.0 * v).collect();
        let mut a_k2: Vec<f64> = a_k3.clone();
        let mut a_k1: Vec<f64> = a_k4.clone();
        // k4 = f'(x4) (dx + h k3)
        let mut a_w = vec![0.0; n];
        self.tendency_adj(&s.x4, &a_k4, &mut a_w);
        for i in 0..n {
            ax[i] += a_w[i];
            a_k3[i] += h * a_w[i];
        }
        // k3 = f'(x3) (dx + h/2 k2)
        a_w.iter_mut().for_each(|v| *v = 0.0);
        self.tendency_adj(&s.x3, &a_k3, &mut a_w);
        for i in 0..n {
            ax[i] += a_w[i];
            a_k2[i] += 0.5 * h * a_w[i];
        }
        // k2 = f'(x2) (dx + h/2 k1)
        a_w.iter_mut().for_each(|v| *v = 0.0);
        self.tendency_adj(&s.x2, &a_k2, &mut a_w);
        for i in 0..n {
            ax[i] += a_w[i];
            a_k1[i] += 0.5 * h * a_w[i];
        }
        // k1 = f'(x) dx
        self.tendency_adj(&s.x, &a_k1, &mut ax);
        ax
    }

    /// The trajectory x_0 … x_steps from x0.
    pub fn run(&self, x0: &[f64], steps: usize) -> Vec<Vec<f64>> {
        let mut traj = Vec::with_capacity(steps + 1);
        traj.push(x0.to_vec());
        for k in 0..steps {
            let next = self.step(&traj[k]);
            traj.push(next);
        }
        traj
    }
}

/// The observation operator h applied at each observed site.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ObsOperator {
    /// h(x) = x.
    Linear,
    /// h(x) = x²: the sign of x is not observed, so the posterior can be far from Gaussian.
    Square,
}

impl ObsOperator {
    fn apply(self, x: f64) -> f64 {
        match self {
            ObsOperator::Linear => x,
            ObsOperator::Square => x * x,
        }
    }
    fn derivative(self, x: f64) -> f64 {
        match self {
            ObsOperator::Linear => 1.0,
            ObsOperator::Square => 2.0 * x,
        }
    }
    fn parse(s: &str) -> Result<Self> {
        match s {
            "linear" => Ok(ObsOperator::Linear),
            "square" => Ok(ObsOperator::Square),
            other => Err(Error::Config(format!(
                "setting obs_op={other}: unknown observation operator; use 'linear' or 'square'"
            ))),
        }
    }
    fn name(self) -> &'static str {
        match self {
            ObsOperator::Linear => "linear",
            ObsOperator::Square => "square",
        }
    }
}

/// One observation: the value of h(x_step[site]) with error standard deviation `sigma`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observation {
    pub step: usize,
    pub site: usize,
    pub value: f64,
    pub sigma: f64,
}

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
        MemoryPlan::new()
            .part(
                "the background-error covariance B, its copy and its Cholesky factor (3 n^2 numbers)",
                n.saturating_mul(n).saturating_mul(24),
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
    fn dense_prior(&self, mean: Vec<f64>) -> Result<DensePrior> {
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

/// A complete Lorenz-96 4D-Var scenario: settings, background, observations, and the truth where known.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub config: Lorenz96Config,
    pub background: Vec<f64>,
    pub observations: Vec<Observation>,
    /// The true trajectory over the window (steps 0..=window), where the scenario is synthetic.
    pub truth: Option<Vec<Vec<f64>>>,
}

/// n independent standard normal draws.
pub(crate) fn normal_draws(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}

impl Scenario {
    /// Generates a synthetic scenario from its settings and seed (see [`SynthMode`]).
    pub fn synthesize(config: &Lorenz96Config) -> Result<Self> {
        config.validate()?;
        let model = config.model;
        let n = model.n;
        let prior = config.dense_prior(vec![0.0; n])?;
        let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
        // Spin-up from rest plus a small seeded perturbation, onto the attractor.
        let mut x: Vec<f64> = normal_draws(&mut rng, n)
            .iter()
            .map(|z| model.forcing + 0.01 * z)
            .collect();
        for _ in 0..config.spinup {
            x = model.step(&x);
        }
        let sqrt_draw = |rng: &mut ChaCha8Rng| {
            let z = normal_draws(rng, n);
            let mut e = vec![0.0; n];
            prior.mul_sqrt(&z, &mut e);
            e
        };
        let eb = sqrt_draw(&mut rng);
        let (background, truth0) = match config.synth {
            SynthMode::Demo => ((0..n).map(|i| x[i] + eb[i]).collect::<Vec<_>>(), x),
            SynthMode::Calibration => {
                let xb: Vec<f64> = (0..n).map(|i| x[i] + eb[i]).collect();
                let et = sqrt_draw(&mut rng);
                let t = (0..n).map(|i| xb[i] + et[i]).collect();
                (xb, t)
            }
        };
        let truth = model.run(&truth0, config.window);
        if let Some(k) = truth.iter().position(|x| x.iter().any(|v| !v.is_finite())) {
            return Err(Error::Config(format!(
                "settings dt={} and forcing={}: the truth run blew up (non-finite state at step {k} \
                 of the window); use a smaller dt (0.05 is the standard step for forcing 8)",
                model.dt, model.forcing
            )));
        }
        let mut observations = Vec::new();
        let mut step = config.obs_every;
        while step <= config.window {
            for site in (0..n).step_by(config.obs_stride) {
                let z: f64 = StandardNormal.sample(&mut rng);
                let value = config.obs_op.apply(truth[step][site]) + config.sigma_o * z;
                observations.push(Observation {
                    step,
                    site,
                    value,
                    sigma: config.sigma_o,
                });
            }
            step += config.obs_every;
        }
        Ok(Scenario {
            config: config.clone(),
            background,
            observations,
            truth: Some(truth),
        })
    }

    /// The scenario's files: (file name, contents) for scenario.json, background.csv, observations.csv
    /// and, where the truth is known, truth.csv. Numbers are written in Rust's shortest round-trip form.
    pub fn to_files(&self) -> Result<Vec<(&'static str, String)>> {
        let mut files = Vec::new();
        let scenario = serde_json::json!({
            "about": "Invented scenario for the varpost demo: a ring of weather stations around an \
                      imaginary polar sea, modelled by Lorenz-96. No real place or data.",
            "format": "varpost-lorenz96 scenario, version 1",
            "config": self.config,
        });
        let text = serde_json::to_string_pretty(&scenario)
            .map_err(|e| Error::Config(format!("cannot encode the scenario: {e}")))?;
        files.push(("scenario.json", text + "\n"));
        let mut b = String::from("site,value\n");
        for (i, v) in self.background.iter().enumerate() {
            b.push_str(&format!("{i},{v}\n"));
        }
        files.push(("background.csv", b));
        let mut o = String::from("step,site,value,sigma\n");
        for ob in &self.observations {
            o.push_str(&format!(
                "{},{},{},{}\n",
                ob.step, ob.site, ob.value, ob.sigma
            ));
        }
        files.push(("observations.csv", o));
        if let Some(truth) = &self.truth {
            let mut t = String::from("step,site,value\n");
            for (k, x) in truth.iter().enumerate() {
                for (i, v) in x.iter().enumerate() {
                    t.push_str(&format!("{k},{i},{v}\n"));
                }
            }
            files.push(("truth.csv", t));
        }
        Ok(files)
    }

    /// Writes the scenario's files into `dir`.
    pub fn write(&self, dir: &Path) -> Result<()> {
        std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
        for (name, text) in self.to_files()? {
            let p = dir.join(name);
            std::fs::write(&p, text).map_err(|e| Error::io(&p, e))?;
        }
        Ok(())
    }

    /// Reads a scenario from a folder holding scenario.json, background.csv, observations.csv and
    /// optionally truth.csv.
    pub fn read(dir: &Path) -> Result<Self> {
        if !dir.is_dir() {
            return Err(Error::Config(format!(
                "scenario folder {} does not exist; it must hold scenario.json, background.csv and \
                 observations.csv (see demo-data/README.md, or write one with `varpost synth --out DIR`)",
                dir.display()
            )));
        }
        let read = |name: &str| -> Result<String> {
            let p = dir.join(name);
            std::fs::read_to_string(&p).map_err(|e| Error::io(&p, e))
        };
        let truth = match dir.join("truth.csv").exists() {
            true => Some(read("truth.csv")?),
            false => None,
        };
        Scenario::parse(
            dir,
            &read("scenario.json")?,
            &read("background.csv")?,
            &read("observations.csv")?,
            truth.as_deref(),
        )
    }

    /// Parses a scenario from the contents of its files; `origin` names the folder in errors.
    pub fn parse(
        origin: &Path,
        scenario: &str,
        background: &str,
        observations: &str,
        truth: Option<&str>,
    ) -> Result<Self> {
        let sp = origin.join("scenario.json");
        let v: serde_json::Value = serde_json::from_str(scenario)
            .map_err(|e| Error::format(&sp, format!("not valid JSON: {e}")))?;
        let config: Lorenz96Config =
            serde_json::from_value(v.get("config").cloned().unwrap_or_default()).map_err(|e| {
                Error::format(
                    &sp,
                    format!("the \"config\" object is incomplete or wrong: {e}"),
                )
            })?;
        config
            .validate()
            .map_err(|e| Error::format(&sp, e.to_string()))?;
        let n = config.model.n;

        let bp = origin.join("background.csv");
        let rows = parse_csv(&bp, background, &["site", "value"])?;
        if rows.len() != n {
            return Err(Error::format(
                &bp,
                format!("{} rows, but the model has n = {n} sites", rows.len()),
            ));
        }
        let mut xb = vec![f64::NAN; n];
        for (line, r) in rows {
            let site = as_index(&bp, line, r[0], n, "site")?;
            xb[site] = r[1];
        }
        if let Some(i) = xb.iter().position(|v| v.is_nan()) {
            return Err(Error::format(
                &bp,
                format!("no background value for site {i}"),
            ));
        }

        let op = origin.join("observations.csv");
        let mut obs = Vec::new();
        for (line, r) in parse_csv(&op, observations, &["step", "site", "value", "sigma"])? {
            let step = as_index(&op, line, r[0], config.window + 1, "step")?;
            let site = as_index(&op, line, r[1], n, "site")?;
            if !(r[3] > 0.0) {
                return Err(Error::format(
                    &op,
                    format!("line {line}: sigma must be positive, got {}", r[3]),
                ));
            }
            obs.push(Observation {
                step,
                site,
                value: r[2],
                sigma: r[3],
            });
        }
        if obs.is_empty() {
            return Err(Error::format(&op, "no observations"));
        }

        let truth = match truth {
            None => None,
            Some(text) => {
                let tp = origin.join("truth.csv");
                let mut t = vec![vec![f64::NAN; n]; config.window + 1];
                for (line, r) in parse_csv(&tp, text, &["step", "site", "value"])? {
                    let k = as_index(&tp, line, r[0], config.window + 1, "step")?;
                    let i = as_index(&tp, line, r[1], n, "site")?;
                    t[k][i] = r[2];
                }
                Some(t)
            }
        };
        Ok(Scenario {
            config,
            background: xb,
            observations: obs,
            truth,
        })
    }
}

/// Parses a CSV file with a fixed header into rows of numbers, keeping the line number for errors.
fn parse_csv(path: &Path, text: &str, header: &[&str]) -> Result<Vec<(usize, Vec<f64>)>> {
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty() && !l.starts_with('#'));
    let want = header.join(",");
    match lines.next() {
        Some((_, h)) if h.trim().replace(' ', "") == want => {}
        Some((_, h)) => {
            return Err(Error::format(
                path,
                format!("header is '{}', expected '{want}'", h.trim()),
            ));
        }
        None => return Err(Error::format(path, "the file is empty")),
    }
    let mut rows = Vec::new();
    for (i, l) in lines {
        let fields: Vec<&str> = l.split(',').map(str::trim).collect();
        if fields.len() != header.len() {
            return Err(Error::format(
                path,
                format!(
                    "line {}: {} fields, expected {} ({want})",
                    i + 1,
                    fields.len(),
                    header.len()
                ),
            ));
        }
        let mut row = Vec::with_capacity(fields.len());
        for (f, name) in fields.iter().zip(header) {
            let v: f64 = f.parse().map_err(|_| {
                Error::format(
                    path,
                    format!("line {}: {name} '{f}' is not a number", i + 1),
                )
            })?;
            if !v.is_finite() {
                return Err(Error::format(
                    path,
                    format!("line {}: {name} is {v}, not a finite number", i + 1),
                ));
            }
            row.push(v);
        }
        rows.push((i + 1, row));
    }
    Ok(rows)
}

fn as_index(path: &Path, line: usize, v: f64, limit: usize, what: &str) -> Result<usize> {
    if v < 0.0 || v.fract() != 0.0 || v >= limit as f64 {
        return Err(Error::format(
            path,
            format!(
                "line {line}: {what} {v} is not an integer in 0..{}",
                limit.saturating_sub(1)
            ),
        ));
    }
    Ok(v as usize)
}

/// The Lorenz-96 4D-Var cost function.
pub struct Lorenz96 {
    scenario: Scenario,
    prior: DensePrior,
    /// Observations grouped by step: obs_at[k] lists (site, value, 1/σ²).
    obs_at: Vec<Vec<(usize, f64, f64)>>,
}

impl Lorenz96 {
    /// The cost function of a scenario.
    pub fn new(scenario: Scenario) -> Result<Self> {
        let c = &scenario.config;
        c.validate()?;
        let prior = c.dense_prior(scenario.background.clone())?;
        let mut obs_at = vec![Vec::new(); c.window + 1];
        for o in &scenario.observations {
            obs_at[o.step].push((o.site, o.value, 1.0 / (o.sigma * o.sigma)));
        }
        Ok(Lorenz96 {
            scenario,
            prior,
            obs_at,
        })
    }

    /// The scenario the cost was built from.
    pub fn scenario(&self) -> &Scenario {
        &self.scenario
    }

    /// The background prior N(xb, B) as a dense matrix form.
    pub fn dense_prior(&self) -> &DensePrior {
        &self.prior
    }

    fn split(
        &self,
        x: &[f64],
        grad: Option<&mut [f64]>,
    ) -> std::result::Result<CostSplit, EvalError> {
        let model = self.scenario.config.model;
        let op = self.scenario.config.obs_op;
        let n = model.n;
        check_len("the control vector", x, n)?;
        if let Some(g) = &grad {
            check_len("the gradient buffer", g, n)?;
        }
        let dxb: Vec<f64> = x
            .iter()
            .zip(self.prior.mean())
            .map(|(a, b)| a - b)
            .collect();
        let mut binv_d = vec![0.0; n];
        self.prior.solve(&dxb, &mut binv_d);
        let jb = 0.5 * dxb.iter().zip(&binv_d).map(|(a, b)| a * b).sum::<f64>();
        let traj = model.run(x, self.scenario.config.window);
        let mut jo = 0.0;
        // forcing[k] = ∂Jo/∂x_k
        let mut forcing = vec![vec![0.0; n]; traj.len()];
        for (k, obs) in self.obs_at.iter().enumerate() {
            for &(site, y, w) in obs {
                let xs = traj[k][site];
                let d = y - op.apply(xs);
                jo += 0.5 * w * d * d;
                forcing[k][site] -= w * d * op.derivative(xs);
            }
        }
        if let Some(g) = grad {
            let mut a = forcing[traj.len() - 1].clone();
            for k in (0..traj.len() - 1).rev() {
                a = model.step_adj(&traj[k], &a);
                for i in 0..n {
                    a[i] += forcing[k][i];
                }
            }
            for i in 0..n {
                g[i] = binv_d[i] + a[i];
            }
        }
        Ok(CostSplit {
            background: jb,
            observation: jo,
        })
    }
}

impl Problem for Lorenz96 {
    fn dim(&self) -> usize {
        self.scenario.config.model.n
    }
    fn component_names(&self) -> Option<Vec<String>> {
        Some((0..self.dim()).map(|i| format!("x{i}")).collect())
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let s = self.split(x, Some(grad))?;
        Ok(s.background + s.observation)
    }
    fn cost(&self, x: &[f64]) -> std::result::Result<f64, EvalError> {
        let s = self.split(x, None)?;
        Ok(s.background + s.observation)
    }
    fn cost_split(&self, x: &[f64]) -> std::result::Result<Option<CostSplit>, EvalError> {
        Ok(Some(self.split(x, None)?))
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<std::result::Result<f64, EvalError>> {
        parallel_costs(self, xs)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        Some(&self.prior)
    }
}

/// Describes the observation operator for summaries.
pub fn describe(c: &Lorenz96Config) -> String {
    format!(
        "Lorenz-96, n = {}, F = {}, dt = {}, window {} steps, observation operator {}",
        c.model.n,
        c.model.forcing,
        c.model.dt,
        c.window,
        c.obs_op.name()
    )
}
