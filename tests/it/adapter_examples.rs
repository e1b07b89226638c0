//! The example adapters in adapters/ (C, Fortran) built with their own Makefiles and evaluated through
//! `AdapterProblem`, against the closed forms of their problems; and the C example under Open MPI's
//! launcher.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

use nalgebra::{DMatrix, DVector};
use varpost::adapter::{AdapterConfig, AdapterProblem, Encoding, EncodingChoice};
use varpost::Problem;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn have(tool: &str) -> bool {
    Command::new(tool)
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success())
}

/// Builds an example with its Makefile into the test's scratch folder; `None` (with a note) when the
/// compiler is missing on this machine (scripts/test.sh installs it).
fn build(dir: &str, compiler: &str, binary: &str) -> Option<PathBuf> {
    if !have(compiler) {
        eprintln!("note: {compiler} not found, the {dir} example is not tested here");
        return None;
    }
    let out = Path::new(env!("CARGO_TARGET_TMPDIR")).join(dir.replace('/', "-"));
    let status = Command::new("make")
        .arg("-s")
        .arg("-C")
        .arg(root().join(dir))
        .arg(format!("BUILD={}", out.display()))
        .status()
        .expect("make runs");
    assert!(status.success(), "building {dir} failed");
    Some(out.join(binary))
}

fn c_example() -> Option<&'static PathBuf> {
    static BIN: OnceLock<Option<PathBuf>> = OnceLock::new();
    BIN.get_or_init(|| build("adapters/c", "gcc", "advection"))
        .as_ref()
}

fn fortran_example() -> Option<&'static PathBuf> {
    static BIN: OnceLock<Option<PathBuf>> = OnceLock::new();
    BIN.get_or_init(|| build("adapters/fortran", "gfortran", "pairs"))
        .as_ref()
}

fn start(c: &AdapterConfig) -> AdapterProblem {
    AdapterProblem::start(c).unwrap_or_else(|e| panic!("adapter did not start: {e}"))
}

fn close(a: &[f64], b: &[f64], tol: f64) {
    assert_eq!(a.len(), b.len());
    let scale = b.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-300);
    let err = a
        .iter()
        .zip(b)
        .fold(0.0f64, |m, (x, y)| m.max((x - y).abs()));
    assert!(
        err <= tol * scale,
        "max difference {err:e} relative to {scale:e}"
    );
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

// ----- C: linear advection ---------------------------------------------------------------------------

/// The advection problem of adapters/c/advection.c in closed form. Its model step is
/// M = (1 − c) I + c S with S the cyclic shift (x ↦ x[i−1]); I and S commute, so by the binomial theorem
/// M^k x = Σ_m C(k, m) (1 − c)^{k−m} c^m S^m x, evaluated here directly instead of step by step.
struct Advection {
    n: usize,
    steps: usize,
    c: f64,
    xb: Vec<f64>,
    y: Vec<Vec<f64>>,
}

const SB: f64 = 0.5;
const SO: f64 = 0.1;

fn binom(k: usize, m: usize) -> f64 {
    (0..m).fold(1.0, |acc, i| acc * (k - i) as f64 / (i + 1) as f64)
}

impl Advection {
    fn new(n: usize, steps: usize, c: f64) -> Self {
        use std::f64::consts::PI;
        let xb: Vec<f64> = (0..n)
            .map(|i| (2.0 * PI * i as f64 / n as f64).sin())
            .collect();
        let xt: Vec<f64> = (0..n)
            .map(|i| xb[i] + 0.3 * (4.0 * PI * i as f64 / n as f64).cos())
            .collect();
        let mut a = Advection {
            n,
            steps,
            c,
            xb,
            y: vec![],
        };
        a.y = (1..=steps)
            .map(|k| {
                let mx = a.power(k, &xt, false);
                (0..n.div_ceil(4))
                    .map(|j| mx[4 * j] + 0.05 * (7.0 * j as f64 + 3.0 * k as f64).sin())
                    .collect()
            })
            .collect();
        a
    }

