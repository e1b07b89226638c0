//! Standard deviation per component: posterior (ensemble), Laplace and background.

use std::path::Path;

use plotters::coord::ranged1d::Ranged;
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;

use super::{draw_axes, header, msg, render, DrawResult, Mark, FAMILY, PALETTE, STD_SIZE};
use crate::error::{Error, Result};

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
