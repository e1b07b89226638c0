//! `demo`: every stage on the embedded Lorenz-96 scenario, with no arguments needed.

use std::path::Path;

use super::print;
use super::watch::{run_watched, ChainProgress, Watch};
use crate::error::{ExitCode, Result};
use crate::output::progress::Progress;
use crate::pipeline;
use crate::sampler::SampleConfig;

/// Runs the demo into `out` (an earlier demo's folder is replaced) and prints what each stage found.
pub fn demo(out: &Path, progress: Progress) -> Result<ExitCode> {
    println!("varpost demo: the embedded Lorenz-96 scenario (invented; see demo-data/README.md)");
    let _lock = super::lock_folder(out, "demo")?;
    // The demo samples with the default settings.
    let s = SampleConfig::default();
    let chains = ChainProgress::new(s.chains, s.warmup, s.iterations());
    let advance = |chain: usize, done: u64, total: u64| chains.advance(chain, done, total);
    let watch = Watch {
        label: "varpost demo",
        stage: "gradient test, analysis, Hessian, Laplace check",
        runs: None,
        chains: Some(&chains),
    };
    let r = run_watched(progress, &watch, || pipeline::run_demo(out, &advance))?;
    print::demo(&r, out);
    Ok(ExitCode::Success)
}
