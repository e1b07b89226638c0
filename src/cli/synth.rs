//! `synth`: a synthetic scenario of a built-in problem written to a folder, to be read back with
//! `--set data=DIR`. With `--set synth=calibration` the truth is a draw from the prior the cost assumes
//! (x0 from N(xb, B), and F from its prior when `estimate_forcing=true`), observations are drawn from
//! it with noise from R: repeated over seeds, a simulation-based calibration study (benches/sbc.sh).

use std::path::Path;

use crate::error::{Error, ExitCode, Result};
use crate::problem::lorenz96::{Lorenz96Config, Scenario};
use crate::problem::settings::Settings;

/// Writes the scenario of `problem` with the settings `set` (key=value) to `out`.
pub fn synth(problem: &str, set: &[String], out: &Path) -> Result<ExitCode> {
    if problem != "lorenz96" {
        return Err(Error::Config(format!(
            "--problem {problem}: only lorenz96 has scenario files (linear-gaussian is regenerated from its seed)"
        )));
    }
    let s = Settings::parse(set)?;
    let config = Lorenz96Config::from_settings(&s)?;
    s.finish("lorenz96")?;
    let sc = Scenario::synthesize(&config)?;
    sc.write(out)?;
    println!(
        "wrote scenario.json, background.csv, observations.csv, truth.csv to {}",
        out.display()
    );
    if let (Some(_), Some(f)) = (sc.config.forcing_prior, sc.truth_forcing) {
        println!("the truth's forcing F = {f} (scenario.json: truth_forcing)");
    }
    Ok(ExitCode::Success)
}
