//! Tests of the Laplace approximation on small problems with a closed-form posterior.

use nalgebra::{DMatrix, DVector};
use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

use super::*;
use crate::error::EvalError;
use crate::problem::{Counted, DensePrior, DiagonalPrior, Prior, Problem};

/// J(x) = ½ (x − xb)ᵀ B⁻¹ (x − xb) + ½ Σ_k (g_kᵀ x − y_k)² / r_k + (c/4) Σ x_i⁴; with c = 0 a
/// linear-Gaussian problem.
struct Quadratic {
    prior: Box<dyn Prior>,
    binv: DMatrix<f64>,
    g: DMatrix<f64>,
    y: Vec<f64>,
    r: Vec<f64>,
    quartic: f64,
    exact: bool,
    give_prior: bool,
}

impl Quadratic {
    /// Diagonal B, random G (m×n).
    fn new(n: usize, m: usize, seed: u64) -> Self {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let std: Vec<f64> = (0..n).map(|i| 0.5 + (i % 7) as f64 * 0.25).collect();
        let mean = (0..n).map(|i| (i as f64 * 0.3).sin()).collect();
        let binv =
            DMatrix::from_diagonal(&std.iter().map(|s| 1.0 / (s * s)).collect::<Vec<_>>().into());
        let prior = Box::new(DiagonalPrior::new(mean, std).unwrap());
        let g = DMatrix::from_fn(m, n, |_, _| rng.sample::<f64, _>(StandardNormal));
        let y = (0..m).map(|k| k as f64 * 0.1).collect();
        let r = (0..m).map(|k| 0.1 + 0.05 * k as f64).collect();
        Quadratic::assemble(prior, binv, g, y, r)
    }
    fn assemble(
        prior: Box<dyn Prior>,
        binv: DMatrix<f64>,
        g: DMatrix<f64>,
        y: Vec<f64>,
        r: Vec<f64>,
    ) -> Self {
        Quadratic {
            prior,
            binv,
            g,
            y,
            r,
            quartic: 0.0,
            exact: true,
            give_prior: true,
        }
    }
    /// From explicit parts, with a dense B.
    fn from_parts(
        xb: Vec<f64>,
        b: DMatrix<f64>,
        g: DMatrix<f64>,
        y: Vec<f64>,
        r: Vec<f64>,
    ) -> Self {
        let binv = b.clone().try_inverse().unwrap();
        let prior = Box::new(DensePrior::new(xb, b).unwrap());
        Quadratic::assemble(prior, binv, g, y, r)
    }
    /// Closed-form posterior covariance (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ and mean, formed densely with nalgebra.
    fn posterior(&self) -> (DMatrix<f64>, Vec<f64>) {
        let rinv =
            DMatrix::from_diagonal(&self.r.iter().map(|v| 1.0 / v).collect::<Vec<_>>().into());
        let h = &self.binv + self.g.transpose() * &rinv * &self.g;
        let c = h.try_inverse().unwrap();
        let rhs = &self.binv * DVector::from_column_slice(self.prior.mean())
            + self.g.transpose() * &rinv * DVector::from_column_slice(&self.y);
        let mean = &c * rhs;
        (c, mean.as_slice().to_vec())
    }
}

impl Problem for Quadratic {
    fn dim(&self) -> usize {
        self.g.ncols()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let d = DVector::from_column_slice(x) - DVector::from_column_slice(self.prior.mean());
        let bd = &self.binv * &d;
        let resid = &self.g * DVector::from_column_slice(x) - DVector::from_column_slice(&self.y);
        let wr = DVector::from_iterator(resid.len(), resid.iter().zip(&self.r).map(|(a, r)| a / r));
        let gr = self.g.tr_mul(&wr);
        let mut j = 0.5 * d.dot(&bd) + 0.5 * resid.dot(&wr);
        for i in 0..x.len() {
            j += 0.25 * self.quartic * x[i].powi(4);
            grad[i] = bd[i] + gr[i] + self.quartic * x[i].powi(3);
        }
        Ok(j)
    }
    fn has_hess_vec(&self) -> bool {
        self.exact && self.quartic == 0.0
    }
    fn hess_vec(
        &self,
        _x: &[f64],
        v: &[f64],
        out: &mut [f64],
    ) -> std::result::Result<(), EvalError> {
        let v = DVector::from_column_slice(v);
        let gv = &self.g * &v;
        let wr = DVector::from_iterator(gv.len(), gv.iter().zip(&self.r).map(|(a, r)| a / r));
        let hv = &self.binv * &v + self.g.tr_mul(&wr);
        out.copy_from_slice(hv.as_slice());
        Ok(())
    }
    fn prior(&self) -> Option<&dyn Prior> {
        self.give_prior.then_some(self.prior.as_ref())
    }
}

