//! Warm-up: tuning a kernel's step size before the draws that are kept.
//!
//! [`DualAveraging`] is the step-size controller; [`Warmup`] is the schedule that feeds it one
//! acceptance probability per warm-up iteration (init / update / finish). Both are plain data (serde),
//! so a checkpoint can carry them. This module depends on nothing but the error type.

pub mod dual_averaging;
pub mod warmup;

#[allow(unused_imports)]
pub use dual_averaging::{DualAveraging, DualAveragingSettings};
pub use warmup::Warmup;
