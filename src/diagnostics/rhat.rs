//! Rank-normalised split R-hat.

use super::draws::{checked, map, median, rank_normalise, split, Matrix};
use super::draws::{flat, mean, var};
use crate::error::Result;

/// Rank-normalised split R-hat of one quantity: the larger of the bulk R-hat (split chains,
/// rank-normalised) and the tail R-hat (split chains folded about their pooled median,
/// |x − median|, then rank-normalised) — Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021,
/// "Rank-normalization, folding, and localization: an improved R-hat for assessing convergence of MCMC",
/// Bayesian Analysis 16(2), sections 4.1–4.2. Each R-hat is
/// sqrt(((n − 1)/n W + B/n) / W) with B = n · var(chain means) and W = mean(chain variances), n draws
/// per split chain (Gelman & Rubin 1992; Gelman et al. 2013, BDA3 eq. 11.4).
///
/// `chains` holds one slice per chain, all of the same length (at least 4). A single chain is split
/// into two halves and gets a split R-hat (ArviZ returns NaN for one chain).
///
/// Constant draws, as ArviZ computes them: if every draw is the same, R-hat is NaN (0/0); if each
/// chain is constant but the chains differ, R-hat is +∞. When the bulk R-hat is NaN the result is NaN;
/// when only the folded one is (all draws equally far from the median) the bulk value is returned, as
/// ArviZ's `max(bulk, tail)` does.
pub fn rhat(chains: &[&[f64]]) -> Result<f64> {
    let m = checked(chains, "R-hat")?;
    Ok(rank_rhat(&m))
}

pub(crate) fn rank_rhat(m: &Matrix) -> f64 {
    let halves = split(m);
    let bulk = basic_rhat(&rank_normalise(&halves));
    let med = median(&flat(&halves));
    let tail = basic_rhat(&rank_normalise(&map(&halves, |x| (x - med).abs())));
    if tail > bulk {
        tail
    } else {
        bulk
    }
}

/// The potential scale reduction sqrt((B/W + n − 1) / n) of chains with n draws each.
fn basic_rhat(m: &Matrix) -> f64 {
    let n = m[0].len() as f64;
    let chain_means: Vec<f64> = m.iter().map(|c| mean(c)).collect();
    let within = mean(&m.iter().map(|c| var(c)).collect::<Vec<_>>());
    let between = n * var(&chain_means);
    ((between / within + n - 1.0) / n).sqrt()
}
