//! Observations of the Lorenz-96 state and the observation operator h.

use crate::error::{Error, Result};

/// The observation operator h applied at each observed site.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ObsOperator {
    /// h(x) = x.
    Linear,
    /// h(x) = x²: the sign of x is not observed, so the posterior can be far from Gaussian.
    Square,
}

impl ObsOperator {
    pub(super) fn apply(self, x: f64) -> f64 {
        match self {
            ObsOperator::Linear => x,
            ObsOperator::Square => x * x,
        }
    }
    pub(super) fn derivative(self, x: f64) -> f64 {
        match self {
            ObsOperator::Linear => 1.0,
            ObsOperator::Square => 2.0 * x,
        }
    }
    pub(super) fn parse(s: &str) -> Result<Self> {
        match s {
            "linear" => Ok(ObsOperator::Linear),
            "square" => Ok(ObsOperator::Square),
            other => Err(Error::Config(format!(
                "setting obs_op={other}: unknown observation operator; use 'linear' or 'square'"
            ))),
        }
    }
    pub(super) fn name(self) -> &'static str {
        match self {
            ObsOperator::Linear => "linear",
            ObsOperator::Square => "square",
        }
    }
}

/// One observation: the value of h(x_step[site]) with error standard deviation `sigma`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observation {
    pub step: usize,
    pub site: usize,
    pub value: f64,
    pub sigma: f64,
}
