//! Stacked panels of per-chain lines, one panel per component: the layout shared by the trace and
//! autocorrelation pictures.

use std::ops::Range;

use plotters::prelude::*;

use super::{
    caption_font, chain_colour, chain_key, draw_axes, fit_label, header, msg, padded_range,
    ChainSeries, DrawResult, MAX_LABEL_CHARS, PANEL_HEIGHT, TITLE_HEIGHT, WIDTH,
};

/// Most points drawn per line; longer chains are thinned evenly for the picture only.
const MAX_POINTS: usize = 4000;

/// (index, value) pairs of a chain, thinned to at most [`MAX_POINTS`]; non-finite values break the line
/// into separate runs.
pub(super) fn runs(values: &[f64]) -> Vec<Vec<(f64, f64)>> {
    let stride = values.len().div_ceil(MAX_POINTS).max(1);
    let mut out = vec![Vec::new()];
    for (i, &v) in values.iter().enumerate().step_by(stride) {
        if v.is_finite() {
            if let Some(last) = out.last_mut() {
                last.push((i as f64, v));
            }
        } else if out.last().is_some_and(|r| !r.is_empty()) {
            out.push(Vec::new());
        }
    }
    out.retain(|r| !r.is_empty());
    out
}

/// A panel's caption: its label, and which chains (if any) have no finite value to draw, so they are
/// not silently missing from the picture.
fn panel_caption(series: &ChainSeries<'_>) -> String {
    let empty: Vec<String> = series
        .chains
        .iter()
        .enumerate()
        .filter(|(_, c)| !c.iter().any(|v| v.is_finite()))
        .map(|(i, _)| i.to_string())
        .collect();
    let label = fit_label(series.label, MAX_LABEL_CHARS);
    match empty.len() {
        0 => label,
        1 => format!("{label} (chain {}: no finite values)", empty[0]),
        _ => format!("{label} (chains {}: no finite values)", empty.join(", ")),
    }
}

/// Panels of per-chain lines (trace plots and autocorrelations share this).
pub(super) fn chain_panels(
    root: &DrawingArea<BitMapBackend<'_>, plotters::coord::Shift>,
    title: &str,
    components: &[ChainSeries<'_>],
    x_desc: &str,
    y_desc: &str,
    y_fixed: Option<Range<f64>>,
    stroke: u32,
) -> DrawResult {
    let n_chains = components.iter().map(|c| c.chains.len()).max().unwrap_or(0);
    let body = header(root, title, &chain_key(n_chains))?;
    let panels = body.split_evenly((components.len().max(1), 1));
    for (series, area) in components.iter().zip(panels.iter()) {
        let len = series.chains.iter().map(Vec::len).max().unwrap_or(0);
        let x_range = 0.0..(len.max(2) - 1) as f64;
        let y_range = match &y_fixed {
            Some(r) => {
                let lo = series
                    .chains
                    .iter()
                    .flatten()
                    .filter(|v| v.is_finite())
                    .fold(r.start, |a, &b| a.min(b));
                (lo - 0.05)..r.end
            }
            None => padded_range(series.chains.iter().flatten()),
        };
        let mut chart = ChartBuilder::on(area)
            .caption(panel_caption(series), caption_font())
            .margin(8)
            .margin_right(24)
            .x_label_area_size(42)
            .y_label_area_size(80)
            .build_cartesian_2d(x_range.clone(), y_range)
            .map_err(msg)?;
        draw_axes(&mut chart, x_desc, y_desc, true, false)?;
        if y_fixed.is_some() {
            chart
                .draw_series(LineSeries::new(
                    [(x_range.start, 0.0), (x_range.end, 0.0)],
                    BLACK.mix(0.6).stroke_width(1),
                ))
                .map_err(msg)?;
        }
        for (c, chain) in series.chains.iter().enumerate() {
            let style = chain_colour(c).mix(0.85).stroke_width(stroke);
            for run in runs(chain) {
                if let [p] = run[..] {
                    // A lone finite value between gaps: a dot, as a line of one point is invisible.
                    chart
                        .draw_series([Circle::new(p, 2, style.filled())])
                        .map_err(msg)?;
                } else {
                    chart
                        .draw_series(LineSeries::new(run, style))
                        .map_err(msg)?;
                }
            }
        }
    }
    Ok(())
}

/// The size of a picture of `k` stacked panels.
pub(super) fn panels_size(k: usize) -> (u32, u32) {
    (WIDTH, TITLE_HEIGHT + PANEL_HEIGHT * k.max(1) as u32)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_split_at_non_finite_values_and_thin() {
        let r = runs(&[1.0, f64::NAN, 2.0, 3.0]);
        assert_eq!(r, vec![vec![(0.0, 1.0)], vec![(2.0, 2.0), (3.0, 3.0)]]);
        let long = vec![0.5; 3 * MAX_POINTS];
        assert!(runs(&long)[0].len() <= MAX_POINTS);
    }
}
