//! SVG Gantt chart of one simulated step, or of several stacked on one time
//! axis.
//!
//! `plotters` lays out the frame: title, time axis with units, lane labels,
//! legend and caption.
//! The bars and idle marks are then written as plain SVG elements in the
//! chart's pixel coordinates, because each carries a `<title>` tooltip (op,
//! micro-batch, stage, start, end), which plotters has no element for.
//!
//! One lane per device; one bar per operation, coloured by kind (forward blue,
//! backward orange: a pair that stays distinct under the common forms of colour
//! blindness; a weight-gradient pass bluish green), later model chunks drawn
//! lighter; the micro-batch number inside
//! a bar when it fits, dropped when it does not; idle gaps hatched, with their
//! cause as tooltip.

use std::fmt::Write as _;

use baton_engine::format_ns;
use baton_executor::Trace;
use baton_schedule::OpKind;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

use super::{draw_err, hex, ink_on, xml_escape, Rgb, MAX_CHART_OPS};
use crate::{Report, ReportError};

const FORWARD: Rgb = (0x2b, 0x6c, 0xb0);
const BACKWARD: Rgb = (0xe3, 0x8b, 0x2c);
const WEIGHT: Rgb = (0x00, 0x9e, 0x73);

/// The colour of each op kind: one place for every kind the schedule knows.
fn kind_rgb(kind: OpKind) -> Rgb {
    match kind {
        OpKind::Forward => FORWARD,
        OpKind::Backward => BACKWARD,
        OpKind::Weight => WEIGHT,
    }
}
const IDLE_INK: &str = "#b8474a";
const LANE_H: f64 = 28.0;
const LANE_GAP: f64 = 10.0;
/// Height of a communication lane (sends above, receives below).
const COMM_H: f64 = 10.0;
const LABEL_FONT_PX: f64 = 10.0;

/// The colour of an op of `kind` on chunk `chunk` of `chunks`: later chunks lighter.
fn bar_rgb(kind: OpKind, chunk: u32, chunks: u32) -> (u8, u8, u8) {
    let base = kind_rgb(kind);
    if chunks <= 1 {
        return base;
    }
    let t = 0.55 * chunk as f64 / (chunks - 1) as f64;
    let mix = |c: u8| (c as f64 + (255.0 - c as f64) * t).round() as u8;
    (mix(base.0), mix(base.1), mix(base.2))
}

/// What a chart shows beyond the compute bars, and its title.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct GanttOptions {
    /// A thin lane under each device's bars with its sends (bytes leaving)
    /// and receives (data in flight towards it).
    pub comm_lanes: bool,
    /// The chart's title; `None`: the first run's report title.
    pub title: Option<String>,
}

impl Default for GanttOptions {
    fn default() -> Self {
        GanttOptions { comm_lanes: true, title: None }
    }
}

/// One run in a chart.
pub struct Run<'a> {
    /// Its trace.
    pub trace: &'a Trace,
    /// Its report.
    pub report: &'a Report,
    /// Prefix of the run's lane labels (empty for a single run).
    pub label: String,
}

const SEND: Rgb = (0x3d, 0x48, 0x5a);
const RECEIVE: Rgb = (0xa9, 0xb6, 0xc8);

