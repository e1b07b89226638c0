//! Autocorrelation by lag of the least-converged components, one line per chain.

use std::path::Path;

use super::panels::{chain_panels, panels_size};
use super::{render, ChainSeries};
use crate::error::Result;

/// Autocorrelation by lag, one panel per component and one line per chain (the autocorrelations are
/// computed by the caller, lag 0 first). Same size rule as [`super::trace_plot`].
pub fn autocorrelation_plot(path: &Path, components: &[ChainSeries<'_>]) -> Result<(u32, u32)> {
    let size = panels_size(components.len());
    render(path, size, |root| {
        chain_panels(
            root,
            "Autocorrelation per chain",
            components,
            "lag (draws)",
            "autocorrelation",
            Some(-0.2..1.05),
            2,
        )
    })
}
