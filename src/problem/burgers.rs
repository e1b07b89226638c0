//! Strong-constraint 4D-Var on the one-dimensional viscous Burgers equation.
//!
//! Model: u_t + u u_x = ν u_xx on the periodic domain [0, 1), a classic test problem of variational
//! assimilation (used e.g. by Le Dimet, Navon & Daescu 2002, MWR 130; from memory). It is nonlinear (fronts
//! steepen until viscosity holds them) and its state can be made large, which is where dense Hessians stop
//! being practical.
//!
//! Discretisation: n points x_j = j/n, dx = 1/n. The advection term is written in the skew-symmetric form
//! u u_x = ⅓ (u u_x + (u²)_x) with central differences,
//!   (u u_x)_j ≈ [u_j (u_{j+1} − u_{j−1}) + u_{j+1}² − u_{j−1}²] / (6 dx),
//! which conserves Σ u_j² when ν = 0 (common practice, no source); diffusion is the central three-point
//! Laplacian ν (u_{j+1} − 2u_j + u_{j−1}) / dx². Time stepping is the classical fourth-order Runge–Kutta
//! scheme. Its time step is checked by a von Neumann analysis of the linearisation about a uniform flow at
//! the largest speed the scenario reaches: every grid mode θ = 2πk/n must satisfy |R(z(θ))| ≤ 1, with
//! R(z) = 1 + z + z²/2 + z³/6 + z⁴/24 and z(θ) = dt (−4ν sin²(θ/2) / dx² − i U sin θ / dx). On the real
//! axis that is the diffusion limit dt ≤ 2.785 dx² / (4ν), on the imaginary axis the advective (CFL) limit
//! dt ≤ 2√2 dx / U (RK4 stability region; textbook, e.g. Hairer & Wanner, Solving ODEs II; from memory).
//!
//! Cost over the state u₀ at the start of the window:
//! J(u₀) = ½ (u₀ − u_b)ᵀ B⁻¹ (u₀ − u_b) + ½ Σ_k Σ_s (y_{k,s} − u_k[s])² / σ_o²,
//! with u_k the state after k steps, observations of every `obs_stride`-th point every `obs_every` steps,
//! and B = σ_b² times a SOAR correlation on the circle (periodised over the domain's images, so that it
//! is positive definite on every grid), circulant and applied through the FFT ([`CirculantPrior`]). The
//! gradient comes from the hand-written adjoint of the RK4 step; the stage states are recomputed from the
//! stored step states during the adjoint sweep, so memory is (window + 1) n numbers per evaluation
//! running at once, checked against the machine's memory (with the rest of the problem's) before
//! anything is allocated. Work buffers are pooled, so an evaluation allocates only the FFT buffers.
//!
//! Demo truth: u₀(x) = Σ_{m=1}^{3} (1/m) sin(2π m x + φ_m) with phases φ_m drawn uniformly from the seed.

use std::f64::consts::PI;
use std::sync::Mutex;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use rustfft::num_complex::Complex;

use super::batch::parallel_costs;
use super::circulant::{periodised_column, soar, CirculantPrior};
use super::lorenz96::{normal_draws, Observation, SynthMode};
use super::memory::{concurrent_evaluations, MemoryPlan, VEC_HEADER};
use super::prior::Prior;
use super::settings::{in_range, observation_schedule, positive, scale, Settings};
use super::{check_len, CostSplit, Problem};
use crate::error::{Error, EvalError, Result};

/// Amplitudes of the sine modes m = 1, 2, 3 of the demo truth.
pub const TRUTH_AMPLITUDES: [f64; 3] = [1.0, 0.5, 1.0 / 3.0];

/// Longest accepted correlation length, in domain units.
pub const MAX_CORR_LEN: f64 = 10.0;

