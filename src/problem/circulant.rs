//! A background-error covariance that is circulant (stationary on a periodic grid), applied through the
//! FFT, so that B is never formed: O(n log n) work and O(n) memory per product.
//!
//! A symmetric circulant matrix B with first column c (c_j = c_{n−j}) is diagonalised by the discrete
//! Fourier transform, B = F⁻¹ diag(λ) F, with eigenvalues λ = F c, real because c is symmetric (Gray 2006,
//! "Toeplitz and circulant matrices: a review", Found. Trends Commun. Inf. Theory 2(3); from memory). So
//! the symmetric square root S = F⁻¹ diag(√λ) F is itself real, symmetric and circulant: Sᵀ = S, B = S Sᵀ,
//! solving with S divides by √λ, diag(B) = c₀ everywhere, and log det B = Σ_k ln λ_k.

use std::sync::Arc;

use rustfft::num_complex::Complex;
use rustfft::{Fft, FftPlanner};

use super::prior::Prior;
use crate::error::{Error, Result};

/// Smallest accepted ratio of the smallest to the largest eigenvalue of B: below it B is singular to
/// working precision (the FFT computes the eigenvalues to about 10⁻¹⁵ of the largest).
pub const MIN_EIGEN_RATIO: f64 = 1e-14;

/// The second-order auto-regressive (SOAR) correlation (1 + r) e^{−r} at distance r in length scales.
pub fn soar(r: f64) -> f64 {
    (1.0 + r) * (-r).exp()
}

/// The first column of a covariance on a periodic grid of n points spaced dx apart, sampled from
/// cov(d) at the distance d_j = min(j, n − j) dx along the circle.
///
/// Beware: for most correlation functions this is not positive definite (SOAR, say, has a kink at the
/// antipode that gives negative eigenvalues on fine grids); [`periodised_column`] is.
pub fn periodic_column(n: usize, dx: f64, cov: impl Fn(f64) -> f64) -> Vec<f64> {
    (0..n).map(|j| cov(j.min(n - j) as f64 * dx)).collect()
}

/// The first column of the periodised covariance on a grid of n points spaced dx apart (period P = n dx):
/// c_j = Σ_m cov(|j dx + m P|) over the images m ∈ ℤ, rescaled so that c₀ = cov(0).
///
/// `cov` must be a positive definite function on the line that decreases with distance. By the Poisson
/// summation formula the periodised function's Fourier coefficients are samples of the positive Fourier
/// transform of `cov`, so every eigenvalue of the circulant matrix is positive (textbook; e.g. Gneiting
/// 2013, "Strictly and non-strictly positive definite functions on spheres", Bernoulli 19(4), from
/// memory). Images are summed until a whole image contributes less than 10⁻¹⁷ cov(0).
pub fn periodised_column(n: usize, dx: f64, cov: impl Fn(f64) -> f64) -> Vec<f64> {
    let period = n as f64 * dx;
    let c0 = cov(0.0);
    let mut col: Vec<f64> = (0..n)
        .map(|j| {
            let d = j as f64 * dx;
            let mut sum = cov(d) + cov(period - d);
            for m in 1.. {
                let near = cov(m as f64 * period + d.min(period - d));
                if near.abs() < 1e-17 * c0.abs() || m > 1_000_000 {
                    break;
                }
                sum += cov(m as f64 * period + d) + cov((m + 1) as f64 * period - d);
            }
            sum
        })
        .collect();
    let scale = c0 / col[0];
    col.iter_mut().for_each(|c| *c *= scale);
    col
}

/// N(xb, B) with B a symmetric positive definite circulant matrix, applied through the FFT.
#[derive(Clone)]
pub struct CirculantPrior {
    mean: Vec<f64>,
    /// c₀, every diagonal entry of B.
    variance: f64,
    /// λ_k, the eigenvalues of B (the DFT of its first column).
    eigenvalues: Vec<f64>,
    /// √λ_k / n: the eigenvalues of S with the inverse transform's 1/n folded in.
    sqrt_scaled: Vec<f64>,
    /// 1 / (√λ_k n).
    inv_sqrt_scaled: Vec<f64>,
    forward: Arc<dyn Fft<f64>>,
    inverse: Arc<dyn Fft<f64>>,
    scratch_len: usize,
}

impl std::fmt::Debug for CirculantPrior {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CirculantPrior")
            .field("dim", &self.mean.len())
            .field("variance", &self.variance)
            .finish_non_exhaustive()
    }
}

