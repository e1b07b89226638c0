//! Lorenz-96 with the forcing F estimated together with the initial state (`estimate_forcing=true`):
//! the gradient of the joint cost, the adjoint over the window with F included, the synthetic truth's F,
//! scenario files, refusals of bad settings, and a sampling run through the real binary.

use crate::common;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use varpost::problem::builtin;
use varpost::problem::check::gradient_test;
use varpost::problem::lorenz96::{Lorenz96, Lorenz96Config, Lorenz96Model, Scenario};
use varpost::problem::settings::Settings;
use varpost::problem::{Prior, Problem};

use common::{read_json, run, temp_dir, vecf};

fn randn(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

fn open(pairs: &[(&str, &str)]) -> builtin::Builtin {
    builtin::open("lorenz96", &Settings::from_pairs(pairs)).unwrap()
}

#[test]
fn joint_gradient_passes_the_taylor_test() {
    // Taylor test r(alpha) -> 1 with remainder O(alpha^2), and central finite differences of every
    // component (F included): common practice, no source (Navon, Zou & Derber 1992, MWR 120 use it).
    for op in ["linear", "square"] {
        let b = open(&[
            ("obs_op", op),
            ("estimate_forcing", "true"),
            ("forcing_prior_mean", "7.5"),
        ]);
        assert_eq!(b.problem.dim(), 41);
        let names = b.problem.component_names().unwrap();
        assert_eq!((names[0].as_str(), names[40].as_str()), ("x0", "F"));
        let x = b.problem.prior().unwrap().mean().to_vec();
        assert_eq!(
            x[40], 7.5,
            "the prior mean of F is the control's last component"
        );
        let r = gradient_test(&b.problem, &x, 7).unwrap();
        assert!(r.passed, "{op}: {}", r.verdict);
        let slope = r.remainder_slope.unwrap();
        assert!((1.8..2.2).contains(&slope), "{op}: remainder slope {slope}");
        assert!(
            r.fd_max_rel_error.unwrap() < 1e-6,
            "{op}: finite differences {:?}",
            r.fd_max_rel_error
        );
    }
}

#[test]
fn the_forcing_gradient_alone_matches_a_central_difference() {
    // Central difference of J along F only, error O(e^2): common practice, no source. The direction of
    // the Taylor test above mixes F with x0; this isolates ∂J/∂F.
    let b = open(&[("estimate_forcing", "true"), ("forcing_prior_mean", "7.5")]);
    let mut u = b.problem.prior().unwrap().mean().to_vec();
    u[3] += 0.3;
    let mut g = vec![0.0; u.len()];
    b.problem.cost_grad(&u, &mut g).unwrap();
    let e = 1e-5;
    let at = |d: f64| {
        let mut v = u.clone();
        v[40] += d;
        b.problem.cost(&v).unwrap()
    };
    let fd = (at(e) - at(-e)) / (2.0 * e);
    assert!(
        (fd - g[40]).abs() < 1e-6 * g[40].abs().max(1.0),
        "dJ/dF: adjoint {} central difference {fd}",
        g[40]
    );
}

#[test]
fn window_adjoint_with_the_forcing_passes_the_dot_product_test() {
    // Over a whole window: <M'(dx0, dF), y> = <dx0, a_x> + dF a_F, with a_F summed over the steps, to
    // about 100 machine epsilons: common practice, no source.
    let model = Lorenz96Model {
        forcing: 8.3,
        ..Default::default()
    };
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut x0: Vec<f64> = randn(&mut rng, model.n).iter().map(|z| 8.0 + z).collect();
    for _ in 0..300 {
        x0 = model.step(&x0);
    }
    let steps = 12;
    let traj = model.run(&x0, steps);
    for _ in 0..5 {
        let dx0 = randn(&mut rng, model.n);
        let df = randn(&mut rng, 1)[0];
        let y = randn(&mut rng, model.n);
        let mut dx = dx0.clone();
        for x in traj.iter().take(steps) {
            dx = model.step_tl_forcing(x, &dx, df);
        }
        let mut a = y.clone();
        let mut af = 0.0;
        for x in traj.iter().take(steps).rev() {
            let (ax, f) = model.step_adj_forcing(x, &a);
            a = ax;
            af += f;
        }
        let lhs = dot(&dx, &y);
        let rhs = dot(&dx0, &a) + df * af;
        let rel = (lhs - rhs).abs() / lhs.abs().max(rhs.abs());
        assert!(rel < 1e-11, "relative adjoint mismatch {rel:e}");
    }
}

#[test]
fn the_background_term_of_the_forcing_is_independent_of_b() {
    // Jb(x0, F) = Jb(x0) + (F - F_b)^2 / (2 sd^2): the joint prior is block-diagonal (closed form).
    // corr_len 1: SOAR with the default 2 is not positive definite on a ring of 10 sites.
    let plain = open(&[("n", "10"), ("corr_len", "1"), ("window", "4")]);
    let joint = open(&[
        ("n", "10"),
        ("corr_len", "1"),
        ("window", "4"),
        ("estimate_forcing", "true"),
        ("forcing_prior_sd", "0.5"),
    ]);
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let mut x = plain.problem.prior().unwrap().mean().to_vec();
    x.iter_mut()
        .zip(randn(&mut rng, 10))
        .for_each(|(a, z)| *a += z);
    let mut u = x.clone();
    u.push(8.0 + 0.7);
    let a = plain.problem.cost_split(&x).unwrap().unwrap();
    let b = joint.problem.cost_split(&u).unwrap().unwrap();
    let expect = a.background + 0.5 * 0.7f64.powi(2) / 0.25;
    assert!(
        (b.background - expect).abs() < 1e-12 * expect,
        "{b:?} vs {expect}"
    );
    // The observation term runs the model with F = 8.7, so it differs from F = 8.
    assert!(b.observation != a.observation);
    assert_eq!(joint.problem.prior().unwrap().variance()[10], 0.25);
}

#[test]
fn demo_truth_runs_with_the_forcing_setting_and_files_round_trip() {
    // How the synthetic truth's F is chosen (documented in src/problem/lorenz96/forcing.rs), and that
    // scenario folders keep it. No outside source.
    let c = Lorenz96Config::from_settings(&Settings::from_pairs(&[
        ("estimate_forcing", "true"),
        ("forcing_prior_mean", "7.5"),
        ("forcing_prior_sd", "0.8"),
        ("spinup", "50"),
    ]))
    .unwrap();
    let sc = Scenario::synthesize(&c).unwrap();
    assert_eq!(sc.truth_forcing, Some(8.0));
    assert_eq!(sc.truth_control().unwrap()[40], 8.0);
    assert_eq!(sc.background.len(), 40);
    let d = temp_dir("l96-forcing-files");
    sc.write(&d).unwrap();
    let json = read_json(&d.join("scenario.json"));
    assert_eq!(json["truth_forcing"].as_f64(), Some(8.0));
    assert_eq!(json["config"]["forcing_prior"]["sd"].as_f64(), Some(0.8));
    let back = Scenario::read(&d).unwrap();
    assert_eq!(back.config, sc.config);
    assert_eq!(back.truth_control(), sc.truth_control());
    let b = open(&[("data", d.to_str().unwrap())]);
    assert_eq!(b.problem.dim(), 41);
    assert_eq!(b.truth.unwrap()[40], 8.0);
    // A truth without its forcing is refused with the file named.
    let text = std::fs::read_to_string(d.join("scenario.json")).unwrap();
    let mut v: serde_json::Value = serde_json::from_str(&text).unwrap();
    v.as_object_mut().unwrap().remove("truth_forcing");
    std::fs::write(d.join("scenario.json"), v.to_string()).unwrap();
    let e = Scenario::read(&d).unwrap_err().to_string();
    assert!(
        e.contains("scenario.json") && e.contains("truth_forcing"),
        "{e}"
    );
}

#[test]
fn calibration_draws_the_truths_forcing_from_its_prior() {
    // In calibration mode (F_t - F_b) / sd ~ N(0, 1): over 300 seeds the mean is within 4 / sqrt(300)
    // of 0 and the mean square within 4 sqrt(2 / 300) of 1 (normal and chi-square moments, textbook).
    let seeds = 300;
    let (mut s1, mut s2) = (0.0, 0.0);
    for seed in 0..seeds {
        let c = Lorenz96Config::from_settings(&Settings::from_pairs(&[
            ("synth", "calibration"),
            ("estimate_forcing", "true"),
            ("forcing_prior_mean", "7.0"),
            ("forcing_prior_sd", "0.5"),
            ("n", "8"),
            ("corr_len", "1"),
            ("window", "2"),
            ("obs_every", "1"),
            ("spinup", "10"),
            ("seed", &seed.to_string()),
        ]))
        .unwrap();
        let sc = Scenario::synthesize(&c).unwrap();
        let z = (sc.truth_forcing.unwrap() - 7.0) / 0.5;
        s1 += z;
        s2 += z * z;
        let p = Lorenz96::new(sc).unwrap();
        assert_eq!(p.dense_prior().mean()[8], 7.0);
    }
    let (m1, m2) = (s1 / seeds as f64, s2 / seeds as f64);
    assert!(m1.abs() < 4.0 / (seeds as f64).sqrt(), "mean {m1}");
    assert!(
        (m2 - 1.0).abs() < 4.0 * (2.0 / seeds as f64).sqrt(),
        "mean square {m2}"
    );
}

#[test]
fn bad_forcing_settings_are_refused_with_their_key() {
    // Input validation, no outside source.
    let refuse =
        |pairs: &[(&str, &str)]| match builtin::open("lorenz96", &Settings::from_pairs(pairs)) {
            Ok(_) => panic!("{pairs:?} was accepted"),
            Err(e) => e.to_string(),
        };
    let e = refuse(&[("estimate_forcing", "maybe")]);
    assert!(
        e.contains("setting estimate_forcing=maybe") && e.contains("'true'"),
        "{e}"
    );
    for (key, value) in [
        ("forcing_prior_sd", "-1"),
        ("forcing_prior_sd", "0"),
        ("forcing_prior_sd", "NaN"),
        ("forcing_prior_sd", "inf"),
        ("forcing_prior_mean", "nan"),
        ("forcing_prior_mean", "1e300"),
        ("forcing_prior_mean", "eight"),
    ] {
        let e = refuse(&[("estimate_forcing", "true"), (key, value)]);
        assert!(e.contains(&format!("setting {key}=")), "{key}={value}: {e}");
    }
    // A bad forcing is named as such, not as the prior mean it defaults.
    let e = refuse(&[("estimate_forcing", "true"), ("forcing", "nan")]);
    assert!(e.contains("setting forcing=NaN"), "{e}");
    let e = refuse(&[("forcing_prior_sd", "0.5")]);
    assert!(
        e.contains("forcing_prior_sd") && e.contains("estimate_forcing=true"),
        "{e}"
    );
    // The same through the command line: exit code 2 and the key named.
    let o = run(&[
        "check",
        "--problem",
        "lorenz96",
        "--set",
        "estimate_forcing=maybe",
        "--quiet",
    ]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("estimate_forcing=maybe"), "{err}");
}

#[test]
fn sampling_with_the_forcing_estimated_recovers_the_truths_forcing() {
    // The posterior mean of F within 4 posterior sds of the truth's F (a loose consistency check of a
    // well-specified problem: common practice, no source), and the observations inform F (posterior sd
    // below the prior's 1.0).
    let d = temp_dir("l96-forcing-sample");
    let out = d.join("run");
    let sets = [
        "n=10",
        "corr_len=1",
        "window=10",
        "obs_every=1",
        "estimate_forcing=true",
        "forcing_prior_mean=7.4",
        "spinup=200",
    ];
    let mut args = vec!["sample", "--problem", "lorenz96"];
    for s in &sets {
        args.extend(["--set", s]);
    }
    let o_dir = out.to_str().unwrap();
    args.extend([
        "--chains", "2", "--draws", "400", "--warmup", "300", "--seed", "3", "--quiet", "--out",
        o_dir,
    ]);
    let o = run(&args);
    assert!(
        o.status.success() || o.status.code() == Some(5),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let s = read_json(&out.join("summary.json"));
    assert_eq!(s["dim"].as_u64(), Some(11));
    assert_eq!(s["component_names"][10].as_str(), Some("F"));
    let mean = vecf(&s["posterior"]["mean"])[10];
    let sd = vecf(&s["posterior"]["variance"])[10].sqrt();
    // The truth's F is the setting `forcing` (8) in demo mode; `synth` writes it out.
    let sy = d.join("scenario");
    let mut sargs = vec!["synth", "--out", sy.to_str().unwrap()];
    for s in &sets {
        sargs.extend(["--set", s]);
    }
    let so = run(&sargs);
    assert!(so.status.success());
    let said = String::from_utf8_lossy(&so.stdout);
    assert!(said.contains("the truth's forcing F = 8"), "{said}");
    let truth_f = read_json(&sy.join("scenario.json"))["truth_forcing"]
        .as_f64()
        .unwrap();
    assert_eq!(truth_f, 8.0);
    assert!(
        (mean - truth_f).abs() < 4.0 * sd,
        "posterior F {mean} ± {sd}, truth {truth_f}"
    );
    assert!(
        sd < 0.8,
        "posterior sd of F {sd}: the observations should inform F"
    );
}
