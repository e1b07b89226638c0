//! The diagonal method: the Hessian diagonal by probing, diag(H) ≈ Σ_k z_k ⊙ H z_k / Σ_k z_k ⊙ z_k with
//! Rademacher z_k (Bekas, Kokiopoulou & Saad 2007, "An estimator for the diagonal of a matrix", Appl.
//! Numer. Math. 57), or with the unit vectors (exact) when n is at most the number of probes. Crude: the
//! covariance is diag(1 / H_ii), which ignores every correlation.
//!
//! The probing error of entry i grows with the off-diagonal entries of row i; where they are large
//! against H_ii (a weakly constrained prior direction under dense observations) an estimate can come
//! out negative. Then, where the problem gives its prior, the variances are the diagonal of the
//! low-rank Laplace covariance instead (see `low_rank.rs`), and [`LaplaceInfo::diagonal_source`] says
//! so; without a prior it is an error that says what to change.
//!
//! [`LaplaceInfo::diagonal_source`]: super::LaplaceInfo::diagonal_source

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::product::unit;
use super::{DiagonalSource, Inputs, Laplace, LaplaceMethod};
use crate::error::{Error, Result};
use crate::precond::DiagonalPrecond;
use crate::problem::Problem;

/// Builds the diagonal Laplace approximation from `opts.diagonal_probes` probes.
pub(super) fn build<'a, P: Problem + ?Sized>(inp: &Inputs<'_, 'a, P>) -> Result<Laplace<'a>> {
    let hdiag = probe(inp)?;
    let bad = hdiag.iter().filter(|v| !(v.is_finite() && **v > 0.0)).count();
    if bad == 0 {
        let precond = DiagonalPrecond::from_hessian_diagonal(&hdiag)?;
        let mut l = Laplace::from_precond(LaplaceMethod::Diagonal, Box::new(precond));
        l.info.diagonal_source = Some(DiagonalSource::Probing);
        return Ok(l);
    }
    if inp.prior.is_none() {
        let i = hdiag
            .iter()
            .position(|v| !(v.is_finite() && *v > 0.0))
            .unwrap_or(0);
        return Err(Error::Numerical(format!(
            "Hessian diagonal entry {i} is {}, not positive ({bad} of {} entries): the minimisation \
             may not have converged, or the probing estimate needs more probes; use more probes, the \
             dense or lbfgs method, or let the problem return its prior B from Problem::prior so \
             that the diagonal of the low-rank covariance is used instead",
            hdiag[i],
            hdiag.len()
        )));
    }
    let low = super::low_rank::build(inp)?;
    let precond = DiagonalPrecond::from_variances(low.variance)?;
    let mut l = Laplace::from_precond(LaplaceMethod::Diagonal, Box::new(precond));
    l.rank = low.rank;
    l.info.next_eigenvalue = low.info.next_eigenvalue;
    l.info.rank_truncated = low.info.rank_truncated;
    l.info.diagonal_source = Some(DiagonalSource::LowRankCovariance);
    l.info.diagonal_nonpositive = bad;
    Ok(l)
}

/// The probed Hessian diagonal.
fn probe<P: Problem + ?Sized>(inp: &Inputs<'_, '_, P>) -> Result<Vec<f64>> {
    let (op, opts) = (inp.op, inp.opts);
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
    Ok(num.iter().zip(&den).map(|(a, b)| a / b).collect())
}
