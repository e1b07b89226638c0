//! The test direction h of the Taylor test.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::norm;
use crate::problem::Problem;
use crate::util::vector::dot;

/// Tries before accepting a direction nearly orthogonal to the gradient.
const TRIES: usize = 20;

/// A seeded random direction, not nearly orthogonal to the gradient `g` where `g` is not zero: a draw
/// from the background error N(0, B) where the problem gives B (so it has the smoothness and scale of a
/// real increment and does not excite the badly conditioned small scales), else white noise at the
/// scale of the state.
pub fn choose(problem: &dyn Problem, x: &[f64], g: &[f64], seed: u64) -> Vec<f64> {
    let n = x.len();
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let prior = problem.prior().filter(|p| p.dim() == n);
    let scale = (norm(x) / (n as f64).sqrt()).max(1.0);
    let grad_norm = norm(g);
    let mut h = vec![0.0; n];
    let mut z = vec![0.0; n];
    for _ in 0..TRIES {
        z.iter_mut()
            .for_each(|v| *v = StandardNormal.sample(&mut rng));
        match prior {
            Some(p) => p.mul_sqrt(&z, &mut h),
            None => h.iter_mut().zip(&z).for_each(|(a, b)| *a = scale * b),
        }
        if grad_norm == 0.0 || dot(&h, g).abs() > 1e-3 * norm(&h) * grad_norm {
            break;
        }
    }
    h
}
