//! The gradient (Taylor) test at any point: away from and at a minimum, right and wrong gradients, on
//! toy quadratics, a built-in problem and through the binary.
//!
//! Expectations (r(α) → 1 and a remainder falling as α² for a right gradient, as α for a wrong one):
//! common practice, no source (the Taylor test as used e.g. by Navon, Zou & Derber 1992, MWR 120).

use varpost::optimize::{find_map, MapConfig};
use varpost::problem::builtin;
use varpost::problem::check::{gradient_test, taylor_test, Criterion, GradientReport};
use varpost::problem::Problem;

use crate::common::{read_json, run, temp_dir};

/// How a toy gradient is wrong.
#[derive(Clone, Copy, Debug)]
enum Bug {
    None,
    Sign,
    Double,
    /// Component 2 is 1% off.
    OneComponent,
    /// Component 2 carries a constant offset, so the gradient is not zero at the minimum.
    Offset,
}

/// J(x) = 50 + ½ Σ d_i (x_i − m_i)² + ¼ (x_0 − m_0)⁴ + (x_1 − m_1)(x_3 − m_3): minimum 50 at m.
struct Toy {
    m: Vec<f64>,
    bug: Bug,
}

const D: [f64; 6] = [1.0, 4.0, 0.5, 3.0, 2.0, 10.0];

impl Toy {
    fn new(bug: Bug) -> Toy {
        Toy {
            m: vec![1.0, -2.0, 0.5, 3.0, 0.0, 7.0],
            bug,
        }
    }
}

impl Problem for Toy {
    fn dim(&self) -> usize {
        D.len()
    }
    fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, varpost::EvalError> {
        let e: Vec<f64> = x.iter().zip(&self.m).map(|(a, b)| a - b).collect();
        let mut j = 50.0 + 0.25 * e[0].powi(4) + e[1] * e[3];
        for i in 0..D.len() {
            j += 0.5 * D[i] * e[i] * e[i];
            g[i] = D[i] * e[i];
        }
        g[0] += e[0].powi(3);
        g[1] += e[3];
        g[3] += e[1];
        match self.bug {
            Bug::None => {}
            Bug::Sign => g.iter_mut().for_each(|v| *v = -*v),
            Bug::Double => g.iter_mut().for_each(|v| *v *= 2.0),
            Bug::OneComponent => g[2] *= 1.01,
            Bug::Offset => g[2] += 1e-3,
        }
        Ok(j)
    }
}

fn away(t: &Toy) -> Vec<f64> {
    t.m.iter()
        .enumerate()
        .map(|(i, v)| v + 2.0 + 0.5 * i as f64)
        .collect()
}

fn show(r: &GradientReport) -> String {
    let rows: Vec<String> = r
        .rows
        .iter()
        .map(|w| format!("{:e} {:e} {:e}", w.alpha, w.ratio, w.remainder))
        .collect();
    format!("{}\n{}", r.verdict, rows.join("\n"))
}

#[test]
fn a_right_toy_gradient_passes_away_from_and_at_its_minimum() {
    let t = Toy::new(Bug::None);
    for seed in 1..=5 {
        let r = gradient_test(&t, &away(&t), seed).unwrap();
        assert!(r.passed, "away, seed {seed}: {}", show(&r));
        assert_eq!(r.criterion, Criterion::Ratio, "{}", show(&r));
        let r = gradient_test(&t, &t.m, seed).unwrap();
        assert!(r.passed, "at the minimum, seed {seed}: {}", show(&r));
        assert_eq!(r.criterion, Criterion::RemainderOrder, "{}", show(&r));
        assert!(
            r.verdict.contains("criterion: remainder order"),
            "{}",
            r.verdict
        );
    }
}

#[test]
fn wrong_toy_gradients_fail_away_from_the_minimum() {
    let t0 = Toy::new(Bug::None);
    for bug in [Bug::Sign, Bug::Double, Bug::OneComponent, Bug::Offset] {
        let t = Toy::new(bug);
        for seed in 1..=3 {
            let r = taylor_test(&t, &away(&t0), seed).unwrap();
            assert!(!r.passed, "{bug:?}, seed {seed}: {}", show(&r));
            assert!(r.verdict.starts_with("gradient WRONG"), "{}", r.verdict);
        }
    }
}

#[test]
fn a_gradient_not_zero_at_the_minimum_fails_there() {
    let t = Toy::new(Bug::Offset);
    for seed in 1..=3 {
        let r = taylor_test(&t, &t.m, seed).unwrap();
        assert!(!r.passed, "seed {seed}: {}", show(&r));
        assert_eq!(r.criterion, Criterion::RemainderOrder, "{}", show(&r));
        assert!(r.remainder_slope.unwrap() < 1.5, "{}", show(&r));
    }
    // The finite differences name the wrong component.
    let r = gradient_test(&Toy::new(Bug::OneComponent), &away(&t), 1).unwrap();
    assert!(!r.passed);
    assert_eq!(r.fd_worst[0].index, 2, "{:?}", r.fd_worst);
    assert!(r.verdict.contains("worst at [2]"), "{}", r.verdict);
}

