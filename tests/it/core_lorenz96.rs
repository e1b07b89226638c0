//! Lorenz-96 model, tangent-linear, adjoint and 4D-Var cost: checks against facts from outside the
//! project (each check names its source).

use crate::common;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use varpost::optimize::{find_map, MapConfig};
use varpost::problem::builtin;
use varpost::problem::check::{gradient_test, norm};
use varpost::problem::lorenz96::{Lorenz96, Lorenz96Config, Lorenz96Model, ObsOperator, Scenario};
use varpost::problem::{Counted, Problem};

fn randn(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// A state on the attractor.
fn attractor_state(model: &Lorenz96Model, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut x: Vec<f64> = randn(&mut rng, model.n)
        .iter()
        .map(|z| model.forcing + z)
        .collect();
    for _ in 0..500 {
        x = model.step(&x);
    }
    x
}

#[test]
fn tangent_linear_error_falls_as_eps_squared() {
    // Tangent-linear test ||M(x + eps d) - M(x) - eps M' d|| = O(eps^2): common practice, no source.
    let model = Lorenz96Model::default();
    let x = attractor_state(&model, 1);
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let d = randn(&mut rng, model.n);
    let mx = model.step(&x);
    let tl = model.step_tl(&x, &d);
    let mut prev = None;
    for k in 1..=6 {
        let eps = 10f64.powi(-k);
        let xp: Vec<f64> = x.iter().zip(&d).map(|(a, b)| a + eps * b).collect();
        let mxp = model.step(&xp);
        let r: Vec<f64> = (0..model.n).map(|i| mxp[i] - mx[i] - eps * tl[i]).collect();
        let e = norm(&r);
        if let Some(p) = prev {
            // Each decade of eps lowers the remainder by two decades (ratio 100, allow 70..130).
            let ratio: f64 = p / e;
            assert!(
                (70.0..130.0).contains(&ratio),
                "eps={eps}: remainder ratio {ratio}"
            );
        }
        prev = Some(e);
    }
}

#[test]
fn adjoint_passes_the_dot_product_test() {
    // Adjoint test <M' d, y> = <d, M'^T y> to about 100 machine epsilons: common practice, no source.
    let model = Lorenz96Model::default();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for seed in 0..5 {
        let x = attractor_state(&model, 10 + seed);
        let d = randn(&mut rng, model.n);
        let y = randn(&mut rng, model.n);
        let lhs = dot(&model.step_tl(&x, &d), &y);
        let rhs = dot(&d, &model.step_adj(&x, &y));
        let rel = (lhs - rhs).abs() / lhs.abs().max(rhs.abs());
        assert!(rel < 1e-12, "relative adjoint mismatch {rel:e}");
    }
}

#[test]
fn leading_lyapunov_exponent_matches_the_published_error_growth() {
    // Lorenz & Emanuel 1998 (J. Atmos. Sci. 55): for N = 40, F = 8 small errors double in about
    // 0.42 time units (2.1 days), i.e. a leading Lyapunov exponent near ln 2 / 0.42 = 1.65 per unit;
    // values of about 1.7 are widely quoted (from memory). Estimated here by renormalised tangent-linear
    // integration (Benettin et al. 1980 method) along a long trajectory.
    let model = Lorenz96Model::default();
    let mut x = attractor_state(&model, 4);
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let mut d = randn(&mut rng, model.n);
    let nd = norm(&d);
    d.iter_mut().for_each(|v| *v /= nd);
    let steps = 8000;
    let mut sum_log = 0.0;
    for _ in 0..steps {
        d = model.step_tl(&x, &d);
        x = model.step(&x);
        let g = norm(&d);
        sum_log += g.ln();
        d.iter_mut().for_each(|v| *v /= g);
    }
    let lambda = sum_log / (steps as f64 * model.dt);
    let doubling = 2f64.ln() / lambda;
    assert!(
        (1.4..2.0).contains(&lambda),
        "leading Lyapunov exponent {lambda}"
    );
    assert!(
        (0.35..0.5).contains(&doubling),
        "doubling time {doubling} time units"
    );
}

#[test]
fn nearby_trajectories_diverge_on_the_attractor() {
    // Chaos at F = 8 (Lorenz 1996): a 1e-6 perturbation grows by orders of magnitude in 10 time units
    // and saturates at the climatological spread (a few units), not at zero.
    let model = Lorenz96Model::default();
    let x = attractor_state(&model, 6);
    let mut y = x.clone();
    y[0] += 1e-6;
    let tx = model.run(&x, 200);
    let ty = model.run(&y, 200);
    let e = norm(
        &tx[200]
            .iter()
            .zip(&ty[200])
            .map(|(a, b)| a - b)
            .collect::<Vec<_>>(),
    ) / (model.n as f64).sqrt();
    assert!(e > 0.5, "error after 10 units {e}");
}

#[test]
fn gradient_of_the_4dvar_cost_passes_the_taylor_test() {
    // Taylor test r(alpha) -> 1 with remainder O(alpha^2): common practice, no source (Navon, Zou &
    // Derber 1992, MWR 120 use it).
    for op in ["linear", "square"] {
        let s = varpost::problem::settings::Settings::from_pairs(&[("obs_op", op)]);
        let b = builtin::open("lorenz96", &s).unwrap();
        let x = b.problem.prior().unwrap().mean().to_vec();
        let r = gradient_test(&b.problem, &x, 7).unwrap();
        assert!(r.passed, "{op}: {}", r.verdict);
        assert!(
            r.fd_max_rel_error.unwrap() < 1e-6,
            "{op}: finite differences {:?}",
            r.fd_max_rel_error
        );
    }
}

#[test]
fn a_wrong_gradient_fails_the_taylor_test() {
    struct Wrong(Lorenz96);
    impl Problem for Wrong {
        fn dim(&self) -> usize {
            self.0.dim()
        }
        fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, varpost::EvalError> {
            let c = self.0.cost_grad(x, g)?;
            g[3] *= 1.01;
            Ok(c)
        }
    }
    let p = Wrong(Lorenz96::new(builtin::demo_scenario().unwrap()).unwrap());
    let x = p.0.scenario().background.clone();
    let r = gradient_test(&p, &x, 7).unwrap();
    assert!(
        !r.passed,
        "a gradient with one component 1% off passed: {}",
        r.verdict
    );
}

#[test]
fn analysis_converges_and_reduces_the_error() {
    let p = Counted::new(Lorenz96::new(builtin::demo_scenario().unwrap()).unwrap());
    let xb = p.inner().scenario().background.clone();
    let truth = p.inner().scenario().truth.as_ref().unwrap()[0].clone();
    let m = find_map(&p, &xb, &MapConfig::default()).unwrap();
    assert!(m.converged, "{}", m.reason);
    assert!(
        m.grad_norm_start / m.grad_norm > 1e5,
        "gradient reduced only {}",
        m.grad_norm_start / m.grad_norm
    );
    let rmse = |a: &[f64]| {
        (a.iter()
            .zip(&truth)
            .map(|(x, y)| (x - y).powi(2))
            .sum::<f64>()
            / 40.0)
            .sqrt()
    };
    assert!(
        rmse(&m.x) < 0.6 * rmse(&xb),
        "analysis {} vs background {}",
        rmse(&m.x),
        rmse(&xb)
    );
    // At the minimum of a well-specified problem 2 Jo is near the number of observations minus the
    // degrees of freedom the analysis used (chi-square argument; common practice, no source): loosely.
    let split = p.cost_split(&m.x).unwrap().unwrap();
    let nobs = p.inner().scenario().observations.len() as f64;
    assert!(
        2.0 * split.observation < 1.5 * nobs,
        "2 Jo = {} for {nobs} observations",
        2.0 * split.observation
    );
    assert!(
        p.counts().gradient >= m.iterations,
        "every iteration costs at least one adjoint run"
    );
    assert!(m.pairs.len() > 5);
}

#[test]
fn default_settings_reproduce_the_shipped_demo_exactly() {
    let sc = Scenario::synthesize(&Lorenz96Config::default()).unwrap();
    for (name, text) in sc.to_files().unwrap() {
        let shipped =
            std::fs::read_to_string(common::root().join("demo-data/lorenz96").join(name)).unwrap();
        assert!(
            shipped == text,
            "demo-data/lorenz96/{name} differs from `varpost synth` with default settings"
        );
    }
    let embedded = builtin::demo_scenario().unwrap();
    assert_eq!(embedded.background, sc.background);
    assert_eq!(embedded.observations, sc.observations);
}

#[test]
fn calibration_mode_draws_the_truth_from_the_background_distribution() {
    // In calibration mode truth - xb ~ N(0, B): over many seeds the mean of (truth - xb)^T B^-1 (truth - xb)
    // is n (chi-square with n degrees of freedom; textbook).
    let mut acc = 0.0;
    let seeds = 200;
    for seed in 0..seeds {
        let c = Lorenz96Config {
            synth: varpost::problem::lorenz96::SynthMode::Calibration,
            seed,
            spinup: 10,
            ..Default::default()
        };
        let sc = Scenario::synthesize(&c).unwrap();
        let p = Lorenz96::new(sc.clone()).unwrap();
        let d: Vec<f64> = sc.truth.unwrap()[0]
            .iter()
            .zip(&sc.background)
            .map(|(a, b)| a - b)
            .collect();
        let mut w = vec![0.0; 40];
        p.dense_prior().solve(&d, &mut w);
        acc += dot(&d, &w);
    }
    let mean = acc / seeds as f64;
    // sd of the mean: sqrt(2 n / seeds) = 0.63; allow 4 sd.
    assert!((mean - 40.0).abs() < 2.6, "mean chi-square {mean}");
}

#[test]
fn square_operator_is_used() {
    let s = varpost::problem::settings::Settings::from_pairs(&[("obs_op", "square")]);
    let b = builtin::open("lorenz96", &s).unwrap();
    assert!(b.description.contains("square"));
    let c = Lorenz96Config {
        obs_op: ObsOperator::Square,
        ..Default::default()
    };
    let sc = Scenario::synthesize(&c).unwrap();
    assert!(
        sc.observations.iter().all(|o| o.value > -3.0 * o.sigma),
        "squared observations are not negative"
    );
}

/// The error of building the built-in `problem` from settings (it must fail).
fn refusal(problem: &str, pairs: &[(&str, &str)]) -> String {
    match builtin::open(
        problem,
        &varpost::problem::settings::Settings::from_pairs(pairs),
    ) {
        Ok(_) => panic!("{problem} {pairs:?} was accepted"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn sizes_beyond_the_machine_are_refused_before_allocating() {
    // Input validation, no outside source. The estimate counts B, its copy and its Cholesky factor
    // (3 n^2 numbers): n = 100000 needs more than 80 GB for B alone.
    let big = Lorenz96Config {
        model: Lorenz96Model {
            n: 100_000,
            ..Default::default()
        },
        ..Default::default()
    };
    assert!(big.memory_plan().total() > 3 * 80_000_000_000);
    assert!(Lorenz96Config::default().memory_plan().total() < 10_000_000);
    // Sizes no machine holds (petabytes), so the refusal does not depend on this machine's memory.
    let e = refusal("lorenz96", &[("n", "10000000")]);
    assert!(e.contains("would need") && e.contains("PiB"), "{e}");
    assert!(e.contains("Cholesky") && e.contains("lower n"), "{e}");
    let e = refusal("lorenz96", &[("window", "1000000000000")]);
    assert!(
        e.contains("window = 1000000000000") && e.contains("lower window"),
        "{e}"
    );
    let e = refusal("lorenz96", &[("window", &usize::MAX.to_string())]);
    assert!(e.contains("would need"), "{e}");
}

#[test]
fn non_finite_and_out_of_range_settings_are_named() {
    // Input validation, no outside source.
    for (key, value) in [
        ("sigma_o", "inf"),
        ("sigma_o", "NaN"),
        ("sigma_b", "1e-200"),
        ("corr_len", "-1"),
        ("dt", "0"),
        ("forcing", "nan"),
        ("forcing", "1e300"),
        ("spinup", "100000000000"),
    ] {
        let e = refusal("lorenz96", &[(key, value)]);
        assert!(e.contains(&format!("setting {key}=")), "{key}={value}: {e}");
    }
    // A step far beyond RK4's stability for this model blows the truth run up.
    let e = refusal("lorenz96", &[("dt", "1.5")]);
    assert!(e.contains("blew up") && e.contains("dt=1.5"), "{e}");
}
