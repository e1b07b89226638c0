//! Unit tests of the NUTS kernel: Gaussian targets whose moments are known in closed form, the
//! invariance of N(0, I) under one step, the depth cap, divergences and failed evaluations, and
//! reproducibility.

use std::sync::Arc;

use rand::SeedableRng;

use super::*;
use crate::diagnostics::{mcse_mean, mcse_sd};
use crate::error::EvalError;
use crate::precond::IdentityPrecond;
use crate::problem::{Counted, Problem};

/// J(x) = ½ xᵀ A x (A symmetric, row-major), so the target is exactly N(0, A⁻¹); the cost is NaN (a
/// recoverable failure) wherever |x₀| exceeds `fail_beyond`.
struct Quadratic {
    n: usize,
    a: Vec<f64>,
    fail_beyond: f64,
}

impl Quadratic {
    fn new(n: usize, a: Vec<f64>) -> Self {
        Quadratic {
            n,
            a,
            fail_beyond: f64::INFINITY,
        }
    }
    fn identity(n: usize, scale: f64) -> Self {
        let a = (0..n * n)
            .map(|k| if k / n == k % n { scale } else { 0.0 })
            .collect();
        Quadratic::new(n, a)
    }
}

impl Problem for Quadratic {
    fn dim(&self) -> usize {
        self.n
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        if x[0].abs() > self.fail_beyond {
            return Ok(f64::NAN);
        }
        for (i, g) in grad.iter_mut().enumerate() {
            *g = (0..self.n).map(|j| self.a[i * self.n + j] * x[j]).sum();
        }
        Ok(0.5 * x.iter().zip(grad.iter()).map(|(a, b)| a * b).sum::<f64>())
    }
}

/// Runs `chains` chains of `draws` NUTS steps each from `start(c)`, returning `[chain][draw]` positions
/// and every step's info.
fn run_chains(
    problem: Quadratic,
    s: &[f64],
    eps: f64,
    chains: usize,
    draws: usize,
    start: impl Fn(&mut ChainRng) -> Vec<f64>,
) -> (Vec<Vec<Vec<f64>>>, Vec<StepInfo>) {
    let n = problem.n;
    let counted = Counted::new(problem);
    let target = Target::new(
        &counted,
        "q",
        vec![0.0; n],
        Arc::new(IdentityPrecond::new(n)),
    )
    .unwrap();
    let kernel = Nuts::new(10).unwrap();
    let mut out = Vec::new();
    let mut infos = Vec::new();
    for c in 0..chains {
        let mut rng = ChainRng::seed_from_u64(7);
        rng.set_stream(c as u64);
        let mut state = kernel.init(&target, start(&mut rng)).unwrap().unwrap();
        let mut draws_c = Vec::new();
        for _ in 0..draws {
            let (next, info) = kernel
                .step(&target, &mut rng, &state, eps, &Metric::diagonal(s))
                .unwrap();
            infos.push(info);
            draws_c.push(next.u.clone());
            state = next;
        }
        out.push(draws_c);
    }
    (out, infos)
}

/// Component `i` of `[chain][draw]` positions, transformed by `f`.
fn series(draws: &[Vec<Vec<f64>>], f: impl Fn(&[f64]) -> f64) -> Vec<Vec<f64>> {
    draws
        .iter()
        .map(|c| c.iter().map(|x| f(x)).collect())
        .collect()
}

/// The mean of f within 4 MCSE (the project's `mcse_mean`) of `want`.
fn check_mean(s: &[Vec<f64>], want: f64, what: &str) {
    let refs: Vec<&[f64]> = s.iter().map(|c| c.as_slice()).collect();
    let all: Vec<f64> = s.iter().flatten().copied().collect();
    let m = all.iter().sum::<f64>() / all.len() as f64;
    let e = mcse_mean(&refs).unwrap();
    assert!(
        (m - want).abs() < 4.0 * e,
        "{what}: mean {m} vs {want}, MCSE {e}"
    );
}

/// The variance of x within 4 MCSE of `want`; MCSE of the variance = 2 sd · MCSE of the sd (the
/// project's `mcse_sd`, delta method).
fn check_var(s: &[Vec<f64>], want: f64, what: &str) {
    let refs: Vec<&[f64]> = s.iter().map(|c| c.as_slice()).collect();
    let all: Vec<f64> = s.iter().flatten().copied().collect();
    let m = all.iter().sum::<f64>() / all.len() as f64;
    let v = all.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (all.len() - 1) as f64;
    let e = 2.0 * v.sqrt() * mcse_sd(&refs).unwrap();
    assert!(
        (v - want).abs() < 4.0 * e,
        "{what}: variance {v} vs {want}, MCSE {e}"
    );
}