/// The discretised viscous Burgers model on [0, 1) with an RK4 step, its tangent-linear and adjoint.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BurgersModel {
    /// Grid points.
    pub n: usize,
    /// Viscosity ν.
    pub nu: f64,
    /// Time step.
    pub dt: f64,
}

/// Three neighbouring values (j − 1, j, j + 1) of a grid field.
type Triple = (f64, f64, f64);

/// out_j = f(u around j, v around j) for every point of the periodic grid (n ≥ 3). The interior runs
/// over sliding windows, so the loop has no index arithmetic or bounds checks.
#[inline(always)]
fn stencil(out: &mut [f64], u: &[f64], v: &[f64], f: impl Fn(Triple, Triple) -> f64) {
    let n = out.len();
    out[0] = f((u[n - 1], u[0], u[1]), (v[n - 1], v[0], v[1]));
    for ((o, uw), vw) in out[1..n - 1].iter_mut().zip(u.windows(3)).zip(v.windows(3)) {
        *o = f((uw[0], uw[1], uw[2]), (vw[0], vw[1], vw[2]));
    }
    out[n - 1] = f((u[n - 2], u[n - 1], u[0]), (v[n - 2], v[n - 1], v[0]));
}

/// Buffers of one RK4 step and its tangent-linear / adjoint (n numbers each).
struct StepWork {
    k: Vec<f64>,
    s: Vec<f64>,
    x2: Vec<f64>,
    x3: Vec<f64>,
    x4: Vec<f64>,
    kb: Vec<f64>,
    w: Vec<f64>,
}

impl StepWork {
    fn new(n: usize) -> Self {
        let z = || vec![0.0; n];
        StepWork {
            k: z(),
            s: z(),
            x2: z(),
            x3: z(),
            x4: z(),
            kb: z(),
            w: z(),
        }
    }
}

/// |R(z)| for the RK4 stability polynomial R(z) = 1 + z + z²/2 + z³/6 + z⁴/24.
fn rk4_gain(z: Complex<f64>) -> f64 {
    let one = Complex::new(1.0, 0.0);
    (one + z * (one + z * (one / 2.0 + z * (one / 6.0 + z / 24.0)))).norm()
}

impl BurgersModel {
    /// Grid spacing 1/n.
    pub fn dx(&self) -> f64 {
        1.0 / self.n as f64
    }

    /// Grid point positions x_j = j/n.
    pub fn grid(&self) -> Vec<f64> {
        (0..self.n).map(|j| j as f64 * self.dx()).collect()
    }

    /// The semi-discrete right-hand side f(u) = −(u u_x) + ν u_xx.
    fn tendency(&self, u: &[f64], out: &mut [f64]) {
        let c = -(self.n as f64) / 6.0;
        let d = self.nu * (self.n * self.n) as f64;
        stencil(out, u, u, |(um, uj, up), _| {
            c * (uj * (up - um) + up * up - um * um) + d * (up - 2.0 * uj + um)
        });
    }

    /// out = f′(u) du.
    fn tendency_tl(&self, u: &[f64], du: &[f64], out: &mut [f64]) {
        let c = -(self.n as f64) / 6.0;
        let d = self.nu * (self.n * self.n) as f64;
        stencil(out, u, du, |(um, uj, up), (dm, dj, dp)| {
            c * (dj * (up - um) + (uj + 2.0 * up) * dp - (uj + 2.0 * um) * dm)
                + d * (dp - 2.0 * dj + dm)
        });
    }

    /// out = f′(u)ᵀ a, gathered row by row from the tangent-linear's three non-zero entries per row.
    fn tendency_adj(&self, u: &[f64], a: &[f64], out: &mut [f64]) {
        let c = -(self.n as f64) / 6.0;
        let d = self.nu * (self.n * self.n) as f64;
        stencil(out, u, a, |(um, uj, up), (am, aj, ap)| {
            c * (aj * (up - um) + am * (um + 2.0 * uj) - ap * (up + 2.0 * uj))
                + d * (ap - 2.0 * aj + am)
        });
    }