/// Lorenz-96 with a wrong gradient.
struct WrongL96(Box<dyn Problem>, Bug);

impl Problem for WrongL96 {
    fn dim(&self) -> usize {
        self.0.dim()
    }
    fn component_names(&self) -> Option<Vec<String>> {
        self.0.component_names()
    }
    fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, varpost::EvalError> {
        let c = self.0.cost_grad(x, g)?;
        match self.1 {
            Bug::Sign => g.iter_mut().for_each(|v| *v = -*v),
            Bug::Double => g.iter_mut().for_each(|v| *v *= 2.0),
            Bug::OneComponent => g[5] *= 1.01,
            Bug::Offset => g[5] += 1e-3,
            Bug::None => {}
        }
        Ok(c)
    }
}

fn lorenz96() -> builtin::Builtin {
    builtin::open("lorenz96", &varpost::problem::settings::Settings::default()).unwrap()
}

#[test]
fn lorenz96_passes_at_its_analysis_by_the_remainder_order() {
    let b = lorenz96();
    let xb = b.problem.prior().unwrap().mean().to_vec();
    let m = find_map(&b.problem, &xb, &MapConfig::default()).unwrap();
    assert!(m.converged);
    let r = gradient_test(&b.problem, &m.x, 3).unwrap();
    assert!(r.passed, "{}", show(&r));
    assert_eq!(r.criterion, Criterion::RemainderOrder, "{}", show(&r));
    // A gradient wrong by a constant in one component is not zero at the analysis and fails there.
    let w = WrongL96(Box::new(lorenz96().problem), Bug::Offset);
    let r = gradient_test(&w, &m.x, 3).unwrap();
    assert!(!r.passed, "{}", show(&r));
    assert_eq!(
        r.fd_worst[0].name.as_deref(),
        Some("x5"),
        "{:?}",
        r.fd_worst
    );
}

#[test]
fn wrong_lorenz96_gradients_fail_at_the_background() {
    let xb = lorenz96().problem.prior().unwrap().mean().to_vec();
    for bug in [Bug::Sign, Bug::Double, Bug::OneComponent] {
        let w = WrongL96(Box::new(lorenz96().problem), bug);
        let r = taylor_test(&w, &xb, 7).unwrap();
        assert!(!r.passed, "{bug:?}: {}", show(&r));
    }
}

#[test]
fn check_passes_on_the_calibration_scenario_that_once_failed_its_slope() {
    // Agreement with finite differences 4.6e-11, but the α = 0.1 row is dominated by higher orders.
    let d = temp_dir("check-calibration");
    let data = d.join("data");
    let o = run(&[
        "synth",
        "--problem",
        "lorenz96",
        "--set",
        "synth=calibration",
        "--set",
        "seed=10195",
        "--set",
        "n=10",
        "--set",
        "corr_len=1",
        "--set",
        "estimate_forcing=true",
        "--quiet",
        "--out",
        data.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let set = format!("data={}", data.display());
    let out = d.join("check");
    let o = run(&[
        "check",
        "--problem",
        "lorenz96",
        "--set",
        &set,
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ]);
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(
        stdout.contains("gradient correct (criterion: ratio)"),
        "{stdout}"
    );
    assert!(stdout.contains("worst components x"), "{stdout}");
    let s = read_json(&out.join("summary.json"));
    assert_eq!(s["check"]["criterion"], "ratio");
    assert!((s["check"]["remainder_slope"].as_f64().unwrap() - 2.0).abs() < 0.1);
    assert_eq!(s["check"]["fd_worst"].as_array().unwrap().len(), 3);

    // At the analysis: the remainder's order decides.
    let map = d.join("map");
    let o = run(&[
        "map",
        "--problem",
        "lorenz96",
        "--set",
        &set,
        "--quiet",
        "--out",
        map.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let x: Vec<String> = read_json(&map.join("summary.json"))["map"]["x"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| format!("{}", v.as_f64().unwrap()))
        .collect();
    let start = d.join("analysis.txt");
    std::fs::write(&start, x.join(",")).unwrap();
    let out = d.join("check-analysis");
    let o = run(&[
        "check",
        "--problem",
        "lorenz96",
        "--set",
        &set,
        "--quiet",
        "--start",
        start.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(stdout.contains("criterion: remainder order"), "{stdout}");
    let s = read_json(&out.join("summary.json"));
    assert_eq!(s["check"]["criterion"], "remainder-order");

    // A sampling run started at the analysis gets past its gradient test (exit code 3 is that test).
    let out = d.join("sample");
    let o = run(&[
        "sample",
        "--problem",
        "lorenz96",
        "--set",
        &set,
        "--quiet",
        "--start",
        start.to_str().unwrap(),
        "--chains",
        "2",
        "--draws",
        "50",
        "--warmup",
        "50",
        "--laplace-draws",
        "0",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_ne!(
        o.status.code(),
        Some(3),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let s = read_json(&out.join("summary.json"));
    assert_eq!(s["check"]["passed"], true);
    assert_eq!(s["check"]["criterion"], "remainder-order");
}