    /// M^k x, or (M^k)ᵀ x with `transpose`.
    fn power(&self, k: usize, x: &[f64], transpose: bool) -> Vec<f64> {
        let n = self.n as isize;
        (0..n)
            .map(|i| {
                (0..=k)
                    .map(|m| {
                        let w = binom(k, m)
                            * (1.0 - self.c).powi((k - m) as i32)
                            * self.c.powi(m as i32);
                        let j = if transpose {
                            i + m as isize
                        } else {
                            i - m as isize
                        };
                        w * x[j.rem_euclid(n) as usize]
                    })
                    .sum::<f64>()
            })
            .collect()
    }

    /// (Jb, Jo, ∇J).
    fn eval(&self, x: &[f64]) -> (f64, f64, Vec<f64>) {
        let jb: f64 = x
            .iter()
            .zip(&self.xb)
            .map(|(a, b)| 0.5 * (a - b).powi(2) / (SB * SB))
            .sum();
        let mut jo = 0.0;
        let mut g: Vec<f64> = x
            .iter()
            .zip(&self.xb)
            .map(|(a, b)| (a - b) / (SB * SB))
            .collect();
        for k in 1..=self.steps {
            let mx = self.power(k, x, false);
            let mut forcing = vec![0.0; self.n];
            for (j, yj) in self.y[k - 1].iter().enumerate() {
                let d = mx[4 * j] - yj;
                jo += 0.5 * d * d / (SO * SO);
                forcing[4 * j] = d / (SO * SO);
            }
            for (gi, a) in g.iter_mut().zip(self.power(k, &forcing, true)) {
                *gi += a;
            }
        }
        (jb, jo, g)
    }

    fn hess_vec(&self, v: &[f64]) -> Vec<f64> {
        let mut hv: Vec<f64> = v.iter().map(|a| a / (SB * SB)).collect();
        for k in 1..=self.steps {
            let mv = self.power(k, v, false);
            let mut forcing = vec![0.0; self.n];
            for j in 0..self.n.div_ceil(4) {
                forcing[4 * j] = mv[4 * j] / (SO * SO);
            }
            for (h, a) in hv.iter_mut().zip(self.power(k, &forcing, true)) {
                *h += a;
            }
        }
        hv
    }
}

#[test]
fn c_advection_matches_its_closed_form_in_both_encodings() {
    let Some(bin) = c_example() else { return };
    let model = Advection::new(40, 5, 0.6);
    for (choice, enc) in [
        (EncodingChoice::Text, Encoding::Text),
        (EncodingChoice::Binary, Encoding::Binary),
    ] {
        let mut cfg = AdapterConfig::new(format!("'{}'", bin.display()));
        cfg.encoding = choice;
        let p = start(&cfg);
        assert_eq!(p.encoding(), enc);
        assert_eq!(p.dim(), 40);
        assert!(p.has_hess_vec());
        for s in 0..3 {
            let x: Vec<f64> = (0..40)
                .map(|i| ((i * 7 + s * 13) % 11) as f64 / 5.0 - 1.0)
                .collect();
            let (jb, jo, g0) = model.eval(&x);
            let mut g = vec![0.0; 40];
            let j = p.cost_grad(&x, &mut g).unwrap();
            assert!(rel(j, jb + jo) < 1e-12, "{j} vs {}", jb + jo);
            close(&g, &g0, 1e-12);
            assert!(rel(p.cost(&x).unwrap(), jb + jo) < 1e-12);
            let split = p.cost_split(&x).unwrap().unwrap();
            assert!(rel(split.background, jb) < 1e-12 && rel(split.observation, jo) < 1e-12);
            let v: Vec<f64> = (0..40).map(|i| ((i * 3 + s) % 5) as f64 - 2.0).collect();
            let mut hv = vec![0.0; 40];
            p.hess_vec(&x, &v, &mut hv).unwrap();
            close(&hv, &model.hess_vec(&v), 1e-12);
        }
        // The prior N(xb, 0.25 I) as the adapter gives it.
        let prior = p.prior().expect("the C example offers a prior");
        close(prior.mean(), &model.xb, 1e-15);
        assert!(prior.variance().iter().all(|v| *v == 0.25));
        assert!(rel(prior.log_det(), 40.0 * 0.25f64.ln()) < 1e-14);
        let z: Vec<f64> = (0..40).map(|i| i as f64 - 20.0).collect();
        let mut out = vec![0.0; 40];
        prior.mul_sqrt(&z, &mut out);
        close(&out, &z.iter().map(|v| 0.5 * v).collect::<Vec<_>>(), 1e-15);
        assert!(prior.solve_sqrt_t(&z, &mut out));
        close(&out, &z.iter().map(|v| 2.0 * v).collect::<Vec<_>>(), 1e-15);
    }
}