    /// One RK4 step from u into out.
    fn step_into(&self, u: &[f64], out: &mut [f64], w: &mut StepWork) {
        let h = self.dt;
        let StepWork { k, s, .. } = w;
        self.tendency(u, k);
        for i in 0..self.n {
            out[i] = u[i] + h / 6.0 * k[i];
            s[i] = u[i] + 0.5 * h * k[i];
        }
        self.tendency(s, k);
        for i in 0..self.n {
            out[i] += h / 3.0 * k[i];
            s[i] = u[i] + 0.5 * h * k[i];
        }
        self.tendency(s, k);
        for i in 0..self.n {
            out[i] += h / 3.0 * k[i];
            s[i] = u[i] + h * k[i];
        }
        self.tendency(s, k);
        for i in 0..self.n {
            out[i] += h / 6.0 * k[i];
        }
    }

    /// The stage states x2, x3, x4 of the RK4 step from u, into the work buffers.
    fn stages_into(&self, u: &[f64], w: &mut StepWork) {
        let h = self.dt;
        let StepWork { k, x2, x3, x4, .. } = w;
        self.tendency(u, k);
        for i in 0..self.n {
            x2[i] = u[i] + 0.5 * h * k[i];
        }
        self.tendency(x2, k);
        for i in 0..self.n {
            x3[i] = u[i] + 0.5 * h * k[i];
        }
        self.tendency(x3, k);
        for i in 0..self.n {
            x4[i] = u[i] + h * k[i];
        }
    }

    /// The tangent-linear of the RK4 step at u applied to du, into out.
    fn step_tl_into(&self, u: &[f64], du: &[f64], out: &mut [f64], w: &mut StepWork) {
        let h = self.dt;
        self.stages_into(u, w);
        let StepWork {
            k, s, x2, x3, x4, ..
        } = w;
        self.tendency_tl(u, du, k);
        for i in 0..self.n {
            out[i] = du[i] + h / 6.0 * k[i];
            s[i] = du[i] + 0.5 * h * k[i];
        }
        self.tendency_tl(x2, s, k);
        for i in 0..self.n {
            out[i] += h / 3.0 * k[i];
            s[i] = du[i] + 0.5 * h * k[i];
        }
        self.tendency_tl(x3, s, k);
        for i in 0..self.n {
            out[i] += h / 3.0 * k[i];
            s[i] = du[i] + h * k[i];
        }
        self.tendency_tl(x4, s, k);
        for i in 0..self.n {
            out[i] += h / 6.0 * k[i];
        }
    }

    /// The adjoint of the RK4 step at u applied to a (the adjoint of the step's output), into out.
    ///
    /// Reverse sweep of out = u + h/6 (k1 + 2k2 + 2k3 + k4), k1 = f(u), k2 = f(u + h/2 k1),
    /// k3 = f(u + h/2 k2), k4 = f(u + h k3).
    fn step_adj_into(&self, u: &[f64], a: &[f64], out: &mut [f64], w: &mut StepWork) {
        let h = self.dt;
        self.stages_into(u, w);
        let StepWork {
            x2, x3, x4, kb, w, ..
        } = w;
        out.copy_from_slice(a);
        for i in 0..self.n {
            kb[i] = h / 6.0 * a[i];
        }
        self.tendency_adj(x4, kb, w);
        for i in 0..self.n {
            out[i] += w[i];
            kb[i] = h / 3.0 * a[i] + h * w[i];
        }
        self.tendency_adj(x3, kb, w);
        for i in 0..self.n {
            out[i] += w[i];
            kb[i] = h / 3.0 * a[i] + 0.5 * h * w[i];
        }
        self.tendency_adj(x2, kb, w);
        for i in 0..self.n {
            out[i] += w[i];
            kb[i] = h / 6.0 * a[i] + 0.5 * h * w[i];
        }
        self.tendency_adj(u, kb, w);
        for i in 0..self.n {
            out[i] += w[i];
        }
    }

