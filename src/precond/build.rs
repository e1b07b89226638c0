//! The Hessian of the cost at the analysis x*, estimated by one of four methods, and the Laplace
//! (analysis-error) covariance C = (∇²J(x*))⁻¹ built from it.
//!
//! In 4D-Var the inverse Hessian of the cost at the analysis approximates the analysis-error covariance
//! (Rabier & Courtier 1992, QJRMS 118; Fisher & Courtier 1995, ECMWF Tech. Memo 220); for nonlinear
//! dynamics it is only a local Gaussian approximation of the posterior (Gejadze, Shutyaev & Le Dimet 2013,
//! QJRMS 139).
//!
//! Methods ([`LaplaceMethod`]):
//! - **dense**: the n columns H e_i, then Cholesky; for small n.
//! - **low-rank**: a randomized eigensolver (Halko, Martinsson & Tropp 2011, "Finding structure with
//!   randomness", SIAM Review 53(2): randomized range finder with oversampling, Algorithm 4.1, with
//!   subspace (power) iterations, Algorithm 4.4, and Rayleigh–Ritz, Algorithm 5.3) on the
//!   prior-preconditioned misfit Hessian v ↦ Sᵀ ∇²J(x*) S v − v, giving the update of the prior in
//!   [`LowRankPrecond`]. The sketch is enlarged until the smallest trusted Ritz value drops below the
//!   threshold, the range of the operator is exhausted, or the maximum rank is reached.
//! - **lbfgs**: the minimiser's (s, y) pairs ([`LbfgsPrecond`]); no extra evaluations.
//! - **diagonal**: the Hessian diagonal by probing, diag(H) ≈ Σ_k z_k ⊙ H z_k / Σ_k z_k ⊙ z_k with
//!   Rademacher z_k (Bekas, Kokiopoulou & Saad 2007, "An estimator for the diagonal of a matrix", Appl.
//!   Numer. Math. 57), or with the unit vectors (exact) when n is at most the number of probes.
//!
//! Hessian-vector products come from the problem's own `hess_vec` where offered, otherwise from a
//! central difference of two gradients,
//! H v ≈ (∇J(x + h v) − ∇J(x − h v)) / (2h),  h = δ · max(1, ‖x‖_∞) / ‖v‖_∞,  δ = ε^{1/3} ≈ 6.1e-6,
//! the step balancing the O(h²) truncation error against the O(ε/h) round-off (Nocedal & Wright 2006,
//! "Numerical Optimization", §8.1, from memory). Products are issued in batches over rayon, so a pool
//! of adapter processes evaluates them in parallel.

use std::sync::atomic::{AtomicUsize, Ordering};

use nalgebra::{DMatrix, SymmetricEigen};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;

use super::{
    DensePrecond, DiagonalPrecond, LbfgsPrecond, LowRankPrecond, Preconditioner, PriorSqrt,
};
use crate::error::{Error, Result};
use crate::problem::{Counted, EvalCounts, Prior, Problem};

/// How the Hessian at the analysis is estimated.
#[derive(
    Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum,
)]
#[serde(rename_all = "kebab-case")]
#[value(rename_all = "kebab-case")]
pub enum LaplaceMethod {
    /// All n columns of the Hessian, Cholesky-factorised.
    Dense,
    /// Low-rank update of the prior from a randomized eigensolver.
    LowRank,
    /// The minimiser's L-BFGS pairs.
    Lbfgs,
    /// The Hessian diagonal only.
    Diagonal,
}

impl LaplaceMethod {
    /// The name used in outputs and options ("dense", "low-rank", "lbfgs", "diagonal").
    pub fn as_str(&self) -> &'static str {
        match self {
            LaplaceMethod::Dense => "dense",
            LaplaceMethod::LowRank => "low-rank",
            LaplaceMethod::Lbfgs => "lbfgs",
            LaplaceMethod::Diagonal => "diagonal",
        }
    }
}

impl std::fmt::Display for LaplaceMethod {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

impl std::str::FromStr for LaplaceMethod {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        match s {
            "dense" => Ok(LaplaceMethod::Dense),
            "low-rank" => Ok(LaplaceMethod::LowRank),
            "lbfgs" => Ok(LaplaceMethod::Lbfgs),
            "diagonal" => Ok(LaplaceMethod::Diagonal),
            _ => Err(Error::Config(format!(
                "unknown Hessian method '{s}': choose dense, low-rank, lbfgs or diagonal"
            ))),
        }
    }
}

/// What the reported eigenvalues are eigenvalues of.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum SpectrumOf {
    /// Sᵀ ∇²J S − I, with B = S Sᵀ: λ_i > 0 measures how much the observations reduce the prior variance
    /// along S v_i (the analysis-error variance there is 1 / (1 + λ_i) of the background's).
    PriorPreconditionedMisfit,
    /// ∇²J itself (dense method without a prior).
    Hessian,
}

