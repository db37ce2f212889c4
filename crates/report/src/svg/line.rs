//! A line chart of named series over a row of categories, each line broken
//! where a value is missing, with a marker at every point. The sweep draws its
//! ranking field against the first varied key with it.
//!
//! Lines beyond the eighth colour repeat a colour with another dash pattern
//! and marker shape, so no two lines look alike. Flagged points (the sweep's:
//! over memory capacity) are drawn hollow and joined by a dotted line, with a
//! legend entry saying what the flag means; a point may carry a short label
//! (the sweep's: the values of the keys the chart does not draw).

use plotters::chart::SeriesAnno;
use plotters::coord::types::RangedCoordf64;
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
    /// What a flagged point means, for the legend (e.g. `over memory
    /// capacity`); unused when no point is flagged.
    pub flag_meaning: String,
    /// A line of text under the chart (empty for none).
    pub note: String,
}

/// One line: a value per category, or none where it has no point.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Series {
    /// Its name in the legend.
    pub name: String,
    /// `values[i]` belongs to `categories[i]`.
    pub values: Vec<Option<f64>>,
    /// `flagged[i]`: the point at `i` is drawn hollow, off the solid line
    /// (missing entries are not flagged).
    pub flagged: Vec<bool>,
    /// `labels[i]`: a short text drawn beside the point at `i`.
    pub labels: Vec<Option<String>>,
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
        let note_h = if chart.note.is_empty() { 0 } else { 24 };
        let full =
            SVGBackend::with_string(&mut svg, (options.width_px, options.height_px + note_h)).into_drawing_area();
        full.fill(&WHITE).map_err(draw_err)?;
        let (root, footer) = full.split_vertically(options.height_px);
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
            let look = Look::of(l);
            let colour = look.colour;
            let flagged = |x: usize| series.flagged.get(x).copied().unwrap_or(false);
            // Split the solid line where values are missing or flagged.
            let mut runs: Vec<Vec<(f64, f64)>> = vec![vec![]];
            for (x, v) in series.values.iter().enumerate() {
                match v {
                    Some(y) if !flagged(x) => runs.last_mut().map(|run| run.push((x as f64, *y))).unwrap_or(()),
                    _ => runs.push(vec![]),
                }
            }
            let mut first = true;
            for run in runs.into_iter().filter(|r| !r.is_empty()) {
                look.line(&mut plot, run.clone(), first.then(|| series.name.clone()))?;
                first = false;
                look.markers(&mut plot, run, true)?;
            }
            // Flagged points: hollow, joined to their neighbours by a dotted line.
            let points: Vec<(usize, f64)> =
                series.values.iter().enumerate().filter_map(|(x, v)| v.map(|y| (x, y))).collect();
            for pair in points.windows(2) {
                let ((xa, ya), (xb, yb)) = (pair[0], pair[1]);
                if xb == xa + 1 && (flagged(xa) || flagged(xb)) {
                    plot.draw_series(DashedLineSeries::new(
                        vec![(xa as f64, ya), (xb as f64, yb)],
                        2,
                        4,
                        colour.stroke_width(1),
                    ))
                    .map_err(draw_err)?;
                }
            }
            let hollow: Vec<(f64, f64)> =
                points.iter().filter(|(x, _)| flagged(*x)).map(|&(x, y)| (x as f64, y)).collect();
            if first && !hollow.is_empty() {
                // A line with only flagged points still gets its legend entry.
                look.legend_only(&mut plot, series.name.clone())?;
            }
            look.markers(&mut plot, hollow, false)?;
            // Point labels, just above each point.
            let labelled: Vec<((f64, f64), String)> = series
                .labels
                .iter()
                .enumerate()
                .filter_map(|(x, t)| Some(((x as f64, series.values.get(x).copied().flatten()?), t.clone()?)))
                .collect();
            // Alternate lines put theirs above and below, so close lines do not overprint.
            let dy = if l % 2 == 0 { -16 } else { 6 };
            plot.draw_series(labelled.into_iter().map(|(p, t)| {
                EmptyElement::at(p) + Text::new(t, (-12, dy), ("sans-serif", 10).into_font().color(&colour.mix(0.9)))
            }))
            .map_err(draw_err)?;
        }
        if chart.series.iter().any(|s| s.flagged.iter().any(|&f| f)) {
            let meaning = format!("hollow, dotted: {}", chart.flag_meaning);
            plot.draw_series(std::iter::empty::<Circle<(f64, f64), i32>>()).map_err(draw_err)?.label(meaning).legend(
                |(x, y)| {
                    EmptyElement::at((x, y))
                        + PathElement::new(vec![(0, 0), (4, 0)], RGBColor(90, 90, 90))
                        + PathElement::new(vec![(8, 0), (12, 0)], RGBColor(90, 90, 90))
                        + Circle::new((18, 0), 3, RGBColor(90, 90, 90).stroke_width(1))
                },
            );
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
        if !chart.note.is_empty() {
            footer
                .draw(&Text::new(
                    chart.note.clone(),
                    (16, 4),
                    ("sans-serif", 12).into_font().color(&RGBColor(60, 60, 60)),
                ))
                .map_err(draw_err)?;
        }
        full.present().map_err(draw_err)?;
    }
    Ok(svg)
}

