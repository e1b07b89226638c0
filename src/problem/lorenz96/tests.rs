//! Unit checks of the forcing derivatives of the RK4 step: the tangent-linear in F against finite
//! differences, and the adjoint in (x, F) against the tangent-linear.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::model::Lorenz96Model;
use super::scenario::normal_draws;

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// A state near the attractor of the default model.
fn state(model: &Lorenz96Model, seed: u64) -> Vec<f64> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut x: Vec<f64> = normal_draws(&mut rng, model.n)
        .iter()
        .map(|z| model.forcing + z)
        .collect();
    for _ in 0..300 {
        x = model.step(&x);
    }
    x
}

#[test]
fn forcing_tangent_linear_matches_central_differences() {
    // Central difference (M(x, F + e) − M(x, F − e)) / 2e has error O(e²): common practice, no source.
    let model = Lorenz96Model::default();
    let x = state(&model, 1);
    let zero = vec![0.0; model.n];
    let tl = model.step_tl_forcing(&x, &zero, 1.0);
    let e = 1e-5;
    let at = |f: f64| {
        Lorenz96Model {
            forcing: f,
            ..model
        }
        .step(&x)
    };
    let (p, m) = (at(model.forcing + e), at(model.forcing - e));
    for i in 0..model.n {
        let fd = (p[i] - m[i]) / (2.0 * e);
        assert!((fd - tl[i]).abs() < 1e-8, "site {i}: fd {fd} tl {}", tl[i]);
    }
    // A single Euler stage would give dt; RK4 gives dt plus higher-order terms, not far from it.
    assert!(tl.iter().all(|v| (v - model.dt).abs() < 0.5 * model.dt));
}

#[test]
fn step_adjoint_with_forcing_passes_the_dot_product_test() {
    // <M'(dx, dF), y> = <dx, a_x> + dF a_F to about 100 machine epsilons: common practice, no source.
    let model = Lorenz96Model::default();
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    for seed in 0..5 {
        let x = state(&model, 10 + seed);
        let dx = normal_draws(&mut rng, model.n);
        let df = normal_draws(&mut rng, 1)[0];
        let y = normal_draws(&mut rng, model.n);
        let lhs = dot(&model.step_tl_forcing(&x, &dx, df), &y);
        let (ax, af) = model.step_adj_forcing(&x, &y);
        let rhs = dot(&dx, &ax) + df * af;
        let rel = (lhs - rhs).abs() / lhs.abs().max(rhs.abs());
        assert!(rel < 1e-12, "relative adjoint mismatch {rel:e}");
        // The x part is the adjoint without the forcing, bit for bit.
        assert_eq!(ax, model.step_adj(&x, &y));
    }
}

#[test]
fn without_a_forcing_increment_the_tangent_linear_is_unchanged() {
    // Internal consistency, no outside source.
    let model = Lorenz96Model::default();
    let x = state(&model, 4);
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let dx = normal_draws(&mut rng, model.n);
    assert_eq!(model.step_tl_forcing(&x, &dx, 0.0), model.step_tl(&x, &dx));
}