/// Options of [`laplace`]; `Default` gives the documented defaults.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(default)]
pub struct LaplaceOptions {
    /// Forces a method; `None` chooses automatically: dense for n ≤ `dense_max_dim`, low-rank where a
    /// prior is known, L-BFGS where pairs are given, diagonal otherwise.
    pub method: Option<LaplaceMethod>,
    /// Largest n for the automatic choice of the dense method (default 400).
    pub dense_max_dim: usize,
    /// Low-rank: keep eigenvalues with |λ_i| above this (default 0.1, so each discarded direction would
    /// have changed the prior variance by a factor 1/(1+λ) within about 10% of 1).
    pub eigen_threshold: f64,
    /// Low-rank: largest rank (default min(n, 1000)); also the number of eigenpairs reported by the
    /// dense method. A value above n is an error.
    pub max_rank: Option<usize>,
    /// Low-rank: first target rank of the sketch, doubled while needed (default 20).
    pub initial_rank: usize,
    /// Low-rank: oversampling columns (default 10; Halko et al. 2011, §4.2, suggest 5 or 10).
    pub oversampling: usize,
    /// Low-rank: subspace (power) iterations (default 1).
    pub power_iterations: usize,
    /// Relative finite-difference step δ (default ε^{1/3}); used only without `hess_vec`.
    pub fd_step: Option<f64>,
    /// Diagonal: number of Rademacher probes (default 64).
    pub diagonal_probes: usize,
    /// L-BFGS: relative curvature threshold for skipping a pair.
    pub curvature_eps: f64,
    /// Seed of the random sketch and probes.
    pub seed: u64,
}

impl Default for LaplaceOptions {
    fn default() -> Self {
        LaplaceOptions {
            method: None,
            dense_max_dim: 400,
            eigen_threshold: 0.1,
            max_rank: None,
            initial_rank: 20,
            oversampling: 10,
            power_iterations: 1,
            fd_step: None,
            diagonal_probes: 64,
            curvature_eps: LbfgsPrecond::DEFAULT_CURVATURE_EPS,
            seed: 0x5eed_1a91ace,
        }
    }
}

/// The Laplace approximation N(x*, C) at the analysis and how it was obtained.
pub struct Laplace<'a> {
    /// The method used.
    pub method: LaplaceMethod,
    /// The rank of the low-rank update (low-rank method only).
    pub rank: Option<usize>,
    /// diag(C): the analysis-error variances.
    pub variance: Vec<f64>,
    /// Leading eigenvalues, descending (see `spectrum_of`); empty for the L-BFGS and diagonal methods.
    pub eigenvalues: Vec<f64>,
    /// The matching eigen-directions in model space, one per column: S v_i for the prior-preconditioned
    /// spectrum (B⁻¹-orthonormal), the orthonormal eigenvectors of ∇²J for the Hessian spectrum.
    pub eigenvectors: Option<DMatrix<f64>>,
    /// The Gaussian metric N(x*, C), L Lᵀ = C.
    pub precond: Box<dyn Preconditioner + 'a>,
    /// How it was obtained.
    pub info: LaplaceInfo,
}

/// How a Laplace approximation was obtained: what its spectrum is of, its cost, and its accuracy
/// indicators.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct LaplaceInfo {
    /// What the eigenvalues are eigenvalues of.
    pub spectrum_of: Option<SpectrumOf>,
    /// Hessian-vector products formed (each an exact product or two gradients).
    pub products: usize,
    /// Whether the products were the problem's own (`hess_vec`) rather than finite differences.
    pub exact_products: bool,
    /// Dense method: largest |H_ij − H_ji| / max |H_ij| before symmetrising (the finite-difference error).
    pub asymmetry: Option<f64>,
    /// Low-rank method: the discarded Ritz value of largest magnitude, an estimate of λ_{r+1} (so the
    /// variance along any direction is off by at most about |λ_{r+1}|/(1+λ_{r+1}) of its prior variance).
    pub next_eigenvalue: Option<f64>,
    /// Low-rank method: true when the maximum rank was reached with eigenvalues still above the threshold.
    pub rank_truncated: bool,
    /// L-BFGS method: pairs skipped for failing the curvature condition.
    pub pairs_skipped: usize,
    /// Evaluations spent building it (from the problem's [`Counted`] wrapper).
    pub evaluations: EvalCounts,
}

/// Largest dimension for the dense method (a handful of n×n matrices of 200 MB each at this size).
pub const DENSE_LIMIT: usize = 5000;

