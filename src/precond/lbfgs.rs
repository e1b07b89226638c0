//! The L-BFGS inverse-Hessian approximation left by the minimiser, as a Gaussian metric.
//!
//! From the pairs s_k = x_{k+1} − x_k, y_k = g_{k+1} − g_k (oldest first), ρ_k = 1 / (s_kᵀ y_k), the BFGS
//! recursion on the inverse Hessian is
//!
//! ```text
//! H_{k+1} = (I − ρ_k s_k y_kᵀ) H_k (I − ρ_k y_k s_kᵀ) + ρ_k s_k s_kᵀ,
//! ```
//!
//! started from H_0 = γ I with γ = sᵀy / yᵀy of the newest pair (Nocedal & Wright 2006, "Numerical
//! Optimization", eq. 7.20) or from the prior, H_0 = B.
//!
//! **Square root (product form).** Let H_k = L_k L_kᵀ and B_k = H_k⁻¹. Write V_k = I − ρ_k y_k s_kᵀ and
//! note V_kᵀ s_k = s_k − ρ_k s_k (y_kᵀ s_k) = 0. Try L_{k+1} = V_kᵀ L_k + s_k zᵀ with L_k z = β s_k: the
//! cross terms V_kᵀ L_k z s_kᵀ vanish and L_{k+1} L_{k+1}ᵀ = V_kᵀ H_k V_k + (zᵀz) s_k s_kᵀ, which is
//! H_{k+1} when zᵀz = β² s_kᵀ B_k s_k = ρ_k. Collecting terms,
//!
//! ```text
//! L_{k+1} = (I − s_k a_kᵀ) L_k,   a_k = ρ_k y_k − (ρ_k / s_kᵀ B_k s_k)^{1/2} B_k s_k,
//! 1 − a_kᵀ s_k = (ρ_k s_kᵀ B_k s_k)^{1/2} > 0,
//! ```
//!
//! the product form of Brodlie, Gourlay & Greenstadt 1973, "Rank-one and rank-two corrections to
//! positive definite matrices expressed in product form", IMA J. Appl. Math. 11 (from memory). Each
//! factor is inverted by Sherman–Morrison, (I − s aᵀ)⁻¹ = I + s aᵀ / (1 − aᵀ s), so B_k s_k = L_k⁻ᵀ L_k⁻¹ s_k
//! costs O(k n) and L, Lᵀ, L⁻¹, L⁻ᵀ each cost O(m n). log det H_m = log det H_0 + 2 Σ log(1 − a_kᵀ s_k).
//!
//! **Variances (compact form).** diag(H_m) comes from the compact representation of Byrd, Nocedal &
//! Schnabel 1994, "Representations of quasi-Newton matrices and their use in limited memory methods",
//! Math. Prog. 63, Theorem 2.2:
//!
//! ```text
//! H_m = H_0 + [S  H_0 Y] [ R⁻ᵀ (D + Yᵀ H_0 Y) R⁻¹   −R⁻ᵀ ] [ Sᵀ     ]
//!                        [ −R⁻¹                       0  ] [ Yᵀ H_0 ],
//! ```
//!
//! with S = [s_0 … s_{m−1}], Y likewise, R upper triangular with R_ij = s_iᵀ y_j (i ≤ j), D = diag(s_iᵀ y_i).
//! [`Preconditioner::mul_cov`] also uses it.
//!
//! **Skipped pairs.** A pair with s_kᵀ y_k ≤ ε |s_k| |y_k| (curvature condition violated or numerically
//! zero; ε = [`LbfgsPrecond::DEFAULT_CURVATURE_EPS`] by default) or with non-finite entries is skipped,
//! as is common practice for BFGS updates (Nocedal & Wright 2006, §6.1, from memory); the count is kept.

use nalgebra::{DMatrix, DVector};

use super::low_rank::PriorSqrt;
use super::Preconditioner;
use crate::error::{Error, Result};
use crate::util::vector::dot;