    /// Runs `steps` steps from u0 into traj, which holds (steps + 1) n numbers, state after state.
    fn run_into(&self, u0: &[f64], steps: usize, traj: &mut [f64], w: &mut StepWork) {
        let n = self.n;
        traj[..n].copy_from_slice(u0);
        for k in 0..steps {
            let (done, rest) = traj.split_at_mut((k + 1) * n);
            self.step_into(&done[k * n..], &mut rest[..n], w);
        }
    }

    /// One RK4 step.
    pub fn step(&self, u: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; self.n];
        self.step_into(u, &mut out, &mut StepWork::new(self.n));
        out
    }

    /// The tangent-linear of one RK4 step at u, applied to du.
    pub fn step_tl(&self, u: &[f64], du: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; self.n];
        self.step_tl_into(u, du, &mut out, &mut StepWork::new(self.n));
        out
    }

    /// The adjoint of one RK4 step at u, applied to a.
    pub fn step_adj(&self, u: &[f64], a: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; self.n];
        self.step_adj_into(u, a, &mut out, &mut StepWork::new(self.n));
        out
    }

    /// The trajectory u_0 … u_steps from u0.
    pub fn run(&self, u0: &[f64], steps: usize) -> Vec<Vec<f64>> {
        let mut traj = vec![0.0; (steps + 1) * self.n];
        self.run_into(u0, steps, &mut traj, &mut StepWork::new(self.n));
        traj.chunks(self.n).map(<[f64]>::to_vec).collect()
    }

    /// The energy ½ ∫ u² dx on the grid (rectangle rule, exact for trigonometric polynomials of degree
    /// below n/2).
    pub fn energy(&self, u: &[f64]) -> f64 {
        0.5 * self.dx() * u.iter().map(|v| v * v).sum::<f64>()
    }

    /// Whether RK4 is stable for every grid mode of the linearisation about a uniform flow of speed
    /// `speed` (the von Neumann test in the module docs).
    pub fn is_stable(&self, speed: f64) -> bool {
        let n = self.n as f64;
        let (diff, adv) = (4.0 * self.nu * n * n, speed.abs() * n);
        (0..=self.n / 2).all(|k| {
            let theta = 2.0 * PI * k as f64 / n;
            let half = (0.5 * theta).sin();
            let z = Complex::new(-diff * half * half, -adv * theta.sin()) * self.dt;
            rk4_gain(z) <= 1.0 + 1e-12
        })
    }

    /// The largest time step that passes [`BurgersModel::is_stable`] at `speed`, found by bisection.
    pub fn max_stable_dt(&self, speed: f64) -> f64 {
        let n = self.n as f64;
        // Beyond the diffusion limit on the real axis (2.785) and the advective one on the imaginary axis
        // (2√2) every step is unstable.
        let mut hi = (2.9 / (4.0 * self.nu * n * n)).min(2.9 / (speed.abs() * n).max(1e-300));
        let mut lo = 0.0;
        for _ in 0..60 {
            let mid = 0.5 * (lo + hi);
            let trial = BurgersModel { dt: mid, ..*self };
            if trial.is_stable(speed) {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        lo
    }
}

/// Settings of a Burgers 4D-Var scenario.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct BurgersConfig {
    /// Grid points on [0, 1).
    pub n: usize,
    /// Viscosity ν.
    pub nu: f64,
    /// Time step.
    pub dt: f64,
    /// Model steps in the assimilation window.
    pub window: usize,
    /// Observations every `obs_every` steps (steps obs_every, 2 obs_every, … ≤ window).
    pub obs_every: usize,
    /// Every `obs_stride`-th grid point is observed, starting at point 0.
    pub obs_stride: usize,
    /// Observation-error standard deviation σ_o.
    pub sigma_o: f64,
    /// Background-error standard deviation σ_b.
    pub sigma_b: f64,
    /// Length scale of the SOAR correlation, in domain units (the domain has length 1).
    pub corr_len: f64,
    /// How the truth is made.
    pub synth: SynthMode,
    /// The seed of the truth's phases, the background error and the observation noise.
    pub seed: u64,
}

