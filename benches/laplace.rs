//! Benchmark: the low-rank Laplace covariance of the linear-Gaussian problem at n = 100 000 with a
//! forward map of rank 50, against the problem's closed-form posterior variances.
//!
//! Run with `cargo bench --bench laplace`. Prints one JSON object per case (products, evaluations, wall
//! time, largest relative variance error, peak resident memory VmHWM) and exits non-zero when a target
//! is missed: variances within 1% of the closed form, peak memory under 1 GB.

mod common;

use std::time::Instant;

use common::peak_rss;

use varpost::precond::{laplace, LaplaceMethod, LaplaceOptions};
use varpost::problem::linear_gaussian::{LinearGaussian, LinearGaussianConfig};
use varpost::problem::Prior;
use varpost::{Counted, EvalError, Problem};

/// A borrowed view of the problem, with or without its exact Hessian-vector product (without it, the
/// products are finite differences of gradients).
struct View<'a> {
    problem: &'a LinearGaussian,
    exact: bool,
}

impl Problem for View<'_> {
    fn dim(&self) -> usize {
        self.problem.dim()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        self.problem.cost_grad(x, grad)
    }
    fn has_hess_vec(&self) -> bool {
        self.exact
    }
    fn hess_vec(&self, x: &[f64], v: &[f64], out: &mut [f64]) -> Result<(), EvalError> {
        self.problem.hess_vec(x, v, out)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        self.problem.prior()
    }
}

fn case<P: Problem>(name: &str, problem: &Counted<P>, mean: &[f64], truth: &[f64]) -> bool {
    let prior_var = problem.prior().map(|p| p.variance()).unwrap_or_default();
    let opts = LaplaceOptions {
        method: Some(LaplaceMethod::LowRank),
        ..Default::default()
    };
    let t0 = Instant::now();
    let l = match laplace(problem, mean, &[], &opts) {
        Ok(l) => l,
        Err(e) => {
            eprintln!("{name}: {e}");
            return false;
        }
    };
    let secs = t0.elapsed().as_secs_f64();
    let err = l
        .variance
        .iter()
        .zip(truth)
        .map(|(a, b)| (a - b).abs() / b)
        .fold(0.0, f64::max);
    // The variance reduction b_i − σ²_i is what the low-rank update carries; its error relative to the
    // largest reduction is the more telling figure where most of the variance is the prior's.
    let reduction =
        |v: &[f64]| -> Vec<f64> { prior_var.iter().zip(v).map(|(b, s)| b - s).collect() };
    let (red, red_true) = (reduction(&l.variance), reduction(truth));
    let red_scale = red_true.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
    let red_err = red
        .iter()
        .zip(&red_true)
        .map(|(a, b)| (a - b).abs())
        .fold(0.0, f64::max)
        / red_scale;
    let peak = peak_rss().unwrap_or(0);
    println!(
        "{}",
        serde_json::json!({
            "case": name,
            "n": mean.len(),
            "rank": l.rank,
            "smallest_kept_eigenvalue": l.eigenvalues.last(),
            "next_eigenvalue": l.info.next_eigenvalue,
            "hessian_vector_products": l.info.products,
            "evaluations": l.info.evaluations,
            "seconds": secs,
            "max_rel_variance_error": err,
            "max_variance_reduction_error": red_err,
            "peak_rss_mb": peak as f64 / 1048576.0,
        })
    );
    let ok = err < 0.01 && peak < 1 << 30;
    if !ok {
        eprintln!(
            "{name}: target missed (variance error {err:.3e}, peak {} MB)",
            peak >> 20
        );
    }
    ok
}

fn main() {
    let mut ok = true;
    // sigma_o = 0.3 (the default): every one of the 50 eigenvalues is far above the threshold;
    // sigma_o = 1000: the spectrum straddles the 0.1 threshold, so the rank rule truncates.
    for sigma_o in [0.3, 1000.0] {
        let config = LinearGaussianConfig {
            n: 100_000,
            m: 400,
            rank: 50,
            sigma_o,
            ..Default::default()
        };
        let built = LinearGaussian::new(config).and_then(|p| p.reference().map(|r| (p, r)));
        let (problem, reference) = match built {
            Ok(pr) => pr,
            Err(e) => {
                eprintln!("building the problem: {e}");
                std::process::exit(2);
            }
        };
        for exact in [true, false] {
            let view = Counted::new(View {
                problem: &problem,
                exact,
            });
            let kind = if exact { "exact" } else { "finite-difference" };
            let name = format!("sigma_o={sigma_o}, {kind} products");
            ok &= case(&name, &view, &reference.mean, &reference.variance);
        }
    }
    if !ok {
        std::process::exit(1);
    }
}
