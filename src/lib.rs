//! varpost: posterior uncertainty for strong-constraint 4D-Var.
//!
//! Wrap an existing cost function and adjoint gradient as a [`Problem`] (or run your code as a
//! subprocess through the adapter protocol, adapters/PROTOCOL.md); the [`pipeline`] checks the gradient,
//! finds the analysis (MAP) with L-BFGS, builds a Hessian-based (Laplace) approximation there, checks how
//! far its Gaussian picture holds, and samples the posterior with preconditioned chains, returning the
//! spread with its diagnostics. Every spread is conditional on the model, B and R given.
//!
//! # Example: your own cost function through the whole pipeline
//!
//! ```
//! use varpost::pipeline::{run_sample, Loaded};
//! use varpost::problem::{DiagonalPrior, Prior};
//! use varpost::{EvalError, Interrupt, Problem, ProblemSource, RunConfig};
//!
//! /// J(x) = ½|x − xb|² + ½ (y − x0 − x1)² / σo²: a background N(0, I) and one observation of x0 + x1.
//! struct Toy {
//!     prior: DiagonalPrior,
//! }
//! impl Problem for Toy {
//!     fn dim(&self) -> usize {
//!         2
//!     }
//!     fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, EvalError> {
//!         let (y, w) = (1.0, 1.0 / 0.5f64.powi(2));
//!         let d = y - x[0] - x[1];
//!         g[0] = x[0] - w * d;
//!         g[1] = x[1] - w * d;
//!         Ok(0.5 * (x[0] * x[0] + x[1] * x[1]) + 0.5 * w * d * d)
//!     }
//!     fn prior(&self) -> Option<&dyn Prior> {
//!         Some(&self.prior)
//!     }
//! }
//!
//! # fn main() -> varpost::Result<()> {
//! let toy = Toy { prior: DiagonalPrior::new(vec![0.0; 2], vec![1.0; 2])? };
//! let loaded = Loaded::from_problem("toy", Box::new(toy));
//! let mut config = RunConfig::new(ProblemSource::InProcess { name: "toy".into() });
//! config.sampler.warmup = 200;
//! config.sampler.draws = 200;
//! let out = std::env::temp_dir().join(format!("varpost-doc-{}", std::process::id()));
//! # let _ = std::fs::remove_dir_all(&out);
//! let run = run_sample(&loaded, &config, &out, false, &Interrupt::new(), &|_, _, _| {})?;
//! // The posterior is Gaussian: its mean is the analysis, (B⁻¹ + HᵀR⁻¹H)⁻¹ H^T R⁻¹ y = (4/9, 4/9).
//! let analysis = &run.summary.map.as_ref().unwrap().x;
//! assert!((analysis[0] - 4.0 / 9.0).abs() < 1e-6);
//! println!("{}", run.diagnosis.verdict.text());
//! # std::fs::remove_dir_all(&out).ok();
//! # Ok(()) }
//! ```
//!
//! The modules follow the data path (ARCHITECTURE.md): [`problem`] → [`optimize`] → [`precond`] →
//! [`sampler`] → [`diagnostics`], wired by [`pipeline`] from a [`RunConfig`] ([`config`]).

mod adapt;
#[doc(hidden)]
pub mod adapter;
#[doc(hidden)]
pub mod cli;
pub mod config;
pub mod diagnostics;
pub mod error;
mod hash;
mod interrupt;
pub mod optimize;
#[doc(hidden)]
pub mod output;
pub mod pipeline;
pub mod precond;
pub mod problem;
mod resources;
pub mod sampler;
pub(crate) mod util;

pub use config::{KernelKind, MetricKind, ProblemSource, RunConfig, SampleConfig};
pub use error::{Error, EvalError, ExitCode, Result};
pub use interrupt::Interrupt;
pub use output::Summary;
pub use problem::{Counted, EvalCounts, Problem};
pub use sampler::Ensemble;