impl Default for BurgersConfig {
    fn default() -> Self {
        BurgersConfig {
            n: 200,
            nu: 0.01,
            dt: 1e-3,
            window: 100,
            obs_every: 10,
            obs_stride: 10,
            sigma_o: 0.05,
            sigma_b: 0.2,
            corr_len: 0.05,
            synth: SynthMode::Demo,
            seed: 1,
        }
    }
}

impl BurgersConfig {
    /// Reads the settings a user gave (`--set key=value`) over the defaults.
    pub fn from_settings(s: &Settings) -> Result<Self> {
        let d = BurgersConfig::default();
        let c = BurgersConfig {
            n: s.get("n", d.n)?,
            nu: s.get("nu", d.nu)?,
            dt: s.get("dt", d.dt)?,
            window: s.get("window", d.window)?,
            obs_every: s.get("obs_every", d.obs_every)?,
            obs_stride: s.get("obs_stride", d.obs_stride)?,
            sigma_o: s.get("sigma_o", d.sigma_o)?,
            sigma_b: s.get("sigma_b", d.sigma_b)?,
            corr_len: s.get("corr_len", d.corr_len)?,
            synth: SynthMode::from_settings(s)?,
            seed: s.get("seed", d.seed)?,
        };
        c.validate()?;
        Ok(c)
    }

    /// The model these settings define.
    pub fn model(&self) -> BurgersModel {
        BurgersModel {
            n: self.n,
            nu: self.nu,
            dt: self.dt,
        }
    }

    /// Checks the settings that do not depend on the scenario (the time step is checked against the
    /// scenario's speeds when the problem is built).
    pub fn validate(&self) -> Result<()> {
        if self.n < 8 {
            return Err(Error::Config(format!(
                "setting n={}: the Burgers grid needs at least 8 points",
                self.n
            )));
        }
        for (key, v) in [
            ("nu", self.nu),
            ("dt", self.dt),
            ("sigma_o", self.sigma_o),
            ("sigma_b", self.sigma_b),
        ] {
            scale(key, v)?;
        }
        positive("corr_len", self.corr_len)?;
        in_range(
            "corr_len",
            self.corr_len,
            1e-150,
            MAX_CORR_LEN,
            "in domain units; the periodised correlation sums images over about 40 corr_len domain \
             lengths, and a longer correlation makes B singular on any useful grid",
        )?;
        observation_schedule(self.window, self.obs_every, self.obs_stride, self.n)?;
        self.memory_plan().check(&format!(
            "burgers with n = {} and window = {}",
            self.n, self.window
        ))
    }

    /// The memory a problem of these settings holds at its peak: the truth run (a flat trajectory and
    /// its per-step copy), the observations, the background-error covariance in FFT form, and the
    /// pooled work buffers (a trajectory of (window + 1) n numbers and 13 n more) of each evaluation
    /// running at once.
    pub fn memory_plan(&self) -> MemoryPlan {
        let n = self.n as u128;
        let steps = self.window as u128 + 1;
        let flat = steps.saturating_mul(n).saturating_mul(8);
        let rows = steps.saturating_mul((8 * n).saturating_add(VEC_HEADER));
        let n_obs = (self.window / self.obs_every.max(1)) as u128
            * n.div_ceil(self.obs_stride.max(1) as u128);
        let threads = concurrent_evaluations();
        MemoryPlan::new()
            .part(
                "the truth run, flat and per step (2 (window + 1) n numbers)",
                flat.saturating_add(rows),
                "lower window or n",
            )
            .part(
                format!("the {n_obs} observations"),
                n_obs
                    .saturating_mul(32 + 24)
                    .saturating_add(steps.saturating_mul(VEC_HEADER)),
                "raise obs_every or obs_stride, or lower window",
            )
            .part(
                "the background-error covariance in FFT form (about 16 n numbers)",
                n.saturating_mul(16 * 8),
                "lower n",
            )
            .part(
                format!(
                    "the work buffers of {threads} evaluations running at once ((window + 1) n + \
                     13 n numbers each)"
                ),
                flat.saturating_add(n.saturating_mul(13 * 8))
                    .saturating_mul(threads),
                "lower window or n",
            )
    }

