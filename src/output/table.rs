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

/// A number with `digits` significant digits, in scientific notation outside [1e-3, 1e5); `NaN` shows
/// as "-" (not known).
pub fn significant(v: f64, digits: usize) -> String {
    if v.is_nan() {
        return "-".into();
    }
    if v.is_infinite() || v == 0.0 {
        return format!("{v}");
    }
    let mag = v.abs().log10().floor() as i64;
    if (-3..5).contains(&mag) {
        let decimals = (digits as i64 - 1 - mag).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{v:.*e}", digits.saturating_sub(1))
    }
}

/// A count-like number (an ESS) rounded to a whole number; `NaN` shows as "-".
fn whole(v: f64) -> String {
    if v.is_nan() {
        "-".into()
    } else {
        format!("{v:.0}")
    }
}

impl ComponentStats<'_> {
    /// The component table of the report: column headers and one row of text per component, in the
    /// order given (e.g. [`super::worst_first`]); indices beyond the components are skipped.
    pub fn report_rows(&self, order: &[usize]) -> (Vec<String>, Vec<Vec<String>>) {
        let columns = [
            "component",
            "R-hat",
            "bulk ESS",
            "tail ESS",
            "posterior mean",
            "MCSE of mean",
            "posterior std",
            "Laplace std",
            "background std",
            "analysis",
        ];
        let at =
            |v: Option<&[f64]>, i: usize| v.and_then(|v| v.get(i)).copied().unwrap_or(f64::NAN);
        let rows = order
            .iter()
            .filter(|&&i| i < self.names.len())
            .map(|&i| {
                vec![
                    self.names[i].clone(),
                    significant(at(Some(self.rhat), i), 4),
                    whole(at(Some(self.ess_bulk), i)),
                    whole(at(Some(self.ess_tail), i)),
                    significant(at(Some(self.posterior_mean), i), 4),
                    significant(at(Some(self.mcse_mean), i), 2),
                    significant(at(Some(self.posterior_std), i), 3),
                    significant(at(self.laplace_std, i), 3),
                    significant(at(self.background_std, i), 3),
                    significant(at(Some(self.analysis), i), 4),
                ]
            })
            .collect();
        (columns.iter().map(|c| c.to_string()).collect(), rows)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn significant_digits() {
        // Rounding to significant figures, half away from zero as printf does (C99 7.19.6.1, from
        // memory); the values below avoid exact ties.
        assert_eq!(significant(1.23456, 3), "1.23");
        assert_eq!(significant(0.0012345, 2), "0.0012");
        assert_eq!(significant(1234.56, 4), "1235");
        assert_eq!(significant(123456.0, 3), "1.23e5");
        assert_eq!(significant(-0.000012345, 3), "-1.23e-5");
        assert_eq!(significant(f64::NAN, 3), "-");
        assert_eq!(significant(0.0, 3), "0");
    }

    #[test]
    fn report_rows_follow_the_order_given() {
        let names: Vec<String> = vec!["a".into(), "b,c".into()];
        let v = [1.0, 2.0];
        let s = ComponentStats {
            names: &names,
            analysis: &v,
            background_std: None,
            laplace_std: Some(&v),
            posterior_mean: &v,
            posterior_std: &v,
            mcse_mean: &v,
            ess_bulk: &[100.4, 2000.6],
            ess_tail: &v,
            rhat: &[1.0012, 1.2],
        };
        let (cols, rows) = s.report_rows(&[1, 0, 7]);
        assert_eq!(cols.len(), rows[0].len());
        assert_eq!(rows.len(), 2);
        assert_eq!(rows[0][..3], ["b,c", "1.200", "2001"]);
        assert_eq!(rows[1][..3], ["a", "1.001", "100"]);
        assert_eq!(rows[1][8], "-");
    }
}
