//! Importance-sampling check of a Gaussian (Laplace) approximation: draws from the approximation q,
//! weighted by π / q, say whether q covers the posterior π well enough to stand in for it.

use serde::Serialize;

use super::verdict::KHAT_LIMIT;
use crate::error::{Error, Result};

/// Fewest draws in the tail for the generalized Pareto fit (as ArviZ requires: more than 4).
pub const MIN_TAIL_DRAWS: usize = 5;

/// Relative size, against the largest |log target| or |log proposal| (and at least 1), below which the
/// spread of the log weights counts as rounding: the weights are then equal and the proposal is the
/// target up to a constant.
pub const EQUAL_WEIGHTS_RTOL: f64 = 1e-9;

/// Outcome of [`importance_check`].
#[derive(Debug, Clone, Serialize)]
pub struct ImportanceCheck {
    /// Pareto k-hat of the importance weights; −∞ when all weights are equal to rounding (the proposal
    /// is the target up to a constant, as for a linear-Gaussian problem; ArviZ reports +∞ there because
    /// its tail is empty, which would wrongly fail an exact approximation); NaN when it cannot be
    /// estimated (too few draws or too few distinct large weights for the tail fit: see `khat_note`).
    pub khat: f64,
    /// The k-hat below which the weighted estimates are reliable: [`khat_threshold`] of the draws.
    pub khat_threshold: f64,
    /// Why k-hat is −∞ or NaN, in words for the user (with the number of draws needed where that is
    /// the cause); `None` when k-hat is an estimate.
    pub khat_note: Option<String>,
    /// Kish effective sample size (Σ w)² / Σ w² of the raw (unsmoothed) weights, between 1 and S.
    pub kish_ess: f64,
    /// Pareto-smoothed weights, normalised to sum to 1, in the order of the draws given (the raw
    /// weights, normalised, where k-hat could not be estimated).
    pub smoothed_weights: Vec<f64>,
}

impl ImportanceCheck {
    /// Whether k-hat is below the reliability threshold (false when it could not be estimated).
    pub fn reliable(&self) -> bool {
        self.khat < self.khat_threshold
    }

    /// The number of draws S.
    pub fn draws(&self) -> usize {
        self.smoothed_weights.len()
    }
}

/// The k-hat below which importance-sampling estimates from S draws are reliable:
/// min(1 − 1/log10(S), 0.7) — Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed importance
/// sampling", JMLR 25, section 3 (0.7 from S = 2155 draws on, as 10^(10/3) ≈ 2154.4). The one place the threshold is computed.
pub fn khat_threshold(draws: usize) -> f64 {
    (1.0 - 1.0 / (draws as f64).log10()).min(KHAT_LIMIT)
}

/// Draws in the tail fitted by PSIS: ⌈min(0.2 S, 3 √S)⌉ (Vehtari et al. 2024, section 3).
fn tail_len(draws: usize) -> usize {
    let s = draws as f64;
    (s / 5.0).min(3.0 * s.sqrt()).ceil() as usize
}

/// Fewest draws S whose tail holds [`MIN_TAIL_DRAWS`] draws: below it k-hat cannot be estimated.
pub fn min_draws_for_khat() -> usize {
    (2..)
        .find(|&s| tail_len(s) >= MIN_TAIL_DRAWS)
        .unwrap_or(usize::MAX)
}

