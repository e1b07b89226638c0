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

use plotters::coord::ranged1d::Ranged;
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;

use super::{commit, temp_sibling};
use crate::error::{Error, Result};

/// The embedded font (DejaVu Sans; licence in assets/fonts/LICENSE-DejaVu.txt).
static FONT: &[u8] = include_bytes!("../../assets/fonts/DejaVuSans.ttf");
const FAMILY: &str = "sans-serif";

/// Width of every picture, in pixels.
pub const WIDTH: u32 = 1100;
/// Height of the band over every picture holding its title and its colour key.
pub const TITLE_HEIGHT: u32 = 84;
/// Height of one panel of the trace and autocorrelation pictures.
pub const PANEL_HEIGHT: u32 = 260;
/// Size of one histogram panel of the marginal picture (three per row).
pub const MARGINAL_PANEL: (u32, u32) = (WIDTH / 3, 320);
/// Size of the standard-deviation picture.
pub const STD_SIZE: (u32, u32) = (WIDTH, 550);
/// Most points drawn per line; longer chains are thinned evenly for the picture only.
const MAX_POINTS: usize = 4000;
/// Most characters of a label over a full-width panel (trace and autocorrelation pictures).
pub const MAX_LABEL_CHARS: usize = 90;
/// Most characters of a label over a marginal panel (a third of the width).
pub const MAX_MARGINAL_LABEL_CHARS: usize = 40;

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

/// How an entry of a colour key is drawn.
#[derive(Clone, Copy)]
enum Mark {
    Line,
    Bar,
    /// Text only, no mark.
    Note,
}

/// Draws the title and, under it, a colour key (the legend, kept out of the data), then returns the
/// area below.
fn header<'a>(
    root: &DrawingArea<BitMapBackend<'a>, plotters::coord::Shift>,
    title: &str,
    key: &[(String, RGBColor, Mark)],
) -> std::result::Result<DrawingArea<BitMapBackend<'a>, plotters::coord::Shift>, String> {
    let (top, rest) = root.split_vertically(TITLE_HEIGHT);
    top.draw(&Text::new(
        title.to_string(),
        (20, 12),
        (FAMILY, 26).into_font().color(&BLACK),
    ))
    .map_err(msg)?;
    let font: TextStyle = (FAMILY, 16).into_font().color(&BLACK);
    let (mut x, y) = (24i32, 60i32);
    for (i, (label, colour, mark)) in key.iter().enumerate() {
        let (w, _) = top.estimate_text_size(label, &font).map_err(msg)?;
        if x + 34 + w as i32 > WIDTH as i32 - 20 {
            let more = format!("... {} more", key.len() - i);
            top.draw(&Text::new(more, (x, y - 8), font.clone()))
                .map_err(msg)?;
            break;
        }
        let text_x = match mark {
            Mark::Note => x,
            _ => x + 32,
        };
        match mark {
            Mark::Note => {}
            Mark::Line => top
                .draw(&PathElement::new(
                    vec![(x, y), (x + 26, y)],
                    colour.stroke_width(4),
                ))
                .map_err(msg)?,
            Mark::Bar => top
                .draw(&Rectangle::new(
                    [(x, y - 7), (x + 26, y + 7)],
                    colour.mix(0.45).filled(),
                ))
                .map_err(msg)?,
        }
        top.draw(&Text::new(label.clone(), (text_x, y - 8), font.clone()))
            .map_err(msg)?;
        x = text_x + w as i32 + 20;
    }
    Ok(rest)
}

/// The key of one line per chain; beyond the palette's eight colours, a note that they repeat.
fn chain_key(n_chains: usize) -> Vec<(String, RGBColor, Mark)> {
    let mut key: Vec<_> = (0..n_chains.min(PALETTE.len()))
        .map(|c| (format!("chain {c}"), chain_colour(c), Mark::Line))
        .collect();
    if n_chains > PALETTE.len() {
        key.push((
            format!("(colours repeat after {})", PALETTE.len()),
            BLACK,
            Mark::Note,
        ));
    }
    key
}

/// A tick-label formatter for an axis spanning `range`: as many decimals as the tick spacing needs,
/// scientific notation for very small or large spacings, and no "-0".
fn tick_formatter(range: &Range<f64>) -> impl Fn(&f64) -> String {
    let step = ((range.end - range.start).abs() / 10.0).max(f64::MIN_POSITIVE);
    let decimals = (-step.log10().floor()).clamp(0.0, 12.0) as usize;
    let scientific = !(1e-4..1e6).contains(&step);
    move |v: &f64| {
        let v = if v.abs() < step * 1e-6 { 0.0 } else { *v };
        if scientific {
            format!("{v:.2e}")
        } else {
            format!("{v:.decimals$}")
        }
    }
}

/// Axes of a linear chart: descriptions, readable tick labels, a light grid.
fn draw_axes(
    chart: &mut ChartContext<'_, BitMapBackend<'_>, Cartesian2d<RangedCoordf64, RangedCoordf64>>,
    x_desc: &str,
    y_desc: &str,
    integer_x: bool,
    small: bool,
) -> DrawResult {
    let (label, desc) = if small { (13, 14) } else { (15, 16) };
    let x_fmt = tick_formatter(&chart.x_range());
    let y_fmt = tick_formatter(&chart.y_range());
    let whole = |v: &f64| format!("{v:.0}");
    let mut mesh = chart.configure_mesh();
    mesh.x_desc(x_desc)
        .y_desc(y_desc)
        .label_style((FAMILY, label))
        .axis_desc_style((FAMILY, desc))
        .bold_line_style(RGBColor(225, 225, 225))
        .max_light_lines(0)
        .y_label_formatter(&y_fmt);
    if integer_x {
        mesh.x_label_formatter(&whole);
    } else {
        mesh.x_label_formatter(&x_fmt);
    }
    if small {
        mesh.x_labels(5).y_labels(5);
    }
    mesh.draw().map_err(msg)
}