type Plot<'a> = ChartContext<'a, SVGBackend<'a>, Cartesian2d<RangedCoordf64, RangedCoordf64>>;

/// How the line at index `l` looks: colour `l mod 8`; from the ninth line
/// on, another dash pattern and marker shape for each further eight.
#[derive(Clone, Copy, Debug, PartialEq)]
struct Look {
    colour: RGBColor,
    /// 0 solid with circles, 1 dashed with squares, 2 dotted with
    /// triangles, 3 long dashes with crosses.
    round: usize,
}

impl Look {
    fn of(l: usize) -> Look {
        let (r, g, b) = LINE_COLOURS[l % LINE_COLOURS.len()];
        Look { colour: RGBColor(r, g, b), round: (l / LINE_COLOURS.len()) % 4 }
    }

    /// Dash and gap lengths in pixels (`None`: solid).
    fn pattern(self) -> Option<(u32, u32)> {
        match self.round {
            0 => None,
            1 => Some((8, 5)),
            2 => Some((2, 4)),
            _ => Some((14, 4)),
        }
    }

    /// The legend's three strokes, as pixel spans along 22 px.
    fn strokes(self) -> [(i32, i32); 3] {
        match self.round {
            0 => [(0, 8), (7, 15), (14, 22)],
            1 => [(0, 6), (9, 14), (17, 22)],
            2 => [(0, 2), (10, 12), (20, 22)],
            _ => [(0, 10), (13, 15), (18, 22)],
        }
    }

    /// Draws the line through `points` and gives it its legend entry
    /// (`name`, when given).
    fn line(self, plot: &mut Plot<'_>, points: Vec<(f64, f64)>, name: Option<String>) -> Result<(), ReportError> {
        let style = self.colour.stroke_width(2);
        let anno = match self.pattern() {
            None => plot.draw_series(LineSeries::new(points, style)).map_err(draw_err)?,
            Some((size, spacing)) => {
                plot.draw_series(DashedLineSeries::new(points, size, spacing, style)).map_err(draw_err)?
            }
        };
        if let Some(name) = name {
            self.annotate(anno, name);
        }
        Ok(())
    }

    /// A legend entry with this look, for a series drawn elsewhere.
    fn legend_only(self, plot: &mut Plot<'_>, name: String) -> Result<(), ReportError> {
        let anno = plot.draw_series(std::iter::empty::<Circle<(f64, f64), i32>>()).map_err(draw_err)?;
        self.annotate(anno, name);
        Ok(())
    }