fn assert_rel(a: &[f64], b: &[f64], tol: f64, what: &str) {
    for (i, (x, y)) in a.iter().zip(b).enumerate() {
        assert!(
            (x - y).abs() <= tol * y.abs(),
            "{what}: component {i}: {x} vs {y}"
        );
    }
}

fn opts(method: LaplaceMethod) -> LaplaceOptions {
    LaplaceOptions {
        method: Some(method),
        ..Default::default()
    }
}

#[test]
fn dense_and_low_rank_match_the_closed_form_posterior() {
    // Source: for a linear-Gaussian problem the posterior covariance is (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ exactly
    // (textbook Gaussian conditioning, e.g. Tarantola 2005, "Inverse Problem Theory", §3.2.2).
    for exact in [true, false] {
        let mut q = Quadratic::new(40, 6, 3);
        q.exact = exact;
        let (c, mean) = q.posterior();
        let truth: Vec<f64> = c.diagonal().iter().copied().collect();
        let p = Counted::new(q);
        for method in [LaplaceMethod::Dense, LaplaceMethod::LowRank] {
            let l = laplace(&p, &mean, &[], &opts(method)).unwrap();
            assert_eq!(l.method, method);
            assert_eq!(l.info.exact_products, exact);
            assert_rel(
                &l.variance,
                &truth,
                1e-6,
                &format!("{method:?}, exact {exact}"),
            );
            let mut out = vec![0.0; 40];
            let e0: Vec<f64> = (0..40).map(|i| if i == 0 { 1.0 } else { 0.0 }).collect();
            l.precond.mul_cov(&e0, &mut out);
            assert_rel(&out, c.column(0).as_slice(), 1e-6, "first column of C");
            if exact {
                assert_eq!(l.info.evaluations.hessvec as usize, l.info.products);
            } else {
                assert_eq!(l.info.evaluations.gradient as usize, 2 * l.info.products);
            }
        }
        let lr = laplace(&p, &mean, &[], &opts(LaplaceMethod::LowRank)).unwrap();
        // The misfit Hessian Sᵀ Gᵀ R⁻¹ G S has rank 6 (6 observations).
        assert_eq!(lr.rank, Some(6));
        assert!(lr.eigenvalues.windows(2).all(|w| w[0] >= w[1]));
        let dn = laplace(&p, &mean, &[], &opts(LaplaceMethod::Dense)).unwrap();
        assert_rel(
            &lr.eigenvalues,
            &dn.eigenvalues[..6],
            1e-6,
            "leading eigenvalues",
        );
    }
}

#[test]
fn low_rank_sketch_grows_until_the_threshold() {
    // 120 observations in dimension 200: a misfit of rank 120, more than the first sketch (30
    // columns). The closed form is as above (Gaussian conditioning).
    let q = Quadratic::new(200, 120, 11);
    let (c, mean) = q.posterior();
    let truth: Vec<f64> = c.diagonal().iter().copied().collect();
    let p = Counted::new(q);
    let o = LaplaceOptions {
        eigen_threshold: 1e-9,
        ..opts(LaplaceMethod::LowRank)
    };
    let l = laplace(&p, &mean, &[], &o).unwrap();
    assert_eq!(l.rank, Some(120));
    assert!(!l.info.rank_truncated);
    assert_rel(&l.variance, &truth, 1e-6, "grown sketch");
    // A maximum rank below the misfit rank is reported as truncation.
    let o = LaplaceOptions {
        max_rank: Some(40),
        ..o
    };
    let l = laplace(&p, &mean, &[], &o).unwrap();
    assert_eq!(l.rank, Some(40));
    assert!(l.info.rank_truncated);
}

