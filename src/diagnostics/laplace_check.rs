//! Importance-sampling check of a Gaussian (Laplace) approximation: draws from the approximation q,
//! weighted by π / q, say whether q covers the posterior π well enough to stand in for it.

use serde::Serialize;

use crate::error::{Error, Result};

/// Outcome of [`importance_check`].
#[derive(Debug, Clone, Serialize)]
pub struct ImportanceCheck {
    /// Pareto k-hat of the importance weights: +∞ when the tail is too short to fit (fewer than 5 draws
    /// beyond the cut-off, as ArviZ reports it), −∞ when all weights are equal (the proposal is the
    /// target up to a constant, as for a linear-Gaussian problem; ArviZ reports +∞ there because its
    /// tail is empty, which would wrongly fail an exact approximation).
    pub khat: f64,
    /// The k-hat below which the weighted estimates are reliable: min(1 − 1/log10(S), 0.7).
    pub khat_threshold: f64,
    /// Kish effective sample size (Σ w)² / Σ w² of the raw (unsmoothed) weights, between 1 and S.
    pub kish_ess: f64,
    /// Pareto-smoothed weights, normalised to sum to 1, in the order of the draws given.
    pub smoothed_weights: Vec<f64>,
}

impl ImportanceCheck {
    /// Whether k-hat is below the reliability threshold.
    pub fn reliable(&self) -> bool {
        self.khat < self.khat_threshold
    }
}

/// Importance weights w_s = π(x_s) / q(x_s) of S draws x_s from a proposal q, given per draw the
/// unnormalised log target log π(x_s) (e.g. −J(x_s)) and the log proposal density log q(x_s); constants
/// cancel on normalisation.
///
/// Computes the Kish effective sample size (Σ w)² / Σ w² — Kish 1965, Survey Sampling — and Pareto
/// smoothed importance sampling (PSIS) — Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
/// importance sampling", JMLR 25: the M = ⌈min(0.2 S, 3 √S)⌉ largest weights are fitted with a
/// generalized Pareto distribution above the (M + 1)-th largest weight (Zhang & Stephens 2009 with a weakly informative prior on the shape); its
/// shape is k-hat; those weights are replaced by the fitted quantiles at (i − 1/2) / M, capped at the
/// largest raw weight, and all weights are normalised. k-hat < min(1 − 1/log10 S, 0.7) says the
/// weighted estimates are reliable (paper, section 3). The arithmetic follows ArviZ's `psislw` with
/// relative efficiency 1.
///
/// Errors: lengths differ, fewer than 2 draws, a NaN or +∞ log target, a non-finite log proposal, or no
/// draw with positive target density. A log target of −∞ (zero density, e.g. a failed model run
/// counted as impossible) is allowed and gives weight zero.
pub fn importance_check(log_target: &[f64], log_proposal: &[f64]) -> Result<ImportanceCheck> {
    let s = log_target.len();
    if log_proposal.len() != s {
        return Err(Error::Config(format!(
            "importance check: {s} log-target values but {} log-proposal values; give one of each per draw",
            log_proposal.len()
        )));
    }
    if s < 2 {
        return Err(Error::Config(format!(
            "importance check: {s} draws given, at least 2 are needed (a few hundred for a useful k-hat)"
        )));
    }
    for (i, (&t, &q)) in log_target.iter().zip(log_proposal).enumerate() {
        if t.is_nan() || t == f64::INFINITY {
            return Err(Error::Numerical(format!(
                "importance check: log target of draw {i} is {t}; it must be finite or −inf"
            )));
        }
        if !q.is_finite() {
            return Err(Error::Numerical(format!(
                "importance check: log proposal density of draw {i} is {q}; it must be finite"
            )));
        }
    }
    let log_w: Vec<f64> = log_target
        .iter()
        .zip(log_proposal)
        .map(|(t, q)| t - q)
        .collect();
    let max = log_w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if max == f64::NEG_INFINITY {
        return Err(Error::Numerical(
            "importance check: every draw has zero target density (log target −inf)".into(),
        ));
    }
    let raw: Vec<f64> = log_w.iter().map(|lw| (lw - max).exp()).collect();
    let sum: f64 = raw.iter().sum();
    let kish_ess = sum * sum / raw.iter().map(|w| w * w).sum::<f64>();

    let (smoothed_log, khat) = if log_w.iter().all(|&v| v == log_w[0]) {
        (vec![-(s as f64).ln(); s], f64::NEG_INFINITY)
    } else {
        psis_smooth(&log_w)
    };
    let smoothed_weights = smoothed_log.iter().map(|lw| lw.exp()).collect();
    let khat_threshold = (1.0 - 1.0 / (s as f64).log10()).min(0.7);
    Ok(ImportanceCheck {
        khat,
        khat_threshold,
        kish_ess,
        smoothed_weights,
    })
}

