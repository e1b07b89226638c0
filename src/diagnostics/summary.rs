//! All per-component summaries in one pass over the chains.

use serde::Serialize;

use super::draws::{checked, flat, mean, quantile_sorted, sorted, var};
use super::{ess, mcse, rhat};
use crate::error::Result;

/// Posterior summary and convergence diagnostics of one component (one coordinate of the state, or
/// any scalar function of it). Every field follows the function of the same name in this module.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ComponentStats {
    /// Mean of all draws pooled over chains.
    pub mean: f64,
    /// Standard deviation of all draws (divisor S − 1).
    pub sd: f64,
    /// Rank-normalised split R-hat ([`rhat`](crate::diagnostics::rhat())); NaN for constant draws.
    pub rhat: f64,
    /// Bulk effective sample size.
    pub ess_bulk: f64,
    /// Tail effective sample size.
    pub ess_tail: f64,
    /// Monte Carlo standard error of `mean`.
    pub mcse_mean: f64,
    /// Monte Carlo standard error of `sd`; NaN for constant draws.
    pub mcse_sd: f64,
    /// 5% sample quantile (type 7, linear interpolation).
    pub q05: f64,
    /// 95% sample quantile.
    pub q95: f64,
    /// Monte Carlo standard error of `q05`.
    pub mcse_q05: f64,
    /// Monte Carlo standard error of `q95`.
    pub mcse_q95: f64,
}

/// [`ComponentStats`] of one component, `chains` holding one slice of draws per chain (equal lengths,
/// at least 4 draws, all finite; an error names the offending chain or draw otherwise).
///
/// Constant draws follow ArviZ: R-hat NaN (all draws equal) or +∞ (each chain constant at a different
/// value), ESS = S, MCSE of the mean and of the quantiles 0, MCSE of the sd NaN.
pub fn component_stats(chains: &[&[f64]]) -> Result<ComponentStats> {
    let m = checked(chains, "component summary")?;
    let all = flat(&m);
    let s = sorted(&all);
    let ess_q05 = ess::quantile_ess(&m, 0.05);
    let ess_q95 = ess::quantile_ess(&m, 0.95);
    Ok(ComponentStats {
        mean: mean(&all),
        sd: var(&all).sqrt(),
        rhat: rhat::rank_rhat(&m),
        ess_bulk: ess::bulk(&m),
        ess_tail: ess::smaller(ess_q05, ess_q95),
        mcse_mean: mcse::of_mean(&m),
        mcse_sd: mcse::of_sd(&m),
        q05: quantile_sorted(&s, 0.05),
        q95: quantile_sorted(&s, 0.95),
        mcse_q05: mcse::of_quantile(&m, 0.05, ess_q05),
        mcse_q95: mcse::of_quantile(&m, 0.95, ess_q95),
    })
}
