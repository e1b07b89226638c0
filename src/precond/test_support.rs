//! Helpers shared by the preconditioner tests: random matrices and dense images of operators.

use nalgebra::DMatrix;
use rand::RngExt;
use rand_chacha::ChaCha8Rng;

use super::Preconditioner;

/// An r×c matrix of independent standard normal draws.
pub fn gaussian(rng: &mut ChaCha8Rng, r: usize, c: usize) -> DMatrix<f64> {
    DMatrix::from_fn(r, c, |_, _| {
        rng.sample::<f64, _>(rand_distr::StandardNormal)
    })
}

/// The dense n×n matrix of an operator of `p`, column j being f(p, e_j).
pub fn dense_of(
    p: &dyn Preconditioner,
    f: fn(&dyn Preconditioner, &[f64], &mut [f64]),
) -> DMatrix<f64> {
    let n = p.dim();
    let mut m = DMatrix::zeros(n, n);
    for j in 0..n {
        let mut e = vec![0.0; n];
        e[j] = 1.0;
        f(p, &e, m.column_mut(j).as_mut_slice());
    }
    m
}

/// Relative Frobenius distance ‖a − b‖ / ‖b‖.
pub fn rel(a: &DMatrix<f64>, b: &DMatrix<f64>) -> f64 {
    (a - b).norm() / b.norm()
}

/// log det of a symmetric positive definite matrix, from its Cholesky factor (2 Σ log L_ii).
pub fn log_det_spd(m: &DMatrix<f64>) -> f64 {
    let l = m.clone().cholesky().expect("test matrix is SPD").l();
    l.diagonal().iter().map(|d| 2.0 * d.ln()).sum()
}