/// Importance weights w_s = π(x_s) / q(x_s) of S draws x_s from a proposal q, given per draw the
/// unnormalised log target log π(x_s) (e.g. −J(x_s)) and the log proposal density log q(x_s); constants
/// cancel on normalisation.
///
/// Computes the Kish effective sample size (Σ w)² / Σ w² — Kish 1965, Survey Sampling — and Pareto
/// smoothed importance sampling (PSIS) — Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed
/// importance sampling", JMLR 25: the M = ⌈min(0.2 S, 3 √S)⌉ largest weights are fitted with a
/// generalized Pareto distribution above the (M + 1)-th largest weight (Zhang & Stephens 2009 with a
/// weakly informative prior on the shape); its shape is k-hat; those weights are replaced by the fitted
/// quantiles at (i − 1/2) / M, capped at the largest raw weight, and all weights are normalised.
/// k-hat below [`khat_threshold`] says the weighted estimates are reliable (paper, section 3). The
/// arithmetic follows ArviZ's `psislw` with relative efficiency 1.
///
/// Where ArviZ reports k-hat = +∞ for a tail too short to fit, this reports NaN with a note saying
/// why: fewer than [`min_draws_for_khat`] draws (21: M is then below [`MIN_TAIL_DRAWS`]), or too few
/// distinct weights above the cut-off. Weights equal to rounding (see [`EQUAL_WEIGHTS_RTOL`]) give
/// k-hat = −∞ whatever S: the proposal is exact.
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

    let (smoothed_log, khat, khat_note) = if equal_to_rounding(log_target, log_proposal, &log_w) {
        let note =
            "the importance weights are equal to rounding: the Gaussian is the posterior up to \
                    a constant";
        (
            vec![-(s as f64).ln(); s],
            f64::NEG_INFINITY,
            Some(note.to_string()),
        )
    } else if s < min_draws_for_khat() {
        let note = format!(
            "k-hat cannot be estimated from {s} draws: the Pareto fit of the largest weights needs at \
             least {} draws ({MIN_TAIL_DRAWS} in the tail), and a few hundred for a useful estimate",
            min_draws_for_khat()
        );
        let lse = log_sum_exp(&log_w);
        (
            log_w.iter().map(|v| v - lse).collect(),
            f64::NAN,
            Some(note),
        )
    } else {
        let (smoothed, khat) = psis_smooth(&log_w);
        let note = (!khat.is_finite()).then(|| {
            format!(
                "k-hat cannot be estimated: fewer than {MIN_TAIL_DRAWS} of the {s} weights stand \
                 distinctly above the cut-off of the Pareto tail fit (many equal or zero weights)"
            )
        });
        (smoothed, khat, note)
    };
    let smoothed_weights = smoothed_log.iter().map(|lw| lw.exp()).collect();
    Ok(ImportanceCheck {
        khat,
        khat_threshold: khat_threshold(s),
        khat_note,
        kish_ess,
        smoothed_weights,
    })
}

/// Whether the log weights are all equal up to rounding of the log densities they come from (see
/// [`EQUAL_WEIGHTS_RTOL`]); a zero weight (log target −∞) among positive ones is never rounding.
fn equal_to_rounding(log_target: &[f64], log_proposal: &[f64], log_w: &[f64]) -> bool {
    if log_w.iter().any(|v| !v.is_finite()) {
        return false;
    }
    let (lo, hi) = log_w
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    let scale = log_target
        .iter()
        .chain(log_proposal)
        .fold(1.0f64, |m, v| m.max(v.abs()));
    hi - lo <= EQUAL_WEIGHTS_RTOL * scale
}

