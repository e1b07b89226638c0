//! The linear-Gaussian problem: closed form against numpy/scipy, MAP against the closed form, and the
//! optimiser on the Rosenbrock function.

use crate::common;

use varpost::optimize::{find_map, MapConfig};
use varpost::problem::linear_gaussian::{LinearGaussian, LinearGaussianConfig};
use varpost::problem::{Counted, Problem};
use varpost::EvalError;

#[test]
fn export_still_matches_the_fixture_the_numpy_reference_was_computed_from() {
    let p = LinearGaussian::new(LinearGaussianConfig::default()).unwrap();
    let fixture =
        common::read_json(&common::root().join("tests/reference/linear_gaussian_problem.json"));
    assert!(
        p.export() == fixture,
        "linear-gaussian defaults changed: re-export tests/reference/linear_gaussian_problem.json"
    );
}

#[test]
fn closed_form_matches_numpy_dense_reference() {
    // Reference: tests/reference/linear_gaussian_numpy.py, a dense Cholesky solve of
    // (B^-1 + G^T R^-1 G) with numpy/scipy (scipy.linalg.cho_solve).
    let p = LinearGaussian::new(LinearGaussianConfig::default()).unwrap();
    let r = p.reference().unwrap();
    let np = common::read_json(&common::root().join("tests/reference/linear_gaussian_numpy.json"));
    let mean = common::vecf(&np["mean"]);
    let var = common::vecf(&np["variance"]);
    assert!(common::max_rel_err(&r.mean, &mean) < 1e-10);
    assert!(common::max_rel_err_each(&r.variance, &var) < 1e-10);
    let c = p.cost(&r.mean).unwrap();
    assert!((c - np["cost_at_mean"].as_f64().unwrap()).abs() < 1e-10 * c);
}

#[test]
fn map_equals_the_closed_form_posterior_mean() {
    for cfg in [
        LinearGaussianConfig::default(),
        LinearGaussianConfig {
            n: 200,
            m: 30,
            rank: 12,
            b_cond: 1e3,
            ..Default::default()
        },
    ] {
        let p = Counted::new(LinearGaussian::new(cfg.clone()).unwrap());
        let r = p.inner().reference().unwrap();
        let xb = p.prior().unwrap().mean().to_vec();
        let m = find_map(&p, &xb, &MapConfig::default()).unwrap();
        assert!(m.converged, "{}", m.reason);
        let e = common::max_rel_err(&m.x, &r.mean);
        assert!(
            e < 1e-6,
            "n = {}: MAP differs from the closed-form mean by {e:e}",
            cfg.n
        );
    }
}

#[test]
fn exact_hessian_vector_product_is_the_posterior_precision() {
    // H v for a linear-Gaussian problem is (B^-1 + G^T R^-1 G) v: compare with a gradient difference,
    // exact for a quadratic (textbook).
    let p = LinearGaussian::new(LinearGaussianConfig::default()).unwrap();
    let n = p.dim();
    let x: Vec<f64> = (0..n).map(|i| i as f64 * 0.1).collect();
    let v: Vec<f64> = (0..n).map(|i| ((i * 7) % 5) as f64 - 2.0).collect();
    let mut hv = vec![0.0; n];
    p.hess_vec(&x, &v, &mut hv).unwrap();
    let (mut g0, mut g1) = (vec![0.0; n], vec![0.0; n]);
    p.cost_grad(&x, &mut g0).unwrap();
    let xv: Vec<f64> = x.iter().zip(&v).map(|(a, b)| a + b).collect();
    p.cost_grad(&xv, &mut g1).unwrap();
    let diff: Vec<f64> = g1.iter().zip(&g0).map(|(a, b)| a - b).collect();
    assert!(common::max_rel_err(&hv, &diff) < 1e-10);
}

#[test]
fn large_closed_form_needs_no_dense_matrix() {
    // n = 1e5 with rank 20: the closed form is O(n r) in memory; variances lie below the prior's.
    let cfg = LinearGaussianConfig {
        n: 100_000,
        m: 40,
        rank: 20,
        ..Default::default()
    };
    let p = LinearGaussian::new(cfg).unwrap();
    let r = p.reference().unwrap();
    let b = p.prior().unwrap().variance();
    assert!(r
        .variance
        .iter()
        .zip(&b)
        .all(|(v, b)| *v > 0.0 && *v <= *b * (1.0 + 1e-12)));
}

