//! The Laplace covariance as a low-rank update of the prior, in prior-preconditioned form.
//!
//! With the prior B = S Sᵀ and the prior-preconditioned misfit Hessian
//! Sᵀ (∇²J) S − I ≈ V Λ Vᵀ (V orthonormal n×r, Λ = diag(λ_i), λ_i > −1), the Hessian and covariance are
//!
//! ```text
//! H = S⁻ᵀ (I + V Λ Vᵀ) S⁻¹,        C = H⁻¹ = S (I − V D Vᵀ) Sᵀ,   D = diag(λ_i / (1 + λ_i)),
//! ```
//!
//! the second by the Sherman–Morrison–Woodbury identity. A square root follows from
//! P = I + V E Vᵀ with E = diag((1 + λ_i)^{-1/2} − 1): P is symmetric and P² = I − V D Vᵀ, so
//!
//! ```text
//! L = S P,   Lᵀ = P Sᵀ,   L⁻¹ = P⁻¹ S⁻¹,   P⁻¹ = I + V diag((1 + λ_i)^{1/2} − 1) Vᵀ,
//! diag(C) = diag(B) − Σ_i λ_i / (1 + λ_i) (S v_i)²,   log det C = log det B − Σ_i log(1 + λ_i).
//! ```
//!
//! Nothing n×n is ever formed: storage is V (n×r), and every product costs one prior square-root
//! application plus O(n r). References: Bui-Thanh, Ghattas, Martin & Stadler 2013, "A computational
//! framework for infinite-dimensional Bayesian inverse problems, Part I", SISC 35(6); Flath, Wilcox,
//! Akçelik, Hill, van Bloemen Waanders & Ghattas 2011, "Fast algorithms for Bayesian uncertainty
//! quantification in large-scale linear inverse problems based on low-rank partial Hessian
//! approximations", SISC 33(1).
//!
//! The control-variable form of 4D-Var (x = xb + S v, prior N(0, I) on v) is the case S = I.

use std::sync::Arc;

use nalgebra::{DMatrix, DVector};

use super::Preconditioner;
use crate::error::{Error, Result};
use crate::problem::Prior;

/// The prior square root S that the low-rank update is relative to.
#[derive(Clone)]
pub enum PriorSqrt<'a> {
    /// S = I in dimension n: the control-variable form, where the prior on the control vector is N(0, I).
    Unit(usize),
    /// A prior owned elsewhere (e.g. by the problem).
    Borrowed(&'a dyn Prior),
    /// A prior shared by reference count.
    Shared(Arc<dyn Prior>),
}

impl PriorSqrt<'_> {
    /// Dimension.
    pub fn dim(&self) -> usize {
        match self {
            PriorSqrt::Unit(n) => *n,
            PriorSqrt::Borrowed(p) => p.dim(),
            PriorSqrt::Shared(p) => p.dim(),
        }
    }
    fn prior(&self) -> Option<&dyn Prior> {
        match self {
            PriorSqrt::Unit(_) => None,
            PriorSqrt::Borrowed(p) => Some(*p),
            PriorSqrt::Shared(p) => Some(p.as_ref()),
        }
    }
    /// out = S z.
    pub fn mul(&self, z: &[f64], out: &mut [f64]) {
        match self.prior() {
            None => out.copy_from_slice(z),
            Some(p) => p.mul_sqrt(z, out),
        }
    }
    /// out = Sᵀ v.
    pub fn mul_t(&self, v: &[f64], out: &mut [f64]) {
        match self.prior() {
            None => out.copy_from_slice(v),
            Some(p) => p.mul_sqrt_t(v, out),
        }
    }
    /// out = S⁻¹ x; false where the prior cannot solve.
    pub fn solve(&self, x: &[f64], out: &mut [f64]) -> bool {
        match self.prior() {
            None => {
                out.copy_from_slice(x);
                true
            }
            Some(p) => p.solve_sqrt(x, out),
        }
    }
    /// out = S⁻ᵀ x; false where the prior cannot solve.
    pub fn solve_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        match self.prior() {
            None => {
                out.copy_from_slice(x);
                true
            }
            Some(p) => p.solve_sqrt_t(x, out),
        }
    }
    /// diag(B).
    pub fn variance(&self) -> Vec<f64> {
        match self.prior() {
            None => vec![1.0; self.dim()],
            Some(p) => p.variance(),
        }
    }
    /// log det B.
    pub fn log_det(&self) -> f64 {
        self.prior().map_or(0.0, |p| p.log_det())
    }
}