    fn annotate<'a>(self, anno: &mut SeriesAnno<'a, SVGBackend<'a>>, name: String) {
        let (c, [a, b, d]) = (self.colour, self.strokes());
        let strokes = move |(x, y): (i32, i32)| {
            EmptyElement::at((x, y))
                + PathElement::new(vec![(a.0, 0), (a.1, 0)], c.stroke_width(2))
                + PathElement::new(vec![(b.0, 0), (b.1, 0)], c.stroke_width(2))
                + PathElement::new(vec![(d.0, 0), (d.1, 0)], c.stroke_width(2))
        };
        let anno = anno.label(name);
        match self.round {
            0 => anno.legend(move |p| strokes(p) + Circle::new((11, 0), 3, c.filled())),
            1 => anno.legend(move |p| strokes(p) + Rectangle::new([(8, -3), (14, 3)], c.filled())),
            2 => anno.legend(move |p| strokes(p) + TriangleMarker::new((11, 0), 4, c.filled())),
            _ => anno.legend(move |p| strokes(p) + Cross::new((11, 0), 4, c.stroke_width(2))),
        };
    }

    /// Draws a marker at each point: filled, or hollow (an outline).
    fn markers(self, plot: &mut Plot<'_>, points: Vec<(f64, f64)>, filled: bool) -> Result<(), ReportError> {
        let style = if filled { self.colour.filled() } else { self.colour.stroke_width(2) };
        let it = points.into_iter();
        match self.round {
            0 => plot.draw_series(it.map(|p| Circle::new(p, 3, style))).map(|_| ()),
            1 => plot
                .draw_series(it.map(|p| EmptyElement::at(p) + Rectangle::new([(-3, -3), (3, 3)], style)))
                .map(|_| ()),
            2 => plot.draw_series(it.map(|p| TriangleMarker::new(p, 4, style))).map(|_| ()),
            _ => plot.draw_series(it.map(|p| Cross::new(p, 4, self.colour.stroke_width(2)))).map(|_| ()),
        }
        .map_err(draw_err)
    }
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
                Series { name: "1f1b".into(), values: vec![Some(1.0), Some(2.0), None], ..Default::default() },
                Series { name: "fill-drain".into(), values: vec![None, Some(1.5), Some(1.8)], ..Default::default() },
            ],
            flag_meaning: String::new(),
            note: String::new(),
        };
        let svg = render(&chart, &LineOptions::default()).unwrap();
        assert!(svg.contains("1f1b") && svg.contains("fill-drain") && svg.contains("samples/s"));
        let empty = LineChart {
            series: vec![Series { name: "x".into(), values: vec![None; 3], ..Default::default() }],
            ..chart
        };
        assert!(render(&empty, &LineOptions::default()).is_err());
    }

    #[test]
    fn thirty_two_lines_all_look_different() {
        let looks: Vec<Look> = (0..32).map(Look::of).collect();
        for (i, a) in looks.iter().enumerate() {
            for b in &looks[i + 1..] {
                assert_ne!(a, b);
            }
        }
        assert_eq!(Look::of(0).pattern(), None);
        assert_ne!(Look::of(8).pattern(), None, "the ninth line is dashed");
    }

    #[test]
    fn flagged_points_and_labels_are_drawn() {
        let chart = LineChart {
            title: "t".into(),
            x_label: "m".into(),
            y_label: "v".into(),
            categories: vec!["1".into(), "2".into(), "3".into()],
            series: vec![Series {
                name: "a".into(),
                values: vec![Some(1.0), Some(2.0), Some(3.0)],
                flagged: vec![false, false, true],
                labels: vec![Some("k=1".into()), None, Some("k=2".into())],
            }],
            flag_meaning: "over memory capacity".into(),
            note: "a note".into(),
        };
        let svg = render(&chart, &LineOptions { width_px: 640, height_px: 400 }).unwrap();
        assert!(svg.contains("hollow, dotted: over memory capacity"));
        for text in ["k=1", "k=2", "a note"] {
            assert!(svg.lines().any(|l| l.trim() == text), "{text}");
        }
        assert!(svg.contains("width=\"640\""));
    }
}
