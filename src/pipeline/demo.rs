//! The demo: the embedded Lorenz-96 scenario through every stage.

use std::path::Path;

use super::load::{load, Loaded};
use super::report::{report_after_sample, ReportOutcome};
use super::sample::{run_sample, SampleOutcome};
use crate::config::{ProblemSource, RunConfig};
use crate::error::{Error, Result};
use crate::output::summary::CheckSummary;
use crate::output::Summary;

/// What the demo found, for printing.
pub struct DemoReport {
    pub check: CheckSummary,
    pub sample: SampleOutcome,
    pub report: ReportOutcome,
    /// Root-mean-square error against the truth of the background and of the analysis.
    pub rmse_background: Option<f64>,
    pub rmse_analysis: Option<f64>,
}

/// The demo: the embedded Lorenz-96 scenario through every stage, into `out`. A folder left by an
/// earlier demo is replaced; any other non-empty folder is refused.
pub fn run_demo(out: &Path, progress: &dyn crate::sampler::Progress) -> Result<DemoReport> {
    prepare_demo_folder(out)?;
    let source = ProblemSource::Builtin {
        name: "lorenz96".into(),
        settings: Vec::new(),
    };
    let loaded = load(&source)?;
    let x0 = loaded.start(None)?;
    // The gradient test is the pipeline's own (run once, at the background, and judged by the
    // verdict); a failure stops the run there with its message.
    let cfg = RunConfig::new(source);
    let interrupt = crate::interrupt::Interrupt::from_signals()?;
    let mut sample = run_sample(&loaded, &cfg, out, false, &interrupt, progress)?;
    sample.summary.command = "demo".into();
    sample.summary.write(out)?;
    let check = sample
        .summary
        .check
        .clone()
        .ok_or_else(|| Error::Internal("the demo's gradient test went missing".into()))?;
    let report = report_after_sample(out, &sample, "varpost demo")?;
    let xa = sample
        .summary
        .map
        .as_ref()
        .map(|m| m.x.clone())
        .unwrap_or_default();
    Ok(DemoReport {
        rmse_background: rmse(&loaded, &x0),
        rmse_analysis: rmse(&loaded, &xa),
        check,
        sample,
        report,
    })
}

fn rmse(loaded: &Loaded, a: &[f64]) -> Option<f64> {
    loaded.truth.as_ref().map(|t| {
        (t.iter().zip(a).map(|(p, q)| (p - q).powi(2)).sum::<f64>() / t.len() as f64).sqrt()
    })
}

fn prepare_demo_folder(out: &Path) -> Result<()> {
    let lock_file = std::ffi::OsStr::new(crate::output::lock::LOCK_FILE);
    let entries: Vec<std::path::PathBuf> = match std::fs::read_dir(out) {
        Ok(d) => d
            .filter_map(|e| e.ok())
            .filter(|e| e.file_name() != lock_file)
            .map(|e| e.path())
            .collect(),
        Err(_) => Vec::new(),
    };
    let non_empty = !entries.is_empty();
    if non_empty {
        match Summary::read(out) {
            Ok(s)
                if s.command == "demo"
                    || s.command == "sample"
                        && s.problem == "lorenz96"
                        && out.join("demo.txt").exists() =>
            {
                // Everything but the lock file, which the running demo holds.
                for p in &entries {
                    let r = if p.is_dir() {
                        std::fs::remove_dir_all(p)
                    } else {
                        std::fs::remove_file(p)
                    };
                    r.map_err(|e| Error::io(p, e))?;
                }
            }
            _ => {
                return Err(Error::Config(format!(
                    "{} is not empty and does not hold an earlier demo; give the demo another folder with --out",
                    out.display()
                )))
            }
        }
    }
    std::fs::create_dir_all(out).map_err(|e| Error::io(out, e))?;
    std::fs::write(
        out.join("demo.txt"),
        "written by `varpost demo`; the folder is replaced when the demo runs again\n",
    )
    .map_err(|e| Error::io(out.join("demo.txt"), e))
}
