//! The dense method: all n columns H e_i of the Hessian, symmetrised and Cholesky-factorised; for small
//! n. Its eigenvalues are those of the prior-preconditioned misfit Hessian Sᵀ H S − I where the problem
//! gives its prior B = S Sᵀ, else those of H itself.

use nalgebra::DMatrix;

use super::eigen::eigen_descending;
use super::product::unit;
use super::{Inputs, Laplace, LaplaceMethod, SpectrumOf};
use crate::error::Result;
use crate::precond::DensePrecond;
use crate::problem::{Prior, Problem};

/// Builds the dense Laplace approximation, reporting at most `max_rank` eigenpairs.
pub(super) fn build<'a, P: Problem + ?Sized>(inp: &Inputs<'_, 'a, P>) -> Result<Laplace<'a>> {
    let op = inp.op;
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
    let k = inp.max_rank.min(n);
    let (of, values, vectors) = spectrum(h, inp.prior, &units, k);
    let mut l = Laplace::from_precond(LaplaceMethod::Dense, Box::new(precond));
    l.eigenvalues = values[..k].to_vec();
    l.eigenvectors = Some(vectors);
    l.info.spectrum_of = Some(of);
    l.info.asymmetry = Some(asym);
    Ok(l)
}

/// The eigenvalues (descending) and the leading `k` eigen-directions in model space.
fn spectrum(
    h: DMatrix<f64>,
    prior: Option<&dyn Prior>,
    units: &[Vec<f64>],
    k: usize,
) -> (SpectrumOf, Vec<f64>, DMatrix<f64>) {
    let n = h.nrows();
    match prior {
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
    }
}
