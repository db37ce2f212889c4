//! A histogram of values (the step times of `--trials`): equal-width bins
//! over the values' range, one bar per bin, with the percentiles marked.

use plotters::prelude::*;

use super::draw_err;
use crate::ReportError;

/// What to draw: neutral data.
#[derive(Clone, Debug, PartialEq)]
pub struct Histogram {
    /// The chart's title.
    pub title: String,
    /// The label under the horizontal axis.
    pub x_label: String,
    /// The values.
    pub values: Vec<f64>,
    /// Vertical marks, each a name and a value (e.g. `p50`).
    pub marks: Vec<(String, f64)>,
    /// A line of text under the chart (empty for none).
    pub note: String,
}

/// Bins: at most 40, about the square root of the count.
fn bins(n: usize) -> usize {
    ((n as f64).sqrt().ceil() as usize).clamp(1, 40)
}

/// Draws `chart` (1000 x 500 pixels); refuses one with no value.
pub fn render(chart: &Histogram) -> Result<String, ReportError> {
    if chart.values.is_empty() {
        return Err(ReportError::Draw("there is no value to chart".into()));
    }
    let (lo, hi) = chart.values.iter().fold((f64::MAX, f64::MIN), |(a, b), &v| (a.min(v), b.max(v)));
    let span = if hi > lo { hi - lo } else { hi.abs().max(1e-9) * 0.02 };
    let k = bins(chart.values.len());
    let width = span / k as f64;
    let start = if hi > lo { lo } else { lo - span / 2.0 };
    let mut counts = vec![0u32; k];
    for &v in &chart.values {
        let b = (((v - start) / width).floor() as isize).clamp(0, k as isize - 1) as usize;
        counts[b] += 1;
    }
    let top = counts.iter().copied().max().unwrap_or(1) as f64 * 1.1;
    let mut svg = String::new();
    {
        let note_h = if chart.note.is_empty() { 0 } else { 24 };
        let full = SVGBackend::with_string(&mut svg, (1000, 500 + note_h)).into_drawing_area();
        full.fill(&WHITE).map_err(draw_err)?;
        let (root, footer) = full.split_vertically(500);
        let x1 = start + width * k as f64;
        let mut plot = ChartBuilder::on(&root)
            .caption(&chart.title, ("sans-serif", 18))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(60)
            .build_cartesian_2d(start..x1, 0f64..top)
            .map_err(draw_err)?;
        plot.configure_mesh()
            .x_desc(chart.x_label.as_str())
            .y_desc("trials")
            .label_style(("sans-serif", 12))
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(draw_err)?;
        let bar = RGBColor(0x1f, 0x5f, 0xa8);
        plot.draw_series(counts.iter().enumerate().filter(|(_, &c)| c > 0).map(|(b, &c)| {
            let x0 = start + width * b as f64;
            Rectangle::new([(x0, 0.0), (x0 + width, c as f64)], bar.filled())
        }))
        .map_err(draw_err)?;
        let ink = RGBColor(0xb8, 0x2e, 0x5a);
        for (name, v) in &chart.marks {
            plot.draw_series(std::iter::once(PathElement::new(vec![(*v, 0.0), (*v, top)], ink.stroke_width(2))))
                .map_err(draw_err)?;
            plot.draw_series(std::iter::once(Text::new(
                name.clone(),
                (*v, top * 0.97),
                ("sans-serif", 12).into_font(),
            )))
            .map_err(draw_err)?;
        }
        if !chart.note.is_empty() {
            footer.draw(&Text::new(chart.note.clone(), (16, 4), ("sans-serif", 13).into_font())).map_err(draw_err)?;
        }
        full.present().map_err(draw_err)?;
    }
    Ok(svg)
}
