//! PNG pictures of a sampling run, drawn with plotters' bitmap backend from plain arrays:
//! trace plots, marginal histograms against the Laplace Gaussian, standard deviations per component,
//! and autocorrelations per chain.
//!
//! Text is drawn with DejaVu Sans, embedded in the binary (assets/fonts, licence beside it), so the
//! pictures need no system fonts. Each function writes its file atomically and returns the picture's
//! size in pixels.

use std::ops::Range;
use std::path::Path;
use std::sync::OnceLock;

use plotters::coord::ranged1d::{AsRangedCoord, Ranged, ValueFormatter};
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;

use super::{commit, temp_sibling};
use crate::error::{Error, Result};

/// The embedded font (DejaVu Sans; licence in assets/fonts/LICENSE-DejaVu.txt).
static FONT: &[u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
const FAMILY: &str = "sans-serif";

/// Width of every picture, in pixels.
pub const WIDTH: u32 = 1100;
/// Height of the title band of the multi-panel pictures.
pub const TITLE_HEIGHT: u32 = 50;
/// Height of one panel of the trace and autocorrelation pictures.
pub const PANEL_HEIGHT: u32 = 260;
/// Size of one histogram panel of the marginal picture (three per row).
pub const MARGINAL_PANEL: (u32, u32) = (WIDTH / 3, 320);
/// Size of the standard-deviation picture.
pub const STD_SIZE: (u32, u32) = (WIDTH, 550);
/// Most points drawn per line; longer chains are thinned evenly for the picture only.
const MAX_POINTS: usize = 4000;

/// A colour-blind-safe palette for chains (Okabe & Ito 2008, "Color Universal Design"), with yellow last
/// as it is faint on white.
const PALETTE: [RGBColor; 8] = [
    RGBColor(0, 114, 178),
    RGBColor(213, 94, 0),
    RGBColor(0, 158, 115),
    RGBColor(204, 121, 167),
    RGBColor(230, 159, 0),
    RGBColor(86, 180, 233),
    RGBColor(0, 0, 0),
    RGBColor(240, 228, 66),
];

fn chain_colour(c: usize) -> RGBColor {
    PALETTE[c % PALETTE.len()]
}

/// One component's values per chain (draws for trace plots, autocorrelations by lag for
/// [`autocorrelation_plot`]), with the label shown over its panel.
#[derive(Debug, Clone, Copy)]
pub struct ChainSeries<'a> {
    /// The panel caption, e.g. "x17 (R-hat 1.04, bulk ESS 210)".
    pub label: &'a str,
    /// One vector per chain.
    pub chains: &'a [Vec<f64>],
}

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

/// Registers the embedded font with plotters, once.
fn ensure_font() -> Result<()> {
    static REGISTERED: OnceLock<bool> = OnceLock::new();
    let ok = *REGISTERED
        .get_or_init(|| plotters::style::register_font(FAMILY, FontStyle::Normal, FONT).is_ok());
    if ok {
        Ok(())
    } else {
        Err(Error::Numerical(
            "the embedded plot font could not be read".into(),
        ))
    }
}

/// Draws into a temporary PNG beside `path` with `draw`, then renames it to `path`.
fn render<F>(path: &Path, size: (u32, u32), draw: F) -> Result<(u32, u32)>
where
    F: FnOnce(&DrawingArea<BitMapBackend<'_>, plotters::coord::Shift>) -> DrawResult,
{
    ensure_font()?;
    let tmp = temp_sibling(path)?;
    let drawn = (|| {
        let root = BitMapBackend::new(&tmp, size).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        draw(&root)?;
        root.present().map_err(|e| e.to_string())
    })();
    match drawn {
        Ok(()) => commit(&tmp, path).map(|()| size),
        Err(msg) => {
            let _ = std::fs::remove_file(&tmp);
            Err(Error::io(
                path,
                std::io::Error::other(format!("cannot draw the picture: {msg}")),
            ))
        }
    }
}

type DrawResult = std::result::Result<(), String>;

/// Turns any plotters error into the message of [`render`].
fn msg<E: std::fmt::Display>(e: E) -> String {
    e.to_string()
}

/// The finite range of some values, widened a little and never empty.
fn padded_range<'a>(values: impl Iterator<Item = &'a f64>) -> Range<f64> {
    let (lo, hi) = values
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| {
            (lo.min(v), hi.max(v))
        });
    if !lo.is_finite() {
        return -1.0..1.0;
    }
    let span = hi - lo;
    let pad = if span > 0.0 {
        0.05 * span
    } else {
        0.5 * lo.abs().max(1.0)
    };
    (lo - pad)..(hi + pad)
}

