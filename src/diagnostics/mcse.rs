//! Monte Carlo standard errors of the mean, the standard deviation and quantiles.

use super::draws::{checked, flat, map, mean, sorted, var, Matrix};
use super::ess::{mean_ess, quantile_ess};
use super::special::beta_quantile;
use crate::error::{Error, Result};

/// MCSE of the posterior mean: sd / sqrt(ESS_mean), sd the pooled sample standard deviation (divisor
/// S − 1) and ESS_mean the ESS of the split chains without rank normalisation — Vehtari et al. 2021,
/// Bayesian Analysis 16(2), section 4.4; Geyer 1992, Statistical Science 7(4).
pub fn mcse_mean(chains: &[&[f64]]) -> Result<f64> {
    let m = checked(chains, "MCSE of the mean")?;
    Ok(of_mean(&m))
}

/// MCSE of the posterior standard deviation by the delta method: with c = (x − x̄)², the variance
/// estimate v = mean(c) has squared standard error (mean(c²) − v²) / ESS(c), and the standard
/// deviation sqrt(v) then has squared error that / (4 v) — as ArviZ 0.23 computes it (Vehtari et al.
/// 2021, section 4.4, describe the same delta-method idea). The MCSE of the variance itself is
/// 2 sqrt(v) times this value.
///
/// For constant draws this is NaN (0 / 0), as in ArviZ.
pub fn mcse_sd(chains: &[&[f64]]) -> Result<f64> {
    let m = checked(chains, "MCSE of the sd")?;
    Ok(of_sd(&m))
}

/// MCSE of the p-quantile (0 < p < 1): half the width of the interval between the order statistics at
/// the 15.87% and 84.13% quantiles of Beta(ESS p + 1, ESS (1 − p) + 1) (a ±1 sd interval), ESS that of
/// the indicator 1{x ≤ q_p} — Vehtari et al. 2021, section 4.4, as ArviZ computes it.
pub fn mcse_quantile(chains: &[&[f64]], p: f64) -> Result<f64> {
    if !(p > 0.0 && p < 1.0) {
        return Err(Error::Data(format!(
            "MCSE of a quantile: probability {p} is outside (0, 1); give e.g. 0.05 or 0.95"
        )));
    }
    let m = checked(chains, "MCSE of a quantile")?;
    Ok(of_quantile(&m, p, quantile_ess(&m, p)))
}

pub(crate) fn of_mean(m: &Matrix) -> f64 {
    var(&flat(m)).sqrt() / mean_ess(m).sqrt()
}

pub(crate) fn of_sd(m: &Matrix) -> f64 {
    let centre = mean(&flat(m));
    let c2 = map(m, |x| (x - centre) * (x - centre));
    let ess = mean_ess(&c2);
    let c2_flat = flat(&c2);
    let evar = mean(&c2_flat);
    let varvar =
        (c2_flat.iter().map(|v| v * v).sum::<f64>() / c2_flat.len() as f64 - evar * evar) / ess;
    (varvar / evar / 4.0).sqrt()
}

/// The quantile MCSE given the ESS of its indicator (so callers that have it do not recompute it).
pub(crate) fn of_quantile(m: &Matrix, p: f64, ess: f64) -> f64 {
    // The ±1 standard deviation probabilities of a normal, Φ(−1) and Φ(1), as ArviZ writes them.
    const PROBS: [f64; 2] = [0.158_655_3, 0.841_344_7];
    let a = ess * p + 1.0;
    let b = ess * (1.0 - p) + 1.0;
    let s = sorted(&flat(m));
    let size = s.len() as f64;
    let lo = beta_quantile(PROBS[0], a, b) * size - 1.0;
    let hi = beta_quantile(PROBS[1], a, b) * size - 1.0;
    // A NaN bound (NaN ESS) falls back to the extreme order statistic, as NumPy's nanmax/nanmin do.
    let lo = if lo.is_nan() { 0.0 } else { lo.max(0.0) };
    let hi = if hi.is_nan() {
        size - 1.0
    } else {
        hi.min(size - 1.0)
    };
    let th1 = s[lo.floor() as usize];
    let th2 = s[hi.ceil() as usize];
    (th2 - th1) / 2.0
}
