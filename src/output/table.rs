//! Per-component CSV tables.

use std::path::{Path, PathBuf};

use super::write_atomic;
use crate::error::{Error, Result};

/// Writes a CSV with a `component` and a `name` column followed by the given columns. Names holding a
/// comma, a quote or a line break are quoted (RFC 4180); a missing value is written as `NaN`.
pub fn write_columns(path: &Path, names: &[String], columns: &[(&str, &[f64])]) -> Result<()> {
    let mut s = String::from("component,name");
    for (h, _) in columns {
        s.push(',');
        s.push_str(&csv_field(h));
    }
    s.push('\n');
    for (i, name) in names.iter().enumerate() {
        s.push_str(&format!("{i},{}", csv_field(name)));
        for (_, c) in columns {
            s.push_str(&format!(",{}", c.get(i).copied().unwrap_or(f64::NAN)));
        }
        s.push('\n');
    }
    write_atomic(path, s.as_bytes())
}

/// A CSV field, quoted where RFC 4180 needs it.
fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// The per-component results of a sampling run, for DIR/components.csv. Every slice has one value per
/// component; columns that are not known are `None` and written as `NaN`.
#[derive(Debug, Clone, Copy)]
pub struct ComponentStats<'a> {
    pub names: &'a [String],
    pub analysis: &'a [f64],
    pub background_std: Option<&'a [f64]>,
    pub laplace_std: Option<&'a [f64]>,
    pub posterior_mean: &'a [f64],
    pub posterior_std: &'a [f64],
    /// Monte Carlo standard error of the posterior mean.
    pub mcse_mean: &'a [f64],
    pub ess_bulk: &'a [f64],
    pub ess_tail: &'a [f64],
    pub rhat: &'a [f64],
}

/// The header of components.csv, in order.
pub const COMPONENT_COLUMNS: [&str; 11] = [
    "component",
    "name",
    "analysis",
    "background_std",
    "laplace_std",
    "posterior_mean",
    "posterior_std",
    "mcse_mean",
    "ess_bulk",
    "ess_tail",
    "rhat",
];

/// Writes DIR/components.csv (one row per component, columns [`COMPONENT_COLUMNS`]) and returns its
/// path.
pub fn write_components(dir: &Path, stats: &ComponentStats<'_>) -> Result<PathBuf> {
    let n = stats.names.len();
    let columns: [(&str, Option<&[f64]>); 9] = [
        ("analysis", Some(stats.analysis)),
        ("background_std", stats.background_std),
        ("laplace_std", stats.laplace_std),
        ("posterior_mean", Some(stats.posterior_mean)),
        ("posterior_std", Some(stats.posterior_std)),
        ("mcse_mean", Some(stats.mcse_mean)),
        ("ess_bulk", Some(stats.ess_bulk)),
        ("ess_tail", Some(stats.ess_tail)),
        ("rhat", Some(stats.rhat)),
    ];
    for (name, c) in &columns {
        if let Some(c) = c {
            if c.len() != n {
                return Err(Error::Config(format!(
                    "components.csv: column {name} has {} values for {n} components",
                    c.len()
                )));
            }
        }
    }
    let missing = vec![f64::NAN; n];
    let cols: Vec<(&str, &[f64])> = columns
        .iter()
        .map(|(h, c)| (*h, c.unwrap_or(&missing[..])))
        .collect();
    let path = dir.join("components.csv");
    write_columns(&path, stats.names, &cols)?;
    Ok(path)
}