#[test]
fn finite_difference_hessian_matches_finitediff() {
    // Reference: the central-difference Hessian of the general-purpose `finitediff` crate (argmin
    // project) from the same gradient, on a non-quadratic cost.
    let mut q = Quadratic::new(8, 3, 5);
    q.quartic = 0.7;
    let x: Vec<f64> = (0..8).map(|i| 0.2 * i as f64 - 0.5).collect();
    let grad = |x: &Vec<f64>| {
        let mut g = vec![0.0; x.len()];
        q.cost_grad(x, &mut g).unwrap();
        Ok(g)
    };
    let reference = finitediff::vec::central_hessian(&grad)(&x).unwrap();
    let p = Counted::new(q);
    let l = laplace(&p, &x, &[], &opts(LaplaceMethod::Dense)).unwrap();
    assert!(l.info.asymmetry.unwrap() < 1e-8);
    let h = DMatrix::from_fn(8, 8, |r, c| reference[r][c]);
    let c = h.try_inverse().unwrap();
    assert_rel(
        &l.variance,
        c.diagonal().as_slice(),
        1e-6,
        "finitediff reference",
    );
}

#[test]
fn lbfgs_and_diagonal_methods() {
    // Diagonal: for a diagonal Hessian the probing estimator is exact for any ±1 probe (Bekas,
    // Kokiopoulou & Saad 2007); here no observations, so H = B⁻¹ and C = B.
    let mut q = Quadratic::new(300, 0, 2);
    q.give_prior = false;
    let b = q.prior.variance();
    let mean = q.prior.mean().to_vec();
    let p = Counted::new(q);
    let l = laplace(
        &p,
        &mean,
        &[],
        &LaplaceOptions {
            dense_max_dim: 100,
            ..Default::default()
        },
    )
    .unwrap();
    assert_eq!(l.method, LaplaceMethod::Diagonal);
    assert_rel(&l.variance, &b, 1e-12, "diagonal");
    // L-BFGS chosen automatically when pairs are given; exact (s, H s) pairs along all n unit
    // directions reproduce H⁻¹ (BFGS with exact line searches on a quadratic: Nocedal & Wright 2006,
    // Theorem 6.4, from memory — here the secant conditions H_m y_k = s_k pin it down for a diagonal H).
    let pairs: Vec<(Vec<f64>, Vec<f64>)> = (0..300)
        .map(|i| {
            let mut s = vec![0.0; 300];
            s[i] = 1.0;
            let mut y = vec![0.0; 300];
            y[i] = 1.0 / b[i];
            (s, y)
        })
        .collect();
    let l = laplace(
        &p,
        &mean,
        &pairs,
        &LaplaceOptions {
            dense_max_dim: 100,
            ..Default::default()
        },
    )
    .unwrap();
    assert_eq!(l.method, LaplaceMethod::Lbfgs);
    assert_eq!(l.info.evaluations.gradient, 0);
    assert_rel(&l.variance, &b, 1e-10, "lbfgs");
}

#[test]
fn errors_name_the_problem() {
    let mut q = Quadratic::new(30, 4, 1);
    q.give_prior = false;
    let p = Counted::new(q);
    let x = vec![0.0; 30];
    let e = laplace(&p, &x, &[], &opts(LaplaceMethod::LowRank))
        .err()
        .unwrap()
        .to_string();
    assert!(e.contains("Problem::prior"), "{e}");
    let e = laplace(
        &p,
        &x,
        &[],
        &LaplaceOptions {
            max_rank: Some(31),
            ..Default::default()
        },
    )
    .err()
    .unwrap()
    .to_string();
    assert!(e.contains("larger than the dimension 30"), "{e}");
    assert!(laplace(&p, &x[..3], &[], &LaplaceOptions::default()).is_err());

    // Negative curvature: a concave quartic term at a point away from 0 is not a minimum.
    let mut q = Quadratic::new(5, 2, 1);
    q.quartic = -50.0;
    let p = Counted::new(q);
    let e = laplace(&p, &[1.0; 5], &[], &opts(LaplaceMethod::Dense))
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("not positive definite") && e.contains("converged"),
        "{e}"
    );
    let e = laplace(&p, &[1.0; 5], &[], &opts(LaplaceMethod::LowRank))
        .err()
        .unwrap()
        .to_string();
    assert!(e.contains("not positive definite"), "{e}");
}