/// The initial inverse Hessian H_0 = L_0 L_0ᵀ.
enum Initial<'a> {
    /// H_0 = γ I.
    Scaled(f64),
    /// H_0 = B = S Sᵀ (the prior must solve with S).
    Prior(PriorSqrt<'a>),
}

impl Initial<'_> {
    fn mul(&self, z: &[f64], out: &mut [f64]) {
        match self {
            Initial::Scaled(g) => scale(g.sqrt(), z, out),
            Initial::Prior(s) => s.mul(z, out),
        }
    }
    fn mul_t(&self, z: &[f64], out: &mut [f64]) {
        match self {
            Initial::Scaled(g) => scale(g.sqrt(), z, out),
            Initial::Prior(s) => s.mul_t(z, out),
        }
    }
    fn solve(&self, z: &[f64], out: &mut [f64]) -> bool {
        match self {
            Initial::Scaled(g) => {
                scale(1.0 / g.sqrt(), z, out);
                true
            }
            Initial::Prior(s) => s.solve(z, out),
        }
    }
    fn solve_t(&self, z: &[f64], out: &mut [f64]) -> bool {
        match self {
            Initial::Scaled(g) => {
                scale(1.0 / g.sqrt(), z, out);
                true
            }
            Initial::Prior(s) => s.solve_t(z, out),
        }
    }
    /// out = H_0 z.
    fn mul_h0(&self, z: &[f64], out: &mut [f64]) {
        let mut t = vec![0.0; z.len()];
        self.mul_t(z, &mut t);
        self.mul(&t, out);
    }
}

fn scale(c: f64, z: &[f64], out: &mut [f64]) {
    for (o, v) in out.iter_mut().zip(z) {
        *o = c * v;
    }
}

/// x ← x + c a.
fn axpy(c: f64, a: &[f64], x: &mut [f64]) {
    for (xi, ai) in x.iter_mut().zip(a) {
        *xi += c * ai;
    }
}

/// The L-BFGS inverse-Hessian approximation H_m = L Lᵀ (see the module documentation).
pub struct LbfgsPrecond<'a> {
    n: usize,
    init: Initial<'a>,
    /// Kept s_k, oldest first.
    s: Vec<Vec<f64>>,
    /// Product-form vectors a_k.
    a: Vec<Vec<f64>>,
    /// 1 − a_kᵀ s_k.
    c: Vec<f64>,
    /// Compact form: U = [S  H_0 Y] (n × 2m) and the middle matrix M (2m × 2m).
    u: DMatrix<f64>,
    m: DMatrix<f64>,
    skipped: usize,
    variance: Vec<f64>,
    log_det: f64,
}

impl<'a> LbfgsPrecond<'a> {
    /// Relative curvature threshold below which a pair is skipped.
    pub const DEFAULT_CURVATURE_EPS: f64 = 1e-10;

