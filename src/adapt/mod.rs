//! Warm-up: tuning a kernel's step size before the draws that are kept.
//!
//! [`DualAveraging`] is the step-size controller; [`Warmup`] is the schedule that feeds it one
//! acceptance probability per warm-up iteration (init / update / finish). [`WarmupPlan`] is the
//! pooled warm-up of all chains: its windows, the metric learned from their draws ([`pooled`]) and
//! when the warm-up has settled. All are plain data (serde), so a checkpoint can carry them. [`Metric`]
//! is what the gradient kernels use. This module depends on nothing but the error type and the
//! small shared helpers.

pub mod dual_averaging;
pub mod metric;
pub mod plan;
pub mod pooled;
pub mod warmup;

#[allow(unused_imports)]
pub use dual_averaging::{DualAveraging, DualAveragingSettings};
pub use metric::Metric;
pub use plan::{WarmupPlan, WindowReport};
pub use warmup::Warmup;
