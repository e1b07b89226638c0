//! Viscous Burgers model, its tangent-linear and adjoint, the circulant background covariance and the
//! Burgers 4D-Var cost: checks against facts from outside the project (each check names its source).

use crate::common;

use std::f64::consts::PI;

use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use varpost::problem::burgers::{Burgers, BurgersConfig, BurgersModel, TRUTH_AMPLITUDES};
use varpost::problem::check::{gradient_test, norm};
use varpost::problem::circulant::{periodic_column, periodised_column, soar, CirculantPrior};
use varpost::problem::lorenz96::SynthMode;
use varpost::problem::settings::Settings;
use varpost::problem::{builtin, Prior, Problem};

fn randn(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn demo() -> Burgers {
    Burgers::new(BurgersConfig::default()).unwrap()
}

/// A state with a front: the demo truth after 60 steps, plus a little noise.
fn front_state(p: &Burgers, seed: u64) -> Vec<f64> {
    let model = p.model();
    let mut u = model.run(p.truth(), 60).pop().unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    for (v, z) in u.iter_mut().zip(randn(&mut rng, model.n)) {
        *v += 0.05 * z;
    }
    u
}

/// The tangent-linear of `steps` steps from u along du.
fn run_tl(model: &BurgersModel, u: &[f64], du: &[f64], steps: usize) -> Vec<f64> {
    let traj = model.run(u, steps);
    let mut d = du.to_vec();
    for x in &traj[..steps] {
        d = model.step_tl(x, &d);
    }
    d
}

/// The adjoint of `steps` steps from u applied to a.
fn run_adj(model: &BurgersModel, u: &[f64], a: &[f64], steps: usize) -> Vec<f64> {
    let traj = model.run(u, steps);
    let mut l = a.to_vec();
    for x in traj[..steps].iter().rev() {
        l = model.step_adj(x, &l);
    }
    l
}

#[test]
fn tangent_linear_error_falls_as_eps_squared() {
    // Tangent-linear test ||M(u + eps d) - M(u) - eps M' d|| = O(eps^2): common practice, no source.
    let p = demo();
    let model = p.model();
    let u = front_state(&p, 1);
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let d = randn(&mut rng, model.n);
    for steps in [1, 20] {
        let mu = model.run(&u, steps).pop().unwrap();
        let tl = run_tl(&model, &u, &d, steps);
        let mut prev = None;
        for k in 1..=5 {
            let eps = 10f64.powi(-k);
            let up: Vec<f64> = u.iter().zip(&d).map(|(a, b)| a + eps * b).collect();
            let mup = model.run(&up, steps).pop().unwrap();
            let r: Vec<f64> = (0..model.n).map(|i| mup[i] - mu[i] - eps * tl[i]).collect();
            let e = norm(&r);
            if let Some(prev) = prev {
                // Each decade of eps lowers the remainder by two decades (ratio 100, allow 70..130).
                let ratio: f64 = prev / e;
                assert!(
                    (70.0..130.0).contains(&ratio),
                    "{steps} steps, eps={eps}: remainder ratio {ratio}"
                );
            }
            prev = Some(e);
        }
    }
}

#[test]
fn adjoint_passes_the_dot_product_test() {
    // Adjoint test <M' d, y> = <d, M'^T y> to about 100 machine epsilons: common practice, no source.
    let p = demo();
    let model = p.model();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for (seed, steps) in [(10, 1), (11, 1), (12, 1), (13, 25), (14, 25)] {
        let u = front_state(&p, seed);
        let d = randn(&mut rng, model.n);
        let y = randn(&mut rng, model.n);
        let lhs = dot(&run_tl(&model, &u, &d, steps), &y);
        let rhs = dot(&d, &run_adj(&model, &u, &y, steps));
        let rel = (lhs - rhs).abs() / lhs.abs().max(rhs.abs());
        assert!(
            rel < 1e-12,
            "{steps} steps: relative adjoint mismatch {rel:e}"
        );
    }
}

#[test]
fn energy_decays_monotonically_at_the_rate_of_the_energy_equation() {
    // Viscous Burgers energy equation d/dt (1/2 int u^2) = -nu int u_x^2 on a periodic domain: the
    // advection term integrates to zero, so the energy decays monotonically for nu > 0 (textbook, e.g.
    // Whitham 1974, Linear and Nonlinear Waves; from memory). For the demo truth
    // u0 = sum_m a_m sin(2 pi m x + phi_m), Parseval gives E(0) = sum_m a_m^2 / 4 and
    // dE/dt(0) = -nu sum_m a_m^2 (2 pi m)^2 / 2, whatever the phases.
    let p = demo();
    let model = p.model();
    let e0: f64 = TRUTH_AMPLITUDES.iter().map(|a| a * a / 4.0).sum();
    let rate0: f64 = -model.nu
        * TRUTH_AMPLITUDES
            .iter()
            .enumerate()
            .map(|(m, a)| a * a * (2.0 * PI * (m + 1) as f64).powi(2) / 2.0)
            .sum::<f64>();
    let traj = model.run(p.truth(), 1000);
    let e: Vec<f64> = traj.iter().map(|u| model.energy(u)).collect();
    assert!((e[0] - e0).abs() < 1e-12 * e0, "E(0) = {} vs {e0}", e[0]);
    // Second-order one-sided difference (textbook).
    let rate = (-3.0 * e[0] + 4.0 * e[1] - e[2]) / (2.0 * model.dt);
    assert!(
        (rate - rate0).abs() < 5e-3 * rate0.abs(),
        "dE/dt(0) = {rate} vs {rate0}"
    );
    // Monotone decay over t = 1, through the steepening of fronts.
    for (k, w) in e.windows(2).enumerate() {
        assert!(w[1] < w[0], "energy rose at step {k}: {} -> {}", w[0], w[1]);
    }
    assert!(e[1000] < 0.8 * e[0] && e[1000] > 0.0);
}

#[test]
fn without_viscosity_the_skew_symmetric_form_conserves_energy() {
    // The skew-symmetric central form 1/3 (u u_x + (u^2)_x) conserves sum u_j^2 exactly in the
    // semi-discrete inviscid limit (common practice, e.g. Morinishi et al. 1998, J. Comput. Phys. 143;
    // from memory); RK4 adds only an O(dt^4) loss per step. A plain advective form u_j (u_{j+1} -
    // u_{j-1}) / (2 dx) would change the energy at O(dx^2).
    let p = demo();
    let model = BurgersModel {
        nu: 1e-12,
        ..p.model()
    };
    let traj = model.run(p.truth(), 40);
    let e0 = model.energy(&traj[0]);
    let e1 = model.energy(&traj[40]);
    assert!((e1 - e0).abs() < 1e-9 * e0, "energy {e0} -> {e1}");
}

#[test]
fn a_small_fourier_mode_decays_at_rate_nu_k_squared() {
    // Linear limit of viscous Burgers: a small-amplitude mode eps sin(k x) obeys the heat equation and
    // decays as exp(-nu k^2 t) (textbook). The central Laplacian's rate differs by (k dx)^2 / 12
    // (3e-4 here), and the nonlinear correction is of relative order (eps k t)^2.
    let model = BurgersModel {
        n: 200,
        nu: 0.01,
        dt: 1e-3,
    };
    let m = 2.0;
    let k = 2.0 * PI * m;
    let u0: Vec<f64> = model
        .grid()
        .iter()
        .map(|x| 1e-3 * (k * x + 0.3).sin())
        .collect();
    let steps = 500;
    let t = steps as f64 * model.dt;
    let amplitude = |u: &[f64]| {
        let (s, c) = model
            .grid()
            .iter()
            .zip(u)
            .fold((0.0, 0.0), |(s, c), (x, v)| {
                (s + v * (k * x).sin(), c + v * (k * x).cos())
            });
        2.0 * model.dx() * (s * s + c * c).sqrt()
    };
    let ut = model.run(&u0, steps).pop().unwrap();
    let rate = -(amplitude(&ut) / amplitude(&u0)).ln() / t;
    let expected = model.nu * k * k;
    assert!(
        (rate - expected).abs() < 2e-3 * expected,
        "decay rate {rate} vs nu k^2 = {expected}"
    );
}

#[test]
fn stability_limits_match_the_rk4_stability_interval() {
    // RK4's stability region meets the negative real axis at -2.785 and the imaginary axis at
    // +-2 sqrt(2) (textbook, e.g. Hairer & Wanner, Solving ODEs II; from memory). Pure diffusion on the
    // grid has eigenvalues down to -4 nu / dx^2, pure central advection up to i U / dx.
    let diffusive = BurgersModel {
        n: 100,
        nu: 0.01,
        dt: 1.0,
    };
    let dx = diffusive.dx();
    let limit = diffusive.max_stable_dt(0.0) * 4.0 * diffusive.nu / (dx * dx);
    assert!((limit - 2.785).abs() < 2e-3, "real-axis limit {limit}");
    let advective = BurgersModel {
        n: 100,
        nu: 1e-12,
        dt: 1.0,
    };
    let limit = advective.max_stable_dt(1.0) / dx;
    assert!(
        (limit - 2.0 * 2f64.sqrt()).abs() < 1e-3,
        "imaginary-axis limit {limit}"
    );
}

#[test]
fn an_unstable_time_step_is_refused_with_the_limits() {
    let s = Settings::from_pairs(&[("n", "2000")]);
    let e = builtin::open("burgers", &s).err().unwrap().to_string();
    assert!(e.contains("setting dt=0.001"), "{e}");
    assert!(e.contains("diffusion limit"), "{e}");
    assert!(e.contains("--set dt="), "{e}");
    let s = Settings::from_pairs(&[("dt", "0.02")]);
    let e = builtin::open("burgers", &s).err().unwrap().to_string();
    assert!(e.contains("CFL"), "{e}");
    for (k, v) in [
        ("nu", "-1"),
        ("n", "4"),
        ("obs_every", "0"),
        ("obs_stride", "500"),
        ("synth", "other"),
    ] {
        let s = Settings::from_pairs(&[(k, v)]);
        let e = builtin::open("burgers", &s).err().unwrap().to_string();
        assert!(e.contains(k) || e.contains(v), "{k}={v}: {e}");
    }
}

#[test]
fn gradient_of_the_4dvar_cost_passes_the_taylor_test() {
    // Taylor test r(alpha) -> 1 with remainder O(alpha^2): common practice, no source (Navon, Zou &
    // Derber 1992, MWR 120 use it). n = 64 also compares with finite differences.
    for pairs in [
        vec![],
        vec![("n", "64")],
        vec![("synth", "calibration"), ("seed", "5")],
    ] {
        let b = builtin::open("burgers", &Settings::from_pairs(&pairs)).unwrap();
        let x = b.problem.prior().unwrap().mean().to_vec();
        let r = gradient_test(&b.problem, &x, 7).unwrap();
        assert!(r.passed, "{pairs:?}: {}", r.verdict);
        if let Some(fd) = r.fd_max_rel_error {
            assert!(fd < 1e-6, "{pairs:?}: finite differences {fd}");
        }
    }
}

#[test]
fn a_grid_of_2000_points_evaluates_with_a_correct_gradient() {
    // One cost and gradient at n = 2000, checked along a prior-shaped direction h = S z against a
    // central difference (error O(alpha^2); textbook).
    let s = Settings::from_pairs(&[
        ("n", "2000"),
        ("dt", "1e-5"),
        ("window", "100"),
        ("obs_stride", "20"),
    ]);
    let b = builtin::open("burgers", &s).unwrap();
    let prior = b.problem.prior().unwrap();
    let x = prior.mean().to_vec();
    let mut g = vec![0.0; 2000];
    let j = b.problem.cost_grad(&x, &mut g).unwrap();
    assert!(j.is_finite() && j > 0.0);
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    let mut h = vec![0.0; 2000];
    prior.mul_sqrt(&randn(&mut rng, 2000), &mut h);
    let alpha = 1e-4;
    let at = |a: f64| {
        let xp: Vec<f64> = x.iter().zip(&h).map(|(u, v)| u + a * v).collect();
        b.problem.cost(&xp).unwrap()
    };
    let fd = (at(alpha) - at(-alpha)) / (2.0 * alpha);
    let an = dot(&g, &h);
    assert!(
        (fd - an).abs() < 1e-6 * an.abs(),
        "directional derivative {an} vs central difference {fd}"
    );
}

#[test]
fn wrong_lengths_are_evaluation_errors() {
    let p = demo();
    let mut g = vec![0.0; 200];
    let e = p.cost_grad(&[0.0; 10], &mut g).unwrap_err();
    assert!(e.to_string().contains("expected 200"), "{e}");
}

#[test]
fn calibration_mode_draws_the_truth_from_the_background_distribution() {
    // In calibration mode truth - xb ~ N(0, B): over many seeds the mean of (truth - xb)^T B^-1 (truth - xb)
    // is n (chi-square with n degrees of freedom; textbook).
    let n = 64;
    let seeds = 200;
    let mut acc = 0.0;
    for seed in 0..seeds {
        let p = Burgers::new(BurgersConfig {
            n,
            window: 10,
            obs_every: 5,
            obs_stride: 8,
            synth: SynthMode::Calibration,
            seed,
            ..Default::default()
        })
        .unwrap();
        let d: Vec<f64> = p
            .truth()
            .iter()
            .zip(p.background())
            .map(|(a, b)| a - b)
            .collect();
        let mut w = vec![0.0; n];
        p.circulant_prior().solve(&d, &mut w);
        acc += dot(&d, &w);
    }
    let mean = acc / seeds as f64;
    // sd of the mean: sqrt(2 n / seeds) = 0.8; allow 4 sd.
    assert!((mean - n as f64).abs() < 3.2, "mean chi-square {mean}");
}

/// The dense symmetric circulant matrix with first column c.
fn dense_circulant(c: &[f64]) -> DMatrix<f64> {
    let n = c.len();
    DMatrix::from_fn(n, n, |i, j| c[(i + n - j) % n])
}

/// The matrix of a linear map given as a function on vectors, column by column.
fn matrix_of(n: usize, f: impl Fn(&[f64], &mut [f64])) -> DMatrix<f64> {
    let mut m = DMatrix::zeros(n, n);
    for j in 0..n {
        let mut e = vec![0.0; n];
        e[j] = 1.0;
        let mut out = vec![0.0; n];
        f(&e, &mut out);
        m.set_column(j, &nalgebra::DVector::from_vec(out));
    }
    m
}

#[test]
fn circulant_prior_matches_the_dense_matrix() {
    // Reference: the dense B built directly and factorised by nalgebra (symmetric eigendecomposition,
    // Cholesky). S S^T = B, S^T = S, eigenvalues of B, log det B, B^-1 B = I, S^-1 S = I.
    for n in [12, 13, 30] {
        let dx = 1.0 / n as f64;
        let c = periodised_column(n, dx, |d| 0.3 * soar(d / 0.15));
        let mean: Vec<f64> = (0..n).map(|i| i as f64 * 0.1).collect();
        let p = CirculantPrior::new(mean.clone(), &c).unwrap();
        let b = dense_circulant(&c);
        let s = matrix_of(n, |z, o| p.mul_sqrt(z, o));
        let st = matrix_of(n, |z, o| p.mul_sqrt_t(z, o));
        assert!(
            (&s * s.transpose() - &b).amax() < 1e-13,
            "n={n}: S S^T != B"
        );
        assert!((&s - &st).amax() < 1e-15, "n={n}: S^T != S");
        let bm = matrix_of(n, |z, o| p.mul(z, o));
        assert!((&bm - &b).amax() < 1e-13, "n={n}: mul != B");
        let mut ours = p.eigenvalues().to_vec();
        let mut theirs: Vec<f64> = nalgebra::SymmetricEigen::new(b.clone())
            .eigenvalues
            .iter()
            .copied()
            .collect();
        ours.sort_by(f64::total_cmp);
        theirs.sort_by(f64::total_cmp);
        assert!(
            common::max_rel_err(&ours, &theirs) < 1e-12,
            "n={n}: eigenvalues"
        );
        let chol = nalgebra::Cholesky::new(b.clone()).unwrap();
        let ld: f64 = chol.l().diagonal().iter().map(|d| 2.0 * d.ln()).sum();
        assert!(
            (p.log_det() - ld).abs() < 1e-10 * ld.abs().max(1.0),
            "n={n}: log det"
        );
        assert_eq!(p.variance(), vec![0.3; n]);
        assert_eq!(p.mean(), &mean[..]);
        let mut rng = ChaCha8Rng::seed_from_u64(n as u64);
        let v = randn(&mut rng, n);
        let (mut bv, mut back) = (vec![0.0; n], vec![0.0; n]);
        p.mul(&v, &mut bv);
        p.solve(&bv, &mut back);
        assert!(
            common::max_rel_err(&back, &v) < 1e-12,
            "n={n}: solve(mul v)"
        );
        p.mul_sqrt(&v, &mut bv);
        assert!(p.solve_sqrt(&bv, &mut back));
        assert!(
            common::max_rel_err(&back, &v) < 1e-12,
            "n={n}: solve_sqrt(S v)"
        );
        assert!(p.solve_sqrt_t(&bv, &mut back));
        assert!(
            common::max_rel_err(&back, &v) < 1e-12,
            "n={n}: solve_sqrt_t(S v)"
        );
    }
}

#[test]
fn periodised_soar_matches_its_closed_form_image_sum() {
    // With period 1 the image sum of f(r) = (1 + r/L) e^{-r/L} is G(d) + G(1 - d), where
    // G(a) = e^{-a/L} [1/(1-q) + (a/(1-q) + q/(1-q)^2) / L] with q = e^{-1/L} (geometric series,
    // sum q^m = 1/(1-q) and sum m q^m = q/(1-q)^2; textbook).
    let n = 50;
    for l in [0.05f64, 0.3, 2.0] {
        let q: f64 = (-1.0 / l).exp();
        let g = |a: f64| {
            (-a / l).exp() * (1.0 / (1.0 - q) + (a / (1.0 - q) + q / (1.0 - q).powi(2)) / l)
        };
        let rho = |d: f64| (g(d) + g(1.0 - d)) / (g(0.0) + g(1.0));
        let c = periodised_column(n, 1.0 / n as f64, |d| soar(d / l));
        let expected: Vec<f64> = (0..n).map(|j| rho(j as f64 / n as f64)).collect();
        assert!(common::max_rel_err(&c, &expected) < 1e-13, "L={l}");
    }
}

#[test]
fn non_positive_definite_circulants_are_refused() {
    // SOAR in the arc distance is not positive definite on the circle: the kink at the antipode gives
    // negative eigenvalues on fine grids (Matern functions with smoothness above 1/2 are not positive
    // definite in the great-circle distance; Gneiting 2013, Bernoulli 19(4); from memory).
    let n = 2000;
    let c = periodic_column(n, 1.0 / n as f64, |d| soar(d / 0.05));
    let e = CirculantPrior::new(vec![0.0; n], &c)
        .unwrap_err()
        .to_string();
    assert!(e.contains("not positive definite"), "{e}");
    // c = (1, 0.9, 0, ..., 0, 0.9) has eigenvalues 1 + 1.8 cos(2 pi k / n) < 0 near k = n/2 (DFT of the
    // first column; Gray 2006, Toeplitz and circulant matrices: a review; from memory).
    let mut c = vec![0.0; 10];
    c[0] = 1.0;
    c[1] = 0.9;
    c[9] = 0.9;
    assert!(CirculantPrior::new(vec![0.0; 10], &c).is_err());
    c[9] = 0.5;
    let e = CirculantPrior::new(vec![0.0; 10], &c)
        .unwrap_err()
        .to_string();
    assert!(e.contains("not symmetric"), "{e}");
    // A correlation length far beyond the grid spacing: B is singular to working precision.
    let s = Settings::from_pairs(&[("corr_len", "8")]);
    let e = builtin::open("burgers", &s).err().unwrap().to_string();
    assert!(
        e.contains("corr_len=8") && e.contains("correlation length"),
        "{e}"
    );
}

#[test]
fn map_on_burgers_converges_through_the_binary() {
    let d = common::temp_dir("burgers-map");
    let o = common::run(&["map", "--problem", "burgers", "--out", d.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let s = common::read_json(&d.join("summary.json"));
    let reduction =
        s["map"]["grad_norm_start"].as_f64().unwrap() / s["map"]["grad_norm"].as_f64().unwrap();
    assert!(reduction >= 1e5, "gradient norm reduced by {reduction}");
    assert_eq!(s["map"]["converged"], true);
    assert_eq!(s["dim"], 200);
    assert!(d.join("analysis.csv").exists());
    // The analysis is closer to the truth than the background (common practice, no source).
    let p = demo();
    let x = common::vecf(&s["map"]["x"]);
    let rmse = |a: &[f64]| {
        (a.iter()
            .zip(p.truth())
            .map(|(u, v)| (u - v).powi(2))
            .sum::<f64>()
            / 200.0)
            .sqrt()
    };
    assert!(
        rmse(&x) < 0.6 * rmse(p.background()),
        "analysis {} vs background {}",
        rmse(&x),
        rmse(p.background())
    );
}

#[test]
fn bad_burgers_settings_fail_with_exit_code_2() {
    let d = common::temp_dir("burgers-bad");
    let o = common::run(&[
        "map",
        "--problem",
        "burgers",
        "--set",
        "dt=0.05",
        "--out",
        d.to_str().unwrap(),
    ]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains("unstable") && !e.contains("panicked"), "{e}");
}

/// The error of building burgers from settings (it must fail).
fn refusal(pairs: &[(&str, &str)]) -> String {
    match builtin::open("burgers", &Settings::from_pairs(pairs)) {
        Ok(_) => panic!("burgers {pairs:?} was accepted"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn sizes_beyond_the_machine_are_refused_before_allocating() {
    // Input validation, no outside source. The truth run alone keeps 2 (window + 1) n numbers.
    let cfg = BurgersConfig {
        n: 2000,
        window: 1_000_000,
        ..Default::default()
    };
    assert!(cfg.memory_plan().total() > 2 * 8 * 2000 * 1_000_000);
    assert!(BurgersConfig::default().memory_plan().total() < 10_000_000);
    let e = refusal(&[("window", "1000000000000")]);
    assert!(
        e.contains("would need") && e.contains("lower window or n"),
        "{e}"
    );
    let e = refusal(&[("n", "1000000000000"), ("obs_stride", "1")]);
    assert!(
        e.contains("would need") && e.contains("n = 1000000000000"),
        "{e}"
    );
}

#[test]
fn non_finite_and_out_of_range_settings_are_named() {
    // Input validation, no outside source.
    for (key, value) in [
        ("nu", "inf"),
        ("nu", "0"),
        ("dt", "NaN"),
        ("sigma_o", "1e-300"),
        ("sigma_b", "-0.2"),
        ("corr_len", "1e6"),
        ("corr_len", "nan"),
        ("n", "4"),
    ] {
        let e = refusal(&[(key, value)]);
        assert!(e.contains(&format!("setting {key}=")), "{key}={value}: {e}");
    }
}