/// C = S (I + V Λ Vᵀ)⁻¹ Sᵀ, applied through the Sherman–Morrison–Woodbury identity.
pub struct LowRankPrecond<'a> {
    sqrt: PriorSqrt<'a>,
    v: DMatrix<f64>,
    lambda: Vec<f64>,
    /// (1 + λ_i)^{-1/2} − 1: the coefficients of P = L's correction.
    e_mul: Vec<f64>,
    /// (1 + λ_i)^{1/2} − 1: the coefficients of P⁻¹.
    e_solve: Vec<f64>,
    variance: Vec<f64>,
    log_det: f64,
}

/// Largest |VᵀV − I| entry accepted as orthonormal.
const ORTHONORMAL_TOL: f64 = 1e-8;

impl<'a> LowRankPrecond<'a> {
    /// From the prior square root, orthonormal eigenvectors V (n×r, whitened coordinates) and the
    /// eigenvalues λ_i of the prior-preconditioned misfit Hessian. Fails on a dimension mismatch, a
    /// non-orthonormal V, or an eigenvalue ≤ −1 or non-finite (the Hessian would not be positive
    /// definite).
    pub fn new(sqrt: PriorSqrt<'a>, v: DMatrix<f64>, lambda: Vec<f64>) -> Result<Self> {
        let n = sqrt.dim();
        if v.nrows() != n {
            return Err(Error::Numerical(format!(
                "low-rank eigenvectors have {} rows but the prior has dimension {n}",
                v.nrows()
            )));
        }
        if v.ncols() != lambda.len() {
            return Err(Error::Numerical(format!(
                "{} eigenvectors but {} eigenvalues were given",
                v.ncols(),
                lambda.len()
            )));
        }
        if lambda.len() > n {
            return Err(Error::Numerical(format!(
                "rank {} exceeds the dimension {n}",
                lambda.len()
            )));
        }
        if let Some(i) = lambda.iter().position(|l| !(l.is_finite() && *l > -1.0)) {
            return Err(Error::Numerical(format!(
                "eigenvalue {i} of the prior-preconditioned misfit Hessian is {}; values must exceed −1 \
                 for the Hessian to be positive definite (the minimisation may not have converged)",
                lambda[i]
            )));
        }
        let gram = v.tr_mul(&v);
        let off = (&gram - DMatrix::<f64>::identity(v.ncols(), v.ncols())).amax();
        if off > ORTHONORMAL_TOL {
            return Err(Error::Numerical(format!(
                "low-rank eigenvectors are not orthonormal (largest |VᵀV − I| entry {off:.3e})"
            )));
        }
        let e_mul = lambda
            .iter()
            .map(|l| 1.0 / (1.0 + l).sqrt() - 1.0)
            .collect();
        let e_solve = lambda.iter().map(|l| (1.0 + l).sqrt() - 1.0).collect();
        let log_det = sqrt.log_det() - lambda.iter().map(|l| l.ln_1p()).sum::<f64>();
        // diag(C) = diag(B) − Σ_i d_i (S v_i)²: one prior application per eigenvector.
        let mut variance = sqrt.variance();
        let mut sv = vec![0.0; n];
        for (i, l) in lambda.iter().enumerate() {
            let d = l / (1.0 + l);
            sqrt.mul(v.column(i).as_slice(), &mut sv);
            for (var, w) in variance.iter_mut().zip(&sv) {
                *var -= d * w * w;
            }
        }
        Ok(LowRankPrecond {
            sqrt,
            v,
            lambda,
            e_mul,
            e_solve,
            variance,
            log_det,
        })
    }