    /// The first column of B: σ_b² times the SOAR correlation (1 + d/L) e^{−d/L}, L = corr_len,
    /// periodised over the images of the domain so that B is positive definite on every grid.
    pub fn background_column(&self) -> Vec<f64> {
        let var = self.sigma_b * self.sigma_b;
        periodised_column(self.n, 1.0 / self.n as f64, |d| {
            var * soar(d / self.corr_len)
        })
    }

    /// Checks dt against RK4 stability at speeds up to `speed` (see the module docs).
    fn check_time_step(&self, speed: f64) -> Result<()> {
        let model = self.model();
        if model.is_stable(speed) {
            return Ok(());
        }
        let dx = model.dx();
        let max_dt = model.max_stable_dt(speed);
        // A round suggestion at 90% of the limit: 1, 2 or 5 times a power of ten.
        let target = 0.9 * max_dt;
        let p = 10f64.powf(target.log10().floor());
        let suggest = [5.0, 2.0, 1.0]
            .iter()
            .map(|m| m * p)
            .find(|v| *v <= target)
            .unwrap_or(p);
        Err(Error::Config(format!(
            "setting dt={}: the RK4 step is unstable on this grid (n = {}, dx = {dx:.3e}, nu = {}, \
             speeds up to {speed:.3} = the largest |u| of background and truth + 3 sigma_b). The \
             diffusion limit is dt <= 2.785 dx^2 / (4 nu) = {:.3e}, the advective (CFL) limit \
             dt <= 2.83 dx / |u| = {:.3e}, and together they allow dt up to about {max_dt:.3e}. \
             Use a smaller step (e.g. --set dt={suggest:e}, with a longer window for the same time \
             span), fewer grid points, or a larger nu",
            self.dt,
            self.n,
            self.nu,
            2.785 * dx * dx / (4.0 * self.nu),
            2.83 * dx / speed,
        )))
    }
}

/// Work buffers of one evaluation, pooled between evaluations.
struct Work {
    traj: Vec<f64>,
    dxb: Vec<f64>,
    binv: Vec<f64>,
    lam: Vec<f64>,
    lam_prev: Vec<f64>,
    step: StepWork,
}

impl Work {
    fn new(n: usize, window: usize) -> Self {
        Work {
            traj: vec![0.0; (window + 1) * n],
            dxb: vec![0.0; n],
            binv: vec![0.0; n],
            lam: vec![0.0; n],
            lam_prev: vec![0.0; n],
            step: StepWork::new(n),
        }
    }
}

/// The Burgers 4D-Var cost function with its synthetic scenario.
pub struct Burgers {
    config: BurgersConfig,
    model: BurgersModel,
    prior: CirculantPrior,
    truth: Vec<f64>,
    observations: Vec<Observation>,
    /// Observations grouped by step: obs_at[k] lists (point, value, 1/σ²).
    obs_at: Vec<Vec<(usize, f64, f64)>>,
    pool: Mutex<Vec<Work>>,
}