struct Rosenbrock;
impl Problem for Rosenbrock {
    fn dim(&self) -> usize {
        2
    }
    fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, EvalError> {
        let (a, b) = (x[0], x[1]);
        g[0] = -2.0 * (1.0 - a) - 400.0 * a * (b - a * a);
        g[1] = 200.0 * (b - a * a);
        Ok((1.0 - a).powi(2) + 100.0 * (b - a * a).powi(2))
    }
}

#[test]
fn lbfgs_reaches_the_rosenbrock_minimum() {
    // Handbook fact: the Rosenbrock function has its minimum 0 at (1, 1).
    let p = Counted::new(Rosenbrock);
    let m = find_map(
        &p,
        &[-1.2, 1.0],
        &MapConfig {
            grad_rtol: 1e-12,
            ..Default::default()
        },
    )
    .unwrap();
    assert!(
        (m.x[0] - 1.0).abs() < 1e-8 && (m.x[1] - 1.0).abs() < 1e-8,
        "{:?} ({})",
        m.x,
        m.reason
    );
    assert!(m.cost < 1e-16);
    assert_eq!(p.counts().gradient, p.counts().model_runs());
}

struct BlowsUp;
impl Problem for BlowsUp {
    fn dim(&self) -> usize {
        2
    }
    fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, EvalError> {
        // A quadratic whose "model" blows up (NaN) far from the minimum, like a model run on a too-long step.
        if x[0].abs() > 3.0 {
            return Ok(f64::NAN);
        }
        g[0] = 2.0 * (x[0] - 1.0);
        g[1] = 20.0 * (x[1] + 1.0);
        Ok((x[0] - 1.0).powi(2) + 10.0 * (x[1] + 1.0).powi(2))
    }
}

#[test]
fn minimiser_backs_off_from_non_finite_trial_points() {
    let p = Counted::new(BlowsUp);
    let m = find_map(&p, &[0.0, 60.0], &MapConfig::default()).unwrap();
    assert!(m.converged, "{}", m.reason);
    assert!(
        (m.x[0] - 1.0).abs() < 1e-6 && (m.x[1] + 1.0).abs() < 1e-6,
        "{:?}",
        m.x
    );
}

/// The error of building linear-gaussian from settings (it must fail).
fn refusal(pairs: &[(&str, &str)]) -> String {
    match varpost::problem::builtin::open(
        "linear-gaussian",
        &varpost::problem::settings::Settings::from_pairs(pairs),
    ) {
        Ok(_) => panic!("linear-gaussian {pairs:?} was accepted"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn sizes_beyond_the_machine_are_refused_before_allocating() {
    // Input validation, no outside source. m = 1e8 observations with the default n = 20 (rank 20): the
    // factor A and R^-1 A hold 2 m rank numbers, 32 GB.
    let cfg = LinearGaussianConfig {
        m: 100_000_000,
        rank: 20,
        ..Default::default()
    };
    assert!(cfg.memory_plan().total() > 32_000_000_000);
    assert!(LinearGaussianConfig::default().memory_plan().total() < 1_000_000);
    // Sizes no machine holds, so the refusal does not depend on this machine's memory.
    let e = refusal(&[("m", "100000000000000")]);
    assert!(
        e.contains("would need") && e.contains("lower m or rank"),
        "{e}"
    );
    let e = refusal(&[("n", "100000000000000"), ("m", "10")]);
    assert!(e.contains("would need") && e.contains("lower n"), "{e}");
}

#[test]
fn non_finite_and_out_of_range_settings_are_named() {
    // Input validation, no outside source.
    for (key, value) in [
        ("b_cond", "inf"),
        ("b_cond", "0.5"),
        ("r_cond", "1e20"),
        ("sigma_o", "NaN"),
        ("sigma_o", "0"),
        ("n", "0"),
        ("m", "0"),
        ("rank", "30"),
    ] {
        let e = refusal(&[(key, value)]);
        assert!(e.contains(&format!("setting {key}=")), "{key}={value}: {e}");
    }
}
