//! A linear-Gaussian 4D-Var problem whose posterior is known in closed form.
//!
//! J(x) = ½ (x − xb)ᵀ B⁻¹ (x − xb) + ½ (y − G x)ᵀ R⁻¹ (y − G x), with G = A C the linear forward map
//! (model then observation operator) of rank r, A (m × r), C (r × n), B = diag(b) and R = diag(ρ). The
//! posterior is exactly N(μ, Σ) with Σ = (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ and μ = xb + Σ Gᵀ R⁻¹ (y − G xb).
//!
//! The closed form is computed through the rank-r structure without forming an n × n matrix: with
//! W = Aᵀ R⁻¹ A (r × r) and K = C B Cᵀ (r × r), the Woodbury identity gives
//! Σ = B − B Cᵀ W (I + K W)⁻¹ C B, so diag(Σ) and products with Σ cost O(n r²).

use nalgebra::{DMatrix, DVector};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::batch::parallel_costs;
use super::memory::{concurrent_evaluations, MemoryPlan};
use super::prior::{DiagonalPrior, Prior};
use super::settings::{in_range, scale, Settings};
use super::{check_len, CostSplit, Problem};
use crate::error::{Error, EvalError, Result};

/// Settings of the linear-Gaussian problem.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct LinearGaussianConfig {
    /// Dimension of the control vector.
    pub n: usize,
    /// Number of observations.
    pub m: usize,
    /// Rank of the forward map G (at most min(m, n)).
    pub rank: usize,
    /// Condition number of B (background-error variances log-spaced from 1 down to 1/b_cond).
    pub b_cond: f64,
    /// Condition number of R (observation-error variances log-spaced from sigma_o² up to b_cond·sigma_o²).
    pub r_cond: f64,
    /// Smallest observation-error standard deviation.
    pub sigma_o: f64,
    /// "demo" (a smooth truth, background = truth + background error) or "calibration" (xb = 0, truth
    /// drawn from N(xb, B)).
    pub synth: String,
    /// Seed of G, the truth and the errors.
    pub seed: u64,
}

impl Default for LinearGaussianConfig {
    fn default() -> Self {
        LinearGaussianConfig {
            n: 20,
            m: 10,
            rank: 10,
            b_cond: 100.0,
            r_cond: 10.0,
            sigma_o: 0.3,
            synth: "demo".into(),
            seed: 7,
        }
    }
}

impl LinearGaussianConfig {
    /// Reads the settings a user gave (`--set key=value`) over the defaults.
    pub fn from_settings(s: &Settings) -> Result<Self> {
        let d = LinearGaussianConfig::default();
        let n = s.get("n", d.n)?;
        let m = s.get("m", if s.contains("n") { (n / 2).max(1) } else { d.m })?;
        let c = LinearGaussianConfig {
            n,
            m,
            rank: s.get("rank", m.min(n))?,
            b_cond: s.get("b_cond", d.b_cond)?,
            r_cond: s.get("r_cond", d.r_cond)?,
            sigma_o: s.get("sigma_o", d.sigma_o)?,
            synth: s.get_str("synth").unwrap_or(d.synth),
            seed: s.get("seed", d.seed)?,
        };
        c.validate()?;
        Ok(c)
    }

    /// Checks every setting's range, then that a problem of this size fits in this machine's memory
    /// (see [`LinearGaussianConfig::memory_plan`]).
    pub fn validate(&self) -> Result<()> {
        for (key, v) in [("n", self.n), ("m", self.m)] {
            if v == 0 {
                return Err(Error::Config(format!(
                    "setting {key}=0: it must be at least 1"
                )));
            }
        }
        if self.rank == 0 || self.rank > self.m.min(self.n) {
            return Err(Error::Config(format!(
                "setting rank={}: it must be between 1 and min(m, n) = {}",
                self.rank,
                self.m.min(self.n)
            )));
        }
        for (key, v) in [("b_cond", self.b_cond), ("r_cond", self.r_cond)] {
            in_range(
                key,
                v,
                1.0,
                MAX_CONDITION,
                "a condition number; beyond 1e12 double precision keeps fewer than 4 significant \
                 digits of the closed-form reference",
            )?;
        }
        scale("sigma_o", self.sigma_o)?;
        // The largest observation-error variance is sigma_o² r_cond.
        scale("sigma_o", self.sigma_o * self.r_cond.sqrt())
            .map_err(|_| Error::Config(format!(
                "settings sigma_o={} and r_cond={}: the largest observation-error standard deviation \
                 sigma_o sqrt(r_cond) must stay below 1e150; lower one of them",
                self.sigma_o, self.r_cond
            )))?;
        if self.synth != "demo" && self.synth != "calibration" {
            return Err(Error::Config(format!(
                "setting synth={}: use 'demo' or 'calibration'",
                self.synth
            )));
        }
        self.memory_plan().check(&format!(
            "linear-gaussian with n = {}, m = {} and rank = {}",
            self.n, self.m, self.rank
        ))
    }