/// Pareto smoothing of log weights; returns the normalised smoothed log weights and k-hat.
fn psis_smooth(log_w: &[f64]) -> (Vec<f64>, f64) {
    let s = log_w.len();
    let max = log_w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mut x: Vec<f64> = log_w.iter().map(|lw| lw - max).collect();
    let tail_len_target = (s as f64 / 5.0).min(3.0 * (s as f64).sqrt()).ceil() as usize;
    let mut order: Vec<usize> = (0..s).collect();
    order.sort_by(|&i, &j| x[i].total_cmp(&x[j]));
    let cutoff_index = s.saturating_sub(tail_len_target + 1);
    let cutoff = x[order[cutoff_index]].max(f64::MIN_POSITIVE.ln());
    let exp_cutoff = cutoff.exp();
    // Tail draws in increasing order of weight.
    let tail: Vec<usize> = order.iter().copied().filter(|&i| x[i] > cutoff).collect();
    let khat = if tail.len() <= 4 {
        f64::INFINITY
    } else {
        let excess: Vec<f64> = tail.iter().map(|&i| x[i].exp() - exp_cutoff).collect();
        let (k, sigma) = gpd_fit(&excess);
        if k.is_finite() && sigma > 0.0 {
            let m = tail.len() as f64;
            for (j, &i) in tail.iter().enumerate() {
                let p = (j as f64 + 0.5) / m;
                x[i] = (gpd_quantile(p, k, sigma) + exp_cutoff).ln();
            }
            for v in x.iter_mut() {
                if *v > 0.0 {
                    *v = 0.0;
                }
            }
        }
        k
    };
    let lse = log_sum_exp(&x);
    (x.iter().map(|v| v - lse).collect(), khat)
}

fn log_sum_exp(x: &[f64]) -> f64 {
    let max = x.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    max + x.iter().map(|v| (v - max).exp()).sum::<f64>().ln()
}