/// Estimates the Hessian at the analysis `x_map` and returns the Laplace approximation there.
///
/// `pairs` are the minimiser's L-BFGS pairs (s_k, y_k), oldest first (may be empty unless the L-BFGS
/// method is asked for). Evaluations go through `problem` and are counted there.
pub fn laplace<'a, P: Problem + ?Sized>(
    problem: &'a Counted<P>,
    x_map: &[f64],
    pairs: &[(Vec<f64>, Vec<f64>)],
    opts: &LaplaceOptions,
) -> Result<Laplace<'a>> {
    let n = problem.dim();
    if n == 0 {
        return Err(Error::Config("the problem has dimension 0".into()));
    }
    if x_map.len() != n {
        return Err(Error::Config(format!(
            "the analysis has {} components but the problem has dimension {n}",
            x_map.len()
        )));
    }
    if let Some(i) = x_map.iter().position(|v| !v.is_finite()) {
        return Err(Error::Numerical(format!(
            "analysis component {i} is not finite"
        )));
    }
    let max_rank = match opts.max_rank {
        Some(r) if r > n => {
            return Err(Error::Config(format!(
                "the maximum rank {r} is larger than the dimension {n}; give a rank of at most {n}"
            )))
        }
        Some(0) => return Err(Error::Config("the maximum rank must be at least 1".into())),
        Some(r) => r,
        None => n.min(1000),
    };
    if !(opts.eigen_threshold.is_finite() && opts.eigen_threshold >= 0.0) {
        return Err(Error::Config(format!(
            "the eigenvalue threshold is {}; it must be a finite number ≥ 0",
            opts.eigen_threshold
        )));
    }
    let method = opts.method.unwrap_or(if n <= opts.dense_max_dim {
        LaplaceMethod::Dense
    } else if problem.prior().is_some() {
        LaplaceMethod::LowRank
    } else if !pairs.is_empty() {
        LaplaceMethod::Lbfgs
    } else {
        LaplaceMethod::Diagonal
    });
    if method == LaplaceMethod::Dense && n > DENSE_LIMIT {
        return Err(Error::Config(format!(
            "the dense Hessian of dimension {n} needs several {n}×{n} matrices ({:.1} GB each); above \
             n = {DENSE_LIMIT} use the low-rank, lbfgs or diagonal method",
            (n * n) as f64 * 8e-9
        )));
    }
    let start = problem.counts();
    let op = HessOp::new(problem, x_map, opts.fd_step)?;
    let mut out = match method {
        LaplaceMethod::Dense => dense(&op, problem.prior(), max_rank)?,
        LaplaceMethod::LowRank => {
            let prior = problem.prior().ok_or_else(|| {
                Error::Config(
                    "the low-rank Hessian needs the background-error covariance B: let the problem \
                     return it from Problem::prior (e.g. a DiagonalPrior or DensePrior; for a cost \
                     written in the control variable, the prior N(0, I)), or choose the dense, lbfgs \
                     or diagonal method"
                        .into(),
                )
            })?;
            low_rank(&op, prior, max_rank, opts)?
        }
        LaplaceMethod::Lbfgs => {
            let p = match problem.prior() {
                Some(prior) => {
                    LbfgsPrecond::with_prior(pairs, PriorSqrt::Borrowed(prior), opts.curvature_eps)?
                }
                None => LbfgsPrecond::new(pairs, opts.curvature_eps)?,
            };
            let skipped = p.pairs_skipped();
            let mut l = Laplace::from_precond(LaplaceMethod::Lbfgs, Box::new(p));
            l.info.pairs_skipped = skipped;
            l
        }
        LaplaceMethod::Diagonal => diagonal(&op, opts)?,
    };
    out.info.evaluations = problem.counts().since(&start);
    out.info.products = op.products.load(Ordering::Relaxed);
    out.info.exact_products = op.exact && out.info.products > 0;
    Ok(out)
}

impl<'a> Laplace<'a> {
    fn from_precond(method: LaplaceMethod, precond: Box<dyn Preconditioner + 'a>) -> Self {
        Laplace {
            method,
            rank: None,
            variance: precond.variance(),
            eigenvalues: Vec::new(),
            eigenvectors: None,
            precond,
            info: LaplaceInfo::default(),
        }
    }
}

/// v ↦ ∇²J(x*) v, exact or by central differences of gradients.
struct HessOp<'p, P: ?Sized> {
    problem: &'p Counted<P>,
    x: &'p [f64],
    exact: bool,
    /// Absolute step numerator δ · max(1, ‖x‖_∞).
    step: f64,
    products: AtomicUsize,
}

impl<'p, P: Problem + ?Sized> HessOp<'p, P> {
    fn new(problem: &'p Counted<P>, x: &'p [f64], fd_step: Option<f64>) -> Result<Self> {
        let delta = fd_step.unwrap_or(f64::EPSILON.cbrt());
        if !(delta.is_finite() && delta > 0.0) {
            return Err(Error::Config(format!(
                "the finite-difference step is {delta}; it must be positive (default 6.1e-6)"
            )));
        }
        let xmax = x.iter().fold(1.0_f64, |m, v| m.max(v.abs()));
        Ok(HessOp {
            problem,
            x,
            exact: problem.has_hess_vec(),
            step: delta * xmax,
            products: AtomicUsize::new(0),
        })
    }

    fn apply(&self, v: &[f64]) -> Result<Vec<f64>> {
        let n = v.len();
        self.products.fetch_add(1, Ordering::Relaxed);
        let ctx = "Hessian-vector product at the analysis";
        let mut out = vec![0.0; n];
        if self.exact {
            self.problem
                .hess_vec(self.x, v, &mut out)
                .map_err(|e| Error::eval(ctx, e))?;
            return Ok(out);
        }
        let vmax = v.iter().fold(0.0_f64, |m, a| m.max(a.abs()));
        if vmax == 0.0 {
            return Ok(out);
        }
        let h = self.step / vmax;
        let xp: Vec<f64> = self.x.iter().zip(v).map(|(x, d)| x + h * d).collect();
        let xm: Vec<f64> = self.x.iter().zip(v).map(|(x, d)| x - h * d).collect();
        let mut gm = vec![0.0; n];
        self.problem
            .cost_grad(&xp, &mut out)
            .map_err(|e| Error::eval(ctx, e))?;
        self.problem
            .cost_grad(&xm, &mut gm)
            .map_err(|e| Error::eval(ctx, e))?;
        for (o, m) in out.iter_mut().zip(&gm) {
            *o = (*o - m) / (2.0 * h);
        }
        if let Some(i) = out.iter().position(|v| !v.is_finite()) {
            return Err(Error::Numerical(format!(
                "{ctx}: component {i} of the finite-difference product is not finite"
            )));
        }
        Ok(out)
    }

    /// Products for a batch of directions, evaluated in parallel.
    fn apply_batch(&self, vs: &[Vec<f64>]) -> Result<Vec<Vec<f64>>> {
        vs.par_iter().map(|v| self.apply(v)).collect()
    }

