//! SVG chart of each device's memory over one step.
//!
//! One panel per device: the model state (plus reserved memory) as a flat
//! band, the activations held stacked on top of it as a step area, and the
//! device's capacity as a dashed red line. Drawn with `plotters` (SVG backend
//! only, so no fonts are needed to make it).

use baton_executor::Trace;
use plotters::prelude::*;

use super::{draw_err, View, MAX_CHART_OPS};
use crate::{activation_timeline, format_bytes, MemoryInputs, Report, ReportError};

const STATE: RGBColor = RGBColor(0x7a, 0x86, 0x99);
const ACTIVATIONS: RGBColor = RGBColor(0x3a, 0x9e, 0x8c);
const CAPACITY: RGBColor = RGBColor(0xc0, 0x39, 0x2b);
const GIB: f64 = (1u64 << 30) as f64;

/// A step and the memory model it was reported with.
pub struct MemoryRun<'a> {
    /// Its trace.
    pub trace: &'a Trace,
    /// Its report.
    pub report: &'a Report,
    /// The stash per virtual stage, state per device, reserve and capacity.
    pub memory: &'a MemoryInputs,
}

/// How the memory chart is drawn.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct MemoryOptions {
    /// Height of each device's panel in pixels.
    pub panel_px: u32,
    /// Width and time window.
    pub view: View,
    /// What the run changed from its file (e.g. `with placement=spread`),
    /// shown under the legend; empty for none.
    pub note: String,
}

impl Default for MemoryOptions {
    fn default() -> Self {
        MemoryOptions { panel_px: 150, view: View::default(), note: String::new() }
    }
}

/// Draws the memory chart; returns the SVG document.
pub fn render(run: &MemoryRun<'_>, options: &MemoryOptions) -> Result<String, ReportError> {
    let MemoryRun { trace, report, memory } = *run;
    // Every replica holds the same state and the same activations (at its
    // own times): replica 0's devices stand for all.
    let replicas = trace.replicas.max(1);
    let t = trace.tensor.max(1) as usize;
    let shown: Vec<usize> = if replicas > 1 || t > 1 {
        (0..trace.plan.shape.stages as usize).map(|g| g * t).collect()
    } else {
        (0..trace.ops.len()).collect()
    };
    let lanes = shown.len().max(1);
    let total_ops: usize = shown.iter().map(|&d| trace.ops[d].len()).sum();
    if total_ops > MAX_CHART_OPS {
        return Err(ReportError::TooLarge { ops: total_ops, limit: MAX_CHART_OPS });
    }
    let panel_h = options.panel_px;
    let noted = !options.note.is_empty() || options.view.window.is_some() || replicas > 1 || t > 1;
    let (width, height) =
        (options.view.width_px.unwrap_or(1100), 60 + panel_h * lanes as u32 + if noted { 80 } else { 60 });
    let t0 = trace.start().as_ns();
    let (ws, we) = options.view.span(report.step_time_ns);
    let (start_ms, end_ms) = (ws as f64 / 1e6, we as f64 / 1e6);
    // Times outside the window are drawn at its edge.
    let ms_at = |t: u64| (t.saturating_sub(t0) as f64 / 1e6).clamp(start_ms, end_ms);
    let reserved = memory.reserved_bytes;

    // One vertical scale for every panel, so devices compare at a glance.
    let top_bytes =
        report.devices.iter().map(|d| d.peak_memory_bytes).chain(memory.capacity_bytes).max().unwrap_or(1).max(1);
    let y_max = top_bytes as f64 / GIB * 1.08;

    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (width, height)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let root =
            root.titled(&format!("{}: memory per device", report.title), ("sans-serif", 20)).map_err(draw_err)?;
        let (body, footer) = root.split_vertically(panel_h * lanes as u32);
        let panels = body.split_evenly((lanes, 1));
        for (lane, panel) in panels.iter().enumerate() {
            let d = shown[lane];
            let dev = &report.devices[d];
            let base = (dev.state_bytes + reserved) as f64 / GIB;
            let capacity = dev.memory_capacity_bytes.map_or_else(|| "unlimited".into(), format_bytes);
            let caption = format!(
                "device {d}: peak {} / {}{}",
                format_bytes(dev.peak_memory_bytes),
                capacity,
                if dev.fits { "" } else { "  (over capacity)" }
            );
            let mut chart = ChartBuilder::on(panel)
                .caption(caption, ("sans-serif", 13))
                .margin(6)
                .x_label_area_size(if lane + 1 == lanes { 32 } else { 14 })
                .y_label_area_size(70)
                .build_cartesian_2d(start_ms..end_ms, 0f64..y_max)
                .map_err(draw_err)?;
            let mut mesh = chart.configure_mesh();
            mesh.y_desc("GiB")
                .y_labels(4)
                .x_labels(10)
                .label_style(("sans-serif", 11))
                .light_line_style(RGBColor(238, 238, 238));
            if lane + 1 == lanes {
                mesh.x_desc("time (ms)");
            } else {
                mesh.x_label_formatter(&|_| String::new());
            }
            mesh.draw().map_err(draw_err)?;
            chart
                .draw_series(std::iter::once(Rectangle::new([(start_ms, 0.0), (end_ms, base)], STATE.filled())))
                .map_err(draw_err)?;
            if !memory.stash_bytes.is_empty() {
                let timeline = activation_timeline(trace, memory, d);
                let mut points = Vec::with_capacity(2 * timeline.len() + 2);
                let mut level = base;
                points.push((start_ms, base));
                for (t, held) in timeline {
                    let x = ms_at(t.as_ns());
                    points.push((x, level));
                    level = base + held as f64 / GIB;
                    points.push((x, level));
                }
                points.push((end_ms, level));
                points.push((end_ms, base));
                chart
                    .draw_series(std::iter::once(Polygon::new(points, ACTIVATIONS.mix(0.85).filled())))
                    .map_err(draw_err)?;
            }
            if let Some(c) = dev.memory_capacity_bytes {
                let y = c as f64 / GIB;
                chart
                    .draw_series(DashedLineSeries::new(
                        vec![(start_ms, y), (end_ms, y)],
                        8,
                        5,
                        CAPACITY.stroke_width(2),
                    ))
                    .map_err(draw_err)?;
            }
        }
        let legend: [(&str, RGBColor); 3] =
            [("model state + reserved", STATE), ("activations held", ACTIVATIONS), ("capacity", CAPACITY)];
        let mut x = 80;
        for (name, colour) in legend {
            footer.draw(&Rectangle::new([(x, 20), (x + 16, 32)], colour.filled())).map_err(draw_err)?;
            footer.draw(&Text::new(name.to_string(), (x + 22, 20), ("sans-serif", 12))).map_err(draw_err)?;
            x += 60 + 8 * name.len() as i32;
        }
        let mut notes = Vec::new();
        if t > 1 {
            notes.push(format!(
                "replica 0 of {replicas}, rank 0 of each tensor group of {t} shown (every rank and replica holds the same)"
            ));
        } else if replicas > 1 {
            notes.push(format!("replica 0 of {replicas} shown (every replica holds the same)"));
        }
        if !options.note.is_empty() {
            notes.push(options.note.clone());
        }
        if let Some(w) = options.view.window {
            notes.push(format!(
                "showing {} to {} from the step's start",
                baton_engine::format_ns(w.start_ns),
                baton_engine::format_ns(w.end_ns)
            ));
        }
        if !notes.is_empty() {
            footer.draw(&Text::new(notes.join(" · "), (80, 46), ("sans-serif", 12))).map_err(draw_err)?;
        }
        root.present().map_err(draw_err)?;
    }
    Ok(svg)
}
