//! The metric of the gradient kernels: the inverse mass matrix S of HMC, the preconditioner of MALA,
//! in whitened coordinates (where the Hessian at the analysis gives S = I).
//!
//! One form covers every metric the warm-up can learn:
//!
//! ```text
//! S = D^(1/2) (I + U diag(λ − 1) Uᵀ) D^(1/2),    A = D^(1/2) (I + U diag(√λ − 1) Uᵀ),   S = A Aᵀ,
//! ```
//!
//! with D diagonal and positive, U an n × k matrix of orthonormal columns and λ > 0. The unit metric
//! has D = I, k = 0; a diagonal metric k = 0; a dense one D = I and U the n eigenvectors of S; a
//! "diagonal plus low rank" one a few columns. Since U has orthonormal columns,
//! (I + U diag(c) Uᵀ)(I + U diag(c') Uᵀ) = I + U diag(c + c' + c c') Uᵀ, which gives A⁻¹ in the
//! same form (c = √λ − 1 becomes 1/√λ − 1). Every product below costs O(n k).
//!
//! What the kernels need:
//! - HMC: momentum p ~ N(0, S⁻¹), drawn as p = A⁻ᵀ z; velocity S p; kinetic energy ½ pᵀ S p.
//! - MALA: the proposal noise A z, and |A⁻¹ r|² in the proposal density.

use crate::util::vector::dot;

/// An inverse mass matrix S = A Aᵀ in the form of the module docs.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Metric {
    /// D: the diagonal scale.
    d: Vec<f64>,
    /// √D.
    sqrt_d: Vec<f64>,
    /// U, column-major: k columns of length n.
    basis: Vec<f64>,
    /// λ, one per column of U.
    eig: Vec<f64>,
}

impl Metric {
    /// S = I: the Hessian at the analysis as it is.
    pub fn unit(n: usize) -> Self {
        Metric {
            d: vec![1.0; n],
            sqrt_d: vec![1.0; n],
            basis: Vec::new(),
            eig: Vec::new(),
        }
    }

    /// S = diag(s); every s_i must be positive and finite.
    pub fn diagonal(s: &[f64]) -> Self {
        Metric {
            d: s.to_vec(),
            sqrt_d: s.iter().map(|v| v.sqrt()).collect(),
            basis: Vec::new(),
            eig: Vec::new(),
        }
    }

    /// S = D^(1/2)(I + U diag(λ − 1) Uᵀ)D^(1/2) with `d` the diagonal D, `basis` the columns of U
    /// (orthonormal, column-major) and `eig` the λ. Entries of `d` and `eig` must be positive.
    pub fn low_rank(d: &[f64], basis: Vec<f64>, eig: Vec<f64>) -> Self {
        debug_assert_eq!(basis.len(), d.len() * eig.len());
        Metric {
            d: d.to_vec(),
            sqrt_d: d.iter().map(|v| v.sqrt()).collect(),
            basis,
            eig,
        }
    }

    /// Dimension.
    pub fn dim(&self) -> usize {
        self.sqrt_d.len()
    }

    /// Number of columns of U.
    pub fn rank(&self) -> usize {
        self.eig.len()
    }

    /// Whether S = I.
    pub fn is_unit(&self) -> bool {
        self.eig.is_empty() && self.sqrt_d.iter().all(|v| *v == 1.0)
    }

    /// The diagonal of S.
    pub fn diagonal_of(&self) -> Vec<f64> {
        let n = self.dim();
        (0..n)
            .map(|i| {
                let low: f64 = self
                    .columns()
                    .zip(&self.eig)
                    .map(|(u, l)| (l - 1.0) * u[i] * u[i])
                    .sum();
                self.sqrt_d[i] * self.sqrt_d[i] * (1.0 + low)
            })
            .collect()
    }

    /// The eigenvalues λ of the low-rank part (empty for a diagonal metric).
    pub fn eigenvalues(&self) -> &[f64] {
        &self.eig
    }

    fn columns(&self) -> impl Iterator<Item = &[f64]> {
        let n = self.dim().max(1);
        self.basis.chunks(n)
    }

    /// (I + U diag(f(λ)) Uᵀ) v in place.
    fn core(&self, v: &mut [f64], f: impl Fn(f64) -> f64) {
        let coef: Vec<f64> = self
            .columns()
            .zip(&self.eig)
            .map(|(u, &l)| f(l) * dot(u, v))
            .collect();
        for (u, c) in self.columns().zip(coef) {
            for (vi, ui) in v.iter_mut().zip(u) {
                *vi += c * ui;
            }
        }
    }

    /// S v.
    pub fn mul(&self, v: &[f64]) -> Vec<f64> {
        if self.eig.is_empty() {
            return v.iter().zip(&self.d).map(|(x, d)| x * d).collect();
        }
        let mut w: Vec<f64> = v.iter().zip(&self.sqrt_d).map(|(x, s)| x * s).collect();
        self.core(&mut w, |l| l - 1.0);
        w.iter_mut().zip(&self.sqrt_d).for_each(|(x, s)| *x *= s);
        w
    }

    /// A z (the proposal noise of MALA: A z ~ N(0, S) for z ~ N(0, I)).
    pub fn mul_sqrt(&self, z: &[f64]) -> Vec<f64> {
        let mut w = z.to_vec();
        self.core(&mut w, |l| l.sqrt() - 1.0);
        w.iter_mut().zip(&self.sqrt_d).for_each(|(x, s)| *x *= s);
        w
    }

