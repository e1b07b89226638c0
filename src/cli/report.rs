//! `report DIR`: the diagnostics table and the report files of a finished or partial sampling run.

use std::path::Path;

use super::print;
use crate::error::{ExitCode, Result};
use crate::pipeline;

/// Writes the report files of the run in `dir` and prints its `rows` worst-converged components; the
/// verdict decides the exit code, as for `sample` (a partial run is 5).
pub fn report(dir: &Path, rows: usize) -> Result<ExitCode> {
    let r = pipeline::run_report(dir, &super::command_line())?;
    print::report(&r, rows);
    Ok(r.verdict.exit_code())
}
