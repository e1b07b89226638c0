//! PNG pictures of a sampling run, drawn with plotters' bitmap backend from plain arrays:
//! trace plots, marginal histograms against the Laplace Gaussian, standard deviations per component,
//! and autocorrelations per chain.
//!
//! This module holds what the pictures share: the canvas (an atomically written PNG), the embedded
//! font, the colours, the title band with its colour key, the axes and the cutting of long labels. Each
//! picture has its own file. Text is drawn with DejaVu Sans, embedded in the binary (assets/fonts,
//! licence beside it), so the pictures need no system fonts. Each function writes its file atomically
//! and returns the picture's size in pixels.

mod autocorrelation;
mod marginal;
mod panels;
mod std_dev;
mod trace;

pub use autocorrelation::autocorrelation_plot;
pub use marginal::{marginal_plot, Marginal};
pub use std_dev::std_plot;
pub use trace::trace_plot;

use std::ops::Range;
use std::path::Path;
use std::sync::OnceLock;

use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;

use super::{commit, temp_sibling};
use crate::error::{Error, Result};

/// The embedded font (DejaVu Sans; licence in assets/fonts/LICENSE-DejaVu.txt).
static FONT: &[u8] = include_bytes!("../../../assets/fonts/DejaVuSans.ttf");
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
    fn tick_labels_have_the_decimals_the_spacing_needs() {
        // Display rule, common practice, no source: ticks 0.2 apart need one decimal; no "-0".
        let f = tick_formatter(&(-0.5..1.5));
        assert_eq!(f(&0.4), "0.4");
        assert_eq!(f(&-1e-17), "0.0");
        assert_eq!(tick_formatter(&(0.0..2000.0))(&600.0), "600");
        assert_eq!(tick_formatter(&(0.0..1e-6))(&5e-7), "5.00e-7");
    }
}