/// (index, value) pairs of a chain, thinned to at most [`MAX_POINTS`]; non-finite values break the line
/// into separate runs.
fn runs(values: &[f64]) -> Vec<Vec<(f64, f64)>> {
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

/// The panel title font.
fn caption_font() -> (&'static str, u32) {
    (FAMILY, 20)
}

/// Picture title band and the area under it.
fn titled<'a>(
    root: &DrawingArea<BitMapBackend<'a>, plotters::coord::Shift>,
    title: &str,
) -> std::result::Result<DrawingArea<BitMapBackend<'a>, plotters::coord::Shift>, String> {
    let (top, rest) = root.split_vertically(TITLE_HEIGHT);
    top.draw(&Text::new(
        title.to_string(),
        (20, 14),
        (FAMILY, 26).into_font().color(&BLACK),
    ))
    .map_err(msg)?;
    Ok(rest)
}

/// Panels of per-chain lines (trace plots and autocorrelations share this).
fn chain_panels(
    root: &DrawingArea<BitMapBackend<'_>, plotters::coord::Shift>,
    title: &str,
    components: &[ChainSeries<'_>],
    x_desc: &str,
    y_desc: &str,
    y_fixed: Option<Range<f64>>,
) -> DrawResult {
    let body = titled(root, title)?;
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
            .caption(series.label, caption_font())
            .margin(8)
            .margin_right(24)
            .x_label_area_size(42)
            .y_label_area_size(80)
            .build_cartesian_2d(x_range.clone(), y_range)
            .map_err(msg)?;
        chart
            .configure_mesh()
            .x_desc(x_desc)
            .y_desc(y_desc)
            .label_style((FAMILY, 15))
            .axis_desc_style((FAMILY, 16))
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(msg)?;
        if y_fixed.is_some() {
            chart
                .draw_series(LineSeries::new(
                    [(x_range.start, 0.0), (x_range.end, 0.0)],
                    BLACK.mix(0.6).stroke_width(1),
                ))
                .map_err(msg)?;
        }
        for (c, chain) in series.chains.iter().enumerate() {
            let colour = chain_colour(c);
            let style = colour.mix(0.85).stroke_width(1);
            let mut first = true;
            let runs = runs(chain);
            let n_runs = runs.len();
            for run in runs {
                let drawn = chart
                    .draw_series(LineSeries::new(run, style))
                    .map_err(msg)?;
                if first {
                    drawn.label(format!("chain {c}")).legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 20, y)], colour.stroke_width(3))
                    });
                    first = false;
                }
            }
            if n_runs == 0 {
                // A chain with no finite value still gets its legend entry, so it is not silently
                // missing from the picture.
                chart
                    .draw_series(std::iter::empty::<PathElement<(f64, f64)>>())
                    .map_err(msg)?
                    .label(format!("chain {c} (no finite values)"))
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 20, y)], colour.stroke_width(3))
                    });
            }
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK.mix(0.5))
            .label_font((FAMILY, 14))
            .draw()
            .map_err(msg)?;
    }
    Ok(())
}

