//! Marginal histograms of the ensemble against the Laplace Gaussian at the analysis.

use std::ops::Range;
use std::path::Path;

use plotters::prelude::*;

use super::{
    draw_axes, fit_label, header, msg, padded_range, render, ChainSeries, Mark, FAMILY,
    MARGINAL_PANEL, MAX_MARGINAL_LABEL_CHARS, PALETTE, TITLE_HEIGHT, WIDTH,
};
use crate::error::Result;

/// One component's draws and its Laplace (Gaussian at the analysis) approximation.
#[derive(Debug, Clone, Copy)]
pub struct Marginal<'a> {
    /// The draws of each chain; the histogram pools them.
    pub series: ChainSeries<'a>,
    /// The analysis (MAP): the mean of the Laplace Gaussian.
    pub analysis: f64,
    /// The Laplace standard deviation, where known.
    pub laplace_std: Option<f64>,
}

/// The Gaussian density (the Laplace approximation drawn over the histograms).
fn gauss_pdf(x: f64, mean: f64, sd: f64) -> f64 {
    let z = (x - mean) / sd;
    (-0.5 * z * z).exp() / (sd * (2.0 * std::f64::consts::PI).sqrt())
}

/// Histogram of finite values over `range` with `bins` bins, as densities (area one).
fn density_histogram(values: &[f64], range: &Range<f64>, bins: usize) -> Vec<f64> {
    let mut counts = vec![0usize; bins];
    let width = (range.end - range.start) / bins as f64;
    let mut total = 0usize;
    for &v in values.iter().filter(|v| v.is_finite()) {
        let k = ((v - range.start) / width).floor();
        if k >= 0.0 && (k as usize) < bins {
            counts[k as usize] += 1;
        } else if v == range.end {
            counts[bins - 1] += 1;
        }
        total += 1;
    }
    let norm = (total.max(1) as f64) * width;
    counts.iter().map(|&c| c as f64 / norm).collect()
}

/// Marginal histograms of the pooled draws with the Laplace Gaussian N(analysis, laplace_std²) drawn
/// over them, three panels per row. Size: [`WIDTH`] × ([`TITLE_HEIGHT`] + rows × `MARGINAL_PANEL.1`).
pub fn marginal_plot(path: &Path, marginals: &[Marginal<'_>]) -> Result<(u32, u32)> {
    let cols = 3usize;
    let rows = marginals.len().div_ceil(cols).max(1);
    let size = (WIDTH, TITLE_HEIGHT + MARGINAL_PANEL.1 * rows as u32);
    let (bar, laplace) = (PALETTE[0], PALETTE[1]);
    render(path, size, |root| {
        let key = [
            ("ensemble histogram".to_string(), bar, Mark::Bar),
            (
                "Laplace Gaussian (analysis, inverse-Hessian variance)".to_string(),
                laplace,
                Mark::Line,
            ),
            ("analysis (MAP)".to_string(), BLACK, Mark::Line),
        ];
        let body = header(
            root,
            "Marginal posteriors against the Laplace approximation",
            &key,
        )?;
        let panels = body.split_evenly((rows, cols));
        for (m, area) in marginals.iter().zip(panels.iter()) {
            let pooled: Vec<f64> = m.series.chains.iter().flatten().copied().collect();
            let n = pooled.iter().filter(|v| v.is_finite()).count();
            let sd = m.laplace_std.filter(|s| s.is_finite() && *s > 0.0);
            let mut ends: Vec<f64> = pooled.clone();
            if let Some(s) = sd {
                ends.push(m.analysis - 3.5 * s);
                ends.push(m.analysis + 3.5 * s);
            }
            let x_range = padded_range(ends.iter());
            // Rice rule for the number of bins, 2 n^(1/3) (Terrell and Scott 1985, from memory).
            let bins = ((2.0 * (n as f64).cbrt()).ceil() as usize).clamp(10, 80);
            let dens = density_histogram(&pooled, &x_range, bins);
            let peak = sd.map_or(0.0, |s| gauss_pdf(m.analysis, m.analysis, s));
            let y_max = dens.iter().copied().fold(peak, f64::max).max(1e-300) * 1.1;
            let label = fit_label(m.series.label, MAX_MARGINAL_LABEL_CHARS);
            let caption = match sd {
                Some(_) => format!("{label} ({n} draws)"),
                None => format!("{label} ({n} draws; no Laplace)"),
            };
            let mut chart = ChartBuilder::on(area)
                .caption(caption, (FAMILY, 17))
                .margin(8)
                .margin_right(18)
                .x_label_area_size(40)
                .y_label_area_size(64)
                .build_cartesian_2d(x_range.clone(), 0.0..y_max)
                .map_err(msg)?;
            draw_axes(&mut chart, "value", "density", false, true)?;
            let w = (x_range.end - x_range.start) / bins as f64;
            chart
                .draw_series(dens.iter().enumerate().map(|(k, &d)| {
                    let x0 = x_range.start + k as f64 * w;
                    Rectangle::new([(x0, 0.0), (x0 + w, d)], bar.mix(0.45).filled())
                }))
                .map_err(msg)?;
            if let Some(s) = sd {
                let curve = (0..=200).map(|k| {
                    let x = x_range.start + (x_range.end - x_range.start) * k as f64 / 200.0;
                    (x, gauss_pdf(x, m.analysis, s))
                });
                chart
                    .draw_series(LineSeries::new(curve, laplace.stroke_width(2)))
                    .map_err(msg)?;
            }
            chart
                .draw_series(LineSeries::new(
                    [(m.analysis, 0.0), (m.analysis, y_max)],
                    BLACK.mix(0.8).stroke_width(1),
                ))
                .map_err(msg)?;
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn density_histogram_has_unit_area() {
        // A density histogram integrates to one (definition; common practice, no source).
        let v: Vec<f64> = (0..1000).map(|i| (i as f64 * 0.618).fract()).collect();
        let r = 0.0..1.0;
        let d = density_histogram(&v, &r, 20);
        let area: f64 = d.iter().map(|x| x * 0.05).sum();
        assert!((area - 1.0).abs() < 1e-12, "{area}");
    }

    #[test]
    fn gaussian_density_peak() {
        // N(0, s^2) peaks at 1/(s sqrt(2 pi)); 1/sqrt(2 pi) = 0.3989422804014327 (Abramowitz and
        // Stegun 1964, Table 26.1, from memory).
        assert!((gauss_pdf(0.0, 0.0, 1.0) - 0.398_942_280_401_432_7).abs() < 1e-15);
        assert!((gauss_pdf(1.0, 1.0, 2.0) - 0.199_471_140_200_716_35).abs() < 1e-15);
    }
}