/// A label as drawn: control characters shown as spaces, and at most `max` characters. A longer label
/// keeps its beginning (two thirds) and its end (one third) around an ellipsis, so that both a long
/// component name and the statistics a caller appends to it stay readable; the text layout then costs
/// the same for a five-megabyte name as for a short one.
pub fn fit_label(label: &str, max: usize) -> String {
    let clean = |c: char| if c.is_control() { ' ' } else { c };
    let count = label.chars().count();
    if count <= max {
        return label.chars().map(clean).collect();
    }
    let keep = max.saturating_sub(1);
    let head = keep * 2 / 3;
    let tail = keep - head;
    label
        .chars()
        .take(head)
        .chain(std::iter::once('…'))
        .chain(label.chars().skip(count - tail))
        .map(clean)
        .collect()
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
fn chain_panels(
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
fn panels_size(k: usize) -> (u32, u32) {
    (WIDTH, TITLE_HEIGHT + PANEL_HEIGHT * k.max(1) as u32)
}

/// Trace plots: one panel per component (give the least-converged few), one line per chain, the draw
/// index across. Size: [`WIDTH`] × ([`TITLE_HEIGHT`] + [`PANEL_HEIGHT`] per component).
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

/// Autocorrelation by lag, one panel per component and one line per chain (the autocorrelations are
/// computed by the caller, lag 0 first). Same size rule as [`trace_plot`].
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
    let key: Vec<(String, RGBColor, Mark)> = lines
        .iter()
        .map(|(l, _, c)| (l.to_string(), *c, Mark::Line))
        .collect();
    render(path, STD_SIZE, |root| {
        let body = header(root, "Standard deviation per component", &key)?;
        let mut builder = ChartBuilder::on(&body);
        builder
            .margin(10)
            .margin_right(30)
            .x_label_area_size(46)
            .y_label_area_size(90);
        if lo.is_finite() && hi / lo > 30.0 {
            let mut chart = builder
                .build_cartesian_2d(x_range, (lo / 1.5..hi * 1.5).log_scale())
                .map_err(msg)?;
            let whole = |v: &f64| format!("{v:.0}");
            chart
                .configure_mesh()
                .x_desc("component index")
                .y_desc("standard deviation (log scale)")
                .label_style((FAMILY, 15))
                .axis_desc_style((FAMILY, 16))
                .bold_line_style(RGBColor(225, 225, 225))
                .max_light_lines(0)
                .x_label_formatter(&whole)
                .draw()
                .map_err(msg)?;
            std_lines(&mut chart, &lines)
        } else {
            let top = if hi.is_finite() { hi * 1.1 } else { 1.0 };
            let mut chart = builder.build_cartesian_2d(x_range, 0.0..top).map_err(msg)?;
            draw_axes(
                &mut chart,
                "component index",
                "standard deviation",
                true,
                false,
            )?;
            std_lines(&mut chart, &lines)
        }
    })
}

/// The lines (and, for up to 100 components, the points) of [`std_plot`].
fn std_lines<Y>(
    chart: &mut ChartContext<'_, BitMapBackend<'_>, Cartesian2d<RangedCoordf64, Y>>,
    lines: &[(&str, &[f64], RGBColor)],
) -> DrawResult
where
    Y: Ranged<ValueType = f64>,
{
    for &(_, values, colour) in lines {
        let pts = || {
            values
                .iter()
                .enumerate()
                .filter(|(_, v)| v.is_finite() && **v > 0.0)
                .map(|(i, &v)| (i as f64, v))
        };
        chart
            .draw_series(LineSeries::new(pts(), colour.stroke_width(2)))
            .map_err(msg)?;
        if values.len() <= 100 {
            chart
                .draw_series(pts().map(|p| Circle::new(p, 3, colour.filled())))
                .map_err(msg)?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn long_labels_keep_their_ends_around_an_ellipsis() {
        // Display rule of this module, no outside source.
        assert_eq!(fit_label("x17 (R-hat 1.04)", 90), "x17 (R-hat 1.04)");
        assert_eq!(fit_label("a\nb\0c", 90), "a b c");
        let huge = format!("{} (R-hat 1.04)", "n".repeat(5_000_000));
        let f = fit_label(&huge, 40);
        assert_eq!(f.chars().count(), 40);
        assert!(
            f.starts_with("nnn") && f.contains('…') && f.ends_with("(R-hat 1.04)"),
            "{f}"
        );
        assert_eq!(fit_label("abcdef", 4), "ab…f");
    }

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
    fn tick_labels_have_the_decimals_the_spacing_needs() {
        // Display rule, common practice, no source: ticks 0.2 apart need one decimal; no "-0".
        let f = tick_formatter(&(-0.5..1.5));
        assert_eq!(f(&0.4), "0.4");
        assert_eq!(f(&-1e-17), "0.0");
        assert_eq!(tick_formatter(&(0.0..2000.0))(&600.0), "600");
        assert_eq!(tick_formatter(&(0.0..1e-6))(&5e-7), "5.00e-7");
    }

    #[test]
    fn runs_split_at_non_finite_values_and_thin() {
        let r = runs(&[1.0, f64::NAN, 2.0, 3.0]);
        assert_eq!(r, vec![vec![(0.0, 1.0)], vec![(2.0, 2.0), (3.0, 3.0)]]);
        let long = vec![0.5; 3 * MAX_POINTS];
        assert!(runs(&long)[0].len() <= MAX_POINTS);
    }
}