    /// Products w ↦ Sᵀ H S w − w of the prior-preconditioned misfit Hessian, in parallel.
    fn apply_whitened_batch(&self, prior: &dyn Prior, ws: &[Vec<f64>]) -> Result<Vec<Vec<f64>>> {
        ws.par_iter()
            .map(|w| {
                let mut sw = vec![0.0; w.len()];
                prior.mul_sqrt(w, &mut sw);
                let hsw = self.apply(&sw)?;
                let mut out = vec![0.0; w.len()];
                prior.mul_sqrt_t(&hsw, &mut out);
                for (o, wi) in out.iter_mut().zip(w) {
                    *o -= wi;
                }
                Ok(out)
            })
            .collect()
    }
}

fn unit(n: usize, i: usize) -> Vec<f64> {
    let mut e = vec![0.0; n];
    e[i] = 1.0;
    e
}

/// Symmetric eigen-decomposition with eigenpairs sorted by descending eigenvalue.
fn eigen_descending(a: DMatrix<f64>) -> (Vec<f64>, DMatrix<f64>) {
    let eig = SymmetricEigen::new(a);
    let mut order: Vec<usize> = (0..eig.eigenvalues.len()).collect();
    order.sort_by(|&i, &j| eig.eigenvalues[j].total_cmp(&eig.eigenvalues[i]));
    let values = order.iter().map(|&i| eig.eigenvalues[i]).collect();
    let vectors = DMatrix::from_fn(eig.eigenvectors.nrows(), order.len(), |r, c| {
        eig.eigenvectors[(r, order[c])]
    });
    (values, vectors)
}

fn dense<'a, P: Problem + ?Sized>(
    op: &HessOp<'_, P>,
    prior: Option<&dyn Prior>,
    max_report: usize,
) -> Result<Laplace<'a>> {
    let n = op.x.len();
    let units: Vec<Vec<f64>> = (0..n).map(|i| unit(n, i)).collect();
    let cols = op.apply_batch(&units)?;
    let h = DMatrix::from_fn(n, n, |r, c| cols[c][r]);
    let scale = h.amax();
    let asym = if scale > 0.0 {
        (&h - h.transpose()).amax() / scale
    } else {
        0.0
    };
    let h = (&h + h.transpose()) * 0.5;
    let precond = DensePrecond::from_hessian(&h)?;
    let k = max_report.min(n);
    let (of, values, vectors) = match prior {
        Some(p) => {
            let mut s = DMatrix::<f64>::zeros(n, n);
            for (i, mut col) in s.column_iter_mut().enumerate() {
                p.mul_sqrt(&units[i], col.as_mut_slice());
            }
            let a = s.transpose() * &h * &s - DMatrix::<f64>::identity(n, n);
            let (vals, vecs) = eigen_descending((&a + a.transpose()) * 0.5);
            let model = &s * vecs.columns(0, k);
            (SpectrumOf::PriorPreconditionedMisfit, vals, model)
        }
        None => {
            let (vals, vecs) = eigen_descending(h);
            (SpectrumOf::Hessian, vals, vecs.columns(0, k).into_owned())
        }
    };
    let mut l = Laplace::from_precond(LaplaceMethod::Dense, Box::new(precond));
    l.eigenvalues = values[..k].to_vec();
    l.eigenvectors = Some(vectors);
    l.info.spectrum_of = Some(of);
    l.info.asymmetry = Some(asym);
    Ok(l)
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Orthonormalises `ys` against `basis` and against each other (classical Gram–Schmidt applied twice,
/// "twice is enough": Giraud, Langou, Rozložník & van den Eshof 2005, Numer. Math. 101, from memory),
/// dropping columns whose norm falls below `DROP_TOL` of their original norm (numerically in the span).
fn orthonormalise(basis: &[Vec<f64>], ys: Vec<Vec<f64>>) -> Vec<Vec<f64>> {
    const DROP_TOL: f64 = 1e-10;
    let mut accepted: Vec<Vec<f64>> = Vec::with_capacity(ys.len());
    for mut y in ys {
        let norm0 = dot(&y, &y).sqrt();
        if norm0 == 0.0 || !norm0.is_finite() {
            continue;
        }
        for _ in 0..2 {
            let coefs: Vec<f64> = basis
                .par_iter()
                .chain(accepted.par_iter())
                .map(|q| dot(q, &y))
                .collect();
            for (q, c) in basis.iter().chain(accepted.iter()).zip(&coefs) {
                for (yi, qi) in y.iter_mut().zip(q) {
                    *yi -= c * qi;
                }
            }
        }
        let norm = dot(&y, &y).sqrt();
        if norm > DROP_TOL * norm0 {
            y.iter_mut().for_each(|v| *v /= norm);
            accepted.push(y);
        }
    }
    accepted
}

/// How many Ritz values of an m-column sketch are trusted: all when the sketch spans the operator's
/// range (or the whole space), else all but the oversampling columns (at least one).
fn trusted_count(m: usize, n: usize, oversampling: usize, exhausted: bool) -> usize {
    if exhausted || m == n {
        m
    } else {
        m.saturating_sub(oversampling).max(1)
    }
}

/// Indices of `values` by descending magnitude.
fn by_magnitude(values: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&i, &j| values[j].abs().total_cmp(&values[i].abs()));
    order
}