    /// With H_0 = γ I, γ = sᵀy / yᵀy of the newest kept pair.
    pub fn new(
        pairs: &[(Vec<f64>, Vec<f64>)],
        curvature_eps: f64,
    ) -> Result<LbfgsPrecond<'static>> {
        let n = pairs.first().map_or(0, |p| p.0.len());
        let kept = keep_pairs(pairs, n, curvature_eps)?;
        let gamma = match kept.last() {
            Some((s, y)) => dot(s, y) / dot(y, y),
            None => return Err(Error::Config("no usable (s, y) pairs".into())),
        };
        LbfgsPrecond::build(n, Initial::Scaled(gamma), &kept, pairs.len() - kept.len())
    }

    /// With the prior as initial matrix, H_0 = B = S Sᵀ. The prior must be able to solve with S.
    pub fn with_prior(
        pairs: &[(Vec<f64>, Vec<f64>)],
        prior: PriorSqrt<'a>,
        curvature_eps: f64,
    ) -> Result<Self> {
        let n = prior.dim();
        let probe = vec![1.0; n];
        let mut t = vec![0.0; n];
        if !(prior.solve(&probe, &mut t) && prior.solve_t(&probe, &mut t)) {
            return Err(Error::Config(
                "the L-BFGS preconditioner with the prior as initial matrix needs a prior that can solve \
                 with its square root S (a diagonal or dense B can); otherwise use the scaled identity"
                    .into(),
            ));
        }
        let kept = keep_pairs(pairs, n, curvature_eps)?;
        LbfgsPrecond::build(n, Initial::Prior(prior), &kept, pairs.len() - kept.len())
    }

    /// Number of (s, y) pairs used.
    pub fn pairs_used(&self) -> usize {
        self.s.len()
    }
    /// Number of pairs skipped for failing the curvature condition.
    pub fn pairs_skipped(&self) -> usize {
        self.skipped
    }
    /// The initial scaling γ, where H_0 = γ I.
    pub fn initial_scaling(&self) -> Option<f64> {
        match self.init {
            Initial::Scaled(g) => Some(g),
            Initial::Prior(_) => None,
        }
    }

    fn build(
        n: usize,
        init: Initial<'a>,
        kept: &[(&[f64], &[f64])],
        skipped: usize,
    ) -> Result<Self> {
        let mut p = LbfgsPrecond {
            n,
            init,
            s: Vec::with_capacity(kept.len()),
            a: Vec::with_capacity(kept.len()),
            c: Vec::with_capacity(kept.len()),
            u: DMatrix::zeros(0, 0),
            m: DMatrix::zeros(0, 0),
            skipped,
            variance: Vec::new(),
            log_det: 0.0,
        };
        let mut t = vec![0.0; n];
        let mut bs = vec![0.0; n];
        for (s, y) in kept {
            let rho = 1.0 / dot(s, y);
            // t = L_k⁻¹ s_k, then B_k s_k = L_k⁻ᵀ t.
            p.solve_l(s, &mut t);
            let q = dot(&t, &t);
            p.solve_lt(&t, &mut bs);
            let beta = (rho / q).sqrt();
            let a: Vec<f64> = y
                .iter()
                .zip(&bs)
                .map(|(yi, bi)| rho * yi - beta * bi)
                .collect();
            let c = (rho * q).sqrt();
            if !(c.is_finite() && c > 0.0 && a.iter().all(|v| v.is_finite())) {
                return Err(Error::Numerical(
                    "the L-BFGS update became singular: the (s, y) pairs are badly scaled or nearly \
                     dependent"
                        .into(),
                ));
            }
            p.s.push(s.to_vec());
            p.a.push(a);
            p.c.push(c);
        }
        let log_det_h0 = match &p.init {
            Initial::Scaled(g) => n as f64 * g.ln(),
            Initial::Prior(s) => s.log_det(),
        };
        p.log_det = log_det_h0 + 2.0 * p.c.iter().map(|c| c.ln()).sum::<f64>();
        p.compact(kept)?;
        Ok(p)
    }

    /// Builds the compact form (U, M) and the variances from it.
    fn compact(&mut self, kept: &[(&[f64], &[f64])]) -> Result<()> {
        let (n, m) = (self.n, kept.len());
        let mut u = DMatrix::<f64>::zeros(n, 2 * m);
        let mut ymat = DMatrix::<f64>::zeros(n, m);
        for (j, (s, y)) in kept.iter().enumerate() {
            u.column_mut(j).copy_from_slice(s);
            ymat.column_mut(j).copy_from_slice(y);
            self.init.mul_h0(y, u.column_mut(m + j).as_mut_slice());
        }
        let smat = u.columns(0, m);
        let h0y = u.columns(m, m);
        let sty = smat.tr_mul(&ymat);
        let r = DMatrix::from_fn(m, m, |i, j| if i <= j { sty[(i, j)] } else { 0.0 });
        let yhy = ymat.tr_mul(&h0y);
        let mut rinv = DMatrix::<f64>::identity(m, m);
        if !r.solve_upper_triangular_mut(&mut rinv) {
            return Err(Error::Numerical(
                "the L-BFGS compact form is singular (sᵀy = 0)".into(),
            ));
        }
        let mut dy = yhy;
        for i in 0..m {
            dy[(i, i)] += sty[(i, i)];
        }
        let top = rinv.transpose() * dy * &rinv;
        let mut mid = DMatrix::<f64>::zeros(2 * m, 2 * m);
        mid.view_mut((0, 0), (m, m)).copy_from(&top);
        mid.view_mut((0, m), (m, m)).copy_from(&(-rinv.transpose()));
        mid.view_mut((m, 0), (m, m)).copy_from(&(-&rinv));
        let mut variance = match &self.init {
            Initial::Scaled(g) => vec![*g; n],
            Initial::Prior(s) => s.variance(),
        };
        let mut row = DVector::<f64>::zeros(2 * m);
        for (i, var) in variance.iter_mut().enumerate() {
            row.copy_from(&u.row(i).transpose());
            *var += row.dot(&(&mid * &row));
        }
        if let Some(i) = variance.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
            return Err(Error::Numerical(format!(
                "L-BFGS variance {i} is {}: the (s, y) pairs are badly conditioned",
                variance[i]
            )));
        }
        self.u = u;
        self.m = mid;
        self.variance = variance;
        Ok(())
    }

    /// out = L⁻¹ x = L_0⁻¹ F_0⁻¹ ⋯ F_{m−1}⁻¹ x, over the factors built so far.
    fn solve_l(&self, x: &[f64], out: &mut [f64]) -> bool {
        let mut t = x.to_vec();
        for ((s, a), c) in self.s.iter().zip(&self.a).zip(&self.c).rev() {
            let k = dot(a, &t) / c;
            axpy(k, s, &mut t);
        }
        self.init.solve(&t, out)
    }
    /// out = L⁻ᵀ x = F_{m−1}⁻ᵀ ⋯ F_0⁻ᵀ L_0⁻ᵀ x.
    fn solve_lt(&self, x: &[f64], out: &mut [f64]) -> bool {
        if !self.init.solve_t(x, out) {
            return false;
        }
        for ((s, a), c) in self.s.iter().zip(&self.a).zip(&self.c) {
            let k = dot(s, out) / c;
            axpy(k, a, out);
        }
        true
    }
}

