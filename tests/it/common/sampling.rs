//! Test problems with known posteriors and the statistics the sampler tests check with.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use nalgebra::{DMatrix, DVector};
use varpost::error::EvalError;
use varpost::precond::{DensePrecond, Preconditioner};
use varpost::problem::Problem;

/// J(x) = ½ (x − m)ᵀ A (x − m): the posterior is exactly N(m, A⁻¹).
///
/// Options: `upper_x0` makes the cost non-finite where x0 > upper_x0 (recoverable), so the posterior is
/// the Gaussian truncated there; `fatal_after` makes every evaluation after that many fail
/// non-recoverably; `sleep_us` slows each evaluation down.
pub struct Gaussian {
    pub mean: Vec<f64>,
    pub a: DMatrix<f64>,
    pub upper_x0: Option<f64>,
    pub fatal_after: Option<u64>,
    pub sleep_us: u64,
    calls: AtomicU64,
}

impl Gaussian {
    pub fn new(mean: Vec<f64>, a: DMatrix<f64>) -> Self {
        Gaussian {
            mean,
            a,
            upper_x0: None,
            fatal_after: None,
            sleep_us: 0,
            calls: AtomicU64::new(0),
        }
    }

    /// A fixed correlated example in dimension n: A = M Mᵀ + I with M_ij = sin(i + 2j + 1) / 2.
    pub fn correlated(n: usize) -> Self {
        let m = DMatrix::from_fn(n, n, |i, j| ((i + 2 * j + 1) as f64).sin() / 2.0);
        let a = &m * m.transpose() + DMatrix::identity(n, n);
        let mean = (0..n).map(|i| 1.0 + 0.5 * i as f64).collect();
        Gaussian::new(mean, a)
    }

    /// The exact covariance A⁻¹.
    pub fn cov(&self) -> DMatrix<f64> {
        self.a.clone().try_inverse().unwrap()
    }

    /// A preconditioner from the Hessian `h`.
    pub fn precond(h: &DMatrix<f64>) -> Arc<dyn Preconditioner> {
        Arc::new(DensePrecond::from_hessian(h).unwrap())
    }

    /// The diagonal of A as a Hessian (ignores the correlations).
    pub fn diag_hessian(&self) -> DMatrix<f64> {
        DMatrix::from_diagonal(&self.a.diagonal())
    }
}

impl Problem for Gaussian {
    fn dim(&self) -> usize {
        self.mean.len()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        let k = self.calls.fetch_add(1, Ordering::Relaxed);
        if self.sleep_us > 0 {
            std::thread::sleep(std::time::Duration::from_micros(self.sleep_us));
        }
        if let Some(limit) = self.fatal_after {
            if k >= limit {
                return Err(EvalError::Failed {
                    message: "model process died".into(),
                    recoverable: false,
                });
            }
        }
        if let Some(c) = self.upper_x0 {
            if x[0] > c {
                return Ok(f64::NAN);
            }
        }
        let d = DVector::from_iterator(x.len(), x.iter().zip(&self.mean).map(|(a, b)| a - b));
        let g = &self.a * &d;
        grad.copy_from_slice(g.as_slice());
        Ok(0.5 * d.dot(&g))
    }
}

/// The twisted Gaussian ("banana") of Haario, Saksman & Tamminen 1999 ("Adaptive proposal distribution
/// for random walk Metropolis algorithm", Computational Statistics 14) in two dimensions: the density of
/// N(0, diag(100, 1)) composed with φ_b(y) = (y1, y2 + b y1² − 100 b), whose Jacobian is 1:
/// J(y) = y1²/200 + ½ (y2 + b y1² − 100 b)².
///
/// Moments, derived here: y1 ~ N(0, 100) and y2 = z − b (y1² − 100) with z ~ N(0, 1) independent, so
/// E y1 = 0, Var y1 = 100, E y2 = 0, Var y2 = 1 + b² Var(y1²) = 1 + 2·10⁴ b² (Var(y1²) = 2σ⁴ for a
/// centred normal, textbook). The MAP is (0, 100 b), where the Hessian is diag(1/100, 1).
pub struct Banana {
    pub b: f64,
}

