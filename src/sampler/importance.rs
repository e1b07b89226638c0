//! Importance sampling from the Laplace Gaussian: draws u ~ N(0, I) in the whitened coordinates of a
//! [`Target`] (so x = x* + L u ~ N(x*, L Lᵀ)), evaluated together with cost-only runs, and weighted by
//! π(u) / q(u) with log q(u) = −½ |u|² (its constant cancels on normalisation). The Laplace check uses
//! it; a draw whose evaluation fails recoverably gets weight 0 (log-weight −∞).
//!
//! Draw i uses stream `STREAM_OFFSET + i` of the seed, so the draws do not depend on how the
//! evaluations are spread over workers or threads.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use super::ensemble::WeightedDraws;
use super::{standard_normal, Target};
use crate::error::Result;

/// First random stream of the draws (chains use streams 0, 1, …).
pub const STREAM_OFFSET: u64 = 1_000;

/// The weighted Laplace draws, with the log target and log proposal of each.
#[derive(Default)]
pub struct ImportanceDraws {
    /// Draws in model space with log w = log π − log q.
    pub draws: WeightedDraws,
    /// log π(u) = −J(x) of each draw (−∞ where the evaluation failed).
    pub log_target: Vec<f64>,
    /// log q(u) = −½ |u|² of each draw.
    pub log_proposal: Vec<f64>,
    /// Draws whose evaluation failed recoverably.
    pub failed: usize,
}

/// `k` draws of the Laplace Gaussian of `target`, evaluated as one batch.
pub fn laplace_draws(target: &Target<'_>, k: usize, seed: u64) -> Result<ImportanceDraws> {
    laplace_draws_from(target, 0, k, seed)
}

/// Draws `first` … `first + k − 1` of the Laplace Gaussian of `target` (the same draws whatever the
/// batches they are asked in), evaluated as one batch.
pub fn laplace_draws_from(
    target: &Target<'_>,
    first: usize,
    k: usize,
    seed: u64,
) -> Result<ImportanceDraws> {
    let n = target.dim();
    let us: Vec<Vec<f64>> = (first..first + k)
        .map(|i| {
            let mut rng = ChaCha8Rng::seed_from_u64(seed);
            rng.set_stream(STREAM_OFFSET + i as u64);
            standard_normal(&mut rng, n)
        })
        .collect();
    let log_proposal: Vec<f64> = us
        .iter()
        .map(|u| -0.5 * crate::util::vector::dot(u, u))
        .collect();
    let log_target: Vec<f64> = target
        .log_density_batch(&us)?
        .into_iter()
        .map(|lp| lp.unwrap_or(f64::NEG_INFINITY))
        .collect();
    let failed = log_target
        .iter()
        .filter(|t| **t == f64::NEG_INFINITY)
        .count();
    let x: Vec<Vec<f64>> = us
        .iter()
        .map(|u| {
            let mut x = vec![0.0; n];
            target.to_model(u, &mut x);
            x
        })
        .collect();
    let log_weights = log_target
        .iter()
        .zip(&log_proposal)
        .map(|(t, q)| t - q)
        .collect();
    Ok(ImportanceDraws {
        draws: WeightedDraws { x, log_weights },
        log_target,
        log_proposal,
        failed,
    })
}

impl ImportanceDraws {
    /// These draws followed by `more`.
    pub fn extend(&mut self, more: ImportanceDraws) {
        self.draws.x.extend(more.draws.x);
        self.draws.log_weights.extend(more.draws.log_weights);
        self.log_target.extend(more.log_target);
        self.log_proposal.extend(more.log_proposal);
        self.failed += more.failed;
    }

    /// Number of draws.
    pub fn len(&self) -> usize {
        self.log_target.len()
    }

    /// Whether there are no draws.
    pub fn is_empty(&self) -> bool {
        self.log_target.is_empty()
    }
}