    /// The control-variable form: prior N(0, I), so S = I and C = I − V D Vᵀ.
    pub fn control_variable(v: DMatrix<f64>, lambda: Vec<f64>) -> Result<LowRankPrecond<'static>> {
        LowRankPrecond::new(PriorSqrt::Unit(v.nrows()), v, lambda)
    }

    /// The rank r.
    pub fn rank(&self) -> usize {
        self.lambda.len()
    }
    /// The eigenvalues λ_i of the prior-preconditioned misfit Hessian, in the order given.
    pub fn eigenvalues(&self) -> &[f64] {
        &self.lambda
    }
    /// The eigenvectors v_i in whitened coordinates (orthonormal columns).
    pub fn whitened_eigenvectors(&self) -> &DMatrix<f64> {
        &self.v
    }
    /// The eigen-directions in model space, S v_i (columns; B⁻¹-orthonormal).
    pub fn model_eigenvectors(&self) -> DMatrix<f64> {
        let n = self.v.nrows();
        let mut out = DMatrix::<f64>::zeros(n, self.v.ncols());
        for (i, mut col) in out.column_iter_mut().enumerate() {
            self.sqrt
                .mul(self.v.column(i).as_slice(), col.as_mut_slice());
        }
        out
    }

    /// out = (I + V diag(coef) Vᵀ) u.
    fn correct(&self, coef: &[f64], u: &[f64], out: &mut [f64]) {
        let mut c = self.v.tr_mul(&DVector::from_column_slice(u));
        for (ci, e) in c.iter_mut().zip(coef) {
            *ci *= e;
        }
        let vc = &self.v * c;
        for ((o, a), b) in out.iter_mut().zip(u).zip(vc.iter()) {
            *o = a + b;
        }
    }
}

