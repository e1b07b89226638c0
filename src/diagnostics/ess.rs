//! Effective sample sizes: bulk, tail, of a quantile indicator, and the multi-chain Geyer estimator
//! they share.

use super::autocov::autocovariance;
use super::draws::{
    checked, flat, mean, quantile_sorted, rank_normalise, sorted, split, var, Matrix,
};
use crate::error::Result;

/// Bulk effective sample size: the ESS of the rank-normalised split chains — Vehtari, Gelman, Simpson,
/// Carpenter & Bürkner 2021, Bayesian Analysis 16(2), section 4.3. It measures how well the centre
/// of the distribution (mean, median) is estimated and exists even without finite moments.
pub fn ess_bulk(chains: &[&[f64]]) -> Result<f64> {
    let m = checked(chains, "bulk ESS")?;
    Ok(bulk(&m))
}

/// Tail effective sample size: the smaller of the ESS of the indicators 1{x ≤ q₀.₀₅} and
/// 1{x ≤ q₀.₉₅} over split chains, q the pooled sample quantiles — Vehtari et al. 2021, section 4.3.
pub fn ess_tail(chains: &[&[f64]]) -> Result<f64> {
    let m = checked(chains, "tail ESS")?;
    Ok(tail(&m))
}

pub(crate) fn bulk(m: &Matrix) -> f64 {
    geyer_ess(&rank_normalise(&split(m)))
}

pub(crate) fn tail(m: &Matrix) -> f64 {
    smaller(quantile_ess(m, 0.05), quantile_ess(m, 0.95))
}

/// The smaller of the two quantile ESS values, `low` when they tie or `high` is NaN (ArviZ's `min`).
pub(crate) fn smaller(low: f64, high: f64) -> f64 {
    if high < low {
        high
    } else {
        low
    }
}

/// ESS of the indicator 1{x ≤ q_p} (q_p the pooled type-7 sample quantile) over split chains.
pub(crate) fn quantile_ess(m: &Matrix, p: f64) -> f64 {
    let q = quantile_sorted(&sorted(&flat(m)), p);
    let indicator: Matrix = m
        .iter()
        .map(|c| c.iter().map(|&x| if x <= q { 1.0 } else { 0.0 }).collect())
        .collect();
    geyer_ess(&split(&indicator))
}

/// ESS of the split chains of `m` without transformation (for the mean).
pub(crate) fn mean_ess(m: &Matrix) -> f64 {
    geyer_ess(&split(m))
}

/// Multi-chain effective sample size S / τ̂ of M chains of N draws (S = MN).
///
/// The combined autocorrelation ρ̂_t = 1 − (W − mean_m γ̂_{m,t}) / var⁺ with W the mean within-chain
/// variance (divisor N − 1), var⁺ = (N − 1)/N W + var(chain means) (the latter only with M > 1) and
/// γ̂_{m,t} the FFT autocovariance of chain m — Vehtari et al. 2021, section 3.2, eq. 10. The sum
/// τ̂ = −1 + 2 Σ ρ̂_t is truncated by Geyer's initial positive sequence (stop at the first pair
/// ρ̂_{2k} + ρ̂_{2k+1} that is negative) and made monotone by Geyer's initial monotone sequence
/// (Geyer 1992, "Practical Markov chain Monte Carlo", Statistical Science 7(4)); the last positive even
/// lag is kept as in Stan and ArviZ; τ̂ is bounded below by 1 / log10(S) (Vehtari et al. 2021).
///
/// Draws whose range is below 10⁻¹⁵ (a constant quantity) get ESS = S, as in ArviZ.
pub(crate) fn geyer_ess(m: &Matrix) -> f64 {
    let values = flat(m);
    let lo = values.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let size = values.len() as f64;
    if hi - lo < 1e-15 {
        return size;
    }
    let n_chain = m.len();
    let n = m[0].len();
    let nf = n as f64;
    let acov: Vec<Vec<f64>> = m.iter().map(|c| autocovariance(c)).collect();
    let mean_acov = |t: usize| acov.iter().map(|a| a[t]).sum::<f64>() / n_chain as f64;
    let chain_means: Vec<f64> = m.iter().map(|c| mean(c)).collect();
    let mean_var = mean_acov(0) * nf / (nf - 1.0);
    let mut var_plus = mean_var * (nf - 1.0) / nf;
    if n_chain > 1 {
        var_plus += var(&chain_means);
    }
    let rho = |t: usize| 1.0 - (mean_var - mean_acov(t)) / var_plus;

    let mut rho_t = vec![0.0; n];
    let mut rho_even = 1.0;
    rho_t[0] = rho_even;
    let mut rho_odd = rho(1);
    rho_t[1] = rho_odd;
    // Initial positive sequence (lags in pairs (t + 1, t + 2), t odd).
    let mut t: isize = 1;
    while t < n as isize - 3 && rho_even + rho_odd > 0.0 {
        let tu = t as usize;
        rho_even = rho(tu + 1);
        rho_odd = rho(tu + 2);
        if rho_even + rho_odd >= 0.0 {
            rho_t[tu + 1] = rho_even;
            rho_t[tu + 2] = rho_odd;
        }
        t += 2;
    }
    let max_t = t - 2;
    if rho_even > 0.0 {
        rho_t[(max_t + 1) as usize] = rho_even;
    }
    // Initial monotone sequence.
    let mut t: isize = 1;
    while t <= max_t - 2 {
        let tu = t as usize;
        if rho_t[tu + 1] + rho_t[tu + 2] > rho_t[tu - 1] + rho_t[tu] {
            rho_t[tu + 1] = (rho_t[tu - 1] + rho_t[tu]) / 2.0;
            rho_t[tu + 2] = rho_t[tu + 1];
        }
        t += 2;
    }
    let head = (max_t + 1).max(0) as usize;
    let tail_term = if head < n { rho_t[head] } else { 0.0 };
    let tau = -1.0 + 2.0 * rho_t[..head].iter().sum::<f64>() + tail_term;
    let tau = tau.max(1.0 / size.log10());
    if rho_t.iter().any(|r| r.is_nan()) {
        return f64::NAN;
    }
    size / tau
}