/// Draws `runs` stacked on one shared time axis (each run's lanes below the
/// previous run's), so their timelines compare at a glance; one run is the
/// chart of that step. Returns the SVG document.
pub fn render(runs: &[Run<'_>], options: &GanttOptions) -> Result<String, ReportError> {
    let title =
        options.title.clone().unwrap_or_else(|| runs.first().map(|r| r.report.title.clone()).unwrap_or_default());
    let title = title.as_str();
    let comm = options.comm_lanes && runs.iter().any(|r| !r.trace.transfers.is_empty());
    let total_ops: usize = runs.iter().flat_map(|r| r.trace.ops.iter()).map(Vec::len).sum::<usize>()
        + if comm { runs.iter().map(|r| 2 * r.trace.transfers.len()).sum::<usize>() } else { 0 };
    if total_ops > MAX_CHART_OPS {
        return Err(ReportError::TooLarge { ops: total_ops, limit: MAX_CHART_OPS });
    }
    // Lane of each run's device 0.
    let mut first_lane = Vec::with_capacity(runs.len());
    let mut lanes = 0usize;
    for r in runs {
        first_lane.push(lanes);
        lanes += r.trace.ops.len().max(1);
    }
    let lanes = lanes.max(1);
    let per_device = runs.iter().flat_map(|r| r.trace.ops.iter()).map(Vec::len).max().unwrap_or(0);
    let width = (220 + per_device * 20).clamp(900, 12_000) as u32;
    // Title and axis take about 110 px; each lane gets LANE_H plus a gap.
    let lane_total = if comm { LANE_H + COMM_H + 2.0 + LANE_GAP } else { LANE_H + LANE_GAP };
    let chart_h = 24.0 + 110.0 + lanes as f64 * lane_total;
    let legend_h = 50.0 + 22.0 * runs.len() as f64;
    let height = (chart_h + legend_h).ceil() as u32;
    let step_ns = runs.iter().map(|r| r.report.step_time_ns).max().unwrap_or(0).max(1);
    let step_ms = step_ns as f64 / 1e6;
    let label_w = if runs.iter().any(|r| !r.label.is_empty()) { 150 } else { 90 };

    let mut svg = String::new();
    let (x_range, y_range) = {
        let root = SVGBackend::with_string(&mut svg, (width, height)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (upper, lower) = root.split_vertically(chart_h as u32);
        let mut chart = ChartBuilder::on(&upper)
            .caption(title, ("sans-serif", 20).into_font())
            .margin(12)
            .x_label_area_size(40)
            .y_label_area_size(label_w)
            .build_cartesian_2d(0f64..step_ms, 0f64..lanes as f64)
            .map_err(draw_err)?;
        chart
            .configure_mesh()
            .disable_y_mesh()
            .y_labels(0)
            .x_desc("time (ms)")
            .x_labels(12)
            .light_line_style(RGBColor(235, 235, 235))
            .label_style(("sans-serif", 12))
            .draw()
            .map_err(draw_err)?;
        let (xr, yr) = chart.plotting_area().get_pixel_range();
        // Lane labels, left of the plot; a rule between runs.
        let pitch = (yr.end - yr.start) as f64 / lanes as f64;
        for (r, run) in runs.iter().enumerate() {
            for d in 0..run.trace.ops.len() {
                let y = yr.start as f64 + ((first_lane[r] + d) as f64 + 0.5) * pitch;
                let text =
                    if run.label.is_empty() { format!("device {d}") } else { format!("{}: device {d}", run.label) };
                let style = TextStyle::from(("sans-serif", 13).into_font()).pos(Pos::new(HPos::Right, VPos::Center));
                root.draw(&Text::new(text, (xr.start - 8, y.round() as i32), style)).map_err(draw_err)?;
            }
            if r > 0 {
                let y = (yr.start as f64 + first_lane[r] as f64 * pitch).round() as i32;
                root.draw(&PathElement::new(vec![(xr.start - label_w + 10, y), (xr.end, y)], BLACK.mix(0.4)))
                    .map_err(draw_err)?;
            }
        }
        // Legend and captions.
        let ly = 14;
        let mut lx = xr.start;
        // The kinds the runs' plans run, in kind order.
        let mut legend: Vec<(&str, Option<Rgb>)> = OpKind::ALL
            .iter()
            .filter(|k| runs.iter().any(|r| r.trace.plan.shape.kinds().contains(k)))
            .map(|&k| (k.as_str(), Some(kind_rgb(k))))
            .collect();
        legend.push(("idle (hover for cause)", None));
        if comm {
            legend.push(("send (bytes leaving)", Some(SEND)));
            legend.push(("receive (in flight)", Some(RECEIVE)));
        }
        for (name, colour) in legend {
            let swatch = [(lx, ly), (lx + 16, ly + 12)];
            match colour {
                Some((r, g, b)) => lower.draw(&Rectangle::new(swatch, RGBColor(r, g, b).filled())),
                None => {
                    lower.draw(&Rectangle::new(swatch, ShapeStyle::from(&RGBColor(0xb8, 0x47, 0x4a)).stroke_width(1)))
                }
            }
            .map_err(draw_err)?;
            let style = TextStyle::from(("sans-serif", 12).into_font()).pos(Pos::new(HPos::Left, VPos::Center));
            lower.draw(&Text::new(name.to_string(), (lx + 22, ly + 6), style)).map_err(draw_err)?;
            lx += 40 + 8 * name.len() as i32;
        }
        for (r, run) in runs.iter().enumerate() {
            let report = run.report;
            let chunks_note = if report.chunks > 1 {
                format!(", {} chunks per device (later chunks lighter)", report.chunks)
            } else {
                String::new()
            };
            let caption = format!(
                "{}step time {} · bubble {:.2}% · {} · {} stages · {} micro-batches{} · seed {}",
                if run.label.is_empty() { String::new() } else { format!("{}: ", run.label) },
                format_ns(report.step_time_ns),
                report.bubble_fraction * 100.0,
                report.schedule,
                report.stages,
                report.micro_batches,
                chunks_note,
                report.seed
            );
            let style = TextStyle::from(("sans-serif", 13).into_font()).pos(Pos::new(HPos::Left, VPos::Center));
            lower.draw(&Text::new(caption, (xr.start, ly + 36 + 22 * r as i32), style)).map_err(draw_err)?;
        }
        root.present().map_err(draw_err)?;
        ((xr.start as f64, xr.end as f64), (yr.start as f64, yr.end as f64))
    };

    // Bars and idle marks, in pixel coordinates of the plotting area.
    let px_per_ns = (x_range.1 - x_range.0) / step_ns as f64;
    let pitch = (y_range.1 - y_range.0) / lanes as f64;
    let comm_h = if comm { COMM_H * pitch / lane_total } else { 0.0 };
    let lane_h = pitch - LANE_GAP - if comm { comm_h + 2.0 } else { 0.0 };
    let lane_y = |lane: usize| y_range.0 + LANE_GAP / 2.0 + lane as f64 * pitch;
    let mut body = String::with_capacity(256 * total_ops + 512);
    body.push_str(concat!(
        "<defs><pattern id=\"idle-hatch\" patternUnits=\"userSpaceOnUse\" width=\"6\" height=\"6\" patternTransform=\"rotate(45)\">",
        "<rect width=\"6\" height=\"6\" fill=\"#fbeeee\"/><line x1=\"0\" y1=\"0\" x2=\"0\" y2=\"6\" stroke=\"#b8474a\" stroke-width=\"1.2\"/>",
        "</pattern></defs>\n<g id=\"idle\">\n"
    ));
    for (r, run) in runs.iter().enumerate() {
        let t0 = run.trace.start().as_ns();
        let x_of = |ns: u64| x_range.0 + (ns.saturating_sub(t0)) as f64 * px_per_ns;
        for g in &run.report.gaps {
            let (x0, x1) = (x_of(g.start_ns), x_of(g.end_ns));
            let y = lane_y(first_lane[r] + g.device as usize);
            let _ = writeln!(
                body,
                "<rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"url(#idle-hatch)\" stroke=\"{IDLE_INK}\" stroke-width=\"0.5\"><title>{}idle on device {}, {} to {} ({}): {}</title></rect>",
                x0,
                y + 4.0,
                (x1 - x0).max(0.5),
                lane_h - 8.0,
                if run.label.is_empty() { String::new() } else { format!("{}: ", xml_escape(&run.label)) },
                g.device,
                format_ns(g.start_ns),
                format_ns(g.end_ns),
                g.cause.as_str(),
                xml_escape(&g.detail.to_string())
            );
        }
    }
    body.push_str("</g>\n<g id=\"ops\" font-family=\"sans-serif\" font-size=\"10\" text-anchor=\"middle\">\n");
    for (r, run) in runs.iter().enumerate() {
        let trace = run.trace;
        let t0 = trace.start().as_ns();
        let x_of = |ns: u64| x_range.0 + (ns.saturating_sub(t0)) as f64 * px_per_ns;
        let chunks = trace.plan.shape.chunks;
        let p = trace.plan.shape.stages;
        for (d, recs) in trace.ops.iter().enumerate() {
            let y = lane_y(first_lane[r] + d);
            for rec in recs {
                let (x0, x1) = (x_of(rec.start.as_ns()), x_of(rec.end.as_ns()));
                let w = (x1 - x0).max(0.5);
                let rgb = bar_rgb(rec.op.kind, rec.op.stage / p, chunks);
                let _ = write!(
                    body,
                    "<g><title>{}{} of micro-batch {}, stage {}, device {}: {} to {}</title><rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"{}\" stroke=\"#ffffff\" stroke-width=\"0.6\"/>",
                    if run.label.is_empty() { String::new() } else { format!("{}: ", xml_escape(&run.label)) },
                    rec.op.kind.as_str(),
                    rec.op.micro_batch,
                    rec.op.stage,
                    d,
                    format_ns(rec.start.as_ns()),
                    format_ns(rec.end.as_ns()),
                    x0,
                    y,
                    w,
                    lane_h,
                    hex(rgb)
                );
                let label = rec.op.micro_batch.to_string();
                // About 0.62 em per digit plus a little padding.
                if w >= label.len() as f64 * LABEL_FONT_PX * 0.62 + 3.0 {
                    let _ = write!(
                        body,
                        "<text x=\"{:.2}\" y=\"{:.2}\" fill=\"{}\" dominant-baseline=\"central\">{}</text>",
                        x0 + w / 2.0,
                        y + lane_h / 2.0,
                        ink_on(rgb),
                        label
                    );
                }
                body.push_str("</g>\n");
            }
        }
    }
    body.push_str("</g>\n");
    if comm {
        body.push_str("<g id=\"transfers\">\n");
        for (r, run) in runs.iter().enumerate() {
            let trace = run.trace;
            let t0 = trace.start().as_ns();
            let x_of = |ns: u64| x_range.0 + (ns.saturating_sub(t0)) as f64 * px_per_ns;
            let prefix = if run.label.is_empty() { String::new() } else { format!("{}: ", xml_escape(&run.label)) };
            for t in &trace.transfers {
                let held = t
                    .bottleneck
                    .and_then(|l| trace.link_names.get(l as usize))
                    .map(|n| format!("; held back most on {}", xml_escape(n)))
                    .unwrap_or_default();
                let what = format!(
                    "{} of micro-batch {} from device {} to device {}, {} bytes: sending {} to {}, arrived {}{}",
                    t.flow.as_str(),
                    t.micro_batch,
                    t.src,
                    t.dst,
                    t.bytes,
                    format_ns(t.start.as_ns()),
                    format_ns(t.sent.as_ns()),
                    format_ns(t.end.as_ns()),
                    held
                );
                let half = comm_h / 2.0;
                let send_y = lane_y(first_lane[r] + t.src as usize) + lane_h + 2.0;
                let recv_y = lane_y(first_lane[r] + t.dst as usize) + lane_h + 2.0 + half;
                // Sends: bytes leaving the sender; receives: data in flight to the receiver.
                let marks = [("send", send_y, t.sent, SEND), ("receive", recv_y, t.end, RECEIVE)];
                for (side, y, until, colour) in marks {
                    let (x0, x1) = (x_of(t.start.as_ns()), x_of(until.as_ns()));
                    let _ = writeln!(
                        body,
                        "<rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"{}\"><title>{prefix}{side}: {what}</title></rect>",
                        x0,
                        y,
                        (x1 - x0).max(0.5),
                        half,
                        hex(colour)
                    );
                }
            }
        }
        body.push_str("</g>\n");
    }
    let Some(pos) = svg.rfind("</svg>") else {
        return Err(ReportError::Draw("the SVG backend produced no closing tag".into()));
    };
    svg.insert_str(pos, &body);
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn later_chunks_are_lighter_and_ink_contrasts() {
        let a = bar_rgb(OpKind::Forward, 0, 2);
        let b = bar_rgb(OpKind::Forward, 1, 2);
        assert!(b.0 > a.0 && b.1 > a.1 && b.2 > a.2);
        assert_eq!(ink_on(FORWARD), "#ffffff");
        assert_eq!(ink_on((250, 250, 250)), "#1a1a1a");
    }
}