/// Standard normal in 5 dimensions (closed form: mean 0, variance 1), unit metric.
#[test]
fn standard_normal_moments_within_4_mcse() {
    let (d, infos) = run_chains(Quadratic::identity(5, 1.0), &[1.0; 5], 0.6, 4, 1500, |r| {
        standard_normal(r, 5)
    });
    for i in 0..5 {
        check_mean(&series(&d, |x| x[i]), 0.0, &format!("x{i}"));
        check_var(&series(&d, |x| x[i]), 1.0, &format!("x{i}"));
    }
    assert!(infos.iter().all(|i| !i.divergent && !i.nonfinite));
    let mean_accept = infos.iter().map(|i| i.accept_prob).sum::<f64>() / infos.len() as f64;
    assert!(mean_accept > 0.5 && mean_accept <= 1.0, "{mean_accept}");
}

/// Correlated 2-D Gaussian N(0, Σ), Σ = [[1, 0.9], [0.9, 1]], A = Σ⁻¹ = [[1, −0.9], [−0.9, 1]] / 0.19
/// (closed form), with a non-unit diagonal metric so that the velocity S p enters the U-turn check:
/// means 0, variances 1, and E x₀x₁ = 0.9, each within 4 MCSE.
#[test]
fn correlated_gaussian_moments_within_4_mcse() {
    let a = vec![1.0 / 0.19, -0.9 / 0.19, -0.9 / 0.19, 1.0 / 0.19];
    let (d, _) = run_chains(Quadratic::new(2, a), &[0.5, 2.0], 0.15, 4, 2500, |r| {
        standard_normal(r, 2)
    });
    for i in 0..2 {
        check_mean(&series(&d, |x| x[i]), 0.0, &format!("x{i}"));
        check_var(&series(&d, |x| x[i]), 1.0, &format!("x{i}"));
    }
    check_mean(&series(&d, |x| x[0] * x[1]), 0.9, "x0 x1");
}

/// One step from exact draws of N(0, I₂) must leave N(0, I₂) exactly invariant (closed form: E x = 0,
/// E x² = 1, E x⁴ = 3 per component). 20 000 independent chains, one step each, with a large step
/// size (ε = 1.3: large energy errors, so that the multinomial weights matter), with the unit metric
/// and with S = diag(0.5, 2) (the momentum draw must match the kinetic energy); each moment within 4
/// standard errors of independent draws (Var x = 1, Var x² = 2, Var x⁴ = 105 − 9 = 96).
#[test]
fn one_step_from_exact_draws_preserves_the_standard_normal() {
    for s in [[1.0, 1.0], [0.5, 2.0]] {
        let (d, infos) = run_chains(Quadratic::identity(2, 1.0), &s, 1.3, 20_000, 1, |r| {
            standard_normal(r, 2)
        });
        let n = d.len() as f64;
        for i in 0..2 {
            let x: Vec<f64> = d.iter().map(|c| c[0][i]).collect();
            for (k, want, var) in [(1, 0.0, 1.0), (2, 1.0, 2.0), (4, 3.0, 96.0)] {
                let m = x.iter().map(|v| v.powi(k)).sum::<f64>() / n;
                let se = (var / n).sqrt();
                assert!(
                    (m - want).abs() < 4.0 * se,
                    "metric {s:?} x{i}: E x^{k} = {m} vs {want} (SE {se})"
                );
            }
        }
        // The step size is large enough that the trajectory points are weighted unequally.
        assert!(infos.iter().any(|i| i.accept_prob < 0.9));
    }
}

