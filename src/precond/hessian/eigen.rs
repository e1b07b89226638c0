//! Small eigen-decomposition helpers shared by the dense and low-rank methods.

use nalgebra::{DMatrix, SymmetricEigen};

/// Symmetric eigen-decomposition with eigenpairs sorted by descending eigenvalue.
pub(super) fn eigen_descending(a: DMatrix<f64>) -> (Vec<f64>, DMatrix<f64>) {
    let eig = SymmetricEigen::new(a);
    let mut order: Vec<usize> = (0..eig.eigenvalues.len()).collect();
    order.sort_by(|&i, &j| eig.eigenvalues[j].total_cmp(&eig.eigenvalues[i]));
    let values = order.iter().map(|&i| eig.eigenvalues[i]).collect();
    let vectors = DMatrix::from_fn(eig.eigenvectors.nrows(), order.len(), |r, c| {
        eig.eigenvectors[(r, order[c])]
    });
    (values, vectors)
}

/// Indices of `values` by descending magnitude.
pub(super) fn by_magnitude(values: &[f64]) -> Vec<usize> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&i, &j| values[j].abs().total_cmp(&values[i].abs()));
    order
}