    /// The memory a problem of these settings holds at its peak: the factors A (m × rank) and C
    /// (rank × n) of the forward map, R⁻¹A and the rank × n products formed for the closed form, the
    /// vectors of observations and state, and the work of each evaluation running at once.
    pub fn memory_plan(&self) -> MemoryPlan {
        let (n, m, r) = (self.n as u128, self.m as u128, self.rank as u128);
        let f64s = |count: u128| count.saturating_mul(8);
        let threads = concurrent_evaluations();
        MemoryPlan::new()
            .part(
                "the forward map's factor A and R^-1 A formed for the closed form (2 m rank numbers)",
                f64s(m.saturating_mul(r).saturating_mul(2)),
                "lower m or rank",
            )
            .part(
                "the forward map's factor C and two rank x n products of the closed form \
                 (3 rank n numbers)",
                f64s(r.saturating_mul(n).saturating_mul(3)),
                "lower n or rank",
            )
            .part(
                "the observation and state vectors (6 m + 8 n numbers)",
                f64s(m.saturating_mul(6).saturating_add(n.saturating_mul(8))),
                "lower m or n",
            )
            .part(
                format!(
                    "the work of {threads} evaluations running at once \
                     (2 m + 2 rank + 2 n numbers each)"
                ),
                f64s((m + r + n).saturating_mul(2).saturating_mul(threads)),
                "lower m or n",
            )
    }
}

/// Largest accepted condition number of B or R.
pub const MAX_CONDITION: f64 = 1e12;

/// The closed-form posterior of the linear-Gaussian problem.
#[derive(Debug, Clone, serde::Serialize)]
pub struct GaussianReference {
    /// Posterior mean μ (equal to the MAP).
    pub mean: Vec<f64>,
    /// Posterior variances diag(Σ).
    pub variance: Vec<f64>,
}

/// The linear-Gaussian problem.
pub struct LinearGaussian {
    config: LinearGaussianConfig,
    prior: DiagonalPrior,
    a: DMatrix<f64>,
    c: DMatrix<f64>,
    y: Vec<f64>,
    r_inv: Vec<f64>,
    truth: Vec<f64>,
}

fn log_spaced(n: usize, lo: f64, hi: f64) -> Vec<f64> {
    if n == 1 {
        return vec![hi];
    }
    (0..n)
        .map(|i| (hi.ln() + (lo.ln() - hi.ln()) * i as f64 / (n - 1) as f64).exp())
        .collect()
}

impl LinearGaussian {
    /// Builds the problem from its settings and seed.
    pub fn new(config: LinearGaussianConfig) -> Result<Self> {
        config.validate()?;
        let (n, m, r) = (config.n, config.m, config.rank);
        let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
        let mut normal = || -> f64 { StandardNormal.sample(&mut rng) };
        let a = DMatrix::from_fn(m, r, |_, _| normal() / (r as f64).sqrt());
        let c = DMatrix::from_fn(r, n, |_, _| normal());
        let b_std: Vec<f64> = log_spaced(n, 1.0 / config.b_cond, 1.0)
            .iter()
            .map(|v| v.sqrt())
            .collect();
        let r_std: Vec<f64> = log_spaced(m, 1.0, config.r_cond)
            .iter()
            .rev()
            .map(|v| config.sigma_o * v.sqrt())
            .collect();
        let eb: Vec<f64> = (0..n).map(|i| b_std[i] * normal()).collect();
        let (xb, truth): (Vec<f64>, Vec<f64>) = if config.synth == "demo" {
            let truth: Vec<f64> = (0..n)
                .map(|i| b_std[i] * (2.0 * std::f64::consts::PI * i as f64 / n as f64).sin())
                .collect();
            ((0..n).map(|i| truth[i] + eb[i]).collect(), truth)
        } else {
            (vec![0.0; n], eb)
        };
        let gt = &a * (&c * DVector::from_column_slice(&truth));
        let y: Vec<f64> = (0..m).map(|j| gt[j] + r_std[j] * normal()).collect();
        let r_inv = r_std.iter().map(|s| 1.0 / (s * s)).collect();
        let prior = DiagonalPrior::new(xb, b_std)?;
        Ok(LinearGaussian {
            config,
            prior,
            a,
            c,
            y,
            r_inv,
            truth,
        })
    }

    /// The settings it was built from.
    pub fn config(&self) -> &LinearGaussianConfig {
        &self.config
    }

    /// The truth the observations were made from.
    pub fn truth(&self) -> &[f64] {
        &self.truth
    }

    /// The problem's matrices and data, for checking the closed form against an outside reference:
    /// `a` (m × r, row-major), `c` (r × n, row-major), `b` = diag(B), `r` = diag(R), `y`, `xb`.
    pub fn export(&self) -> serde_json::Value {
        let rows = |m: &DMatrix<f64>| -> Vec<Vec<f64>> {
            (0..m.nrows())
                .map(|i| m.row(i).iter().copied().collect())
                .collect()
        };
        serde_json::json!({
            "n": self.config.n,
            "m": self.config.m,
            "rank": self.config.rank,
            "a": rows(&self.a),
            "c": rows(&self.c),
            "b": self.prior.variance(),
            "r": self.r_inv.iter().map(|v| 1.0 / v).collect::<Vec<_>>(),
            "y": self.y,
            "xb": self.prior.mean(),
        })
    }

