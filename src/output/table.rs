//! Per-component CSV tables.

use std::path::Path;

use super::write_atomic;
use crate::error::Result;

/// Writes a CSV with a `component` and a `name` column followed by the given columns.
pub fn write_columns(path: &Path, names: &[String], columns: &[(&str, &[f64])]) -> Result<()> {
    let mut s = String::from("component,name");
    for (h, _) in columns {
        s.push(',');
        s.push_str(h);
    }
    s.push('\n');
    for (i, name) in names.iter().enumerate() {
        s.push_str(&format!("{i},{name}"));
        for (_, c) in columns {
            s.push_str(&format!(",{}", c.get(i).copied().unwrap_or(f64::NAN)));
        }
        s.push('\n');
    }
    write_atomic(path, s.as_bytes())
}
