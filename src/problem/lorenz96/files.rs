//! Scenario files: writing a scenario to a folder (scenario.json, background.csv, observations.csv,
//! truth.csv) and reading one back with its errors named by file and line.

use std::path::Path;

use super::config::Lorenz96Config;
use super::obs::Observation;
use super::scenario::Scenario;
use crate::error::{Error, Result};

impl Scenario {
    /// The scenario's files: (file name, contents) for scenario.json, background.csv, observations.csv
    /// and, where the truth is known, truth.csv. Numbers are written in Rust's shortest round-trip form.
    pub fn to_files(&self) -> Result<Vec<(&'static str, String)>> {
        let mut files = Vec::new();
        let mut scenario = serde_json::json!({
            "about": "Invented scenario for the varpost demo: a ring of weather stations around an \
                      imaginary polar sea, modelled by Lorenz-96. No real place or data.",
            "format": "varpost-lorenz96 scenario, version 1",
            "config": self.config,
        });
        // With the forcing estimated, the truth's F belongs to the truth (truth.csv holds states only).
        if let (Some(_), Some(_), Some(f)) =
            (&self.config.forcing_prior, &self.truth, self.truth_forcing)
        {
            scenario["truth_forcing"] = serde_json::json!(f);
        }
        let text = serde_json::to_string_pretty(&scenario)
            .map_err(|e| Error::Config(format!("cannot encode the scenario: {e}")))?;
        files.push(("scenario.json", text + "\n"));
        let mut b = String::from("site,value\n");
        for (i, v) in self.background.iter().enumerate() {
            b.push_str(&format!("{i},{v}\n"));
        }
        files.push(("background.csv", b));
        let mut o = String::from("step,site,value,sigma\n");
        for ob in &self.observations {
            o.push_str(&format!(
                "{},{},{},{}\n",
                ob.step, ob.site, ob.value, ob.sigma
            ));
        }
        files.push(("observations.csv", o));
        if let Some(truth) = &self.truth {
            let mut t = String::from("step,site,value\n");
            for (k, x) in truth.iter().enumerate() {
                for (i, v) in x.iter().enumerate() {
                    t.push_str(&format!("{k},{i},{v}\n"));
                }
            }
            files.push(("truth.csv", t));
        }
        Ok(files)
    }

    /// Writes the scenario's files into `dir`.
    pub fn write(&self, dir: &Path) -> Result<()> {
        std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
        for (name, text) in self.to_files()? {
            let p = dir.join(name);
            std::fs::write(&p, text).map_err(|e| Error::io(&p, e))?;
        }
        Ok(())
    }

    /// Reads a scenario from a folder holding scenario.json, background.csv, observations.csv and
    /// optionally truth.csv.
    pub fn read(dir: &Path) -> Result<Self> {
        if !dir.is_dir() {
            return Err(Error::Config(format!(
                "scenario folder {} does not exist; it must hold scenario.json, background.csv and \
                 observations.csv (see demo-data/README.md, or write one with `varpost synth --out DIR`)",
                dir.display()
            )));
        }
        let read = |name: &str| -> Result<String> {
            let p = dir.join(name);
            std::fs::read_to_string(&p).map_err(|e| Error::io(&p, e))
        };
        let truth = match dir.join("truth.csv").exists() {
            true => Some(read("truth.csv")?),
            false => None,
        };
        Scenario::parse(
            dir,
            &read("scenario.json")?,
            &read("background.csv")?,
            &read("observations.csv")?,
            truth.as_deref(),
        )
    }