/// A state larger than the pipes (n = 200 000: 1.6 MB per vector), so that requests and replies are
/// written and read in many pieces, in both encodings.
#[test]
fn c_advection_with_a_large_state() {
    let Some(bin) = c_example() else { return };
    let n = 200_000;
    let model = Advection::new(n, 2, 0.5);
    for choice in [EncodingChoice::Text, EncodingChoice::Binary] {
        let mut cfg = AdapterConfig::new(format!("'{}' {n} 2 0.5", bin.display()));
        cfg.encoding = choice;
        let p = start(&cfg);
        let x: Vec<f64> = (0..n).map(|i| (i as f64 * 0.01).sin()).collect();
        let (jb, jo, g0) = model.eval(&x);
        let mut g = vec![0.0; n];
        for _ in 0..2 {
            let j = p.cost_grad(&x, &mut g).unwrap();
            assert!(rel(j, jb + jo) < 1e-12, "{choice:?}: {j} vs {}", jb + jo);
            close(&g, &g0, 1e-12);
        }
    }
}

#[test]
fn c_advection_under_mpirun_as_launcher() {
    let Some(bin) = c_example() else { return };
    if !have("mpirun") {
        eprintln!("note: mpirun not found, the launcher is not tested here");
        return;
    }
    let model = Advection::new(40, 5, 0.6);
    for choice in [EncodingChoice::Text, EncodingChoice::Binary] {
        let mut cfg = AdapterConfig::new(format!("'{}'", bin.display()));
        // Open MPI refuses to run as root unless told twice (Open MPI 4.1 mpirun(1) man page, from memory).
        cfg.launcher = Some(
            "env OMPI_ALLOW_RUN_AS_ROOT=1 OMPI_ALLOW_RUN_AS_ROOT_CONFIRM=1 \
             mpirun -n 1 --allow-run-as-root --oversubscribe"
                .into(),
        );
        cfg.encoding = choice;
        cfg.workers = 2;
        let p = start(&cfg);
        let x: Vec<f64> = (0..40).map(|i| (i as f64 * 0.37).sin()).collect();
        let (jb, jo, g0) = model.eval(&x);
        let mut g = vec![0.0; 40];
        for _ in 0..3 {
            let j = p.cost_grad(&x, &mut g).unwrap();
            assert!(rel(j, jb + jo) < 1e-12);
            close(&g, &g0, 1e-12);
        }
    }
}

// ----- Fortran: pair-average observations -----------------------------------------------------------

/// The problem of adapters/fortran/pairs.f90 (1-based there, 0-based here) in closed form.
struct Pairs {
    xb: Vec<f64>,
    sb: Vec<f64>,
    y: Vec<f64>,
}

const SO_PAIRS: f64 = 0.2;

