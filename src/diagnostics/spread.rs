//! Posterior spread against the Laplace (inverse-Hessian) spread, component by component: where does
//! the Gaussian at the analysis under- or over-state the uncertainty the chains found?
//!
//! The rule: per component the ratio r = sd_post / sd_Laplace and its Monte Carlo standard error
//! se = MCSE(sd_post) / sd_Laplace (the Laplace standard deviation is exact, the posterior one is
//! estimated). The inverse Hessian *understates* the spread when r − 2 se > 1.1 and *overstates* it when
//! r + 2 se < 0.9: the ratio lies outside [0.9, 1.1] by more than two Monte Carlo standard errors. A
//! component whose ratio or error cannot be computed (constant draws, a zero or non-finite Laplace
//! variance) is *not compared*. The 10% tolerance and the two standard errors are this crate's choice
//! (common practice, no source): 10% is what a user would call a noticeably wrong spread, two standard
//! errors keep Monte Carlo noise from naming a component (one whose true ratio sits exactly at 0.9 or
//! 1.1 is named with probability about 2.3% when the error is Gaussian; one at 1 practically never).

use serde::Serialize;

use super::summary::ComponentStats;
use crate::error::{Error, Result};

/// Relative tolerance on sd_post / sd_Laplace: ratios inside [1 − this, 1 + this] agree.
pub const SPREAD_TOLERANCE: f64 = 0.10;
/// How many Monte Carlo standard errors a ratio must lie beyond the tolerance to be named.
pub const SPREAD_MC_ERRORS: f64 = 2.0;

/// How one component's posterior spread compares with its Laplace spread.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum SpreadFlag {
    /// Within the tolerance, or not distinguishable from it by the Monte Carlo error.
    Agrees,
    /// The posterior is wider: the inverse Hessian understates the spread.
    Understated,
    /// The posterior is narrower: the inverse Hessian overstates the spread.
    Overstated,
    /// The ratio or its error could not be computed.
    NotCompared,
}

/// The comparison of every component ([`compare_spread`]).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SpreadComparison {
    /// sd_post / sd_Laplace per component (NaN where it cannot be computed).
    pub ratio: Vec<f64>,
    /// Monte Carlo standard error of `ratio`.
    pub ratio_mcse: Vec<f64>,
    /// The judgement per component.
    pub flags: Vec<SpreadFlag>,
}

impl SpreadComparison {
    /// Indices of the components flagged `flag`, in component order.
    pub fn with_flag(&self, flag: SpreadFlag) -> Vec<usize> {
        (0..self.flags.len())
            .filter(|&i| self.flags[i] == flag)
            .collect()
    }

    /// Whether every component was compared and agrees.
    pub fn all_agree(&self) -> bool {
        self.flags.iter().all(|f| *f == SpreadFlag::Agrees)
    }
}

/// The flag of one ratio `r` with standard error `se` (see the module documentation for the rule).
pub fn spread_flag(r: f64, se: f64) -> SpreadFlag {
    if !(r.is_finite() && se.is_finite() && se >= 0.0) {
        SpreadFlag::NotCompared
    } else if r - SPREAD_MC_ERRORS * se > 1.0 + SPREAD_TOLERANCE {
        SpreadFlag::Understated
    } else if r + SPREAD_MC_ERRORS * se < 1.0 - SPREAD_TOLERANCE {
        SpreadFlag::Overstated
    } else {
        SpreadFlag::Agrees
    }
}

/// Compares the chains' standard deviations (with their MCSE) in `stats` with the Laplace standard
/// deviations `laplace_sd`, one per component. Errors when the lengths differ.
pub fn compare_spread(stats: &[ComponentStats], laplace_sd: &[f64]) -> Result<SpreadComparison> {
    if stats.len() != laplace_sd.len() {
        return Err(Error::Data(format!(
            "spread comparison: {} components in the chains but {} Laplace standard deviations",
            stats.len(),
            laplace_sd.len()
        )));
    }
    let usable = |l: f64| l.is_finite() && l > 0.0;
    let ratio: Vec<f64> = stats
        .iter()
        .zip(laplace_sd)
        .map(|(s, &l)| if usable(l) { s.sd / l } else { f64::NAN })
        .collect();
    let ratio_mcse: Vec<f64> = stats
        .iter()
        .zip(laplace_sd)
        .map(|(s, &l)| if usable(l) { s.mcse_sd / l } else { f64::NAN })
        .collect();
    let flags = ratio
        .iter()
        .zip(&ratio_mcse)
        .map(|(&r, &se)| spread_flag(r, se))
        .collect();
    Ok(SpreadComparison {
        ratio,
        ratio_mcse,
        flags,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // The rule is this crate's (common practice, no source): outside [0.9, 1.1] by more than 2 MCSE.

    fn stats(sd: f64, mcse_sd: f64) -> ComponentStats {
        ComponentStats {
            mean: 0.0,
            sd,
            rhat: 1.0,
            ess_bulk: 1000.0,
            ess_tail: 1000.0,
            mcse_mean: 0.01,
            mcse_sd,
            q05: -1.0,
            q95: 1.0,
            mcse_q05: 0.01,
            mcse_q95: 0.01,
        }
    }

    #[test]
    fn both_sides_of_each_bound() {
        // Upper bound 1.1 + 2 se with se = 0.02: 1.14.
        assert_eq!(spread_flag(1.15, 0.02), SpreadFlag::Understated);
        assert_eq!(spread_flag(1.13, 0.02), SpreadFlag::Agrees);
        // Lower bound 0.9 − 2 se: 0.86.
        assert_eq!(spread_flag(0.85, 0.02), SpreadFlag::Overstated);
        assert_eq!(spread_flag(0.87, 0.02), SpreadFlag::Agrees);
        // A large Monte Carlo error hides even a ratio of 1.5.
        assert_eq!(spread_flag(1.5, 0.3), SpreadFlag::Agrees);
        assert_eq!(spread_flag(f64::NAN, 0.02), SpreadFlag::NotCompared);
        assert_eq!(spread_flag(1.0, f64::NAN), SpreadFlag::NotCompared);
    }

    #[test]
    fn components_are_compared_one_by_one() {
        let s = [
            stats(2.0, 0.02),
            stats(1.0, 0.01),
            stats(0.5, 0.01),
            stats(0.0, f64::NAN),
        ];
        let c = compare_spread(&s, &[1.0, 1.0, 1.0, 1.0]).unwrap();
        assert_eq!(
            c.flags,
            vec![
                SpreadFlag::Understated,
                SpreadFlag::Agrees,
                SpreadFlag::Overstated,
                SpreadFlag::NotCompared
            ]
        );
        assert!((c.ratio[0] - 2.0).abs() < 1e-15 && (c.ratio_mcse[0] - 0.02).abs() < 1e-15);
        assert_eq!(c.with_flag(SpreadFlag::Understated), vec![0]);
        assert!(!c.all_agree());
        let c = compare_spread(&s[1..2], &[0.0]).unwrap();
        assert_eq!(c.flags, vec![SpreadFlag::NotCompared]);
        assert!(compare_spread(&s, &[1.0]).is_err());
    }
}
