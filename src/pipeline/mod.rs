//! The one place that wires the stages together. A run is a short sequence of stage functions
//! ([`stages`]), each taking what it needs and returning its own typed result; the summary is assembled
//! from those results once ([`assemble`]); `sample` hands its diagnostics on to the report instead of
//! computing them again. The CLI only turns arguments into these calls and prints.
//!
//! - [`load`]: the problem (built-in or adapter) and start points;
//! - [`stages`]: gradient test, analysis, Laplace approximation and metric, Laplace check;
//! - [`runs`]: `check`, `map` and `hessian`;
//! - [`sample`]: the whole pipeline to an ensemble, and `resume`;
//! - [`extend`]: the chains extended in blocks until the target ESS or a limit;
//! - [`diagnose`]: diagnostics of an ensemble (chains or weighted draws);
//! - [`report`]: components.csv, ensemble.nc, plots and report.html;
//! - [`demo`]: every stage on the embedded scenario.

pub mod assemble;
pub mod choose;
pub mod demo;
pub mod diagnose;
pub mod extend;
pub mod load;
pub mod report;
pub mod runs;
pub mod sample;
pub mod stages;

pub use crate::config::{ProblemSource, RunConfig};
pub use assemble::Diagnosis;
pub use demo::{run_demo, DemoReport};
pub use diagnose::diagnose;
pub use load::{load, read_vector, Loaded};
pub use report::{report_after_sample, run_report, ReportOutcome};
pub use runs::{run_check, run_hessian, run_map, CheckConfig, HessianRunConfig, MapRunConfig};
pub use sample::{read_run, run_sample, SampleOutcome};