impl Pairs {
    fn new(n: usize) -> Self {
        Pairs {
            xb: (1..=n).map(|i| (0.5 * i as f64).cos()).collect(),
            sb: (1..=n).map(|i| 0.5 + 0.05 * i as f64).collect(),
            y: (1..=n / 2).map(|j| (j as f64).sin()).collect(),
        }
    }
    fn h(&self, x: &[f64]) -> Vec<f64> {
        (0..self.y.len())
            .map(|j| 0.5 * (x[2 * j] + x[2 * j + 1]))
            .collect()
    }
    fn jb(&self, x: &[f64]) -> f64 {
        x.iter()
            .zip(&self.xb)
            .zip(&self.sb)
            .map(|((x, b), s)| 0.5 * ((x - b) / s).powi(2))
            .sum()
    }
    fn jo(&self, x: &[f64]) -> f64 {
        self.h(x)
            .iter()
            .zip(&self.y)
            .map(|(h, y)| 0.5 * ((h - y) / SO_PAIRS).powi(2))
            .sum()
    }
    /// ∇J = B⁻¹ (x − xb) + Hᵀ R⁻¹ (H x − y) with Hᵀ spreading half of each pair's misfit to both points.
    fn grad(&self, x: &[f64]) -> Vec<f64> {
        let d: Vec<f64> = self
            .h(x)
            .iter()
            .zip(&self.y)
            .map(|(h, y)| (h - y) / (SO_PAIRS * SO_PAIRS))
            .collect();
        (0..x.len())
            .map(|i| (x[i] - self.xb[i]) / self.sb[i].powi(2) + 0.5 * d[i / 2])
            .collect()
    }
    /// The Hessian B⁻¹ + Hᵀ R⁻¹ H as a matrix, and the MAP solving (B⁻¹ + Hᵀ R⁻¹ H) x = B⁻¹ xb + Hᵀ R⁻¹ y
    /// (normal equations of a linear-Gaussian problem; Kalnay 2003, Atmospheric Modeling, Data
    /// Assimilation and Predictability, ch. 5).
    fn hessian_and_map(&self) -> (DMatrix<f64>, Vec<f64>) {
        let n = self.xb.len();
        let mut hm = DMatrix::zeros(n, n);
        let mut rhs = DVector::zeros(n);
        for i in 0..n {
            hm[(i, i)] += 1.0 / self.sb[i].powi(2);
            rhs[i] += self.xb[i] / self.sb[i].powi(2);
        }
        for j in 0..self.y.len() {
            for a in [2 * j, 2 * j + 1] {
                rhs[a] += 0.5 * self.y[j] / (SO_PAIRS * SO_PAIRS);
                for b in [2 * j, 2 * j + 1] {
                    hm[(a, b)] += 0.25 / (SO_PAIRS * SO_PAIRS);
                }
            }
        }
        let map = hm
            .clone()
            .lu()
            .solve(&rhs)
            .expect("the Hessian is invertible");
        (hm, map.as_slice().to_vec())
    }
}

#[test]
fn fortran_example_matches_its_closed_form() {
    let Some(bin) = fortran_example() else { return };
    let n = 12;
    let model = Pairs::new(n);
    let p = start(&AdapterConfig::new(format!("'{}' {n}", bin.display())));
    assert_eq!(
        p.encoding(),
        Encoding::Binary,
        "the Fortran example speaks binary only"
    );
    assert_eq!(
        p.label(),
        Some("pair-average observations (Fortran example)")
    );
    let x: Vec<f64> = (0..n).map(|i| (1.3 * i as f64).sin() * 2.0).collect();
    let mut g = vec![0.0; n];
    let j = p.cost_grad(&x, &mut g).unwrap();
    assert!(rel(j, model.jb(&x) + model.jo(&x)) < 1e-12);
    close(&g, &model.grad(&x), 1e-12);
    let split = p.cost_split(&x).unwrap().unwrap();
    assert!(
        rel(split.background, model.jb(&x)) < 1e-12 && rel(split.observation, model.jo(&x)) < 1e-12
    );
    let (hm, map) = model.hessian_and_map();
    let v: Vec<f64> = (0..n).map(|i| i as f64 - 5.5).collect();
    let mut hv = vec![0.0; n];
    p.hess_vec(&x, &v, &mut hv).unwrap();
    close(
        &hv,
        (&hm * DVector::from_column_slice(&v)).as_slice(),
        1e-12,
    );
    // At the MAP the gradient vanishes (up to rounding of the solve).
    p.cost_grad(&map, &mut g).unwrap();
    assert!(g.iter().all(|v| v.abs() < 1e-10), "{g:?}");
    let prior = p.prior().expect("the Fortran example offers a prior");
    close(prior.mean(), &model.xb, 1e-15);
    close(
        &prior.variance(),
        &model.sb.iter().map(|s| s * s).collect::<Vec<_>>(),
        1e-15,
    );
    let log_det: f64 = model.sb.iter().map(|s| 2.0 * s.ln()).sum();
    assert!(rel(prior.log_det(), log_det) < 1e-13);
    let mut out = vec![0.0; n];
    prior.mul_sqrt_t(&v, &mut out);
    close(
        &out,
        &v.iter()
            .zip(&model.sb)
            .map(|(a, s)| a * s)
            .collect::<Vec<_>>(),
        1e-15,
    );
}
