//! The diagonal method: the Hessian diagonal by probing, diag(H) ≈ Σ_k z_k ⊙ H z_k / Σ_k z_k ⊙ z_k with
//! Rademacher z_k (Bekas, Kokiopoulou & Saad 2007, "An estimator for the diagonal of a matrix", Appl.
//! Numer. Math. 57), or with the unit vectors (exact) when n is at most the number of probes. Crude: the
//! covariance is diag(1 / H_ii), which ignores every correlation.

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::product::unit;
use super::{Inputs, Laplace, LaplaceMethod};
use crate::error::Result;
use crate::precond::DiagonalPrecond;
use crate::problem::Problem;

/// Builds the diagonal Laplace approximation from `opts.diagonal_probes` probes.
pub(super) fn build<'a, P: Problem + ?Sized>(inp: &Inputs<'_, 'a, P>) -> Result<Laplace<'a>> {
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
    let hdiag: Vec<f64> = num.iter().zip(&den).map(|(a, b)| a / b).collect();
    let precond = DiagonalPrecond::from_hessian_diagonal(&hdiag)?;
    Ok(Laplace::from_precond(
        LaplaceMethod::Diagonal,
        Box::new(precond),
    ))
}
