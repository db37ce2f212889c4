//! A line chart of named series over a row of categories, each line broken
//! where a value is missing, with a marker at every point. The sweep draws its
//! ranking field against the first varied key with it.

use plotters::prelude::*;

use super::{draw_err, Rgb};
use crate::ReportError;

/// What to draw: neutral data, with no notion of where it came from.
#[derive(Clone, Debug, PartialEq)]
pub struct LineChart {
    /// The chart's title.
    pub title: String,
    /// The label under the horizontal axis.
    pub x_label: String,
    /// The label beside the vertical axis.
    pub y_label: String,
    /// The categories along the horizontal axis, in order.
    pub categories: Vec<String>,
    /// The lines.
    pub series: Vec<Series>,
}

/// One line: a value per category, or none where it has no point.
#[derive(Clone, Debug, PartialEq)]
pub struct Series {
    /// Its name in the legend.
    pub name: String,
    /// `values[i]` belongs to `categories[i]`.
    pub values: Vec<Option<f64>>,
}

/// The chart's size.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct LineOptions {
    /// Width in pixels.
    pub width_px: u32,
    /// Height in pixels.
    pub height_px: u32,
}

impl Default for LineOptions {
    fn default() -> Self {
        LineOptions { width_px: 1000, height_px: 600 }
    }
}

/// Colours of successive lines, distinct from one another.
const LINE_COLOURS: [Rgb; 8] = [
    (0x1f, 0x5f, 0xa8),
    (0xd9, 0x6c, 0x06),
    (0x2a, 0x9d, 0x5c),
    (0xb8, 0x2e, 0x5a),
    (0x6a, 0x4c, 0x9c),
    (0x8a, 0x6d, 0x1f),
    (0x17, 0x8f, 0x9e),
    (0x55, 0x55, 0x55),
];

/// Draws `chart`; returns the SVG document. Refuses a chart with no value.
pub fn render(chart: &LineChart, options: &LineOptions) -> Result<String, ReportError> {
    let values: Vec<f64> = chart.series.iter().flat_map(|s| s.values.iter().flatten().copied()).collect();
    if values.is_empty() {
        return Err(ReportError::Draw("there is no value to chart".into()));
    }
    let (lo, hi) = values.iter().fold((f64::MAX, f64::MIN), |(a, b), &v| (a.min(v), b.max(v)));
    let pad = ((hi - lo) * 0.08).max(hi.abs() * 0.02).max(1e-9);
    let (y0, y1) = ((lo - pad).max(if lo >= 0.0 { 0.0 } else { f64::MIN }), hi + pad);
    let n = chart.categories.len();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (options.width_px, options.height_px)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let mut plot = ChartBuilder::on(&root)
            .caption(&chart.title, ("sans-serif", 18))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(80)
            .build_cartesian_2d(-0.5f64..(n as f64 - 0.5), y0..y1)
            .map_err(draw_err)?;
        let categories = chart.categories.clone();
        plot.configure_mesh()
            .x_desc(chart.x_label.as_str())
            .y_desc(chart.y_label.as_str())
            .x_labels(n.min(40))
            .x_label_formatter(&move |x: &f64| {
                let i = x.round();
                if (x - i).abs() < 1e-6 && i >= 0.0 && (i as usize) < categories.len() {
                    categories[i as usize].clone()
                } else {
                    String::new()
                }
            })
            .label_style(("sans-serif", 12))
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(draw_err)?;
        for (l, series) in chart.series.iter().enumerate() {
            let (r, g, b) = LINE_COLOURS[l % LINE_COLOURS.len()];
            let colour = RGBColor(r, g, b);
            // Split the line where values are missing.
            let mut runs: Vec<Vec<(f64, f64)>> = vec![vec![]];
            for (x, v) in series.values.iter().enumerate() {
                match v {
                    Some(y) => runs.last_mut().map(|run| run.push((x as f64, *y))).unwrap_or(()),
                    None => runs.push(vec![]),
                }
            }
            let mut first = true;
            for run in runs.into_iter().filter(|r| !r.is_empty()) {
                let drawn = plot.draw_series(LineSeries::new(run.clone(), colour.stroke_width(2))).map_err(draw_err)?;
                if first {
                    drawn
                        .label(series.name.clone())
                        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], colour.stroke_width(2)));
                    first = false;
                }
                plot.draw_series(run.into_iter().map(|p| Circle::new(p, 3, colour.filled()))).map_err(draw_err)?;
            }
        }
        // Keep the legend clear of the lines' right ends.
        let right_ends: Vec<f64> =
            chart.series.iter().filter_map(|s| s.values.iter().rev().flatten().next().copied()).collect();
        let high = right_ends.iter().sum::<f64>() / right_ends.len().max(1) as f64 > (y0 + y1) / 2.0;
        plot.configure_series_labels()
            .position(if high { SeriesLabelPosition::LowerRight } else { SeriesLabelPosition::UpperRight })
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(180, 180, 180))
            .label_font(("sans-serif", 12))
            .draw()
            .map_err(draw_err)?;
        root.present().map_err(draw_err)?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn draws_each_series_and_refuses_an_empty_chart() {
        let chart = LineChart {
            title: "t".into(),
            x_label: "m".into(),
            y_label: "samples/s".into(),
            categories: vec!["4".into(), "8".into(), "16".into()],
            series: vec![
                Series { name: "1f1b".into(), values: vec![Some(1.0), Some(2.0), None] },
                Series { name: "fill-drain".into(), values: vec![None, Some(1.5), Some(1.8)] },
            ],
        };
        let svg = render(&chart, &LineOptions::default()).unwrap();
        assert!(svg.contains("1f1b") && svg.contains("fill-drain") && svg.contains("samples/s"));
        let empty = LineChart { series: vec![Series { name: "x".into(), values: vec![None; 3] }], ..chart };
        assert!(render(&empty, &LineOptions::default()).is_err());
    }
}
