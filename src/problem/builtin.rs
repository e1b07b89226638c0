//! The built-in problems by name, built from `--set key=value` settings.

use std::path::Path;

use super::burgers::{Burgers, BurgersConfig};
use super::linear_gaussian::{GaussianReference, LinearGaussian, LinearGaussianConfig};
use super::lorenz96::{self, Lorenz96, Lorenz96Config, Scenario};
use super::settings::Settings;
use super::Problem;
use crate::error::{Error, Result};

/// Names of the built-in problems.
pub const NAMES: &[&str] = &["lorenz96", "linear-gaussian", "burgers"];

/// A built-in problem with what the tool knows about it beyond the cost function.
pub struct Builtin {
    /// The cost function.
    pub problem: Box<dyn Problem>,
    /// One line saying what the problem is.
    pub description: String,
    /// The settings it was built from, for the summary.
    pub settings: serde_json::Value,
    /// The closed-form posterior, where there is one.
    pub reference: Option<GaussianReference>,
    /// The truth at the start of the window, where the scenario is synthetic.
    pub truth: Option<Vec<f64>>,
}

/// The embedded demo scenario (demo-data/lorenz96), as shipped.
pub fn demo_scenario() -> Result<Scenario> {
    Scenario::parse(
        Path::new("demo-data/lorenz96 (embedded)"),
        include_str!("../../demo-data/lorenz96/scenario.json"),
        include_str!("../../demo-data/lorenz96/background.csv"),
        include_str!("../../demo-data/lorenz96/observations.csv"),
        Some(include_str!("../../demo-data/lorenz96/truth.csv")),
    )
}

/// Builds the built-in problem `name` from settings.
///
/// `lorenz96` reads a scenario folder when given `data=DIR` (settings of the model and B come from its
/// scenario.json then, and other generation settings are refused); otherwise it generates the scenario
/// from the settings and seed; with no settings at all that is exactly the shipped demo.
pub fn open(name: &str, settings: &Settings) -> Result<Builtin> {
    match name {
        "lorenz96" => {
            let scenario = match settings.get_str("data") {
                Some(dir) => {
                    let mut s = Scenario::read(Path::new(&dir))?;
                    if let Some(op) = settings.get_str("obs_op") {
                        let c = Lorenz96Config::from_settings(&Settings::from_pairs(&[("obs_op", &op)]))?;
                        s.config.obs_op = c.obs_op;
                    }
                    s
                }
                // No settings at all: the embedded demo (what the defaults generate, byte for byte).
                None if settings.is_empty() => demo_scenario()?,
                None => Scenario::synthesize(&Lorenz96Config::from_settings(settings)?)?,
            };
            settings.finish(name)?;
            let truth = scenario.truth_control();
            let description = lorenz96::describe(&scenario.config);
            let settings = serde_json::to_value(&scenario.config).unwrap_or_default();
            Ok(Builtin {
                problem: Box::new(Lorenz96::new(scenario)?),
                description,
                settings,
                reference: None,
                truth,
            })
        }
        "linear-gaussian" => {
            let config = LinearGaussianConfig::from_settings(settings)?;
            settings.finish(name)?;
            let p = LinearGaussian::new(config.clone())?;
            let reference = Some(p.reference()?);
            Ok(Builtin {
                description: format!(
                    "linear-Gaussian, n = {}, m = {} observations, forward map of rank {}",
                    config.n, config.m, config.rank
                ),
                settings: serde_json::to_value(&config).unwrap_or_default(),
                truth: Some(p.truth().to_vec()),
                problem: Box::new(p),
                reference,
            })
        }
        "burgers" => {
            let config = BurgersConfig::from_settings(settings)?;
            settings.finish(name)?;
            let p = Burgers::new(config)?;
            Ok(Builtin {
                description: p.describe(),
                settings: serde_json::to_value(p.config()).unwrap_or_default(),
                truth: Some(p.truth().to_vec()),
                problem: Box::new(p),
                reference: None,
            })
        }
        other => Err(Error::Config(format!(
            "unknown problem '{other}'; built-in problems: {}. To use your own code, pass --adapter \"COMMAND\"",
            NAMES.join(", ")
        ))),
    }
}