impl Preconditioner for LowRankPrecond<'_> {
    fn dim(&self) -> usize {
        self.v.nrows()
    }
    fn kind(&self) -> &'static str {
        "low-rank"
    }
    fn mul_sqrt_cov(&self, u: &[f64], out: &mut [f64]) {
        let mut t = vec![0.0; u.len()];
        self.correct(&self.e_mul, u, &mut t);
        self.sqrt.mul(&t, out);
    }
    fn mul_sqrt_cov_t(&self, v: &[f64], out: &mut [f64]) {
        let mut t = vec![0.0; v.len()];
        self.sqrt.mul_t(v, &mut t);
        self.correct(&self.e_mul, &t, out);
    }
    fn solve_sqrt_cov(&self, x: &[f64], out: &mut [f64]) -> bool {
        let mut t = vec![0.0; x.len()];
        if !self.sqrt.solve(x, &mut t) {
            return false;
        }
        self.correct(&self.e_solve, &t, out);
        true
    }
    fn solve_sqrt_cov_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        let mut t = vec![0.0; x.len()];
        self.correct(&self.e_solve, x, &mut t);
        self.sqrt.solve_t(&t, out)
    }
    fn log_det_cov(&self) -> f64 {
        self.log_det
    }
    fn variance(&self) -> Vec<f64> {
        self.variance.clone()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::precond::test_support::{dense_of, gaussian, log_det_spd, rel};
    use crate::problem::DensePrior;
    use rand::{RngExt, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// A random instance: a dense SPD prior, orthonormal V and λ ≥ 0.
    fn instance(seed: u64, n: usize, r: usize) -> (DensePrior, DMatrix<f64>, Vec<f64>) {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let a = gaussian(&mut rng, n, n);
        let b = &a * a.transpose() + DMatrix::identity(n, n) * 0.5;
        let prior = DensePrior::new(vec![0.0; n], b).unwrap();
        let v = gaussian(&mut rng, n, r).qr().q();
        let lambda = (0..r).map(|_| 10.0 * rng.random::<f64>()).collect();
        (prior, v, lambda)
    }

    #[test]
    fn woodbury_forms_match_dense_algebra_on_random_instances() {
        // Reference: the n×n matrices H = S⁻ᵀ(I + VΛVᵀ)S⁻¹ and C = H⁻¹ formed and inverted densely with
        // nalgebra (general-purpose linear algebra); the identities are those of Bui-Thanh, Ghattas,
        // Martin & Stadler 2013, SISC 35(6), §5 (Sherman–Morrison–Woodbury).
        for seed in 0..20 {
            let (n, r) = (9 + (seed as usize % 5), 1 + (seed as usize % 4));
            let (prior, v, lambda) = instance(seed, n, r);
            let p = LowRankPrecond::new(PriorSqrt::Borrowed(&prior), v.clone(), lambda.clone())
                .unwrap();
            let mut s = DMatrix::zeros(n, n);
            for j in 0..n {
                let mut e = vec![0.0; n];
                e[j] = 1.0;
                prior.mul_sqrt(&e, s.column_mut(j).as_mut_slice());
            }
            let sinv = s.clone().try_inverse().unwrap();
            let inner = DMatrix::identity(n, n)
                + &v * DMatrix::from_diagonal(&lambda.clone().into()) * v.transpose();
            let h = sinv.transpose() * inner * &sinv;
            let c = h.clone().try_inverse().unwrap();
            let l = dense_of(&p, |p, u, o| p.mul_sqrt_cov(u, o));
            let lt = dense_of(&p, |p, u, o| p.mul_sqrt_cov_t(u, o));
            assert!(
                rel(&(&l * l.transpose()), &c) < 1e-10,
                "seed {seed}: L Lᵀ ≠ C"
            );
            assert!(
                rel(&lt, &l.transpose()) < 1e-12,
                "seed {seed}: Lᵀ is not the transpose of L"
            );
            let linv = dense_of(&p, |p, u, o| assert!(p.solve_sqrt_cov(u, o)));
            let lit = dense_of(&p, |p, u, o| assert!(p.solve_sqrt_cov_t(u, o)));
            assert!(
                rel(&(&linv * &l), &DMatrix::identity(n, n)) < 1e-10,
                "seed {seed}: L⁻¹ L ≠ I"
            );
            assert!(rel(&lit, &linv.transpose()) < 1e-10, "seed {seed}: L⁻ᵀ");
            assert!(rel(&dense_of(&p, |p, u, o| p.mul_cov(u, o)), &c) < 1e-10);
            assert!(rel(&dense_of(&p, |p, u, o| assert!(p.mul_hess(u, o))), &h) < 1e-10);
            let dv: Vec<f64> = c.diagonal().iter().copied().collect();
            for (a, b) in p.variance().iter().zip(&dv) {
                assert!(
                    (a - b).abs() < 1e-10 * b.abs(),
                    "seed {seed}: variance {a} vs {b}"
                );
            }
            let ld = log_det_spd(&c);
            assert!(
                (p.log_det_cov() - ld).abs() < 1e-9 * (1.0 + ld.abs()),
                "seed {seed}: log det"
            );
        }
    }

    #[test]
    fn control_variable_form_is_identity_minus_low_rank() {
        // S = I: C = (I + VΛVᵀ)⁻¹, inverted densely with nalgebra (general-purpose reference).
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let n = 15;
        let v = gaussian(&mut rng, n, 3).qr().q();
        let lambda = vec![50.0, 2.0, 0.3];
        let p = LowRankPrecond::control_variable(v.clone(), lambda.clone()).unwrap();
        let c = (DMatrix::identity(n, n)
            + &v * DMatrix::from_diagonal(&lambda.into()) * v.transpose())
        .try_inverse()
        .unwrap();
        let l = dense_of(&p, |p, u, o| p.mul_sqrt_cov(u, o));
        assert!(rel(&(&l * l.transpose()), &c) < 1e-12);
        for (a, b) in p.variance().iter().zip(c.diagonal().iter()) {
            assert!((a - b).abs() < 1e-12);
        }
    }

    #[test]
    fn rejects_bad_inputs() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let v = gaussian(&mut rng, 6, 2).qr().q();
        assert!(LowRankPrecond::control_variable(v.clone(), vec![1.0]).is_err());
        let e = LowRankPrecond::control_variable(v.clone(), vec![1.0, -1.5])
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("−1"), "{e}");
        let e = LowRankPrecond::control_variable(v * 2.0, vec![1.0, 1.0])
            .err()
            .unwrap()
            .to_string();
        assert!(e.contains("orthonormal"), "{e}");
    }
}