impl CirculantPrior {
    /// The prior N(mean, B) where B is the symmetric circulant matrix with first column `column`.
    ///
    /// Fails with a clear message when the column is not symmetric (c_j ≠ c_{n−j}), not finite, or
    /// when B is not positive definite (an eigenvalue at or below [`MIN_EIGEN_RATIO`] times the largest).
    pub fn new(mean: Vec<f64>, column: &[f64]) -> Result<Self> {
        let n = mean.len();
        if column.len() != n {
            return Err(Error::Config(format!(
                "the covariance column has {} entries but the background has {n} components",
                column.len()
            )));
        }
        if n == 0 {
            return Err(Error::Config(
                "a circulant covariance needs at least one grid point".into(),
            ));
        }
        if let Some(j) = column.iter().position(|c| !c.is_finite()) {
            return Err(Error::Config(format!(
                "covariance entry {j} is {}, it must be finite",
                column[j]
            )));
        }
        let c0 = column[0];
        if !(c0 > 0.0) {
            return Err(Error::Config(format!(
                "the background-error variance (covariance entry 0) is {c0}, it must be positive"
            )));
        }
        if let Some(j) = (1..n).find(|&j| (column[j] - column[n - j]).abs() > 1e-12 * c0) {
            return Err(Error::Config(format!(
                "the covariance column is not symmetric: entry {j} is {} but entry {} is {}; a \
                 stationary covariance on a periodic grid depends on the distance only",
                column[j],
                n - j,
                column[n - j]
            )));
        }
        let mut planner = FftPlanner::new();
        let forward = planner.plan_fft_forward(n);
        let inverse = planner.plan_fft_inverse(n);
        let scratch_len = forward
            .get_inplace_scratch_len()
            .max(inverse.get_inplace_scratch_len());
        let mut buf: Vec<Complex<f64>> = column.iter().map(|&c| Complex::new(c, 0.0)).collect();
        let mut scratch = vec![Complex::new(0.0, 0.0); scratch_len];
        forward.process_with_scratch(&mut buf, &mut scratch);
        let eigenvalues: Vec<f64> = buf.iter().map(|z| z.re).collect();
        let largest = eigenvalues
            .iter()
            .copied()
            .fold(f64::NEG_INFINITY, f64::max);
        let (k_min, smallest) =
            eigenvalues
                .iter()
                .copied()
                .enumerate()
                .fold(
                    (0, f64::INFINITY),
                    |acc, (k, v)| if v < acc.1 { (k, v) } else { acc },
                );
        if !(smallest > MIN_EIGEN_RATIO * largest) {
            return Err(Error::Numerical(format!(
                "the circulant background-error covariance B is not positive definite on this grid: \
                 its eigenvalue at wavenumber {k_min} is {smallest:.3e} against a largest of \
                 {largest:.3e} (at least {MIN_EIGEN_RATIO:e} of it is needed). A negative eigenvalue \
                 means the correlation function is not positive definite on the circle (periodise \
                 it); a tiny positive one means the correlation length is too long for the grid \
                 spacing (use a shorter correlation length or fewer grid points)"
            )));
        }
        let nf = n as f64;
        let sqrt_scaled = eigenvalues.iter().map(|l| l.sqrt() / nf).collect();
        let inv_sqrt_scaled = eigenvalues.iter().map(|l| 1.0 / (l.sqrt() * nf)).collect();
        Ok(CirculantPrior {
            mean,
            variance: c0,
            eigenvalues,
            sqrt_scaled,
            inv_sqrt_scaled,
            forward,
            inverse,
            scratch_len,
        })
    }

    /// The same covariance about another mean.
    pub fn with_mean(mut self, mean: Vec<f64>) -> Result<Self> {
        if mean.len() != self.mean.len() {
            return Err(Error::Config(format!(
                "the new background has {} components, the covariance is {}x{}",
                mean.len(),
                self.mean.len(),
                self.mean.len()
            )));
        }
        self.mean = mean;
        Ok(self)
    }

    /// The eigenvalues λ_k of B, k = 0 … n − 1 in DFT order.
    pub fn eigenvalues(&self) -> &[f64] {
        &self.eigenvalues
    }

    /// out = B v.
    pub fn mul(&self, v: &[f64], out: &mut [f64]) {
        let nf = self.mean.len() as f64;
        self.apply(v, out, |k| self.eigenvalues[k] / nf);
    }

    /// out = B⁻¹ v.
    pub fn solve(&self, v: &[f64], out: &mut [f64]) {
        let nf = self.mean.len() as f64;
        self.apply(v, out, |k| 1.0 / (self.eigenvalues[k] * nf));
    }

    /// out = F⁻¹ diag(g_k) F x, with the inverse transform unnormalised (g carries the 1/n).
    fn apply(&self, x: &[f64], out: &mut [f64], g: impl Fn(usize) -> f64) {
        let mut buf: Vec<Complex<f64>> = x.iter().map(|&v| Complex::new(v, 0.0)).collect();
        let mut scratch = vec![Complex::new(0.0, 0.0); self.scratch_len];
        self.forward.process_with_scratch(&mut buf, &mut scratch);
        for (k, z) in buf.iter_mut().enumerate() {
            *z *= g(k);
        }
        self.inverse.process_with_scratch(&mut buf, &mut scratch);
        for (o, z) in out.iter_mut().zip(&buf) {
            *o = z.re;
        }
    }
}

impl Prior for CirculantPrior {
    fn dim(&self) -> usize {
        self.mean.len()
    }
    fn mean(&self) -> &[f64] {
        &self.mean
    }
    fn mul_sqrt(&self, z: &[f64], out: &mut [f64]) {
        self.apply(z, out, |k| self.sqrt_scaled[k]);
    }
    fn mul_sqrt_t(&self, v: &[f64], out: &mut [f64]) {
        self.mul_sqrt(v, out)
    }
    fn solve_sqrt(&self, x: &[f64], out: &mut [f64]) -> bool {
        self.apply(x, out, |k| self.inv_sqrt_scaled[k]);
        true
    }
    fn solve_sqrt_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        self.solve_sqrt(x, out)
    }
    fn variance(&self) -> Vec<f64> {
        vec![self.variance; self.mean.len()]
    }
    fn log_det(&self) -> f64 {
        self.eigenvalues.iter().map(|l| l.ln()).sum()
    }
}