/// A problem whose gradient is NaN away from the origin.
struct Blows;
impl Problem for Blows {
    fn dim(&self) -> usize {
        3
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let bad = x.iter().any(|v| *v != 0.0);
        for (g, v) in grad.iter_mut().zip(x) {
            *g = if bad { f64::NAN } else { *v };
        }
        Ok(0.0)
    }
}

/// J(x) = ½ |x|² in dimension n.
struct Isotropic(usize);
impl Problem for Isotropic {
    fn dim(&self) -> usize {
        self.0
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        grad.copy_from_slice(x);
        Ok(0.5 * x.iter().map(|v| v * v).sum::<f64>())
    }
}

#[test]
fn a_dense_hessian_too_large_is_refused_before_any_evaluation() {
    let p = Counted::new(Isotropic(DENSE_LIMIT + 1));
    let x = vec![0.0; DENSE_LIMIT + 1];
    let e = laplace(&p, &x, &[], &opts(LaplaceMethod::Dense))
        .err()
        .unwrap()
        .to_string();
    assert!(e.contains("low-rank, lbfgs or diagonal"), "{e}");
    assert_eq!(p.counts().gradient, 0);
    // The automatic choice goes to the diagonal here (no prior, no pairs); H = I exactly, so the
    // probing estimate is exact (Bekas, Kokiopoulou & Saad 2007: exact for diagonal matrices).
    let l = laplace(&p, &x, &[], &LaplaceOptions::default()).unwrap();
    assert_eq!(l.method, LaplaceMethod::Diagonal);
    assert!(l.variance.iter().all(|v| (v - 1.0).abs() < 1e-9));
}

#[test]
fn non_finite_products_are_errors() {
    let p = Counted::new(Blows);
    let e = laplace(&p, &[0.0; 3], &[], &LaplaceOptions::default())
        .err()
        .unwrap()
        .full_message();
    assert!(
        e.contains("Hessian-vector product") && e.contains("not finite"),
        "{e}"
    );
}