    fn forward(&self, x: &[f64]) -> DVector<f64> {
        &self.a * (&self.c * DVector::from_column_slice(x))
    }

    /// Gᵀ v for v of length m.
    fn adjoint(&self, v: &DVector<f64>) -> DVector<f64> {
        self.c.tr_mul(&self.a.tr_mul(v))
    }

    fn split(&self, x: &[f64]) -> std::result::Result<(CostSplit, DVector<f64>), EvalError> {
        check_len("the control vector", x, self.config.n)?;
        let b = self.prior.variance();
        let xb = self.prior.mean();
        let jb = 0.5
            * (0..x.len())
                .map(|i| (x[i] - xb[i]).powi(2) / b[i])
                .sum::<f64>();
        let gx = self.forward(x);
        let wd = DVector::from_fn(self.y.len(), |j, _| (self.y[j] - gx[j]) * self.r_inv[j]);
        let jo = 0.5
            * (0..self.y.len())
                .map(|j| (self.y[j] - gx[j]) * wd[j])
                .sum::<f64>();
        Ok((
            CostSplit {
                background: jb,
                observation: jo,
            },
            wd,
        ))
    }

    /// The closed-form posterior mean and variances, through the rank-r Woodbury form.
    pub fn reference(&self) -> Result<GaussianReference> {
        let b = DVector::from_vec(self.prior.variance());
        let r = self.config.rank;
        let rinv = DVector::from_column_slice(&self.r_inv);
        // W = Aᵀ R⁻¹ A, K = C B Cᵀ, E = C B (r × n).
        let w = self.a.tr_mul(&DMatrix::from_fn(self.a.nrows(), r, |i, j| {
            rinv[i] * self.a[(i, j)]
        }));
        let e = DMatrix::from_fn(r, b.len(), |i, j| self.c[(i, j)] * b[j]);
        let k = &e * self.c.transpose();
        let m = DMatrix::<f64>::identity(r, r) + &k * &w;
        let lu = m.lu();
        // Σ = B − Eᵀ W (I + K W)⁻¹ E; with T = W (I + K W)⁻¹ (r × r):
        let minv = lu.try_inverse().ok_or_else(|| {
            Error::Numerical("I + K W is singular in the closed-form posterior".into())
        })?;
        let t = &w * minv;
        let te = &t * &e;
        let variance: Vec<f64> = (0..b.len())
            .map(|i| b[i] - e.column(i).dot(&te.column(i)))
            .collect();
        // μ = xb + Σ Gᵀ R⁻¹ (y − G xb).
        let xb = self.prior.mean();
        let gxb = self.forward(xb);
        let innov = DVector::from_fn(self.y.len(), |j, _| (self.y[j] - gxb[j]) * rinv[j]);
        let v = self.adjoint(&innov);
        let bv = b.component_mul(&v);
        let corr = e.tr_mul(&(&t * (&e * &v)));
        let mean = (0..b.len()).map(|i| xb[i] + bv[i] - corr[i]).collect();
        Ok(GaussianReference { mean, variance })
    }
}

impl Problem for LinearGaussian {
    fn dim(&self) -> usize {
        self.config.n
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        check_len("the gradient buffer", grad, self.config.n)?;
        let (s, wd) = self.split(x)?;
        let b = self.prior.variance();
        let xb = self.prior.mean();
        let gtw = self.adjoint(&wd);
        for i in 0..x.len() {
            grad[i] = (x[i] - xb[i]) / b[i] - gtw[i];
        }
        Ok(s.background + s.observation)
    }
    fn cost(&self, x: &[f64]) -> std::result::Result<f64, EvalError> {
        let (s, _) = self.split(x)?;
        Ok(s.background + s.observation)
    }
    fn has_hess_vec(&self) -> bool {
        true
    }
    fn hess_vec(
        &self,
        _x: &[f64],
        v: &[f64],
        out: &mut [f64],
    ) -> std::result::Result<(), EvalError> {
        check_len("the direction", v, self.config.n)?;
        check_len("the product buffer", out, self.config.n)?;
        let b = self.prior.std();
        let gv = self.forward(v);
        let w = DVector::from_fn(gv.len(), |j, _| gv[j] * self.r_inv[j]);
        let gtw = self.adjoint(&w);
        for i in 0..v.len() {
            out[i] = v[i] / (b[i] * b[i]) + gtw[i];
        }
        Ok(())
    }
    fn cost_split(&self, x: &[f64]) -> std::result::Result<Option<CostSplit>, EvalError> {
        Ok(Some(self.split(x)?.0))
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<std::result::Result<f64, EvalError>> {
        parallel_costs(self, xs)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        Some(&self.prior)
    }
}