impl Banana {
    pub fn mean(&self) -> [f64; 2] {
        [0.0, 0.0]
    }
    pub fn variance(&self) -> [f64; 2] {
        [100.0, 1.0 + 2.0e4 * self.b * self.b]
    }
    pub fn map(&self) -> Vec<f64> {
        vec![0.0, 100.0 * self.b]
    }
    pub fn hessian_at_map(&self) -> DMatrix<f64> {
        DMatrix::from_diagonal(&DVector::from_vec(vec![0.01, 1.0]))
    }
}

impl Problem for Banana {
    fn dim(&self) -> usize {
        2
    }
    fn cost_grad(&self, y: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        let r = y[1] + self.b * y[0] * y[0] - 100.0 * self.b;
        grad[0] = y[0] / 100.0 + r * 2.0 * self.b * y[0];
        grad[1] = r;
        Ok(y[0] * y[0] / 200.0 + 0.5 * r * r)
    }
}

/// Mean of a slice.
pub fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

/// Unbiased variance of a slice.
pub fn var(v: &[f64]) -> f64 {
    let m = mean(v);
    v.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (v.len() - 1) as f64
}

/// Monte Carlo standard error of the mean of `chains` (one series per chain, equal lengths) by
/// non-overlapping batch means, `batches` per chain: MCSE² = Var(batch means) / (number of batches).
/// (Batch means: Flegal, Haran & Jones 2008, "Markov chain Monte Carlo: can we trust the third
/// significant figure?", Statistical Science 23(2).)
pub fn mcse_batch_means(chains: &[Vec<f64>], batches: usize) -> f64 {
    let mut bm = Vec::new();
    for c in chains {
        let size = c.len() / batches;
        for k in 0..batches {
            bm.push(mean(&c[k * size..(k + 1) * size]));
        }
    }
    (var(&bm) / bm.len() as f64).sqrt()
}

/// The integrated autocorrelation time estimated by batch means: batch size × Var(batch means) /
/// Var(draws) (same source).
pub fn tau_batch_means(chains: &[Vec<f64>], batches: usize) -> f64 {
    let all: Vec<f64> = chains.iter().flatten().copied().collect();
    let size = chains[0].len() / batches;
    let m = mcse_batch_means(chains, batches);
    let nb = (chains.len() * batches) as f64;
    (m * m * nb * size as f64 / var(&all)).max(1.0)
}

/// Standard normal distribution function Φ(x) = erfc(−x/√2)/2, with erfc from libm (a port of the
/// fdlibm/musl implementation, Sun Microsystems 1993).
pub fn normal_cdf(x: f64) -> f64 {
    0.5 * libm::erfc(-x / std::f64::consts::SQRT_2)
}

/// Kolmogorov–Smirnov statistic D_n = sup |F_n − Φ| of a sample against the standard normal.
pub fn ks_normal(sample: &[f64]) -> f64 {
    let mut s = sample.to_vec();
    s.sort_by(|a, b| a.partial_cmp(b).unwrap());
    let n = s.len() as f64;
    s.iter()
        .enumerate()
        .map(|(i, &x)| {
            let f = normal_cdf(x);
            (f - i as f64 / n).abs().max(((i + 1) as f64 / n - f).abs())
        })
        .fold(0.0, f64::max)
}

/// The asymptotic 1% critical value of √n D_n: K⁻¹(0.99) = 1.6276 for the Kolmogorov distribution
/// (Smirnov 1948, "Table for estimating the goodness of fit of empirical distributions", Ann. Math.
/// Statist. 19; checked with scipy.special.kolmogi(0.01) = 1.6276236).
pub const KS_CRIT_1PCT: f64 = 1.6276;

/// Every `k`-th element of each chain, pooled.
pub fn thin_pool(chains: &[Vec<f64>], k: usize) -> Vec<f64> {
    chains
        .iter()
        .flat_map(|c| c.iter().step_by(k).copied())
        .collect()
}