fn numbers(v: &serde_json::Value, key: &str) -> Vec<f64> {
    v[key]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

#[test]
fn matches_numpy_scipy_reference() {
    // Source: tests/reference/laplace_numpy.json, written by tests/reference/laplace_numpy.py
    // (numpy 2.2.6 / scipy 1.15.3: dense Cholesky posterior (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ and scipy.linalg.eigh of
    // the prior-preconditioned misfit Hessian).
    let fixture: serde_json::Value =
        serde_json::from_str(include_str!("../../../tests/reference/laplace_numpy.json")).unwrap();
    for name in ["diagonal", "correlated"] {
        let c = &fixture[name];
        let (n, m) = (
            c["n"].as_u64().unwrap() as usize,
            c["m"].as_u64().unwrap() as usize,
        );
        let q = Quadratic::from_parts(
            numbers(c, "xb"),
            DMatrix::from_row_slice(n, n, &numbers(c, "b")),
            DMatrix::from_row_slice(m, n, &numbers(c, "g")),
            numbers(c, "y"),
            numbers(c, "r"),
        );
        let mean = numbers(c, "mean");
        let p = Counted::new(q);
        for method in [LaplaceMethod::Dense, LaplaceMethod::LowRank] {
            let l = laplace(&p, &mean, &[], &opts(method)).unwrap();
            let what = format!("{name}, {method:?}");
            assert_rel(&l.variance, &numbers(c, "variance"), 1e-6, &what);
            assert_rel(&l.eigenvalues[..m], &numbers(c, "eigenvalues"), 1e-6, &what);
            let ld = c["log_det_cov"].as_f64().unwrap();
            assert!(
                (l.precond.log_det_cov() - ld).abs() < 1e-6 * ld.abs(),
                "{what}: log det"
            );
            if method == LaplaceMethod::LowRank {
                assert_eq!(l.rank, Some(m), "{what}: rank = number of observations");
            }
        }
    }
}

#[test]
fn method_names_round_trip_through_options_and_serde() {
    for &m in LaplaceMethod::ALL {
        assert_eq!(m.as_str().parse::<LaplaceMethod>().unwrap(), m);
        let json = serde_json::to_string(&m).unwrap();
        assert_eq!(json, format!("\"{}\"", m.as_str()));
        assert_eq!(serde_json::from_str::<LaplaceMethod>(&json).unwrap(), m);
    }
    let e = "cholesky".parse::<LaplaceMethod>().unwrap_err().to_string();
    assert!(
        e.contains("'cholesky'") && e.contains("choose dense, low-rank, lbfgs or diagonal"),
        "{e}"
    );
}

#[test]
fn diagonal_falls_back_to_the_low_rank_covariance_where_probing_fails() {
    // H = B⁻¹ + a 11ᵀ with large prior variances: every off-diagonal entry equals a, as large as the
    // misfit's share of the diagonal, so 64 Rademacher probes in dimension 400 misjudge many diagonal
    // entries by ±a·√(n/64) ≈ ±2.5a (Bekas, Kokiopoulou & Saad 2007: the error is the off-diagonal
    // mass) and some come out negative. The closed form is Gaussian conditioning as above.
    let (n, a) = (400, 2.0);
    let var: Vec<f64> = (0..n).map(|i| 50.0 + i as f64).collect();
    let q = || {
        Quadratic::from_parts(
            vec![0.0; n],
            DMatrix::from_diagonal(&DVector::from_vec(var.clone())),
            DMatrix::from_element(1, n, 1.0),
            vec![0.3],
            vec![1.0 / a],
        )
    };
    let (c, mean) = q().posterior();
    let truth: Vec<f64> = c.diagonal().iter().copied().collect();
    let o = LaplaceOptions {
        eigen_threshold: 1e-9,
        ..opts(LaplaceMethod::Diagonal)
    };
    let p = Counted::new(q());
    let l = laplace(&p, &mean, &[], &o).unwrap();
    assert_eq!(l.method, LaplaceMethod::Diagonal);
    assert_eq!(l.precond.kind(), "diagonal");
    assert_eq!(
        l.info.diagonal_source,
        Some(DiagonalSource::LowRankCovariance)
    );
    assert!(l.info.diagonal_nonpositive > 0);
    assert_eq!(l.rank, Some(1));
    assert_rel(&l.variance, &truth, 1e-6, "low-rank diagonal");
    let json = serde_json::to_value(&l.info).unwrap();
    assert_eq!(json["diagonal_source"], "low-rank-covariance");
    // Without the prior there is nothing to fall back on: an error that says what to change.
    let mut bare = q();
    bare.give_prior = false;
    let e = laplace(&Counted::new(bare), &mean, &[], &o)
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("not positive") && e.contains("Problem::prior"),
        "{e}"
    );
    // Where probing works, it is used and said so; the other methods leave the field out.
    let l = laplace(
        &p,
        &mean,
        &[],
        &LaplaceOptions {
            diagonal_probes: n,
            ..o.clone()
        },
    )
    .unwrap();
    assert_eq!(l.info.diagonal_source, Some(DiagonalSource::Probing));
    assert_rel(
        &l.variance,
        &c.try_inverse()
            .unwrap()
            .diagonal()
            .map(|h| 1.0 / h)
            .as_slice(),
        1e-9,
        "probing",
    );
    let l = laplace(&p, &mean, &[], &opts(LaplaceMethod::LowRank)).unwrap();
    assert_eq!(l.info.diagonal_source, None);
    assert!(serde_json::to_value(&l.info)
        .unwrap()
        .get("diagonal_source")
        .is_none());
}
