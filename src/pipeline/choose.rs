//! `--kernel auto`: which kernel samples, chosen from the Laplace check.
//!
//! The independence sampler (`laplace-mh`, proposals from the Laplace Gaussian, cost-only runs that
//! can go to many workers) where the Gaussian at the analysis holds, HMC with the learned metric where
//! it does not. The Gaussian holds when
//! 1. Pareto k-hat of the check's importance weights lies below the sample-size threshold
//!    min(1 − 1/log10 S, 0.7) (Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25) and below
//!    [`IMH_KHAT`] = 0.5: above 1/2 the weights' distribution has no finite variance (the same paper;
//!    the value from memory), and an independence sampler then sticks at a heavy draw for long
//!    stretches — measured on the lorenz96 demo (k-hat 0.54): bulk ESS 777 and tail ESS 298 with one
//!    seed where others gave 1500 to 1950 — so the importance estimates may still be usable while
//!    the chain is not robust, and
//! 2. every component's importance-weighted posterior standard deviation, divided by its Laplace one,
//!    lies inside [0.9, 1.1] by more than two Monte Carlo standard errors (the verdict's spread rule,
//!    [`crate::diagnostics::spread`], with the errors of self-normalised weighted moments).
//!
//! It does not hold when k-hat fails or a ratio lies outside [0.9, 1.1] by more than two errors. In
//! between — a ratio whose two-error interval reaches past the band — the check is inconclusive: it is
//! doubled with new draws (cost-only runs, all evaluated at once) up to [`MAX_ESCALATION`] times its
//! first size. If it is still inconclusive there, k-hat decides (it has passed by then): the
//! independence sampler is exact whatever the spreads, k-hat is what governs how well it mixes, and
//! the verdict compares the chains' own spread with the Laplace one afterwards. (With many components
//! some ratio's interval nearly always reaches past the band by chance, so demanding all of them be
//! decided would spend the check's runs for nothing: measured on lorenz96, n = 40, one of 40 was still
//! open at 1600 draws.)

use super::stages::LaplaceCheck;
use crate::diagnostics::weighted_component_stats;
use crate::diagnostics::{spread_flag, SpreadFlag, SPREAD_MC_ERRORS, SPREAD_TOLERANCE};
use crate::error::Result;
use crate::sampler::importance::laplace_draws_from;
use crate::sampler::{KernelKind, Target};

/// k-hat must lie below this for the independence sampler (module docs).
pub const IMH_KHAT: f64 = 0.5;

/// The check grows at most to this many times its first number of draws.
pub const MAX_ESCALATION: usize = 4;

/// The kernel that samples and why.
#[derive(Debug, Clone, PartialEq)]
pub struct KernelChoice {
    pub kernel: KernelKind,
    /// In words, with the numbers that decided.
    pub reason: String,
}

/// What the check says of the Laplace Gaussian.
#[derive(Debug, Clone, PartialEq)]
enum Reading {
    Holds(String),
    Fails(String),
    Inconclusive(String),
}

/// The kernel for `requested`, growing `check` (drawn on `target`, the problem whitened by the
/// Laplace preconditioner, with `seed`) while it is inconclusive. `laplace_var` is the Laplace
/// variance per component.
pub fn choose_kernel(
    requested: KernelKind,
    check: &mut Option<LaplaceCheck>,
    target: Option<&Target<'_>>,
    laplace_var: &[f64],
    seed: u64,
) -> Result<KernelChoice> {
    if requested != KernelKind::Auto {
        return Ok(KernelChoice {
            kernel: requested,
            reason: format!("{} was asked for", requested.name()),
        });
    }
    let (Some(c), Some(target)) = (check.as_mut(), target) else {
        return Ok(hmc("no Laplace check was run (--laplace-draws 0)".into()));
    };
    let first = c.draws;
    loop {
        match read(c, laplace_var)? {
            Reading::Holds(why) => {
                return Ok(KernelChoice {
                    kernel: KernelKind::LaplaceMh,
                    reason: format!("the Laplace Gaussian holds: {why}"),
                })
            }
            Reading::Fails(why) => {
                return Ok(hmc(format!("the Laplace Gaussian does not hold: {why}")))
            }
            Reading::Inconclusive(why) if c.draws >= MAX_ESCALATION * first => {
                return Ok(KernelChoice {
                    kernel: KernelKind::LaplaceMh,
                    reason: format!(
                        "k-hat passes and no component's spread is known to differ from the \
                         Laplace one by more than 10% at {} draws ({why}); the verdict compares \
                         the chains' spread",
                        c.draws
                    ),
                })
            }
            Reading::Inconclusive(_) => {
                let mut d = std::mem::take(&mut c.sample);
                d.extend(laplace_draws_from(target, c.draws, c.draws, seed)?);
                *c = LaplaceCheck::of(d)?;
            }
        }
    }
}

fn hmc(reason: String) -> KernelChoice {
    KernelChoice {
        kernel: KernelKind::Hmc,
        reason,
    }
}

/// The reading of one check (module docs).
fn read(c: &LaplaceCheck, laplace_var: &[f64]) -> Result<Reading> {
    let ic = &c.check;
    if !ic.reliable() {
        return Ok(Reading::Fails(format!(
            "Pareto k-hat {:.2} is not below {:.2} ({} draws)",
            ic.khat, ic.khat_threshold, c.draws
        )));
    }
    if ic.khat >= IMH_KHAT {
        return Ok(Reading::Fails(format!(
            "Pareto k-hat {:.2} is not below {IMH_KHAT} ({} draws): the weights have no finite \
             variance, and an independence sampler would stick at heavy draws",
            ic.khat, c.draws
        )));
    }
    let x = &c.sample.draws.x;
    let (mut off, mut open, mut worst) = (0usize, 0usize, 1.0f64);
    for (i, lv) in laplace_var.iter().enumerate() {
        let values: Vec<f64> = x.iter().map(|v| v[i]).collect();
        let s = weighted_component_stats(&values, &ic.smoothed_weights)?;
        let (r, se) = (s.sd / lv.sqrt(), s.mcse_sd / lv.sqrt());
        match spread_flag(r, se) {
            SpreadFlag::Understated | SpreadFlag::Overstated | SpreadFlag::NotCompared => off += 1,
            SpreadFlag::Agrees => {
                let reach = SPREAD_MC_ERRORS * se;
                if r - reach < 1.0 - SPREAD_TOLERANCE || r + reach > 1.0 + SPREAD_TOLERANCE {
                    open += 1;
                }
            }
        }
        if (r - 1.0).abs() > (worst - 1.0).abs() || r.is_nan() {
            worst = r;
        }
    }
    let n = laplace_var.len();
    Ok(if off > 0 {
        Reading::Fails(format!(
            "the weighted standard deviation differs from the Laplace one by more than 10% in {off} of \
             {n} components (furthest ratio {worst:.2}; k-hat {:.2})",
            ic.khat
        ))
    } else if open > 0 {
        Reading::Inconclusive(format!(
            "{open} of {n} components' standard-deviation ratios are not yet known to within 10% \
             (k-hat {:.2})",
            ic.khat
        ))
    } else {
        Reading::Holds(format!(
            "Pareto k-hat {:.2} below {:.2} and every component's standard deviation within 10% of \
             the Laplace one ({} draws, furthest ratio {worst:.2})",
            ic.khat, ic.khat_threshold, c.draws
        ))
    })
}
