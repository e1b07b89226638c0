//! The low-rank method: a randomized eigensolver (Halko, Martinsson & Tropp 2011, "Finding structure
//! with randomness", SIAM Review 53(2): randomized range finder with oversampling, Algorithm 4.1, with
//! subspace (power) iterations, Algorithm 4.4, and Rayleigh–Ritz, Algorithm 5.3) on the
//! prior-preconditioned misfit Hessian v ↦ Sᵀ ∇²J(x*) S v − v, giving the update of the prior in
//! [`LowRankPrecond`]. The sketch is enlarged until the smallest trusted Ritz value drops below the
//! threshold, the range of the operator is exhausted, or the maximum rank is reached.

use nalgebra::DMatrix;
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;

use super::eigen::{by_magnitude, eigen_descending};
use super::product::HessOp;
use super::{Inputs, Laplace, LaplaceMethod, LaplaceOptions, SpectrumOf};
use crate::error::{Error, Result};
use crate::precond::{LowRankPrecond, PriorSqrt};
use crate::problem::{Prior, Problem};
use crate::util::vector::dot;

/// The Rayleigh–Ritz result of the grown sketch.
struct Sketch {
    /// Orthonormal basis Q of the sketch, one vector per column.
    q: Vec<Vec<f64>>,
    /// Ritz values, descending.
    values: Vec<f64>,
    /// Ritz vectors in the basis Q, one per column, matching `values`.
    u: DMatrix<f64>,
    /// Whether the sketch spans the numerical range of the operator.
    exhausted: bool,
}

/// Builds the low-rank Laplace approximation; needs the problem's prior.
pub(super) fn build<'a, P: Problem + ?Sized>(inp: &Inputs<'_, 'a, P>) -> Result<Laplace<'a>> {
    let prior = inp.prior.ok_or_else(|| {
        Error::Config(
            "the low-rank Hessian needs the background-error covariance B: let the problem \
             return it from Problem::prior (e.g. a DiagonalPrior or DensePrior; for a cost \
             written in the control variable, the prior N(0, I)), or choose the dense, lbfgs \
             or diagonal method"
                .into(),
        )
    })?;
    let n = inp.op.x.len();
    if prior.dim() != n {
        return Err(Error::Config(format!(
            "the prior has dimension {} but the problem has dimension {n}",
            prior.dim()
        )));
    }
    let sketch = grow_sketch(inp.op, prior, inp.max_rank, inp.opts)?;
    if let Some(&min) = sketch.values.last() {
        if min <= -1.0 + 1e-8 {
            return Err(Error::Numerical(format!(
                "the Hessian at the analysis is not positive definite (an eigenvalue of the \
                 prior-preconditioned misfit Hessian is {min:.3e} ≤ −1): the minimisation may not have \
                 converged"
            )));
        }
    }
    keep_leading(sketch, prior, n, inp.max_rank, inp.opts)
}

/// Range finder, power iterations and Rayleigh–Ritz, doubling the target rank while the weakest trusted
/// Ritz value is above the threshold.
fn grow_sketch<P: Problem + ?Sized>(
    op: &HessOp<'_, P>,
    prior: &dyn Prior,
    max_rank: usize,
    opts: &LaplaceOptions,
) -> Result<Sketch> {
    let n = op.x.len();
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
            let new = range_finder(op, prior, &q, add, &mut rng, opts.power_iterations)?;
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
        let (values, u) = rayleigh_ritz(&q, &aq);
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
    Ok(Sketch {
        q,
        values,
        u,
        exhausted,
    })
}

/// `add` new orthonormal columns of the operator's range (Gaussian test vectors, `power` subspace
/// iterations), kept orthogonal to the basis `q` so far.
fn range_finder<P: Problem + ?Sized>(
    op: &HessOp<'_, P>,
    prior: &dyn Prior,
    q: &[Vec<f64>],
    add: usize,
    rng: &mut ChaCha8Rng,
    power: usize,
) -> Result<Vec<Vec<f64>>> {
    let n = op.x.len();
    let omega: Vec<Vec<f64>> = (0..add)
        .map(|_| {
            (0..n)
                .map(|_| rng.sample::<f64, _>(StandardNormal))
                .collect()
        })
        .collect();
    let mut y = op.apply_whitened_batch(prior, &omega)?;
    for _ in 0..power {
        let yq = orthonormalise(q, y);
        if yq.is_empty() {
            y = yq;
            break;
        }
        y = op.apply_whitened_batch(prior, &yq)?;
    }
    Ok(orthonormalise(q, y))
}

/// Rayleigh–Ritz: the eigenpairs (descending) of T = Qᵀ A Q, given Q and A Q.
fn rayleigh_ritz(q: &[Vec<f64>], aq: &[Vec<f64>]) -> (Vec<f64>, DMatrix<f64>) {
    let m = q.len();
    let t_entries: Vec<f64> = (0..m * m)
        .into_par_iter()
        .map(|k| {
            let (i, j) = (k % m, k / m);
            dot(&q[i], &aq[j])
        })
        .collect();
    let t = DMatrix::from_vec(m, m, t_entries);
    eigen_descending((&t + t.transpose()) * 0.5)
}

/// Keeps the trusted Ritz pairs with |λ| above the threshold (subspace iteration finds the eigenvalues
/// of largest magnitude; a negative λ > −1, from second-order terms of a nonlinear model, widens the
/// variance along its direction), at most `max_rank` of them, reported in descending order.
fn keep_leading<'a>(
    sketch: Sketch,
    prior: &'a dyn Prior,
    n: usize,
    max_rank: usize,
    opts: &LaplaceOptions,
) -> Result<Laplace<'a>> {
    let Sketch {
        q,
        values,
        u,
        exhausted,
    } = sketch;
    let m = q.len();
    let limit = if m == 0 {
        0
    } else {
        trusted_count(m, n, opts.oversampling, exhausted).min(max_rank)
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