/// Trace plots: one panel per component (give the least-converged few), one line per chain, the draw
/// index across. Size: [`WIDTH`] × ([`TITLE_HEIGHT`] + [`PANEL_HEIGHT`] per component).
pub fn trace_plot(path: &Path, components: &[ChainSeries<'_>]) -> Result<(u32, u32)> {
    let size = (
        WIDTH,
        TITLE_HEIGHT + PANEL_HEIGHT * components.len().max(1) as u32,
    );
    render(path, size, |root| {
        chain_panels(
            root,
            "Trace plots: least-converged components, one line per chain",
            components,
            "draw (after warm-up)",
            "value",
            None,
        )
    })
}

/// Autocorrelation by lag, one panel per component and one line per chain (the autocorrelations are
/// computed by the caller, lag 0 first). Same size rule as [`trace_plot`].
pub fn autocorrelation_plot(path: &Path, components: &[ChainSeries<'_>]) -> Result<(u32, u32)> {
    let size = (
        WIDTH,
        TITLE_HEIGHT + PANEL_HEIGHT * components.len().max(1) as u32,
    );
    render(path, size, |root| {
        chain_panels(
            root,
            "Autocorrelation per chain",
            components,
            "lag (draws)",
            "autocorrelation",
            Some(-0.2..1.05),
        )
    })
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
    render(path, size, |root| {
        let body = titled(
            root,
            "Marginal posteriors: ensemble histogram vs Laplace Gaussian at the analysis",
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
            let y_max = dens.iter().copied().fold(peak, f64::max).max(1e-300) * 1.3;
            let mut chart = ChartBuilder::on(area)
                .caption(m.series.label, (FAMILY, 18))
                .margin(8)
                .margin_right(16)
                .x_label_area_size(40)
                .y_label_area_size(64)
                .build_cartesian_2d(x_range.clone(), 0.0..y_max)
                .map_err(msg)?;
            chart
                .configure_mesh()
                .x_labels(5)
                .y_labels(5)
                .x_desc("value")
                .y_desc("density")
                .label_style((FAMILY, 13))
                .axis_desc_style((FAMILY, 14))
                .light_line_style(RGBColor(235, 235, 235))
                .draw()
                .map_err(msg)?;
            let w = (x_range.end - x_range.start) / bins as f64;
            let fill = PALETTE[0].mix(0.45).filled();
            chart
                .draw_series(dens.iter().enumerate().map(|(k, &d)| {
                    let x0 = x_range.start + k as f64 * w;
                    Rectangle::new([(x0, 0.0), (x0 + w, d)], fill)
                }))
                .map_err(msg)?
                .label(format!("ensemble ({n} draws)"))
                .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 16, y + 5)], fill));
            if let Some(s) = sd {
                let curve: Vec<(f64, f64)> = (0..=200)
                    .map(|k| {
                        let x = x_range.start + (x_range.end - x_range.start) * k as f64 / 200.0;
                        (x, gauss_pdf(x, m.analysis, s))
                    })
                    .collect();
                let red = PALETTE[1];
                chart
                    .draw_series(LineSeries::new(curve, red.stroke_width(2)))
                    .map_err(msg)?
                    .label("Laplace")
                    .legend(move |(x, y)| {
                        PathElement::new(vec![(x, y), (x + 16, y)], red.stroke_width(2))
                    });
            }
            let black = BLACK;
            chart
                .draw_series(LineSeries::new(
                    [(m.analysis, 0.0), (m.analysis, y_max)],
                    black.mix(0.7).stroke_width(1),
                ))
                .map_err(msg)?
                .label("analysis")
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 16, y)], black));
            chart
                .configure_series_labels()
                .position(SeriesLabelPosition::UpperRight)
                .background_style(WHITE.mix(0.85))
                .border_style(BLACK.mix(0.5))
                .label_font((FAMILY, 12))
                .draw()
                .map_err(msg)?;
        }
        Ok(())
    })
}