/// Fit of a generalized Pareto distribution with shape k and scale σ to sorted positive exceedances
/// y_(1) ≤ ... ≤ y_(n): the empirical Bayes estimate of Zhang & Stephens 2009, "A new and efficient
/// estimation method for the generalized Pareto distribution", Technometrics 51(3), over θ = −k/σ.
/// With m = 30 + ⌊√n⌋ grid points θ_j = 1/y_(n) + (1 − sqrt(m / (j − 1/2))) / (3 y_(⌊n/4 + 1/2⌋)),
/// κ(θ) = mean log(1 − θ y) and profile log-likelihood ℓ(θ) = n (log(−θ/κ(θ)) − κ(θ) − 1), the weights
/// w_j ∝ exp ℓ(θ_j) (those below 10 machine epsilons dropped) give θ̂ = Σ w_j θ_j, k̂ = κ(θ̂) and
/// σ̂ = −k̂/θ̂. Finally k̂ is shrunk towards 1/2 by a weakly informative prior worth 10 observations,
/// k̂ ← (n k̂ + 5) / (n + 10) — Vehtari et al. 2024, JMLR 25, appendix; as ArviZ computes it. k > 0 means
/// a heavy tail (Zhang & Stephens write the shape with the opposite sign).
fn gpd_fit(y: &[f64]) -> (f64, f64) {
    const PRIOR_BS: f64 = 3.0;
    const PRIOR_K: f64 = 10.0;
    let n = y.len();
    let nf = n as f64;
    let m = 30 + (nf.sqrt()) as usize;
    let quartile = y[((nf / 4.0 + 0.5) as usize).saturating_sub(1)];
    let largest = y[n - 1];
    let theta: Vec<f64> = (1..=m)
        .map(|j| {
            (1.0 - (m as f64 / (j as f64 - 0.5)).sqrt()) / (PRIOR_BS * quartile) + 1.0 / largest
        })
        .collect();
    let k_of = |b: f64| y.iter().map(|&v| (-b * v).ln_1p()).sum::<f64>() / nf;
    let k: Vec<f64> = theta.iter().map(|&b| k_of(b)).collect();
    let len_scale: Vec<f64> = theta
        .iter()
        .zip(&k)
        .map(|(&b, &kj)| nf * ((-(b / kj)).ln() - kj - 1.0))
        .collect();
    let weights = len_scale
        .iter()
        .map(|&lj| 1.0 / len_scale.iter().map(|&li| (li - lj).exp()).sum::<f64>());
    // Grid points of negligible weight dropped, then the weights normalised.
    let kept: Vec<(f64, f64)> = theta
        .iter()
        .copied()
        .zip(weights)
        .filter(|&(_, w)| w >= 10.0 * f64::EPSILON)
        .collect();
    let total: f64 = kept.iter().map(|&(_, w)| w).sum();
    let theta_post: f64 = kept.iter().map(|&(t, w)| t * (w / total)).sum();
    let k_post = k_of(theta_post);
    let sigma = -k_post / theta_post;
    let k_post = (nf * k_post + PRIOR_K * 0.5) / (nf + PRIOR_K);
    (k_post, sigma)
}

/// Quantile of the generalized Pareto distribution with shape k, scale σ and location 0 at 0 < p < 1:
/// σ ((1 − p)^(−k) − 1) / k, or −σ log(1 − p) for k = 0 (Vehtari et al. 2024).
fn gpd_quantile(p: f64, k: f64, sigma: f64) -> f64 {
    if k.abs() < f64::EPSILON {
        -(-p).ln_1p() * sigma
    } else {
        (-k * (-p).ln_1p()).exp_m1() / k * sigma
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn equal_weights() {
        // Equal weights: Kish ESS = S exactly (Kish 1965), smoothed weights 1/S.
        let lt = vec![-1.0; 50];
        let lq = vec![-2.0; 50];
        let c = importance_check(&lt, &lq).unwrap();
        assert!((c.kish_ess - 50.0).abs() < 1e-9);
        assert!(c.smoothed_weights.iter().all(|w| (w - 0.02).abs() < 1e-12));
        // An exact proposal has no tail at all: reported as k-hat = -inf, reliable (bounded weights give
        // k <= 0 — Vehtari et al. 2024, JMLR 25; the -inf value is this crate's documented convention).
        assert_eq!(c.khat, f64::NEG_INFINITY);
        assert!(c.reliable());
    }

    #[test]
    fn bad_input() {
        // Input validation, not a numerical fact (no external source).
        assert!(importance_check(&[0.0, 1.0], &[0.0]).is_err());
        assert!(importance_check(&[0.0, f64::NAN], &[0.0, 0.0]).is_err());
        assert!(importance_check(&[0.0, 0.0], &[0.0, f64::INFINITY]).is_err());
        assert!(importance_check(&[f64::NEG_INFINITY; 3], &[0.0; 3]).is_err());
        assert!(importance_check(&[f64::NEG_INFINITY, 0.0, 0.0], &[0.0; 3]).is_ok());
    }
}
