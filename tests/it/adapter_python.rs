//! The Python example adapter adapters/python/lorenz96.py against varpost's built-in `lorenz96`
//! problem on the same demo scenario: the same cost, gradient, split and prior to 1e-12 relative,
//! in both encodings.

use std::path::PathBuf;

use varpost::adapter::{AdapterConfig, AdapterProblem, EncodingChoice};
use varpost::problem::builtin;
use varpost::problem::settings::Settings;
use varpost::Problem;

fn python() -> String {
    std::env::var("VARPOST_PYTHON").unwrap_or_else(|_| "python3".into())
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn adapter(args: &str, encoding: EncodingChoice) -> AdapterProblem {
    let script = root().join("adapters/python/lorenz96.py");
    let mut c = AdapterConfig::new(format!("{} '{}' {args}", python(), script.display()));
    c.encoding = encoding;
    AdapterProblem::start(&c).unwrap_or_else(|e| panic!("adapter did not start: {e}"))
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

/// max |a − b| / max |b|.
fn vec_rel(a: &[f64], b: &[f64]) -> f64 {
    let scale = b.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    a.iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()))
        / scale
}

/// Test points: the background, the truth at the start of the window, and a perturbed background.
fn points(b: &builtin::Builtin) -> Vec<Vec<f64>> {
    let xb = b
        .problem
        .prior()
        .expect("lorenz96 has a prior")
        .mean()
        .to_vec();
    let truth = b.truth.clone().expect("the demo scenario has a truth");
    let perturbed = xb
        .iter()
        .enumerate()
        .map(|(i, v)| v + 0.3 * (i as f64 * 1.7).sin())
        .collect();
    vec![xb, truth, perturbed]
}

fn compare(p: &AdapterProblem, b: &builtin::Builtin) {
    let n = b.problem.dim();
    assert_eq!(p.dim(), n);
    assert_eq!(p.component_names(), b.problem.component_names());
    for x in points(b) {
        let (mut g, mut g0) = (vec![0.0; n], vec![0.0; n]);
        let j = p.cost_grad(&x, &mut g).unwrap();
        let j0 = b.problem.cost_grad(&x, &mut g0).unwrap();
        assert!(rel(j, j0) < 1e-12, "J {j} vs built-in {j0}");
        assert!(
            vec_rel(&g, &g0) < 1e-12,
            "gradient differs by {:e}",
            vec_rel(&g, &g0)
        );
        assert!(rel(p.cost(&x).unwrap(), j0) < 1e-12);
        let s = p.cost_split(&x).unwrap().unwrap();
        let s0 = b.problem.cost_split(&x).unwrap().unwrap();
        // Relative to J: Jb is exactly 0 at the background.
        assert!(
            (s.background - s0.background).abs() < 1e-12 * j0,
            "Jb {} vs {}",
            s.background,
            s0.background
        );
        assert!((s.observation - s0.observation).abs() < 1e-12 * j0);
    }
}

#[test]
fn python_lorenz96_equals_the_builtin_problem() {
    let b = builtin::open("lorenz96", &Settings::parse(&[]).unwrap()).unwrap();
    for enc in [EncodingChoice::Text, EncodingChoice::Binary] {
        let p = adapter("", enc);
        compare(&p, &b);
        // The prior: same background, variances, log det and square root (both are Cholesky factors of
        // the same B, which is unique for a positive definite B: Golub & Van Loan 2013, Matrix
        // Computations, Theorem 4.2.7).
        let (pa, pb) = (p.prior().unwrap(), b.problem.prior().unwrap());
        assert!(vec_rel(pa.mean(), pb.mean()) < 1e-15);
        assert!(vec_rel(&pa.variance(), &pb.variance()) < 1e-15);
        assert!(rel(pa.log_det(), pb.log_det()) < 1e-12);
        let z: Vec<f64> = (0..40).map(|i| (i as f64 * 0.9).cos()).collect();
        let (mut o, mut o0) = (vec![0.0; 40], vec![0.0; 40]);
        for k in 0..4 {
            match k {
                0 => {
                    pa.mul_sqrt(&z, &mut o);
                    pb.mul_sqrt(&z, &mut o0);
                }
                1 => {
                    pa.mul_sqrt_t(&z, &mut o);
                    pb.mul_sqrt_t(&z, &mut o0);
                }
                2 => assert!(pa.solve_sqrt(&z, &mut o) && pb.solve_sqrt(&z, &mut o0)),
                _ => assert!(pa.solve_sqrt_t(&z, &mut o) && pb.solve_sqrt_t(&z, &mut o0)),
            }
            assert!(
                vec_rel(&o, &o0) < 1e-12,
                "prior operator {k}: {:e}",
                vec_rel(&o, &o0)
            );
        }
    }
}

#[test]
fn python_lorenz96_with_square_observations_equals_the_builtin_problem() {
    let data = root().join("demo-data/lorenz96");
    let data = data.to_string_lossy();
    let b = builtin::open(
        "lorenz96",
        &Settings::from_pairs(&[("data", &data), ("obs_op", "square")]),
    )
    .unwrap();
    let p = adapter(
        &format!("--data '{data}' --obs-op square"),
        EncodingChoice::Auto,
    );
    compare(&p, &b);
}
