//! Per-component CSV tables.

use std::path::{Path, PathBuf};

use super::write_atomic;
use crate::diagnostics::ComponentStats;
use crate::error::{Error, Result};

/// Writes a CSV with a `component` and a `name` column followed by the given columns. Names holding a
/// comma, a quote or a line break are quoted (RFC 4180); a name a spreadsheet would take for a formula
/// is written with a leading single quote (see [`csv_field`]); a missing value is written as `NaN`.
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

/// First characters that make spreadsheet programs read a cell as a formula (OWASP, "CSV Injection").
const FORMULA_STARTS: [char; 6] = ['=', '+', '-', '@', '\t', '\r'];

/// A CSV field, quoted where RFC 4180 needs it. A field starting with `=`, `+`, `-`, `@`, a tab or a
/// carriage return gets a leading single quote, so that a spreadsheet shows it as text instead of
/// evaluating it (the OWASP advice for CSV injection), and is then quoted.
pub fn csv_field(s: &str) -> String {
    let guarded;
    let s = if s.starts_with(FORMULA_STARTS) {
        guarded = format!("'{s}");
        guarded.as_str()
    } else {
        s
    };
    if s.starts_with('\'') || s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// The per-component results of a sampling run, for DIR/components.csv and the report's table: one
/// entry per component in every slice; columns that are not known are `None` and written as `NaN`.
#[derive(Debug, Clone, Copy)]
pub struct ComponentTable<'a> {
    pub names: &'a [String],
    pub analysis: &'a [f64],
    pub background_std: Option<&'a [f64]>,
    pub laplace_std: Option<&'a [f64]>,
    /// Posterior summaries and convergence diagnostics of each component.
    pub stats: &'a [ComponentStats],
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
pub fn write_components(dir: &Path, table: &ComponentTable<'_>) -> Result<PathBuf> {
    let n = table.names.len();
    for (name, len) in [
        ("analysis", Some(table.analysis.len())),
        ("background_std", table.background_std.map(<[f64]>::len)),
        ("laplace_std", table.laplace_std.map(<[f64]>::len)),
        ("component statistics", Some(table.stats.len())),
    ] {
        if let Some(len) = len.filter(|&l| l != n) {
            return Err(Error::Config(format!(
                "components.csv: {name} has {len} values for {n} components"
            )));
        }
    }
    let missing = vec![f64::NAN; n];
    let stat = |f: fn(&ComponentStats) -> f64| table.stats.iter().map(f).collect::<Vec<f64>>();
    let (mean, sd, mcse, bulk, tail, rhat) = (
        stat(|s| s.mean),
        stat(|s| s.sd),
        stat(|s| s.mcse_mean),
        stat(|s| s.ess_bulk),
        stat(|s| s.ess_tail),
        stat(|s| s.rhat),
    );
    let columns: [(&str, &[f64]); 9] = [
        ("analysis", table.analysis),
        ("background_std", table.background_std.unwrap_or(&missing)),
        ("laplace_std", table.laplace_std.unwrap_or(&missing)),
        ("posterior_mean", &mean),
        ("posterior_std", &sd),
        ("mcse_mean", &mcse),
        ("ess_bulk", &bulk),
        ("ess_tail", &tail),
        ("rhat", &rhat),
    ];
    let path = dir.join("components.csv");
    write_columns(&path, table.names, &columns)?;
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

impl ComponentTable<'_> {
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
            .filter(|&&i| i < self.names.len() && i < self.stats.len())
            .map(|&i| {
                let s = &self.stats[i];
                vec![
                    self.names[i].clone(),
                    significant(s.rhat, 4),
                    whole(s.ess_bulk),
                    whole(s.ess_tail),
                    significant(s.mean, 4),
                    significant(s.mcse_mean, 2),
                    significant(s.sd, 3),
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
    fn formula_like_names_are_written_as_text() {
        // OWASP, "CSV Injection": cells starting with = + - @ tab or CR are prefixed with a single
        // quote and quoted; RFC 4180 quoting of commas, quotes and line breaks.
        assert_eq!(csv_field("=HYPERLINK(\"x\")"), "\"'=HYPERLINK(\"\"x\"\")\"");
        assert_eq!(csv_field("+1"), "\"'+1\"");
        assert_eq!(csv_field("-x"), "\"'-x\"");
        assert_eq!(csv_field("@SUM(A1)"), "\"'@SUM(A1)\"");
        assert_eq!(csv_field("\tx"), "\"'\tx\"");
        assert_eq!(csv_field("\rx"), "\"'\rx\"");
        assert_eq!(csv_field("T(lev=2,lat=10)"), "\"T(lev=2,lat=10)\"");
        assert_eq!(csv_field("x-1"), "x-1");
        assert_eq!(csv_field("'quoted"), "\"'quoted\"");
    }

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

    /// Statistics with the given R-hat and bulk ESS, the rest set to `v`.
    fn stats(rhat: f64, ess_bulk: f64, v: f64) -> ComponentStats {
        ComponentStats {
            mean: v,
            sd: v,
            rhat,
            ess_bulk,
            ess_tail: v,
            mcse_mean: v,
            mcse_sd: v,
            q05: v,
            q95: v,
            mcse_q05: v,
            mcse_q95: v,
        }
    }

    #[test]
    fn report_rows_follow_the_order_given() {
        let names: Vec<String> = vec!["a".into(), "b,c".into()];
        let v = [1.0, 2.0];
        let stats = [stats(1.0012, 100.4, 1.0), stats(1.2, 2000.6, 2.0)];
        let t = ComponentTable {
            names: &names,
            analysis: &v,
            background_std: None,
            laplace_std: Some(&v),
            stats: &stats,
        };
        let (cols, rows) = t.report_rows(&[1, 0, 7]);
        assert_eq!(cols.len(), rows[0].len());
        assert_eq!(rows.len(), 2);
        assert_eq!(rows[0][..3], ["b,c", "1.200", "2001"]);
        assert_eq!(rows[1][..3], ["a", "1.001", "100"]);
        assert_eq!(rows[1][8], "-");
    }
}
