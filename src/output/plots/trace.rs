//! Trace plots: the draws of the least-converged components, one line per chain.

use std::path::Path;

use super::panels::{chain_panels, panels_size};
use super::{render, ChainSeries};
use crate::error::Result;

/// Trace plots: one panel per component (give the least-converged few), one line per chain, the draw
/// index across. Size: [`super::WIDTH`] × ([`super::TITLE_HEIGHT`] + [`super::PANEL_HEIGHT`] per component).
pub fn trace_plot(path: &Path, components: &[ChainSeries<'_>]) -> Result<(u32, u32)> {
    let size = panels_size(components.len());
    render(path, size, |root| {
        chain_panels(
            root,
            "Trace plots: least-converged components, one line per chain",
            components,
            "draw (after warm-up)",
            "value",
            None,
            1,
        )
    })
}