    /// Parses a scenario from the contents of its files; `origin` names the folder in errors.
    pub fn parse(
        origin: &Path,
        scenario: &str,
        background: &str,
        observations: &str,
        truth: Option<&str>,
    ) -> Result<Self> {
        let sp = origin.join("scenario.json");
        let v: serde_json::Value = serde_json::from_str(scenario)
            .map_err(|e| Error::format(&sp, format!("not valid JSON: {e}")))?;
        let config: Lorenz96Config =
            serde_json::from_value(v.get("config").cloned().unwrap_or_default()).map_err(|e| {
                Error::format(
                    &sp,
                    format!("the \"config\" object is incomplete or wrong: {e}"),
                )
            })?;
        config
            .validate()
            .map_err(|e| Error::format(&sp, e.to_string()))?;
        let n = config.model.n;

        let bp = origin.join("background.csv");
        let rows = parse_csv(&bp, background, &["site", "value"])?;
        if rows.len() != n {
            return Err(Error::format(
                &bp,
                format!("{} rows, but the model has n = {n} sites", rows.len()),
            ));
        }
        let mut xb = vec![f64::NAN; n];
        for (line, r) in rows {
            let site = as_index(&bp, line, r[0], n, "site")?;
            xb[site] = r[1];
        }
        if let Some(i) = xb.iter().position(|v| v.is_nan()) {
            return Err(Error::format(
                &bp,
                format!("no background value for site {i}"),
            ));
        }

        let op = origin.join("observations.csv");
        let mut obs = Vec::new();
        for (line, r) in parse_csv(&op, observations, &["step", "site", "value", "sigma"])? {
            let step = as_index(&op, line, r[0], config.window + 1, "step")?;
            let site = as_index(&op, line, r[1], n, "site")?;
            if !(r[3] > 0.0) {
                return Err(Error::format(
                    &op,
                    format!("line {line}: sigma must be positive, got {}", r[3]),
                ));
            }
            obs.push(Observation {
                step,
                site,
                value: r[2],
                sigma: r[3],
            });
        }
        if obs.is_empty() {
            return Err(Error::format(&op, "no observations"));
        }

        let truth = match truth {
            None => None,
            Some(text) => {
                let tp = origin.join("truth.csv");
                let mut t = vec![vec![f64::NAN; n]; config.window + 1];
                for (line, r) in parse_csv(&tp, text, &["step", "site", "value"])? {
                    let k = as_index(&tp, line, r[0], config.window + 1, "step")?;
                    let i = as_index(&tp, line, r[1], n, "site")?;
                    t[k][i] = r[2];
                }
                Some(t)
            }
        };
        let truth_forcing = match &truth {
            None => None,
            Some(_) => Some(truth_forcing(&sp, &v, &config)?),
        };
        Ok(Scenario {
            config,
            background: xb,
            observations: obs,
            truth,
            truth_forcing,
        })
    }
}

/// The truth's forcing of a scenario with a known truth: `truth_forcing` from scenario.json, which a
/// scenario with the forcing estimated must give; otherwise the setting `forcing`.
fn truth_forcing(path: &Path, v: &serde_json::Value, config: &Lorenz96Config) -> Result<f64> {
    match (v.get("truth_forcing"), config.forcing_prior) {
        (None, None) => Ok(config.model.forcing),
        (None, Some(_)) => Err(Error::format(
            path,
            "the forcing is estimated (config.forcing_prior) and truth.csv is given, but \
             \"truth_forcing\" (the truth's F) is missing; add it or remove truth.csv",
        )),
        (Some(f), _) => match f.as_f64() {
            Some(f) if f.is_finite() => Ok(f),
            _ => Err(Error::format(
                path,
                format!("\"truth_forcing\" is {f}, not a finite number"),
            )),
        },
    }
}

/// Parses a CSV file with a fixed header into rows of numbers, keeping the line number for errors.
fn parse_csv(path: &Path, text: &str, header: &[&str]) -> Result<Vec<(usize, Vec<f64>)>> {
    let mut lines = text
        .lines()
        .enumerate()
        .filter(|(_, l)| !l.trim().is_empty() && !l.starts_with('#'));
    let want = header.join(",");
    match lines.next() {
        Some((_, h)) if h.trim().replace(' ', "") == want => {}
        Some((_, h)) => {
            return Err(Error::format(
                path,
                format!("header is '{}', expected '{want}'", h.trim()),
            ));
        }
        None => return Err(Error::format(path, "the file is empty")),
    }
    let mut rows = Vec::new();
    for (i, l) in lines {
        let fields: Vec<&str> = l.split(',').map(str::trim).collect();
        if fields.len() != header.len() {
            return Err(Error::format(
                path,
                format!(
                    "line {}: {} fields, expected {} ({want})",
                    i + 1,
                    fields.len(),
                    header.len()
                ),
            ));
        }
        let mut row = Vec::with_capacity(fields.len());
        for (f, name) in fields.iter().zip(header) {
            let v: f64 = f.parse().map_err(|_| {
                Error::format(
                    path,
                    format!("line {}: {name} '{f}' is not a number", i + 1),
                )
            })?;
            if !v.is_finite() {
                return Err(Error::format(
                    path,
                    format!("line {}: {name} is {v}, not a finite number", i + 1),
                ));
            }
            row.push(v);
        }
        rows.push((i + 1, row));
    }
    Ok(rows)
}

fn as_index(path: &Path, line: usize, v: f64, limit: usize, what: &str) -> Result<usize> {
    if v < 0.0 || v.fract() != 0.0 || v >= limit as f64 {
        return Err(Error::format(
            path,
            format!(
                "line {line}: {what} {v} is not an integer in 0..{}",
                limit.saturating_sub(1)
            ),
        ));
    }
    Ok(v as usize)
}
