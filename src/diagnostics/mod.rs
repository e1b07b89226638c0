//! Convergence diagnostics: pure functions over chains of draws.
//!
//! Every function takes one component's draws as `&[&[f64]]`, one slice per chain, all of the same
//! length (at least 4 draws), and returns an error (never a panic) for no chains, unequal lengths, too
//! few draws or non-finite draws.
//!
//! - [`rhat`]: rank-normalised split R-hat (bulk and folded);
//! - [`ess_bulk`], [`ess_tail`]: effective sample sizes with Geyer's initial monotone sequence;
//! - [`mcse_mean`], [`mcse_sd`], [`mcse_quantile`]: Monte Carlo standard errors;
//! - [`component_stats`]: all of the above plus mean, sd and 5% / 95% quantiles in one call;
//! - [`bfmi`]: the energy diagnostic of Hamiltonian Monte Carlo;
//! - [`importance_check`]: Pareto k-hat and Kish ESS of importance weights, to judge the Laplace
//!   (Gaussian at the analysis) approximation;
//! - [`weighted_component_stats`]: the same summaries for a weighted ensemble;
//! - [`compare_spread`]: posterior against Laplace standard deviations, component by component;
//! - [`Verdict`]: a plain-language reading of a whole run, with its status and exit code.
//!
//! The methods are those of Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, "Rank-normalization,
//! folding, and localization: an improved R-hat for assessing convergence of MCMC", Bayesian Analysis
//! 16(2), and Vehtari, Simpson, Gelman, Yao & Gabry 2024, "Pareto smoothed importance sampling",
//! JMLR 25; the arithmetic follows ArviZ 0.23, against which the tests check.
//!
//! ```
//! use varpost::diagnostics::{component_stats, RunFacts, Verdict};
//! // Four chains of one component (a real run has hundreds of draws per chain).
//! let chains: Vec<Vec<f64>> = (0..4)
//!     .map(|c| (0..100).map(|i| ((i * 37 + c * 11) % 100) as f64 / 100.0).collect())
//!     .collect();
//! let slices: Vec<&[f64]> = chains.iter().map(|c| c.as_slice()).collect();
//! let stats = component_stats(&slices)?;
//! // Chains alone: the other facts of a run (gradient test, analysis, Laplace check) left out.
//! let verdict = Verdict::judge(&[stats], slices.len(), &RunFacts::default());
//! println!("{}", verdict.text());
//! # Ok::<(), varpost::Error>(())
//! ```

mod autocov;
mod bfmi;
mod draws;
mod ess;
mod laplace_check;
mod mcse;
mod rhat;
mod special;
mod spread;
mod summary;
mod verdict;
mod weighted;

pub use autocov::{autocorrelation, autocovariance};
pub use bfmi::bfmi;
pub use ess::{ess_bulk, ess_tail};
pub use laplace_check::{
    importance_check, khat_threshold, min_draws_for_khat, ImportanceCheck, EQUAL_WEIGHTS_RTOL,
    MIN_TAIL_DRAWS,
};
pub use mcse::{mcse_mean, mcse_quantile, mcse_sd};
pub use rhat::rhat;
pub use special::inverse_normal_cdf;
pub use spread::{
    compare_spread, spread_flag, SpreadComparison, SpreadFlag, SPREAD_MC_ERRORS, SPREAD_TOLERANCE,
};
pub use summary::{component_stats, ComponentStats};
pub use verdict::{
    against_limit, khat_text, AnalysisReading, ChainDivergences, Check, GradientTest, KhatReading,
    LaplaceFacts, Reason, RunFacts, RunProgress, Status, TargetFacts, Verdict, CONDITIONAL_CAUTION,
    DIVERGENCE_LIMIT, ESS_LIMIT, KHAT_LIMIT, MAX_NAMED, MIN_CHAINS, RHAT_LIMIT,
};
pub use weighted::weighted_component_stats;
