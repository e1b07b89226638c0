//! Per-component summaries of a weighted ensemble (importance sampling, sequential Monte Carlo): the
//! weighted branch of [`ComponentStats`].
//!
//! With normalised weights w_i (Σ w_i = 1) the self-normalised estimates are μ = Σ w_i x_i and
//! σ² = Σ w_i (x_i − μ)². Their Monte Carlo errors follow the delta method for ratio estimators
//! (Owen 2013, "Monte Carlo theory, methods and examples", ch. 9, eq. 9.8 and §9.3):
//! Var(μ̂) ≈ Σ w_i² (x_i − μ)², so the effective sample size for the mean is σ² / Var(μ̂) (which is
//! Kish's (Σ w)² / Σ w² when x does not depend on the weights); for a quantile q_p the variance of the
//! weighted distribution function there is Σ w_i² (1{x_i ≤ q_p} − p)², giving ESS p(1 − p) / Var.
//! R-hat has no meaning for independent weighted draws and is NaN.

use super::summary::ComponentStats;
use crate::error::{Error, Result};

/// [`ComponentStats`] of one component from its values and normalised weights (same length, at least
/// 2 values with positive weight; every value with positive weight finite).
pub fn weighted_component_stats(values: &[f64], weights: &[f64]) -> Result<ComponentStats> {
    if values.len() != weights.len() {
        return Err(Error::Data(format!(
            "{} values but {} weights",
            values.len(),
            weights.len()
        )));
    }
    let pairs: Vec<(f64, f64)> = values
        .iter()
        .zip(weights)
        .filter(|(_, w)| **w > 0.0)
        .map(|(x, w)| (*x, *w))
        .collect();
    if pairs.len() < 2 || pairs.iter().any(|(x, w)| !x.is_finite() || !w.is_finite()) {
        return Err(Error::Data(
            "a weighted summary needs at least 2 finite values with positive weight".into(),
        ));
    }
    let total: f64 = pairs.iter().map(|p| p.1).sum();
    let pairs: Vec<(f64, f64)> = pairs.into_iter().map(|(x, w)| (x, w / total)).collect();
    let mean: f64 = pairs.iter().map(|(x, w)| w * x).sum();
    let var: f64 = pairs.iter().map(|(x, w)| w * (x - mean).powi(2)).sum();
    let var_mean: f64 = pairs.iter().map(|(x, w)| (w * (x - mean)).powi(2)).sum();
    let sd = var.sqrt();
    let var_var: f64 = pairs
        .iter()
        .map(|(x, w)| (w * ((x - mean).powi(2) - var)).powi(2))
        .sum();
    let mut sorted = pairs.clone();
    sorted.sort_by(|a, b| a.0.total_cmp(&b.0));
    let (q05, ess_q05, mcse_q05) = quantile_with_error(&sorted, 0.05);
    let (q95, ess_q95, mcse_q95) = quantile_with_error(&sorted, 0.95);
    let ess_bulk = if var_mean > 0.0 {
        var / var_mean
    } else {
        f64::NAN
    };
    Ok(ComponentStats {
        mean,
        sd,
        rhat: f64::NAN,
        ess_bulk,
        ess_tail: ess_q05.min(ess_q95),
        mcse_mean: var_mean.sqrt(),
        mcse_sd: if sd > 0.0 {
            var_var.sqrt() / (2.0 * sd)
        } else {
            f64::NAN
        },
        q05,
        q95,
        mcse_q05,
        mcse_q95,
    })
}

/// The weighted p-quantile of sorted (value, weight) pairs (the smallest value whose cumulative
/// weight reaches p), the ESS of the distribution function there, and the quantile's Monte Carlo
/// error: the spread of the quantiles at p ± one standard error of the distribution function.
fn quantile_with_error(sorted: &[(f64, f64)], p: f64) -> (f64, f64, f64) {
    let q = weighted_quantile(sorted, p);
    let var_f: f64 = sorted
        .iter()
        .map(|(x, w)| (w * (if *x <= q { 1.0 } else { 0.0 } - p)).powi(2))
        .sum();
    let ess = if var_f > 0.0 {
        p * (1.0 - p) / var_f
    } else {
        f64::NAN
    };
    let se = var_f.sqrt();
    let lo = weighted_quantile(sorted, (p - se).max(0.0));
    let hi = weighted_quantile(sorted, (p + se).min(1.0));
    (q, ess, 0.5 * (hi - lo))
}

fn weighted_quantile(sorted: &[(f64, f64)], p: f64) -> f64 {
    let mut cum = 0.0;
    for (x, w) in sorted {
        cum += w;
        if cum >= p {
            return *x;
        }
    }
    sorted.last().map_or(f64::NAN, |v| v.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn equal_weights_give_plain_moments_and_ess_n() {
        // Closed form: equal weights reduce to the sample mean and the biased (1/N) variance, and the
        // ESS of the mean to N (Kish 1965, Survey Sampling).
        let x: Vec<f64> = (0..1000).map(|i| (i as f64 * 0.7).sin()).collect();
        let w = vec![1.0 / 1000.0; 1000];
        let s = weighted_component_stats(&x, &w).unwrap();
        let m = x.iter().sum::<f64>() / 1000.0;
        let v = x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / 1000.0;
        assert!((s.mean - m).abs() < 1e-14 && (s.sd - v.sqrt()).abs() < 1e-14);
        assert!((s.ess_bulk - 1000.0).abs() < 1e-6, "{}", s.ess_bulk);
        assert!((s.mcse_mean - (v / 1000.0).sqrt()).abs() < 1e-12);
        assert!(s.rhat.is_nan());
    }

    #[test]
    fn weights_shift_the_mean_and_bad_input_is_refused() {
        let s = weighted_component_stats(&[0.0, 1.0], &[0.25, 0.75]).unwrap();
        assert!((s.mean - 0.75).abs() < 1e-15);
        assert!((s.sd - (0.25f64 * 0.75).sqrt()).abs() < 1e-15);
        assert!(weighted_component_stats(&[0.0], &[1.0]).is_err());
        assert!(weighted_component_stats(&[0.0, f64::NAN], &[0.5, 0.5]).is_err());
        assert!(weighted_component_stats(&[0.0, 1.0], &[1.0]).is_err());
    }
}