/// Posterior, Laplace and background standard deviation per component (component index across).
/// The value axis is logarithmic when the values span more than a factor 30. Size: [`STD_SIZE`].
pub fn std_plot(
    path: &Path,
    posterior_std: &[f64],
    laplace_std: Option<&[f64]>,
    background_std: Option<&[f64]>,
) -> Result<(u32, u32)> {
    let n = posterior_std.len();
    for (what, v) in [("Laplace", laplace_std), ("background", background_std)] {
        if let Some(v) = v {
            if v.len() != n {
                return Err(Error::Config(format!(
                    "{what} standard deviations: {} values for {n} components",
                    v.len()
                )));
            }
        }
    }
    let lines: Vec<(&str, &[f64], RGBColor)> = [
        ("background", background_std, RGBColor(120, 120, 120)),
        ("Laplace (inverse Hessian)", laplace_std, PALETTE[1]),
        ("posterior (ensemble)", Some(posterior_std), PALETTE[0]),
    ]
    .into_iter()
    .filter_map(|(l, v, c)| v.map(|v| (l, v, c)))
    .collect();
    let positive = || {
        lines
            .iter()
            .flat_map(|(_, v, _)| v.iter())
            .filter(|v| v.is_finite() && **v > 0.0)
    };
    let lo = positive().fold(f64::INFINITY, |a, &b| a.min(b));
    let hi = positive().fold(f64::NEG_INFINITY, |a, &b| a.max(b));
    let x_range = -0.5..(n.max(1) as f64 - 0.5);
    render(path, STD_SIZE, |root| {
        let body = titled(root, "Standard deviation per component")?;
        if lo.is_finite() && hi / lo > 30.0 {
            let y = (lo / 1.5..hi * 1.5).log_scale();
            std_chart(&body, x_range, y, &lines)
        } else {
            let top = if hi.is_finite() { hi * 1.15 } else { 1.0 };
            std_chart(&body, x_range, 0.0..top, &lines)
        }
    })
}

fn std_chart<Y>(
    area: &DrawingArea<BitMapBackend<'_>, plotters::coord::Shift>,
    x_range: Range<f64>,
    y_range: Y,
    lines: &[(&str, &[f64], RGBColor)],
) -> DrawResult
where
    Y: AsRangedCoord<Value = f64>,
    Y::CoordDescType: Ranged<ValueType = f64> + ValueFormatter<f64>,
{
    let n = lines.first().map_or(0, |l| l.1.len());
    let mut chart = ChartBuilder::on(area)
        .margin(10)
        .margin_right(30)
        .x_label_area_size(46)
        .y_label_area_size(90)
        .build_cartesian_2d::<RangedCoordf64, Y::CoordDescType>(x_range.into(), y_range.into())
        .map_err(msg)?;
    chart
        .configure_mesh()
        .x_desc("component index")
        .y_desc("standard deviation")
        .label_style((FAMILY, 15))
        .axis_desc_style((FAMILY, 16))
        .light_line_style(RGBColor(235, 235, 235))
        .draw()
        .map_err(msg)?;
    for &(label, values, colour) in lines {
        let pts = || {
            values
                .iter()
                .enumerate()
                .filter(|(_, v)| v.is_finite() && **v > 0.0)
                .map(|(i, &v)| (i as f64, v))
        };
        chart
            .draw_series(LineSeries::new(pts(), colour.stroke_width(2)))
            .map_err(msg)?
            .label(label)
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 24, y)], colour.stroke_width(3))
            });
        if n <= 100 {
            chart
                .draw_series(pts().map(|p| Circle::new(p, 3, colour.filled())))
                .map_err(msg)?;
        }
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.5))
        .label_font((FAMILY, 15))
        .draw()
        .map_err(msg)?;
    Ok(())
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

    #[test]
    fn runs_split_at_non_finite_values_and_thin() {
        let r = runs(&[1.0, f64::NAN, 2.0, 3.0]);
        assert_eq!(r, vec![vec![(0.0, 1.0)], vec![(2.0, 2.0), (3.0, 3.0)]]);
        let long = vec![0.5; 3 * MAX_POINTS];
        assert!(runs(&long)[0].len() <= MAX_POINTS);
    }
}