impl Burgers {
    /// Generates the scenario of the settings (see [`SynthMode`]) and builds its cost function. Fails
    /// with a clear message when B is not positive definite or the time step is unstable.
    pub fn new(config: BurgersConfig) -> Result<Self> {
        config.validate()?;
        let model = config.model();
        let n = config.n;
        let unit = CirculantPrior::new(vec![0.0; n], &config.background_column()).map_err(|e| {
            Error::Config(format!(
                "settings corr_len={} with n={}: {e}",
                config.corr_len, config.n
            ))
        })?;
        let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
        let phases: Vec<f64> = (0..TRUTH_AMPLITUDES.len())
            .map(|_| rng.random_range(0.0..2.0 * PI))
            .collect();
        let demo_truth: Vec<f64> = model
            .grid()
            .iter()
            .map(|x| {
                TRUTH_AMPLITUDES
                    .iter()
                    .zip(&phases)
                    .enumerate()
                    .map(|(m, (a, p))| a * (2.0 * PI * (m + 1) as f64 * x + p).sin())
                    .sum()
            })
            .collect();
        let draw = |rng: &mut ChaCha8Rng| {
            let z = normal_draws(rng, n);
            let mut e = vec![0.0; n];
            unit.mul_sqrt(&z, &mut e);
            e
        };
        let eb = draw(&mut rng);
        let background: Vec<f64> = demo_truth.iter().zip(&eb).map(|(t, e)| t + e).collect();
        let truth = match config.synth {
            SynthMode::Demo => demo_truth,
            SynthMode::Calibration => {
                let et = draw(&mut rng);
                background.iter().zip(&et).map(|(b, e)| b + e).collect()
            }
        };
        let speed = background
            .iter()
            .chain(&truth)
            .fold(0.0f64, |m, v| m.max(v.abs()))
            + 3.0 * config.sigma_b;
        config.check_time_step(speed)?;

        let traj = model.run(&truth, config.window);
        let mut observations = Vec::new();
        let mut obs_at = vec![Vec::new(); config.window + 1];
        for step in (config.obs_every..=config.window).step_by(config.obs_every) {
            for site in (0..n).step_by(config.obs_stride) {
                let z: f64 = StandardNormal.sample(&mut rng);
                let o = Observation {
                    step,
                    site,
                    value: traj[step][site] + config.sigma_o * z,
                    sigma: config.sigma_o,
                };
                obs_at[step].push((site, o.value, 1.0 / (o.sigma * o.sigma)));
                observations.push(o);
            }
        }
        if let Some(o) = observations.iter().find(|o| !o.value.is_finite()) {
            return Err(Error::Numerical(format!(
                "the truth run blew up before step {} although dt passed the stability check; \
                 use a smaller dt",
                o.step
            )));
        }
        Ok(Burgers {
            prior: unit.with_mean(background)?,
            config,
            model,
            truth,
            observations,
            obs_at,
            pool: Mutex::new(Vec::new()),
        })
    }

    /// The settings.
    pub fn config(&self) -> &BurgersConfig {
        &self.config
    }

    /// The model.
    pub fn model(&self) -> BurgersModel {
        self.model
    }

    /// The true state at the start of the window.
    pub fn truth(&self) -> &[f64] {
        &self.truth
    }

    /// The background u_b.
    pub fn background(&self) -> &[f64] {
        self.prior.mean()
    }

    /// The observations.
    pub fn observations(&self) -> &[Observation] {
        &self.observations
    }

    /// The background prior N(u_b, B) with its FFT operations.
    pub fn circulant_prior(&self) -> &CirculantPrior {
        &self.prior
    }

    /// One line saying what the problem is.
    pub fn describe(&self) -> String {
        let c = &self.config;
        format!(
            "viscous Burgers, n = {}, nu = {}, dt = {}, window {} steps (t = {}), {} observations, \
             SOAR background error (sigma_b = {}, length {}), synth {}",
            c.n,
            c.nu,
            c.dt,
            c.window,
            c.window as f64 * c.dt,
            self.observations.len(),
            c.sigma_b,
            c.corr_len,
            match c.synth {
                SynthMode::Demo => "demo",
                SynthMode::Calibration => "calibration",
            }
        )
    }