/// Pareto smoothing of log weights; returns the normalised smoothed log weights and k-hat (NaN, and
/// the weights unsmoothed, when fewer than [`MIN_TAIL_DRAWS`] weights lie above the cut-off).
fn psis_smooth(log_w: &[f64]) -> (Vec<f64>, f64) {
    let s = log_w.len();
    let max = log_w.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mut x: Vec<f64> = log_w.iter().map(|lw| lw - max).collect();
    let tail_len_target = tail_len(s);
    let mut order: Vec<usize> = (0..s).collect();
    order.sort_by(|&i, &j| x[i].total_cmp(&x[j]));
    let cutoff_index = s.saturating_sub(tail_len_target + 1);
    let cutoff = x[order[cutoff_index]].max(f64::MIN_POSITIVE.ln());
    let exp_cutoff = cutoff.exp();
    // Tail draws in increasing order of weight.
    let tail: Vec<usize> = order.iter().copied().filter(|&i| x[i] > cutoff).collect();
    let khat = if tail.len() < MIN_TAIL_DRAWS {
        f64::NAN
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

    /// log N(x; 0, sd²) written two ways, so that rounding differs as between a cost function and a
    /// Gaussian density coded separately.
    fn log_normal_two_ways(x: f64, sd: f64) -> (f64, f64) {
        let z = x / sd;
        let a = -0.5 * z * z - sd.ln();
        let b = -(x * x) / (2.0 * sd * sd) - sd.ln();
        (a, b)
    }

    #[test]
    fn twenty_draws_of_an_exact_gaussian_are_not_infinite() {
        // An exact Gaussian proposal gives weights equal up to rounding: bounded weights, k <= 0
        // (Vehtari et al. 2024, JMLR 25); reported as -inf with a note, reliable, never +inf.
        let x: Vec<f64> = (0..20).map(|i| -2.0 + 0.2 * i as f64 + 0.013).collect();
        let (lt, lq): (Vec<f64>, Vec<f64>) = x.iter().map(|&v| log_normal_two_ways(v, 1.3)).unzip();
        assert!(
            lt.iter().zip(&lq).any(|(a, b)| a != b),
            "rounding must differ"
        );
        let c = importance_check(&lt, &lq).unwrap();
        assert_eq!(c.khat, f64::NEG_INFINITY);
        assert!(c.reliable());
        assert!(c
            .khat_note
            .as_deref()
            .unwrap()
            .contains("equal to rounding"));
        assert!((c.kish_ess - 20.0).abs() < 1e-9);
    }

    #[test]
    fn too_few_draws_for_the_tail_fit_give_nan_with_the_minimum() {
        // PSIS tail of ceil(min(0.2 S, 3 sqrt S)) draws and at least 5 for the fit (Vehtari et al.
        // 2024, JMLR 25; ArviZ 0.23 psislw): 20 draws give a tail of 4, 21 draws a tail of 5.
        assert_eq!(min_draws_for_khat(), 21);
        assert_eq!(tail_len(20), 4);
        assert_eq!(tail_len(21), 5);
        // 20 draws of N(0, 1) weighted against a wider Gaussian proposal N(0, 1.5^2).
        let x: Vec<f64> = (0..20).map(|i| -2.5 + 0.26 * i as f64).collect();
        let lt: Vec<f64> = x.iter().map(|&v| log_normal_two_ways(v, 1.0).0).collect();
        let lq: Vec<f64> = x.iter().map(|&v| log_normal_two_ways(v, 1.5).0).collect();
        let c = importance_check(&lt, &lq).unwrap();
        assert!(c.khat.is_nan(), "{}", c.khat);
        assert!(!c.reliable());
        let note = c.khat_note.unwrap();
        assert!(
            note.contains("20 draws") && note.contains("at least 21"),
            "{note}"
        );
        let total: f64 = c.smoothed_weights.iter().sum();
        assert!((total - 1.0).abs() < 1e-12);
        // One more draw and k-hat is estimated.
        let x21: Vec<f64> = (0..21).map(|i| -2.5 + 0.25 * i as f64).collect();
        let lt: Vec<f64> = x21.iter().map(|&v| log_normal_two_ways(v, 1.0).0).collect();
        let lq: Vec<f64> = x21.iter().map(|&v| log_normal_two_ways(v, 1.5).0).collect();
        let c = importance_check(&lt, &lq).unwrap();
        assert!(
            c.khat.is_finite() && c.khat_note.is_none(),
            "{:?}",
            c.khat_note
        );
    }

    #[test]
    fn threshold_follows_the_sample_size() {
        // min(1 - 1/log10(S), 0.7): Vehtari et al. 2024, JMLR 25, section 3.
        assert!((khat_threshold(100) - 0.5).abs() < 1e-15);
        assert!((khat_threshold(1000) - (1.0 - 1.0 / 3.0)).abs() < 1e-15);
        assert!(khat_threshold(2154) < 0.7);
        assert_eq!(khat_threshold(2155), 0.7);
        assert_eq!(khat_threshold(100_000), 0.7);
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
