//! The Hessian of the cost at the analysis x*, estimated by one of several methods, and the Laplace
//! (analysis-error) covariance C = (∇²J(x*))⁻¹ built from it: the one entry point [`laplace`].
//!
//! In 4D-Var the inverse Hessian of the cost at the analysis approximates the analysis-error covariance
//! (Rabier & Courtier 1992, QJRMS 118; Fisher & Courtier 1995, ECMWF Tech. Memo 220); for nonlinear
//! dynamics it is only a local Gaussian approximation of the posterior (Gejadze, Shutyaev & Le Dimet 2013,
//! QJRMS 139).
//!
//! One file per method ([`LaplaceMethod`]), each with a `build` function from [`Inputs`]:
//! - `dense.rs`: the n columns H e_i, then Cholesky; for small n;
//! - `low_rank.rs`: a randomized eigensolver on the prior-preconditioned misfit Hessian;
//! - `lbfgs.rs`: the minimiser's (s, y) pairs; no extra evaluations;
//! - `diagonal.rs`: the Hessian diagonal by probing.
//!
//! They share `product.rs` (Hessian-vector products, exact or by finite differences, in parallel and
//! counted) and `eigen.rs`. A new method is one new file with its `build` and one line in the
//! `methods!` list below, which declares its module, its [`LaplaceMethod`] variant and name (options,
//! outputs and the command line take it from there).

use nalgebra::DMatrix;

use super::{LbfgsPrecond, Preconditioner};
use crate::error::{Error, Result};
use crate::problem::{Counted, EvalCounts, Prior, Problem};
use product::HessOp;

mod eigen;
mod product;
#[cfg(test)]
mod tests;

/// Declares the methods: each line `Variant = "name" in module;` (with its doc comment) adds the module
/// (whose `build` makes the approximation), the [`LaplaceMethod`] variant and its name.
macro_rules! methods {
    ($($(#[$doc:meta])* $variant:ident = $name:literal in $module:ident;)+) => {
        $(mod $module;)+

        /// How the Hessian at the analysis is estimated.
        #[derive(
            Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize, clap::ValueEnum,
        )]
        pub enum LaplaceMethod {
            $($(#[$doc])* #[serde(rename = $name)] #[value(name = $name)] $variant,)+
        }

        impl LaplaceMethod {
            /// Every method, in the order of the list.
            pub const ALL: &'static [LaplaceMethod] = &[$(LaplaceMethod::$variant),+];

            /// The name used in outputs and options ("dense", "low-rank", "lbfgs", "diagonal").
            pub fn as_str(&self) -> &'static str {
                match self {
                    $(LaplaceMethod::$variant => $name,)+
                }
            }

            fn build<'a, P: Problem + ?Sized>(self, inputs: &Inputs<'_, 'a, P>) -> Result<Laplace<'a>> {
                match self {
                    $(LaplaceMethod::$variant => $module::build(inputs),)+
                }
            }
        }
    };
}

methods! {
    /// All n columns of the Hessian, Cholesky-factorised.
    Dense = "dense" in dense;
    /// Low-rank update of the prior from a randomized eigensolver.
    LowRank = "low-rank" in low_rank;
    /// The minimiser's L-BFGS pairs.
    Lbfgs = "lbfgs" in lbfgs;
    /// The Hessian diagonal only.
    Diagonal = "diagonal" in diagonal;
}

impl std::fmt::Display for LaplaceMethod {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

impl std::str::FromStr for LaplaceMethod {
    type Err = Error;
    fn from_str(s: &str) -> Result<Self> {
        LaplaceMethod::ALL
            .iter()
            .copied()
            .find(|m| m.as_str() == s)
            .ok_or_else(|| {
                let names: Vec<&str> = LaplaceMethod::ALL.iter().map(|m| m.as_str()).collect();
                let (last, rest) = names.split_last().expect("at least one method");
                Error::Config(format!(
                    "unknown Hessian method '{s}': choose {} or {last}",
                    rest.join(", ")
                ))
            })
    }
}

/// What a method's `build` gets: the Hessian-vector products at the analysis and the settings.
struct Inputs<'i, 'a, P: ?Sized> {
    /// Products v ↦ ∇²J(x*) v (the analysis is `op.x`).
    op: &'i HessOp<'i, P>,
    /// The problem's prior, where it gives one.
    prior: Option<&'a dyn Prior>,
    /// The minimiser's L-BFGS pairs (s_k, y_k), oldest first.
    pairs: &'i [(Vec<f64>, Vec<f64>)],
    /// Largest rank (low-rank) or number of eigenpairs reported (dense), validated.
    max_rank: usize,
    /// All options.
    opts: &'i LaplaceOptions,
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
    /// Diagonal method: where the variances come from (absent for the other methods).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub diagonal_source: Option<DiagonalSource>,
    /// Diagonal method: probed Hessian diagonal entries that were not positive (the reason for the
    /// low-rank fallback).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub diagonal_nonpositive: usize,
    /// Evaluations spent building it (from the problem's [`Counted`] wrapper).
    pub evaluations: EvalCounts,
}

/// Where the variances of the diagonal method come from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum DiagonalSource {
    /// The Hessian diagonal by probing: C = diag(1 / H_ii).
    Probing,
    /// Probing gave entries that are not positive (too few probes for a Hessian with large
    /// off-diagonal entries); the variances are the diagonal of the low-rank Laplace covariance
    /// instead, which needs the problem's prior.
    LowRankCovariance,
}

fn is_zero(n: &usize) -> bool {
    *n == 0
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
    check_analysis(n, x_map)?;
    let max_rank = checked_max_rank(n, opts)?;
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
    let inputs = Inputs {
        op: &op,
        prior: problem.prior(),
        pairs,
        max_rank,
        opts,
    };
    let mut out = method.build(&inputs)?;
    out.info.evaluations = problem.counts().since(&start);
    out.info.products = op.products();
    out.info.exact_products = op.exact && out.info.products > 0;
    Ok(out)
}

/// The analysis must have the problem's dimension n ≥ 1 and finite components.
fn check_analysis(n: usize, x_map: &[f64]) -> Result<()> {
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
    Ok(())
}

/// The maximum rank (default min(n, 1000)), after checking it and the eigenvalue threshold.
fn checked_max_rank(n: usize, opts: &LaplaceOptions) -> Result<usize> {
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
    Ok(max_rank)
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