    fn take_work(&self) -> Work {
        let popped = match self.pool.lock() {
            Ok(mut p) => p.pop(),
            Err(poisoned) => poisoned.into_inner().pop(),
        };
        popped.unwrap_or_else(|| Work::new(self.config.n, self.config.window))
    }

    fn put_work(&self, w: Work) {
        match self.pool.lock() {
            Ok(mut p) => p.push(w),
            Err(poisoned) => poisoned.into_inner().push(w),
        }
    }

    fn evaluate(
        &self,
        x: &[f64],
        grad: Option<&mut [f64]>,
    ) -> std::result::Result<CostSplit, EvalError> {
        let n = self.config.n;
        check_len("the control vector", x, n)?;
        if let Some(g) = &grad {
            check_len("the gradient buffer", g, n)?;
        }
        let mut w = self.take_work();
        let r = self.evaluate_with(&mut w, x, grad);
        self.put_work(w);
        r
    }

    fn evaluate_with(
        &self,
        w: &mut Work,
        x: &[f64],
        grad: Option<&mut [f64]>,
    ) -> std::result::Result<CostSplit, EvalError> {
        let n = self.config.n;
        let window = self.config.window;
        for ((d, xi), b) in w.dxb.iter_mut().zip(x).zip(self.prior.mean()) {
            *d = xi - b;
        }
        self.prior.solve(&w.dxb, &mut w.binv);
        let jb = 0.5 * w.dxb.iter().zip(&w.binv).map(|(a, b)| a * b).sum::<f64>();
        self.model.run_into(x, window, &mut w.traj, &mut w.step);
        let mut jo = 0.0;
        for (k, obs) in self.obs_at.iter().enumerate() {
            let u = &w.traj[k * n..(k + 1) * n];
            for &(site, y, wt) in obs {
                let d = y - u[site];
                jo += 0.5 * wt * d * d;
            }
        }
        if !jo.is_finite() {
            return Err(EvalError::NonFinite {
                what: "observation cost (the Burgers run from this state blew up)".into(),
            });
        }
        if let Some(g) = grad {
            // λ_k = ∂J_o/∂u_k summed back through the steps: λ_k = M_kᵀ λ_{k+1} + ∂J_o/∂u_k|direct.
            w.lam.fill(0.0);
            for k in (0..=window).rev() {
                if k < window {
                    let u = &w.traj[k * n..(k + 1) * n];
                    self.model
                        .step_adj_into(u, &w.lam, &mut w.lam_prev, &mut w.step);
                    std::mem::swap(&mut w.lam, &mut w.lam_prev);
                }
                let u = &w.traj[k * n..(k + 1) * n];
                for &(site, y, wt) in &self.obs_at[k] {
                    w.lam[site] -= wt * (y - u[site]);
                }
            }
            for ((gi, b), l) in g.iter_mut().zip(&w.binv).zip(&w.lam) {
                *gi = b + l;
            }
        }
        Ok(CostSplit {
            background: jb,
            observation: jo,
        })
    }
}

impl Problem for Burgers {
    fn dim(&self) -> usize {
        self.config.n
    }
    fn component_names(&self) -> Option<Vec<String>> {
        Some((0..self.config.n).map(|j| format!("u{j}")).collect())
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let s = self.evaluate(x, Some(grad))?;
        Ok(s.background + s.observation)
    }
    fn cost(&self, x: &[f64]) -> std::result::Result<f64, EvalError> {
        let s = self.evaluate(x, None)?;
        Ok(s.background + s.observation)
    }
    fn cost_split(&self, x: &[f64]) -> std::result::Result<Option<CostSplit>, EvalError> {
        Ok(Some(self.evaluate(x, None)?))
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<std::result::Result<f64, EvalError>> {
        parallel_costs(self, xs)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        Some(&self.prior)
    }
}