fn low_rank<'a, P: Problem + ?Sized>(
    op: &HessOp<'_, P>,
    prior: &'a dyn Prior,
    max_rank: usize,
    opts: &LaplaceOptions,
) -> Result<Laplace<'a>> {
    let n = op.x.len();
    if prior.dim() != n {
        return Err(Error::Config(format!(
            "the prior has dimension {} but the problem has dimension {n}",
            prior.dim()
        )));
    }
    let p = opts.oversampling;
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    let mut q: Vec<Vec<f64>> = Vec::new();
    let mut aq: Vec<Vec<f64>> = Vec::new();
    let mut target = opts.initial_rank.clamp(1, max_rank);
    let mut exhausted = false;
    let (values, u) = loop {
        let want = (target + p).min(n);
        let add = want.saturating_sub(q.len());
        if add > 0 {
            // Range finder on the new columns, kept orthogonal to the basis so far.
            let omega: Vec<Vec<f64>> = (0..add)
                .map(|_| {
                    (0..n)
                        .map(|_| rng.sample::<f64, _>(StandardNormal))
                        .collect()
                })
                .collect();
            let mut y = op.apply_whitened_batch(prior, &omega)?;
            for _ in 0..opts.power_iterations {
                let yq = orthonormalise(&q, y);
                if yq.is_empty() {
                    y = yq;
                    break;
                }
                y = op.apply_whitened_batch(prior, &yq)?;
            }
            let new = orthonormalise(&q, y);
            if new.len() < add {
                // Part of the sketch fell into span(Q): the numerical range of the operator is captured.
                exhausted = true;
            }
            let anew = op.apply_whitened_batch(prior, &new)?;
            q.extend(new);
            aq.extend(anew);
        }
        let m = q.len();
        if m == 0 {
            break (Vec::new(), DMatrix::<f64>::zeros(0, 0));
        }
        // Rayleigh–Ritz: T = Qᵀ A Q.
        let t_entries: Vec<f64> = (0..m * m)
            .into_par_iter()
            .map(|k| {
                let (i, j) = (k % m, k / m);
                dot(&q[i], &aq[j])
            })
            .collect();
        let t = DMatrix::from_vec(m, m, t_entries);
        let (values, u) = eigen_descending((&t + t.transpose()) * 0.5);
        let trusted = trusted_count(m, n, p, exhausted);
        let weakest_trusted = by_magnitude(&values)[trusted - 1];
        let more = !exhausted
            && m < n
            && target < max_rank
            && values[weakest_trusted].abs() > opts.eigen_threshold;
        if !more {
            break (values, u);
        }
        target = (2 * target).min(max_rank);
    };
    let m = q.len();
    if let Some(&min) = values.last() {
        if min <= -1.0 + 1e-8 {
            return Err(Error::Numerical(format!(
                "the Hessian at the analysis is not positive definite (an eigenvalue of the \
                 prior-preconditioned misfit Hessian is {min:.3e} ≤ −1): the minimisation may not have \
                 converged"
            )));
        }
    }
    // Keep the trusted Ritz pairs with |λ| above the threshold (subspace iteration finds the eigenvalues
    // of largest magnitude; a negative λ > −1, from second-order terms of a nonlinear model, widens the
    // variance along its direction), at most max_rank of them, reported in descending order.
    let limit = if m == 0 {
        0
    } else {
        trusted_count(m, n, p, exhausted).min(max_rank)
    };
    let order = by_magnitude(&values);
    let mut kept: Vec<usize> = order[..limit]
        .iter()
        .copied()
        .filter(|&i| values[i].abs() > opts.eigen_threshold)
        .collect();
    let r = kept.len();
    let rank_truncated = r == limit && limit == max_rank && limit < m;
    let next_eigenvalue = order.get(r).map(|&i| values[i]);
    kept.sort_unstable();
    let mut v = DMatrix::<f64>::zeros(n, r);
    for (j, &k) in kept.iter().enumerate() {
        let mut col = v.column_mut(j);
        for (i, qi) in q.iter().enumerate() {
            let c = u[(i, k)];
            for (vr, qr) in col.iter_mut().zip(qi) {
                *vr += c * qr;
            }
        }
    }
    drop(aq);
    drop(q);
    let lambda: Vec<f64> = kept.iter().map(|&k| values[k]).collect();
    let precond = LowRankPrecond::new(PriorSqrt::Borrowed(prior), v, lambda.clone())?;
    let vectors = precond.model_eigenvectors();
    let mut l = Laplace::from_precond(LaplaceMethod::LowRank, Box::new(precond));
    l.rank = Some(r);
    l.eigenvalues = lambda;
    l.eigenvectors = Some(vectors);
    l.info.spectrum_of = Some(SpectrumOf::PriorPreconditionedMisfit);
    l.info.next_eigenvalue = next_eigenvalue;
    l.info.rank_truncated = rank_truncated;
    Ok(l)
}