    /// A⁻¹ r.
    pub fn solve_sqrt(&self, r: &[f64]) -> Vec<f64> {
        let mut w: Vec<f64> = r.iter().zip(&self.sqrt_d).map(|(x, s)| x / s).collect();
        self.core(&mut w, |l| 1.0 / l.sqrt() - 1.0);
        w
    }

    /// A⁻ᵀ z: a momentum p ~ N(0, S⁻¹) for z ~ N(0, I).
    pub fn momentum(&self, z: &[f64]) -> Vec<f64> {
        let mut w = z.to_vec();
        self.core(&mut w, |l| 1.0 / l.sqrt() - 1.0);
        w.iter_mut().zip(&self.sqrt_d).for_each(|(x, s)| *x /= s);
        w
    }

    /// u ← u + ε S p (the position update of the leapfrog step).
    pub fn drift(&self, u: &mut [f64], p: &[f64], eps: f64) {
        if self.eig.is_empty() {
            for ((ui, pi), di) in u.iter_mut().zip(p).zip(&self.d) {
                *ui += eps * di * pi;
            }
        } else {
            for (ui, vi) in u.iter_mut().zip(self.mul(p)) {
                *ui += eps * vi;
            }
        }
    }

    /// ½ pᵀ S p.
    pub fn kinetic(&self, p: &[f64]) -> f64 {
        0.5 * dot(p, &self.mul(p))
    }

    /// Checks a metric read from a file: dimension `n`, positive finite entries, U of the right size.
    pub fn check(&self, n: usize) -> std::result::Result<(), String> {
        if self.sqrt_d.len() != n || self.d.len() != n {
            return Err(format!(
                "metric has dimension {}, expected {n}",
                self.d.len()
            ));
        }
        if self.d.iter().zip(&self.sqrt_d).any(|(d, s)| *s != d.sqrt()) {
            return Err("metric's square roots do not match its diagonal".into());
        }
        if self.basis.len() != n * self.eig.len() {
            return Err(format!(
                "metric basis holds {} numbers, expected {} × {n}",
                self.basis.len(),
                self.eig.len()
            ));
        }
        let positive = |v: &f64| v.is_finite() && *v > 0.0;
        if !self.d.iter().all(positive) || !self.eig.iter().all(positive) {
            return Err("metric has an entry that is not positive and finite".into());
        }
        if !self.basis.iter().all(|v| v.is_finite()) {
            return Err("metric basis has a non-finite entry".into());
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{DMatrix, DVector};

    /// A metric with D = diag(d) and two orthonormal columns, and S built densely with nalgebra
    /// (general-purpose reference) from its definition.
    fn example() -> (Metric, DMatrix<f64>) {
        let n = 4;
        let d = [0.5, 2.0, 1.5, 0.8];
        let raw = DMatrix::from_column_slice(n, 2, &[1.0, 2.0, 0.0, -1.0, 0.5, -0.3, 1.0, 2.0]);
        let q = raw.qr().q();
        let lambda = [3.0, 0.25];
        let m = Metric::low_rank(&d, q.as_slice().to_vec(), lambda.to_vec());
        let sd = DMatrix::from_diagonal(&DVector::from_iterator(n, d.iter().map(|v| v.sqrt())));
        let core = DMatrix::identity(n, n)
            + &q * DMatrix::from_diagonal(&DVector::from_iterator(
                2,
                lambda.iter().map(|l| l - 1.0),
            )) * q.transpose();
        (m, &sd * core * &sd)
    }

    #[test]
    fn products_match_the_dense_matrix() {
        let (m, s) = example();
        let v = [0.3, -1.2, 2.0, 0.7];
        let dv = DVector::from_column_slice(&v);
        let sv = &s * &dv;
        let got = m.mul(&v);
        for i in 0..4 {
            assert!((got[i] - sv[i]).abs() < 1e-12, "S v, component {i}");
        }
        // A Aᵀ = S: column by column, A (Aᵀ e_j) — here checked as |A⁻¹ v|² = vᵀ S⁻¹ v.
        let sinv = s.clone().try_inverse().unwrap();
        let want = dv.dot(&(&sinv * &dv));
        let w = m.solve_sqrt(&v);
        assert!((dot(&w, &w) - want).abs() < 1e-10);
        // A (A⁻¹ v) = v.
        let back = m.mul_sqrt(&w);
        for i in 0..4 {
            assert!((back[i] - v[i]).abs() < 1e-12);
        }
        // The momentum p = A⁻ᵀ z has S p = A z.
        let p = m.momentum(&v);
        let sp = m.mul(&p);
        let az = m.mul_sqrt(&v);
        for i in 0..4 {
            assert!((sp[i] - az[i]).abs() < 1e-12);
        }
        let diag = m.diagonal_of();
        for i in 0..4 {
            assert!((diag[i] - s[(i, i)]).abs() < 1e-12);
        }
    }

    #[test]
    fn unit_and_diagonal_metrics() {
        let u = Metric::unit(3);
        assert!(u.is_unit());
        assert_eq!(u.mul(&[1.0, 2.0, 3.0]), vec![1.0, 2.0, 3.0]);
        let d = Metric::diagonal(&[4.0, 1.0, 0.25]);
        assert!(!d.is_unit());
        assert_eq!(d.mul(&[1.0, 1.0, 1.0]), vec![4.0, 1.0, 0.25]);
        assert_eq!(d.momentum(&[1.0, 1.0, 1.0]), vec![0.5, 1.0, 2.0]);
        assert!((d.kinetic(&[1.0, 1.0, 2.0]) - 0.5 * (4.0 + 1.0 + 1.0)).abs() < 1e-15);
        assert!(d.check(3).is_ok());
        assert!(d.check(2).is_err());
    }
}
