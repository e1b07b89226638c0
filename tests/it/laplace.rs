//! The Laplace approximation at the analysis on the built-in problems: the linear-Gaussian problem
//! (closed-form posterior) and Lorenz-96 4D-Var (dense and low-rank estimates against each other).

use varpost::optimize::{find_map, MapConfig};
use varpost::precond::{laplace, LaplaceMethod, LaplaceOptions, SpectrumOf};
use varpost::problem::linear_gaussian::{LinearGaussian, LinearGaussianConfig};
use varpost::problem::lorenz96::{Lorenz96, Lorenz96Config, Scenario};
use varpost::{Counted, Problem};

fn forced(method: LaplaceMethod) -> LaplaceOptions {
    LaplaceOptions {
        method: Some(method),
        ..Default::default()
    }
}

/// Largest componentwise |a_i − b_i| / |b_i|.
fn max_rel(a: &[f64], b: &[f64]) -> f64 {
    assert_eq!(a.len(), b.len());
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs() / y.abs())
        .fold(0.0, f64::max)
}

#[test]
fn linear_gaussian_dense_and_low_rank_match_the_closed_form() {
    // Source: Gaussian conditioning, Σ = (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ (e.g. Tarantola 2005, "Inverse Problem
    // Theory", §3.2.2), computed by the problem's own Woodbury form without n×n matrices.
    let config = LinearGaussianConfig {
        n: 300,
        m: 60,
        rank: 25,
        b_cond: 1e3,
        ..Default::default()
    };
    let problem = Counted::new(LinearGaussian::new(config).unwrap());
    let reference = problem.inner().reference().unwrap();
    for method in [LaplaceMethod::Dense, LaplaceMethod::LowRank] {
        let l = laplace(&problem, &reference.mean, &[], &forced(method)).unwrap();
        let err = max_rel(&l.variance, &reference.variance);
        assert!(err < 1e-6, "{method:?}: variance error {err:.2e}");
        assert_eq!(
            l.info.spectrum_of,
            Some(SpectrumOf::PriorPreconditionedMisfit)
        );
        if method == LaplaceMethod::LowRank {
            // rank(G) = 25, and each of its eigenvalues is above the 0.1 threshold here.
            assert_eq!(l.rank, Some(25), "eigenvalues {:?}", l.eigenvalues);
            assert!(
                l.info.exact_products && l.info.evaluations.hessvec as usize == l.info.products
            );
            assert!(
                l.info.products < 300,
                "{} products for a rank-25 update",
                l.info.products
            );
        }
    }
}

#[test]
fn lorenz96_hessian_at_the_analysis() {
    // Lorenz-96 (Lorenz 1996, ECMWF Seminar), N = 40, F = 8, dt = 0.05, with the default window and
    // observations. No closed form: the checks are internal consistency of two independent estimates.
    let scenario = Scenario::synthesize(&Lorenz96Config::default()).unwrap();
    let problem = Counted::new(Lorenz96::new(scenario).unwrap());
    let xb = problem.inner().scenario().background.clone();
    let map = find_map(&problem, &xb, &MapConfig::default()).unwrap();
    assert!(map.converged, "{}", map.reason);

    let dense = laplace(&problem, &map.x, &map.pairs, &forced(LaplaceMethod::Dense)).unwrap();
    // Symmetric to finite-difference accuracy: central differences of adjoint gradients with step
    // h ≈ ε^{1/3} have relative error of order ε^{2/3} ≈ 4e-11 times the third-derivative scale
    // (common practice, no source); 1e-6 leaves ample room.
    let asym = dense.info.asymmetry.unwrap();
    assert!(asym < 1e-6, "asymmetry {asym:.2e}");
    // Positive definite: the Cholesky factorisation succeeded and every variance is positive.
    assert!(dense.variance.iter().all(|v| *v > 0.0));
    // Each variance is below the background variance (the observations add information; Gaussian
    // conditioning reduces variance, textbook) — approximately so for the nonlinear Hessian.
    let prior_var = problem.prior().unwrap().variance();
    assert!(dense
        .variance
        .iter()
        .zip(&prior_var)
        .all(|(a, b)| a < &(1.01 * b)));

    // Low-rank with a rank that suffices (every eigenvalue kept) equals the dense estimate up to the
    // finite-difference error.
    let opts = LaplaceOptions {
        eigen_threshold: 1e-6,
        ..forced(LaplaceMethod::LowRank)
    };
    let lr = laplace(&problem, &map.x, &[], &opts).unwrap();
    let err = max_rel(&lr.variance, &dense.variance);
    assert!(
        err < 1e-5,
        "low-rank vs dense variance {err:.2e} at rank {:?}",
        lr.rank
    );
    let k = lr.eigenvalues.len().min(5);
    let eig_err = max_rel(&lr.eigenvalues[..k], &dense.eigenvalues[..k]);
    assert!(eig_err < 1e-5, "leading eigenvalues {eig_err:.2e}");

    // The default threshold keeps fewer directions; the variances stay close (discarded λ < 0.1).
    let lr01 = laplace(&problem, &map.x, &[], &forced(LaplaceMethod::LowRank)).unwrap();
    assert!(lr01.rank.unwrap() <= lr.rank.unwrap());
    let err01 = max_rel(&lr01.variance, &dense.variance);
    assert!(err01 < 0.1, "default threshold: {err01:.2e}");

    // The L-BFGS metric from the minimiser's pairs costs no evaluations.
    let lb = laplace(&problem, &map.x, &map.pairs, &forced(LaplaceMethod::Lbfgs)).unwrap();
    assert_eq!(
        lb.info.evaluations.gradient + lb.info.evaluations.hessvec,
        0
    );
    assert!(lb.variance.iter().all(|v| *v > 0.0 && v.is_finite()));
}