/// The pairs that pass the curvature test, after checking lengths.
fn keep_pairs(pairs: &[(Vec<f64>, Vec<f64>)], n: usize, eps: f64) -> Result<Vec<(&[f64], &[f64])>> {
    if n == 0 {
        return Err(Error::Config(
            "no (s, y) pairs were given for the L-BFGS preconditioner".into(),
        ));
    }
    let mut kept = Vec::new();
    for (k, (s, y)) in pairs.iter().enumerate() {
        if s.len() != n || y.len() != n {
            return Err(Error::Config(format!(
                "L-BFGS pair {k} has lengths ({}, {}), expected {n}",
                s.len(),
                y.len()
            )));
        }
        let sy = dot(s, y);
        let ok = s.iter().chain(y).all(|v| v.is_finite())
            && sy.is_finite()
            && sy > eps * dot(s, s).sqrt() * dot(y, y).sqrt();
        if ok {
            kept.push((s.as_slice(), y.as_slice()));
        }
    }
    if kept.is_empty() {
        return Err(Error::Numerical(format!(
            "none of the {} (s, y) pairs satisfies the curvature condition sᵀy > 0; use the dense or \
             diagonal Hessian instead",
            pairs.len()
        )));
    }
    Ok(kept)
}

impl Preconditioner for LbfgsPrecond<'_> {
    fn dim(&self) -> usize {
        self.n
    }
    fn kind(&self) -> &'static str {
        "lbfgs"
    }
    fn mul_sqrt_cov(&self, u: &[f64], out: &mut [f64]) {
        self.init.mul(u, out);
        for (s, a) in self.s.iter().zip(&self.a) {
            let k = -dot(a, out);
            axpy(k, s, out);
        }
    }
    fn mul_sqrt_cov_t(&self, v: &[f64], out: &mut [f64]) {
        let mut t = v.to_vec();
        for (s, a) in self.s.iter().zip(&self.a).rev() {
            let k = -dot(s, &t);
            axpy(k, a, &mut t);
        }
        self.init.mul_t(&t, out);
    }
    fn solve_sqrt_cov(&self, x: &[f64], out: &mut [f64]) -> bool {
        self.solve_l(x, out)
    }
    fn solve_sqrt_cov_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        self.solve_lt(x, out)
    }
    fn log_det_cov(&self) -> f64 {
        self.log_det
    }
    fn variance(&self) -> Vec<f64> {
        self.variance.clone()
    }
    /// C v through the compact form (Byrd, Nocedal & Schnabel 1994, Theorem 2.2).
    fn mul_cov(&self, v: &[f64], out: &mut [f64]) {
        self.init.mul_h0(v, out);
        let w = self.u.tr_mul(&DVector::from_column_slice(v));
        let corr = &self.u * (&self.m * w);
        for (o, c) in out.iter_mut().zip(corr.iter()) {
            *o += c;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::precond::test_support::{dense_of, gaussian, log_det_spd, rel};
    use crate::problem::{DiagonalPrior, Prior};
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;

    /// Pairs (s, A s) for a random SPD A, plus one pair with negative curvature in the middle.
    fn pairs(seed: u64, n: usize, m: usize) -> Vec<(Vec<f64>, Vec<f64>)> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let g = gaussian(&mut rng, n, n);
        let a = &g * g.transpose() + DMatrix::identity(n, n);
        let mut out = Vec::new();
        for k in 0..m {
            let s = gaussian(&mut rng, n, 1);
            let y = if k == m / 2 { -&s } else { &a * &s };
            out.push((s.as_slice().to_vec(), y.as_slice().to_vec()));
        }
        out
    }

    /// The explicit BFGS recursion on the inverse Hessian, skipping pairs with sᵀy ≤ 0
    /// (Nocedal & Wright 2006, "Numerical Optimization", eq. 6.17), formed densely.
    fn dense_bfgs(h0: DMatrix<f64>, pairs: &[(Vec<f64>, Vec<f64>)]) -> DMatrix<f64> {
        let n = h0.nrows();
        let mut h = h0;
        for (s, y) in pairs {
            let s = DMatrix::from_column_slice(n, 1, s);
            let y = DMatrix::from_column_slice(n, 1, y);
            let sy = (s.transpose() * &y)[(0, 0)];
            if sy <= 0.0 {
                continue;
            }
            let rho = 1.0 / sy;
            let v = DMatrix::identity(n, n) - &y * s.transpose() * rho;
            h = v.transpose() * h * v + &s * s.transpose() * rho;
        }
        h
    }

    fn check(p: &dyn Preconditioner, h: &DMatrix<f64>, what: &str) {
        let l = dense_of(p, |p, u, o| p.mul_sqrt_cov(u, o));
        assert!(
            rel(&(&l * l.transpose()), h) < 1e-10,
            "{what}: product form L Lᵀ vs dense BFGS"
        );
        let lt = dense_of(p, |p, u, o| p.mul_sqrt_cov_t(u, o));
        assert!(rel(&lt, &l.transpose()) < 1e-12, "{what}: Lᵀ");
        let c = dense_of(p, |p, u, o| p.mul_cov(u, o));
        assert!(rel(&c, h) < 1e-10, "{what}: compact form vs dense BFGS");
        let linv = dense_of(p, |p, u, o| assert!(p.solve_sqrt_cov(u, o)));
        let n = h.nrows();
        assert!(
            rel(&(&linv * &l), &DMatrix::identity(n, n)) < 1e-9,
            "{what}: L⁻¹ L"
        );
        let lit = dense_of(p, |p, u, o| assert!(p.solve_sqrt_cov_t(u, o)));
        assert!(rel(&lit, &linv.transpose()) < 1e-9, "{what}: L⁻ᵀ");
        for (i, (a, b)) in p.variance().iter().zip(h.diagonal().iter()).enumerate() {
            assert!(
                (a - b).abs() < 1e-10 * b.abs(),
                "{what}: variance {i}: {a} vs {b}"
            );
        }
        let ld = log_det_spd(h);
        assert!(
            (p.log_det_cov() - ld).abs() < 1e-8 * (1.0 + ld.abs()),
            "{what}: log det"
        );
    }

    #[test]
    fn scaled_identity_start_matches_dense_bfgs_recursion() {
        // Reference: the dense BFGS recursion with H_0 = γI, γ = sᵀy/yᵀy of the newest pair (Nocedal &
        // Wright 2006, eq. 7.20); compact form of Byrd, Nocedal & Schnabel 1994, Theorem 2.2.
        for seed in 0..8 {
            let (n, m) = (7 + seed as usize % 4, 3 + seed as usize % 5);
            let pr = pairs(seed, n, m);
            let p = LbfgsPrecond::new(&pr, 0.0).unwrap();
            assert_eq!(p.pairs_skipped(), 1);
            assert_eq!(p.pairs_used(), m - 1);
            let (s, y) = pr.last().unwrap();
            let gamma = dot(s, y) / dot(y, y);
            assert!((p.initial_scaling().unwrap() - gamma).abs() < 1e-15);
            let h = dense_bfgs(DMatrix::identity(n, n) * gamma, &pr);
            check(&p, &h, &format!("seed {seed}"));
        }
    }

    #[test]
    fn prior_start_matches_dense_bfgs_recursion() {
        // Reference: the same recursion from H_0 = B = diag(σ²).
        let n = 8;
        let pr = pairs(42, n, 6);
        let std: Vec<f64> = (0..n).map(|i| 0.5 + 0.3 * i as f64).collect();
        let prior = DiagonalPrior::new(vec![0.0; n], std).unwrap();
        let b = DMatrix::from_diagonal(&prior.variance().into());
        let p = LbfgsPrecond::with_prior(&pr, PriorSqrt::Borrowed(&prior), 0.0).unwrap();
        check(&p, &dense_bfgs(b, &pr), "prior start");
    }

    #[test]
    fn dense_prior_start_matches_dense_bfgs_recursion() {
        // Reference: the same recursion from a dense, correlated H_0 = B (B = S Sᵀ, S lower Cholesky).
        use crate::problem::DensePrior;
        let n = 9;
        let pr = pairs(5, n, 7);
        let b = DMatrix::from_fn(n, n, |i, j| {
            0.8f64.powi((i as i32 - j as i32).abs()) * (1.0 + 0.1 * i as f64)
        });
        let b = (&b + b.transpose()) * 0.5 + DMatrix::identity(n, n);
        let prior = DensePrior::new(vec![0.0; n], b.clone()).unwrap();
        let p = LbfgsPrecond::with_prior(&pr, PriorSqrt::Borrowed(&prior), 0.0).unwrap();
        check(&p, &dense_bfgs(b, &pr), "dense prior start");
    }

    #[test]
    fn unusable_pairs_are_errors() {
        let bad = vec![(vec![1.0, 0.0], vec![-1.0, 0.0])];
        let e = LbfgsPrecond::new(&bad, 1e-10).err().unwrap().to_string();
        assert!(e.contains("curvature"), "{e}");
        let mismatched = vec![(vec![1.0, 0.0], vec![1.0])];
        assert!(LbfgsPrecond::new(&mismatched, 1e-10).is_err());
        assert!(LbfgsPrecond::new(&[], 1e-10).is_err());
    }
}