/// The depth cap: at most 2^max_depth − 1 leapfrog steps, one gradient evaluation each (Hoffman &
/// Gelman 2014, section 3.1: depth j adds 2^j steps). With a tiny step no U-turn is reached, so the cap
/// is hit exactly.
#[test]
fn tree_depth_cap_and_honest_step_count() {
    let counted = Counted::new(Quadratic::identity(3, 1.0));
    let target = Target::new(
        &counted,
        "q",
        vec![0.0; 3],
        Arc::new(IdentityPrecond::new(3)),
    )
    .unwrap();
    for max_depth in 1..=6u32 {
        let kernel = Nuts::new(max_depth).unwrap();
        let cap = (1u32 << max_depth) - 1;
        let mut rng = ChainRng::seed_from_u64(max_depth.into());
        let mut state = kernel.init(&target, vec![0.5, -0.3, 1.0]).unwrap().unwrap();
        for eps in [1e-4, 0.3, 0.9] {
            for _ in 0..50 {
                let before = counted.counts().gradient;
                let (next, info) = kernel
                    .step(&target, &mut rng, &state, eps, &Metric::diagonal(&[1.0; 3]))
                    .unwrap();
                assert!(
                    info.n_steps >= 1 && info.n_steps <= cap,
                    "{max_depth}: {}",
                    info.n_steps
                );
                assert_eq!(counted.counts().gradient - before, u64::from(info.n_steps));
                if eps == 1e-4 {
                    assert_eq!(info.n_steps, cap);
                }
                state = next;
            }
        }
    }
    assert!(Nuts::new(0).is_err() && Nuts::new(MAX_TREE_DEPTH + 1).is_err());
    let e = Nuts::new(21).unwrap_err().to_string();
    assert!(e.contains("--nuts-max-depth"), "{e}");
}

/// A target whose leapfrog blows up (J = ½·10⁸ x², step 1: the integrator is unstable, εω = 10⁴ > 2,
/// Leimkuhler & Reich 2004, "Simulating Hamiltonian Dynamics", section 2.6 — the energy error grows
/// past the threshold at once): divergent, the chain stays, acceptance statistic 0, no panic.
#[test]
fn divergent_target_is_flagged_and_the_chain_stays() {
    let counted = Counted::new(Quadratic::identity(2, 1e8));
    let target = Target::new(
        &counted,
        "q",
        vec![0.0; 2],
        Arc::new(IdentityPrecond::new(2)),
    )
    .unwrap();
    let kernel = Nuts::new(10).unwrap();
    let mut rng = ChainRng::seed_from_u64(3);
    let state = kernel.init(&target, vec![1e-4, 0.0]).unwrap().unwrap();
    let (next, info) = kernel
        .step(&target, &mut rng, &state, 1.0, &Metric::diagonal(&[1.0; 2]))
        .unwrap();
    assert!(info.divergent && !info.accepted);
    assert_eq!(info.n_steps, 1);
    assert_eq!(info.accept_prob, 0.0);
    assert_eq!(next, state);
}

/// A failed evaluation (NaN cost beyond |x₀| = 0.01) stops the doubling like a divergence and is
/// reported as non-finite; the points before it may still be chosen, never a failed one.
#[test]
fn failed_evaluations_stop_the_tree_without_panic() {
    let mut q = Quadratic::identity(2, 1.0);
    q.fail_beyond = 0.01;
    let counted = Counted::new(q);
    let target = Target::new(
        &counted,
        "q",
        vec![0.0; 2],
        Arc::new(IdentityPrecond::new(2)),
    )
    .unwrap();
    let kernel = Nuts::new(10).unwrap();
    let mut rng = ChainRng::seed_from_u64(5);
    let mut state = kernel.init(&target, vec![0.0, 0.0]).unwrap().unwrap();
    let mut failed = 0;
    for _ in 0..50 {
        let (next, info) = kernel
            .step(&target, &mut rng, &state, 0.5, &Metric::diagonal(&[1.0; 2]))
            .unwrap();
        failed += usize::from(info.nonfinite);
        assert!(next.u[0].abs() <= 0.01 && next.log_density.is_finite());
        state = next;
    }
    assert!(failed > 40, "{failed}");
}

/// The same seed gives bit-identical states and step information (common practice, no source).
#[test]
fn same_seed_is_bit_identical() {
    let run = || {
        run_chains(
            Quadratic::identity(3, 2.0),
            &[1.0, 0.5, 2.0],
            0.7,
            2,
            200,
            |r| standard_normal(r, 3),
        )
    };
    let (a, ia) = run();
    let (b, ib) = run();
    let bits = |d: &Vec<Vec<Vec<f64>>>| -> Vec<u64> {
        d.iter().flatten().flatten().map(|v| v.to_bits()).collect()
    };
    assert_eq!(bits(&a), bits(&b));
    assert_eq!(ia, ib);
}