fn diagonal<'a, P: Problem + ?Sized>(
    op: &HessOp<'_, P>,
    opts: &LaplaceOptions,
) -> Result<Laplace<'a>> {
    let n = op.x.len();
    let probes: Vec<Vec<f64>> = if n <= opts.diagonal_probes {
        (0..n).map(|i| unit(n, i)).collect()
    } else {
        let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
        (0..opts.diagonal_probes.max(1))
            .map(|_| {
                (0..n)
                    .map(|_| if rng.random::<bool>() { 1.0 } else { -1.0 })
                    .collect()
            })
            .collect()
    };
    let products = op.apply_batch(&probes)?;
    let mut num = vec![0.0; n];
    let mut den = vec![0.0; n];
    for (z, hz) in probes.iter().zip(&products) {
        for i in 0..n {
            num[i] += z[i] * hz[i];
            den[i] += z[i] * z[i];
        }
    }
    let hdiag: Vec<f64> = num.iter().zip(&den).map(|(a, b)| a / b).collect();
    let precond = DiagonalPrecond::from_hessian_diagonal(&hdiag)?;
    Ok(Laplace::from_precond(
        LaplaceMethod::Diagonal,
        Box::new(precond),
    ))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::EvalError;
    use crate::problem::{DensePrior, DiagonalPrior};
    use nalgebra::DVector;
    use rand::SeedableRng;

    /// J(x) = ½ (x − xb)ᵀ B⁻¹ (x − xb) + ½ Σ_k (g_kᵀ x − y_k)² / r_k + (c/4) Σ x_i⁴; with c = 0 a
    /// linear-Gaussian problem.
    struct Quadratic {
        prior: Box<dyn Prior>,
        binv: DMatrix<f64>,
        g: DMatrix<f64>,
        y: Vec<f64>,
        r: Vec<f64>,
        quartic: f64,
        exact: bool,
        give_prior: bool,
    }

    impl Quadratic {
        /// Diagonal B, random G (m×n).
        fn new(n: usize, m: usize, seed: u64) -> Self {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            let std: Vec<f64> = (0..n).map(|i| 0.5 + (i % 7) as f64 * 0.25).collect();
            let mean = (0..n).map(|i| (i as f64 * 0.3).sin()).collect();
            let binv = DMatrix::from_diagonal(
                &std.iter().map(|s| 1.0 / (s * s)).collect::<Vec<_>>().into(),
            );
            let prior = Box::new(DiagonalPrior::new(mean, std).unwrap());
            let g = DMatrix::from_fn(m, n, |_, _| rng.sample::<f64, _>(StandardNormal));
            let y = (0..m).map(|k| k as f64 * 0.1).collect();
            let r = (0..m).map(|k| 0.1 + 0.05 * k as f64).collect();
            Quadratic::assemble(prior, binv, g, y, r)
        }
        fn assemble(
            prior: Box<dyn Prior>,
            binv: DMatrix<f64>,
            g: DMatrix<f64>,
            y: Vec<f64>,
            r: Vec<f64>,
        ) -> Self {
            Quadratic {
                prior,
                binv,
                g,
                y,
                r,
                quartic: 0.0,
                exact: true,
                give_prior: true,
            }
        }
        /// From explicit parts, with a dense B.
        fn from_parts(
            xb: Vec<f64>,
            b: DMatrix<f64>,
            g: DMatrix<f64>,
            y: Vec<f64>,
            r: Vec<f64>,
        ) -> Self {
            let binv = b.clone().try_inverse().unwrap();
            let prior = Box::new(DensePrior::new(xb, b).unwrap());
            Quadratic::assemble(prior, binv, g, y, r)
        }
        /// Closed-form posterior covariance (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ and mean, formed densely with nalgebra.
        fn posterior(&self) -> (DMatrix<f64>, Vec<f64>) {
            let rinv =
                DMatrix::from_diagonal(&self.r.iter().map(|v| 1.0 / v).collect::<Vec<_>>().into());
            let h = &self.binv + self.g.transpose() * &rinv * &self.g;
            let c = h.try_inverse().unwrap();
            let rhs = &self.binv * DVector::from_column_slice(self.prior.mean())
                + self.g.transpose() * &rinv * DVector::from_column_slice(&self.y);
            let mean = &c * rhs;
            (c, mean.as_slice().to_vec())
        }
    }

    impl Problem for Quadratic {
        fn dim(&self) -> usize {
            self.g.ncols()
        }
        fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
            let d = DVector::from_column_slice(x) - DVector::from_column_slice(self.prior.mean());
            let bd = &self.binv * &d;
            let resid =
                &self.g * DVector::from_column_slice(x) - DVector::from_column_slice(&self.y);
            let wr =
                DVector::from_iterator(resid.len(), resid.iter().zip(&self.r).map(|(a, r)| a / r));
            let gr = self.g.tr_mul(&wr);
            let mut j = 0.5 * d.dot(&bd) + 0.5 * resid.dot(&wr);
            for i in 0..x.len() {
                j += 0.25 * self.quartic * x[i].powi(4);
                grad[i] = bd[i] + gr[i] + self.quartic * x[i].powi(3);
            }
            Ok(j)
        }
        fn has_hess_vec(&self) -> bool {
            self.exact && self.quartic == 0.0
        }
        fn hess_vec(
            &self,
            _x: &[f64],
            v: &[f64],
            out: &mut [f64],
        ) -> std::result::Result<(), EvalError> {
            let v = DVector::from_column_slice(v);
            let gv = &self.g * &v;
            let wr = DVector::from_iterator(gv.len(), gv.iter().zip(&self.r).map(|(a, r)| a / r));
            let hv = &self.binv * &v + self.g.tr_mul(&wr);
            out.copy_from_slice(hv.as_slice());
            Ok(())
        }
        fn prior(&self) -> Option<&dyn Prior> {
            self.give_prior.then_some(self.prior.as_ref())
        }
    }

    fn assert_rel(a: &[f64], b: &[f64], tol: f64, what: &str) {
        for (i, (x, y)) in a.iter().zip(b).enumerate() {
            assert!(
                (x - y).abs() <= tol * y.abs(),
                "{what}: component {i}: {x} vs {y}"
            );
        }
    }

    fn opts(method: LaplaceMethod) -> LaplaceOptions {
        LaplaceOptions {
            method: Some(method),
            ..Default::default()
        }
    }

    #[test]
    fn dense_and_low_rank_match_the_closed_form_posterior() {
        // Source: for a linear-Gaussian problem the posterior covariance is (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ exactly
        // (textbook Gaussian conditioning, e.g. Tarantola 2005, "Inverse Problem Theory", §3.2.2).
        for exact in [true, false] {
            let mut q = Quadratic::new(40, 6, 3);
            q.exact = exact;
            let (c, mean) = q.posterior();
            let truth: Vec<f64> = c.diagonal().iter().copied().collect();
            let p = Counted::new(q);
            for method in [LaplaceMethod::Dense, LaplaceMethod::LowRank] {
                let l = laplace(&p, &mean, &[], &opts(method)).unwrap();
                assert_eq!(l.method, method);
                assert_eq!(l.info.exact_products, exact);
                assert_rel(
                    &l.variance,
                    &truth,
                    1e-6,
                    &format!("{method:?}, exact {exact}"),
                );
                let mut out = vec![0.0; 40];
                let e0: Vec<f64> = (0..40).map(|i| if i == 0 { 1.0 } else { 0.0 }).collect();
                l.precond.mul_cov(&e0, &mut out);
                assert_rel(&out, c.column(0).as_slice(), 1e-6, "first column of C");
                if exact {
                    assert_eq!(l.info.evaluations.hessvec as usize, l.info.products);
                } else {
                    assert_eq!(l.info.evaluations.gradient as usize, 2 * l.info.products);
                }
            }
            let lr = laplace(&p, &mean, &[], &opts(LaplaceMethod::LowRank)).unwrap();
            // The misfit Hessian Sᵀ Gᵀ R⁻¹ G S has rank 6 (6 observations).
            assert_eq!(lr.rank, Some(6));
            assert!(lr.eigenvalues.windows(2).all(|w| w[0] >= w[1]));
            let dn = laplace(&p, &mean, &[], &opts(LaplaceMethod::Dense)).unwrap();
            assert_rel(
                &lr.eigenvalues,
                &dn.eigenvalues[..6],
                1e-6,
                "leading eigenvalues",
            );
        }
    }

    #[test]
    fn low_rank_sketch_grows_until_the_threshold() {
        // 120 observations in dimension 200: a misfit of rank 120, more than the first sketch (30
        // columns). The closed form is as above (Gaussian conditioning).
        let q = Quadratic::new(200, 120, 11);
        let (c, mean) = q.posterior();
        let truth: Vec<f64> = c.diagonal().iter().copied().collect();
        let p = Counted::new(q);
        let o = LaplaceOptions {
            eigen_threshold: 1e-9,
            ..opts(LaplaceMethod::LowRank)
        };
        let l = laplace(&p, &mean, &[], &o).unwrap();
        assert_eq!(l.rank, Some(120));
        assert!(!l.info.rank_truncated);
        assert_rel(&l.variance, &truth, 1e-6, "grown sketch");
        // A maximum rank below the misfit rank is reported as truncation.
        let o = LaplaceOptions {
            max_rank: Some(40),
            ..o
        };
        let l = laplace(&p, &mean, &[], &o).unwrap();
        assert_eq!(l.rank, Some(40));
        assert!(l.info.rank_truncated);
    }

    #[test]
    fn finite_difference_hessian_matches_finitediff() {
        // Reference: the central-difference Hessian of the general-purpose `finitediff` crate (argmin
        // project) from the same gradient, on a non-quadratic cost.
        let mut q = Quadratic::new(8, 3, 5);
        q.quartic = 0.7;
        let x: Vec<f64> = (0..8).map(|i| 0.2 * i as f64 - 0.5).collect();
        let grad = |x: &Vec<f64>| {
            let mut g = vec![0.0; x.len()];
            q.cost_grad(x, &mut g).unwrap();
            Ok(g)
        };
        let reference = finitediff::vec::central_hessian(&grad)(&x).unwrap();
        let p = Counted::new(q);
        let l = laplace(&p, &x, &[], &opts(LaplaceMethod::Dense)).unwrap();
        assert!(l.info.asymmetry.unwrap() < 1e-8);
        let h = DMatrix::from_fn(8, 8, |r, c| reference[r][c]);
        let c = h.try_inverse().unwrap();
        assert_rel(
            &l.variance,
            c.diagonal().as_slice(),
            1e-6,
            "finitediff reference",
        );
    }

    #[test]
    fn lbfgs_and_diagonal_methods() {
        // Diagonal: for a diagonal Hessian the probing estimator is exact for any ±1 probe (Bekas,
        // Kokiopoulou & Saad 2007); here no observations, so H = B⁻¹ and C = B.
        let mut q = Quadratic::new(300, 0, 2);
        q.give_prior = false;
        let b = q.prior.variance();
        let mean = q.prior.mean().to_vec();
        let p = Counted::new(q);
        let l = laplace(
            &p,
            &mean,
            &[],
            &LaplaceOptions {
                dense_max_dim: 100,
                ..Default::default()
            },
        )
        .unwrap();
        assert_eq!(l.method, LaplaceMethod::Diagonal);
        assert_rel(&l.variance, &b, 1e-12, "diagonal");
        // L-BFGS chosen automatically when pairs are given; exact (s, H s) pairs along all n unit
        // directions reproduce H⁻¹ (BFGS with exact line searches on a quadratic: Nocedal & Wright 2006,
        // Theorem 6.4, from memory — here the secant conditions H_m y_k = s_k pin it down for a diagonal H).
        let pairs: Vec<(Vec<f64>, Vec<f64>)> = (0..300)
            .map(|i| {
                let mut s = vec![0.0; 300];
                s[i] = 1.0;
                let mut y = vec![0.0; 300];
                y[i] = 1.0 / b[i];
                (s, y)
            })
            .collect();
        let l = laplace(
            &p,
            &mean,
            &pairs,
            &LaplaceOptions {
                dense_max_dim: 100,
                ..Default::default()
            },
        )
        .unwrap();
        assert_eq!(l.method, LaplaceMethod::Lbfgs);
        assert_eq!(l.info.evaluations.gradient, 0);
        assert_rel(&l.variance, &b, 1e-10, "lbfgs");
    }

    #[test]
    fn errors_name_the_problem() {
        let mut q = Quadratic::new(30, 4, 1);
        q.give_prior = false;
        let p = Counted::new(q);
        let x = vec![0.0; 30];
        let e = laplace(&p, &x, &[], &opts(LaplaceMethod::LowRank))
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("Problem::prior"), "{e}");
        let e = laplace(
            &p,
            &x,
            &[],
            &LaplaceOptions {
                max_rank: Some(31),
                ..Default::default()
            },
        )
        .err()
        .unwrap()
        .to_string();
        assert!(e.contains("larger than the dimension 30"), "{e}");
        assert!(laplace(&p, &x[..3], &[], &LaplaceOptions::default()).is_err());

        // Negative curvature: a concave quartic term at a point away from 0 is not a minimum.
        let mut q = Quadratic::new(5, 2, 1);
        q.quartic = -50.0;
        let p = Counted::new(q);
        let e = laplace(&p, &[1.0; 5], &[], &opts(LaplaceMethod::Dense))
            .err()
            .unwrap()
            .to_string();
        assert!(
            e.contains("not positive definite") && e.contains("converged"),
            "{e}"
        );
        let e = laplace(&p, &[1.0; 5], &[], &opts(LaplaceMethod::LowRank))
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("not positive definite"), "{e}");
    }

    /// A problem whose gradient is NaN away from the origin.
    struct Blows;
    impl Problem for Blows {
        fn dim(&self) -> usize {
            3
        }
        fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
            let bad = x.iter().any(|v| *v != 0.0);
            for (g, v) in grad.iter_mut().zip(x) {
                *g = if bad { f64::NAN } else { *v };
            }
            Ok(0.0)
        }
    }

    /// J(x) = ½ |x|² in dimension n.
    struct Isotropic(usize);
    impl Problem for Isotropic {
        fn dim(&self) -> usize {
            self.0
        }
        fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
            grad.copy_from_slice(x);
            Ok(0.5 * x.iter().map(|v| v * v).sum::<f64>())
        }
    }

    #[test]
    fn a_dense_hessian_too_large_is_refused_before_any_evaluation() {
        let p = Counted::new(Isotropic(DENSE_LIMIT + 1));
        let x = vec![0.0; DENSE_LIMIT + 1];
        let e = laplace(&p, &x, &[], &opts(LaplaceMethod::Dense))
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("low-rank, lbfgs or diagonal"), "{e}");
        assert_eq!(p.counts().gradient, 0);
        // The automatic choice goes to the diagonal here (no prior, no pairs); H = I exactly, so the
        // probing estimate is exact (Bekas, Kokiopoulou & Saad 2007: exact for diagonal matrices).
        let l = laplace(&p, &x, &[], &LaplaceOptions::default()).unwrap();
        assert_eq!(l.method, LaplaceMethod::Diagonal);
        assert!(l.variance.iter().all(|v| (v - 1.0).abs() < 1e-9));
    }

    #[test]
    fn non_finite_products_are_errors() {
        let p = Counted::new(Blows);
        let e = laplace(&p, &[0.0; 3], &[], &LaplaceOptions::default())
            .err()
            .unwrap()
            .full_message();
        assert!(
            e.contains("Hessian-vector product") && e.contains("not finite"),
            "{e}"
        );
    }

    fn numbers(v: &serde_json::Value, key: &str) -> Vec<f64> {
        v[key]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect()
    }

    #[test]
    fn matches_numpy_scipy_reference() {
        // Source: tests/reference/laplace_numpy.json, written by tests/reference/laplace_numpy.py
        // (numpy 2.2.6 / scipy 1.15.3: dense Cholesky posterior (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ and scipy.linalg.eigh of
        // the prior-preconditioned misfit Hessian).
        let fixture: serde_json::Value =
            serde_json::from_str(include_str!("../../tests/reference/laplace_numpy.json")).unwrap();
        for name in ["diagonal", "correlated"] {
            let c = &fixture[name];
            let (n, m) = (
                c["n"].as_u64().unwrap() as usize,
                c["m"].as_u64().unwrap() as usize,
            );
            let q = Quadratic::from_parts(
                numbers(c, "xb"),
                DMatrix::from_row_slice(n, n, &numbers(c, "b")),
                DMatrix::from_row_slice(m, n, &numbers(c, "g")),
                numbers(c, "y"),
                numbers(c, "r"),
            );
            let mean = numbers(c, "mean");
            let p = Counted::new(q);
            for method in [LaplaceMethod::Dense, LaplaceMethod::LowRank] {
                let l = laplace(&p, &mean, &[], &opts(method)).unwrap();
                let what = format!("{name}, {method:?}");
                assert_rel(&l.variance, &numbers(c, "variance"), 1e-6, &what);
                assert_rel(&l.eigenvalues[..m], &numbers(c, "eigenvalues"), 1e-6, &what);
                let ld = c["log_det_cov"].as_f64().unwrap();
                assert!(
                    (l.precond.log_det_cov() - ld).abs() < 1e-6 * ld.abs(),
                    "{what}: log det"
                );
                if method == LaplaceMethod::LowRank {
                    assert_eq!(l.rank, Some(m), "{what}: rank = number of observations");
                }
            }
        }
    }
}
