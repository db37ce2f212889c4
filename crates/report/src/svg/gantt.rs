//! SVG Gantt chart of one simulated step, or of several stacked on one time
//! axis.
//!
//! `plotters` lays out the frame: the plotting area and the time axis with
//! its ticks and units. Everything else is written as plain SVG in the
//! chart's pixel coordinates, because each bar carries a `<title>` tooltip
//! (op, micro-batch, stage, start, end) and the idle marks use fill patterns,
//! neither of which plotters has an element for.
//!
//! One lane per device (on a cluster of nodes, grouped by node, in bands,
//! and labelled by stage and cluster device); one bar per operation, coloured
//! by kind (forward blue, backward orange: a pair that stays distinct under
//! the common forms of colour blindness; a weight-gradient pass bluish
//! green), later model chunks drawn lighter; the micro-batch number inside a
//! bar when it fits, dropped when it does not. Idle gaps are hatched with a
//! pattern and tint of their own per cause, so a pasted picture keeps the
//! cause without its tooltip; the legend shows the same swatches. Under each
//! lane a communication lane shows sends (bytes leaving) and receives (data
//! in flight towards the device). Title and captions wrap to the width.

use std::fmt::Write as _;

use baton_engine::format_ns;
use baton_executor::Trace;
use baton_schedule::OpKind;
use plotters::prelude::*;

use super::{draw_err, hex, ink_on, wrap, xml_escape, Rgb, View, MAX_CHART_OPS};
use crate::analysis::Cause;
use crate::{Report, ReportError};

const FORWARD: Rgb = (0x2b, 0x6c, 0xb0);
const BACKWARD: Rgb = (0xe3, 0x8b, 0x2c);
const WEIGHT: Rgb = (0x00, 0x9e, 0x73);
/// The outline of the critical path's ops and transfers.
const CRITICAL: &str = "#1a1a1a";
/// Compressing or decompressing gradients: a pale olive.
const ENCODE: Rgb = (0xb5, 0xb3, 0x5c);
/// The optimizer update: a dark teal-grey.
const UPDATE: Rgb = (0x4f, 0x6d, 0x6a);
/// Sends: a dark slate.
const SEND: Rgb = (0x3d, 0x48, 0x5a);
/// Receives: a raspberry, a hue no op kind or chunk shade uses.
const RECEIVE: Rgb = (0xa0, 0x2c, 0x7a);
/// A collective's sends: a deep gold.
const SYNC_SEND: Rgb = (0xb8, 0x86, 0x0b);
/// A collective's receives: a violet.
const SYNC_RECEIVE: Rgb = (0x6a, 0x4c, 0x9c);

/// The colour of each op kind: one place for every kind the schedule knows.
fn kind_rgb(kind: OpKind) -> Rgb {
    match kind {
        OpKind::Forward => FORWARD,
        OpKind::Backward => BACKWARD,
        OpKind::Weight => WEIGHT,
        OpKind::Encode => ENCODE,
        OpKind::Update => UPDATE,
    }
}

/// How an idle cause is drawn: the pattern's background tint, its ink, and
/// its marks.
struct CauseStyle {
    tint: &'static str,
    ink: &'static str,
    marks: Marks,
    legend: &'static str,
}

enum Marks {
    /// Parallel lines at this angle (0: vertical).
    Lines(i32),
    /// Two sets of lines, crossing.
    Cross,
    /// A grid of dots.
    Dots,
    /// Horizontal and vertical lines: a square grid.
    Grid,
}

/// One place for every idle cause's look.
fn cause_style(cause: Cause) -> CauseStyle {
    match cause {
        Cause::Fill => CauseStyle { tint: "#f0f0f0", ink: "#7a7a7a", marks: Marks::Lines(45), legend: "idle: fill" },
        Cause::Drain => CauseStyle { tint: "#f0f0f0", ink: "#7a7a7a", marks: Marks::Lines(-45), legend: "idle: drain" },
        Cause::Activation => CauseStyle {
            tint: "#e4edf8",
            ink: "#2b6cb0",
            marks: Marks::Lines(90),
            legend: "idle: waiting for an activation",
        },
        Cause::Gradient => CauseStyle {
            tint: "#fcefe0",
            ink: "#b5651d",
            marks: Marks::Lines(0),
            legend: "idle: waiting for a gradient",
        },
        Cause::Link => {
            CauseStyle { tint: "#f7e4ef", ink: "#a02c7a", marks: Marks::Cross, legend: "idle: data still on a link" }
        }
        Cause::Send => {
            CauseStyle { tint: "#e6f1ee", ink: "#2f6f64", marks: Marks::Dots, legend: "idle: own send not yet arrived" }
        }
        Cause::Sync => CauseStyle {
            tint: "#f6f3dc",
            ink: "#8a7a12",
            marks: Marks::Grid,
            legend: "idle: waiting for gradient synchronisation",
        },
    }
}

/// Every cause, in the order the legend lists them.
const CAUSES: [Cause; 7] =
    [Cause::Fill, Cause::Drain, Cause::Activation, Cause::Gradient, Cause::Link, Cause::Send, Cause::Sync];

/// The `<pattern>` of `cause`, with id `idle-<cause>`.
fn cause_pattern(cause: Cause) -> String {
    let s = cause_style(cause);
    let (tint, ink) = (s.tint, s.ink);
    let id = cause.as_str();
    match s.marks {
        Marks::Lines(angle) => format!(
            "<pattern id=\"idle-{id}\" patternUnits=\"userSpaceOnUse\" width=\"6\" height=\"6\" patternTransform=\"rotate({angle})\">\
             <rect width=\"6\" height=\"6\" fill=\"{tint}\"/><line x1=\"0\" y1=\"0\" x2=\"0\" y2=\"6\" stroke=\"{ink}\" stroke-width=\"1.4\"/></pattern>"
        ),
        Marks::Cross => format!(
            "<pattern id=\"idle-{id}\" patternUnits=\"userSpaceOnUse\" width=\"7\" height=\"7\" patternTransform=\"rotate(45)\">\
             <rect width=\"7\" height=\"7\" fill=\"{tint}\"/><line x1=\"0\" y1=\"0\" x2=\"0\" y2=\"7\" stroke=\"{ink}\" stroke-width=\"1.1\"/>\
             <line x1=\"0\" y1=\"0\" x2=\"7\" y2=\"0\" stroke=\"{ink}\" stroke-width=\"1.1\"/></pattern>"
        ),
        Marks::Grid => format!(
            "<pattern id=\"idle-{id}\" patternUnits=\"userSpaceOnUse\" width=\"6\" height=\"6\">\
             <rect width=\"6\" height=\"6\" fill=\"{tint}\"/><line x1=\"0\" y1=\"0\" x2=\"0\" y2=\"6\" stroke=\"{ink}\" stroke-width=\"1\"/>\
             <line x1=\"0\" y1=\"0\" x2=\"6\" y2=\"0\" stroke=\"{ink}\" stroke-width=\"1\"/></pattern>"
        ),
        Marks::Dots => format!(
            "<pattern id=\"idle-{id}\" patternUnits=\"userSpaceOnUse\" width=\"5\" height=\"5\">\
             <rect width=\"5\" height=\"5\" fill=\"{tint}\"/><circle cx=\"2.5\" cy=\"2.5\" r=\"1.2\" fill=\"{ink}\"/></pattern>"
        ),
    }
}

const LANE_H: f64 = 28.0;
const LANE_GAP: f64 = 10.0;
/// Height of a communication lane: a send row and a receive row.
const COMM_H: f64 = 16.0;
const COMM_ROW: f64 = 7.0;
/// The narrowest send or receive mark, so a short transfer stays visible.
const MIN_MARK_PX: f64 = 3.0;
/// A chart with more ops and transfer marks than this per pixel of its
/// plotting width is dense: there, runs of bars (and of marks) too narrow to
/// tell apart are drawn as one, with one tooltip, and the idle gaps inside
/// such a run are left out. Below it every element is drawn on its own.
const DENSE_PER_PX: f64 = 4.0;
/// In a dense chart, a bar or mark narrower than this (px) joins a run.
const MERGE_PX: f64 = 1.0;
const LABEL_FONT_PX: f64 = 10.0;
/// Average width of a character, as a fraction of the font size (sans-serif).
const EM_PER_CHAR: f64 = 0.56;
const TITLE_PX: f64 = 20.0;
const TEXT_PX: f64 = 13.0;
/// Default width: per op on the busiest device, within these bounds.
const PX_PER_OP: f64 = 18.0;
const DEFAULT_WIDTH_PX: (f64, f64) = (900.0, 1800.0);

/// The colour of an op of `kind` on chunk `chunk` of `chunks`: later chunks lighter.
fn bar_rgb(kind: OpKind, chunk: u32, chunks: u32) -> Rgb {
    let base = kind_rgb(kind);
    if chunks <= 1 {
        return base;
    }
    let t = 0.55 * chunk as f64 / (chunks - 1) as f64;
    let mix = |c: u8| (c as f64 + (255.0 - c as f64) * t).round() as u8;
    (mix(base.0), mix(base.1), mix(base.2))
}

/// What a chart shows beyond the compute bars, its title and its view.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct GanttOptions {
    /// A lane under each device's bars with its sends (bytes leaving)
    /// and receives (data in flight towards it).
    pub comm_lanes: bool,
    /// The chart's title; `None`: the first run's report title.
    pub title: Option<String>,
    /// Width and time window.
    pub view: View,
    /// The devices to chart (`None`: all of them, or replica 0's alone when
    /// a run has more than [`MAX_CHART_DEVICES`]).
    pub devices: Option<Vec<u32>>,
}

impl Default for GanttOptions {
    fn default() -> Self {
        GanttOptions { comm_lanes: true, title: None, view: View::default(), devices: None }
    }
}

/// Above this many devices a chart shows replica 0's devices unless told
/// which to show.
pub const MAX_CHART_DEVICES: usize = 64;

/// Which of a run's devices a chart shows, and a note when it leaves some out.
fn shown_devices(run: &Run<'_>, chosen: Option<&[u32]>) -> (Vec<bool>, Option<String>) {
    let n = run.trace.ops.len();
    match chosen {
        Some(list) => {
            let shown: Vec<bool> = (0..n as u32).map(|d| list.contains(&d)).collect();
            let k = shown.iter().filter(|&&x| x).count();
            let note = (k < n).then(|| format!("Showing {k} of {n} devices (--devices)."));
            (shown, note)
        }
        None if n > MAX_CHART_DEVICES => {
            let p = (run.trace.plan.shape.stages * run.trace.tensor.max(1)) as usize;
            let shown = (0..n).map(|d| d < p).collect();
            let note = format!(
                "Showing replica 0 only: {p} of {n} devices (more than {MAX_CHART_DEVICES}); --devices picks others, e.g. --devices 0-{}.",
                2 * p - 1
            );
            (shown, Some(note))
        }
        None => (vec![true; n], None),
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
    /// What the run changed from its file (e.g. `with placement=spread`),
    /// shown in its caption; empty for none.
    pub note: String,
    /// Devices per node on a cluster of nodes: the lanes are then grouped
    /// by node and labelled by stage and cluster device.
    pub devices_per_node: Option<u32>,
}

/// How one run's devices become lanes.
struct Lanes {
    /// Lane of each device, counted from the run's first lane (`None`: not
    /// shown).
    of_device: Vec<Option<usize>>,
    /// Lanes shown.
    count: usize,
    /// Label of each pipeline device.
    label: Vec<String>,
    /// Bands of consecutive lanes on one node: (first lane, lanes, node).
    nodes: Vec<(usize, usize, u32)>,
}

fn lanes_of(run: &Run<'_>, shown: &[bool]) -> Lanes {
    let devices = run.trace.ops.len();
    let cluster: Vec<u32> =
        (0..devices).map(|d| run.report.devices.get(d).map_or(d as u32, |x| x.cluster_device)).collect();
    let placed = run.devices_per_node.is_some() || cluster.iter().enumerate().any(|(d, &c)| c != d as u32);
    let mut order: Vec<usize> = (0..devices).filter(|&d| shown.get(d).copied().unwrap_or(true)).collect();
    if run.devices_per_node.is_some() {
        order.sort_by_key(|&d| cluster[d]);
    }
    let mut of_device = vec![None; devices];
    for (lane, &d) in order.iter().enumerate() {
        of_device[d] = Some(lane);
    }
    let replicas = run.trace.replicas > 1;
    let t = run.trace.tensor.max(1);
    let p = run.trace.plan.shape.stages.max(1);
    let chunks = run.trace.plan.shape.chunks.max(1);
    let prefix = if run.label.is_empty() { String::new() } else { format!("{}: ", run.label) };
    let label = (0..devices)
        .map(|d| {
            let group = d as u32 / t;
            let stage = group % p;
            let replica = if replicas { format!("r{} ", group / p) } else { String::new() };
            let rank = if t > 1 { format!(" rank {}", d as u32 % t) } else { String::new() };
            if placed || t > 1 {
                let stages: Vec<String> = (0..chunks).map(|c| (stage + c * p).to_string()).collect();
                let word = if chunks > 1 { "stages" } else { "stage" };
                format!("{prefix}{replica}{word} {}{rank} · dev {}", stages.join("+"), cluster[d])
            } else {
                format!("{prefix}device {d}")
            }
        })
        .collect();
    let mut nodes = Vec::new();
    if let Some(dpn) = run.devices_per_node.filter(|&n| n > 0) {
        for (lane, &d) in order.iter().enumerate() {
            let node = cluster[d] / dpn;
            match nodes.last_mut() {
                Some((_, n, last)) if *last == node => *n += 1,
                _ => nodes.push((lane, 1, node)),
            }
        }
    }
    Lanes { count: order.len(), of_device, label, nodes }
}

/// Text width in pixels, roughly, at `px` font size.
fn text_px(text: &str, px: f64) -> f64 {
    text.chars().count() as f64 * px * EM_PER_CHAR
}

/// Draws `runs` stacked on one shared time axis (each run's lanes below the
/// previous run's), so their timelines compare at a glance; one run is the
/// chart of that step. Returns the SVG document.
pub fn render(runs: &[Run<'_>], options: &GanttOptions) -> Result<String, ReportError> {
    let title =
        options.title.clone().unwrap_or_else(|| runs.first().map(|r| r.report.title.clone()).unwrap_or_default());
    let comm =
        options.comm_lanes && runs.iter().any(|r| !r.trace.transfers.is_empty() || !r.trace.sync_transfers.is_empty());
    let shown: Vec<(Vec<bool>, Option<String>)> =
        runs.iter().map(|r| shown_devices(r, options.devices.as_deref())).collect();
    let is_shown = |r: usize, d: u32| shown[r].0.get(d as usize).copied().unwrap_or(false);
    let step_ns = runs.iter().map(|r| r.report.step_time_ns).max().unwrap_or(0).max(1);
    let (ws, we) = options.view.span(step_ns);
    // An interval [a, b) (from the run's start) within the window?
    let visible = |a: u64, b: u64| b > ws && a < we || (a == b && a >= ws && a < we);
    let mut total = 0usize;
    let mut busiest = 0usize;
    for (i, r) in runs.iter().enumerate() {
        let t0 = r.trace.start().as_ns();
        for (d, recs) in r.trace.ops.iter().enumerate() {
            if !is_shown(i, d as u32) {
                continue;
            }
            let n = recs.iter().filter(|o| visible(o.start.as_ns() - t0, o.end.as_ns() - t0)).count();
            total += n;
            busiest = busiest.max(n);
        }
        if comm {
            // A transfer draws a mark under each shown end.
            let marks = |src: u32, dst: u32| usize::from(is_shown(i, src)) + usize::from(is_shown(i, dst));
            let pipeline = r.trace.transfers.iter().filter(|t| visible(t.start.as_ns() - t0, t.end.as_ns() - t0));
            total += pipeline.map(|t| marks(t.src, t.dst)).sum::<usize>();
            let sync = r.trace.sync_transfers.iter().filter(|t| visible(t.start.as_ns() - t0, t.end.as_ns() - t0));
            total += sync.map(|t| marks(t.src, t.dst)).sum::<usize>();
        }
    }
    if total > MAX_CHART_OPS {
        return Err(ReportError::TooLarge { ops: total, limit: MAX_CHART_OPS });
    }
    let layouts: Vec<Lanes> = runs.iter().zip(&shown).map(|(r, s)| lanes_of(r, &s.0)).collect();
    let mut first_lane = Vec::with_capacity(runs.len());
    let mut lanes = 0usize;
    for l in &layouts {
        first_lane.push(lanes);
        lanes += l.count.max(1);
    }
    let lanes = lanes.max(1);
    let grouped = layouts.iter().any(|l| !l.nodes.is_empty());
    let longest_label = layouts.iter().flat_map(|l| l.label.iter()).map(|l| text_px(l, TEXT_PX)).fold(60.0, f64::max);
    let node_w = if grouped { 56.0 } else { 0.0 };
    let label_w = (longest_label + 18.0 + node_w).ceil() as u32;
    let width = match options.view.width_px {
        Some(w) => w,
        None => {
            (label_w as f64 + 60.0 + busiest as f64 * PX_PER_OP).clamp(DEFAULT_WIDTH_PX.0, DEFAULT_WIDTH_PX.1) as u32
        }
    };
    let wf = width as f64;

    // Title, wrapped to the width (at most three lines).
    let title_lines = wrap(&title, ((wf - 24.0) / (TITLE_PX * EM_PER_CHAR)) as usize, 3);
    let title_h = 14.0 + 26.0 * title_lines.len() as f64;
    let lane_total = if comm { LANE_H + COMM_H + 2.0 + LANE_GAP } else { LANE_H + LANE_GAP };
    let plot_h = 12.0 + lanes as f64 * lane_total + 40.0 + 6.0;

    // Legend entries: op kinds, idle causes present, transfers.
    let mut legend: Vec<(String, String)> = OpKind::ALL
        .iter()
        .filter(|&&k| {
            runs.iter().any(|r| {
                if k.is_device_work() {
                    r.trace.ops.iter().flatten().any(|o| o.op.kind == k)
                } else {
                    r.trace.plan.shape.kinds().contains(&k)
                }
            })
        })
        .map(|&k| (k.as_str().to_string(), format!("fill=\"{}\"", hex(kind_rgb(k)))))
        .collect();
    for c in CAUSES {
        if runs.iter().any(|r| r.report.gaps.iter().any(|g| g.cause == c)) {
            let s = cause_style(c);
            legend.push((s.legend.to_string(), format!("fill=\"url(#idle-{})\" stroke=\"{}\"", c.as_str(), s.ink)));
        }
    }
    if comm {
        if runs.iter().any(|r| !r.trace.transfers.is_empty()) {
            legend.push(("send (bytes leaving)".into(), format!("fill=\"{}\"", hex(SEND))));
            legend.push(("receive (data in flight)".into(), format!("fill=\"{}\"", hex(RECEIVE))));
        }
        if runs.iter().any(|r| !r.trace.sync_transfers.is_empty()) {
            legend.push(("gradient sync send".into(), format!("fill=\"{}\"", hex(SYNC_SEND))));
            legend.push(("gradient sync receive".into(), format!("fill=\"{}\"", hex(SYNC_RECEIVE))));
        }
    }
    if runs.iter().any(|r| !r.report.critical_path.is_empty()) {
        legend.push((
            "critical path (outlined)".into(),
            format!("fill=\"none\" stroke=\"{CRITICAL}\" stroke-width=\"1.6\""),
        ));
    }
    let margin = 12.0;
    let mut legend_pos = Vec::with_capacity(legend.len());
    let (mut lx, mut row) = (margin, 0usize);
    for (name, _) in &legend {
        let w = 22.0 + text_px(name, 12.0) + 18.0;
        if lx + w > wf - margin && lx > margin {
            lx = margin;
            row += 1;
        }
        legend_pos.push((lx, row));
        lx += w;
    }
    let legend_h = 8.0 + 20.0 * (row + 1) as f64;

    // Captions: one per run, then notes, wrapped.
    let caption_chars = ((wf - 2.0 * margin) / (TEXT_PX * EM_PER_CHAR)) as usize;
    let mut captions: Vec<String> = Vec::new();
    let dense = total as f64 > DENSE_PER_PX * (wf - label_w as f64 - 2.0 * margin).max(1.0);
    for run in runs {
        let report = run.report;
        let chunks_note = if report.chunks > 1 {
            format!(", {} chunks per device (later chunks lighter)", report.chunks)
        } else {
            String::new()
        };
        let replicas = if report.parallel.data > 1 {
            let sync = report.collectives.iter().find(|c| c.phase != "tied all-reduce").map_or("", |c| c.algorithm);
            format!(" · {} replicas, gradients by {sync}", report.parallel.data)
        } else {
            String::new()
        };
        let time = match &report.steps {
            Some(st) => format!(
                "{} steps in {} (mean {})",
                st.count,
                format_ns(report.step_time_ns),
                format_ns((st.mean_ms * 1e6).round() as u64)
            ),
            None => format!("step time {}", format_ns(report.step_time_ns)),
        };
        let caption = format!(
            "{}{} · bubble {:.2}% · {} · {} stages · {} micro-batches{}{} · seed {}{}",
            if run.label.is_empty() { String::new() } else { format!("{}: ", run.label) },
            time,
            report.bubble_fraction * 100.0,
            report.schedule,
            report.stages,
            report.micro_batches,
            chunks_note,
            replicas,
            report.seed,
            if run.note.is_empty() { String::new() } else { format!(" · {}", run.note) }
        );
        captions.extend(wrap(&caption, caption_chars, 4));
    }
    for (_, note) in &shown {
        if let Some(note) = note {
            captions.extend(wrap(note, caption_chars, 2));
        }
    }
    if let Some(w) = options.view.window {
        let note =
            format!("Showing {} to {} from the step's start (--window).", format_ns(w.start_ns), format_ns(w.end_ns));
        captions.extend(wrap(&note, caption_chars, 2));
    }
    if dense {
        let note = "Runs of ops and of transfers too narrow to tell apart at this width are drawn as one bar each (its tooltip says what it holds); --width or --window shows each.";
        captions.extend(wrap(note, caption_chars, 2));
    }
    if runs.len() > 1 {
        let shortest = runs.iter().map(|r| r.report.step_time_ns).min().unwrap_or(0).max(1);
        if step_ns as f64 / shortest as f64 >= 1.2 {
            let note = format!(
                "All runs share one time axis: the longest step takes {}, the shortest {}, which ends {:.0}% of the way across.",
                format_ns(step_ns),
                format_ns(shortest),
                100.0 * shortest as f64 / step_ns as f64
            );
            captions.extend(wrap(&note, caption_chars, 3));
        }
    }
    let caption_h = 8.0 + 20.0 * captions.len() as f64;
    let height = (title_h + plot_h + legend_h + caption_h).ceil() as u32;

    let mut svg = String::new();
    let (x_range, y_range) = {
        let root = SVGBackend::with_string(&mut svg, (width, height)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let (_, rest) = root.split_vertically(title_h as u32);
        let (upper, _) = rest.split_vertically(plot_h as u32);
        let mut chart = ChartBuilder::on(&upper)
            .margin(margin as u32)
            .x_label_area_size(40)
            .y_label_area_size(label_w)
            .build_cartesian_2d(ws as f64 / 1e6..we as f64 / 1e6, 0f64..lanes as f64)
            .map_err(draw_err)?;
        chart
            .configure_mesh()
            .disable_y_mesh()
            .y_labels(0)
            .x_desc("time (ms)")
            .x_labels(((wf - label_w as f64) / 90.0).clamp(4.0, 20.0) as usize)
            .light_line_style(RGBColor(235, 235, 235))
            .label_style(("sans-serif", 12))
            .draw()
            .map_err(draw_err)?;
        let (xr, yr) = chart.plotting_area().get_pixel_range();
        root.present().map_err(draw_err)?;
        ((xr.start as f64, xr.end as f64), (yr.start as f64, yr.end as f64))
    };

    let px_per_ns = (x_range.1 - x_range.0) / (we - ws) as f64;
    let pitch = (y_range.1 - y_range.0) / lanes as f64;
    let comm_h = if comm { COMM_H * pitch / lane_total } else { 0.0 };
    let comm_row = if comm { COMM_ROW * pitch / lane_total } else { 0.0 };
    let lane_h = pitch - LANE_GAP - if comm { comm_h + 2.0 } else { 0.0 };
    let lane_y = |lane: usize| y_range.0 + LANE_GAP / 2.0 + lane as f64 * pitch;
    // The pixel span of [a, b) (from a run's start) clipped to the window.
    let span = |a: u64, b: u64| -> Option<(f64, f64)> {
        if !visible(a, b) {
            return None;
        }
        let x = |t: u64| x_range.0 + (t.clamp(ws, we) - ws) as f64 * px_per_ns;
        Some((x(a), x(b)))
    };

    let mut body = String::with_capacity(256 * total + 4096);
    body.push_str("<defs>");
    for c in CAUSES {
        body.push_str(&cause_pattern(c));
    }
    body.push_str("</defs>\n<g id=\"title\" font-family=\"sans-serif\" text-anchor=\"middle\">\n");
    for (i, line) in title_lines.iter().enumerate() {
        let _ = writeln!(
            body,
            "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"{TITLE_PX}\">{}</text>",
            wf / 2.0,
            10.0 + 26.0 * (i as f64 + 0.75),
            xml_escape(line)
        );
    }
    body.push_str("</g>\n<g id=\"lanes\" font-family=\"sans-serif\" font-size=\"13\">\n");
    for (r, layout) in layouts.iter().enumerate() {
        for (i, &(first, n, node)) in layout.nodes.iter().enumerate() {
            let y0 = y_range.0 + (first_lane[r] + first) as f64 * pitch;
            let h = n as f64 * pitch;
            let _ = writeln!(
                body,
                "<rect x=\"{:.1}\" y=\"{y0:.2}\" width=\"{:.1}\" height=\"{h:.2}\" fill=\"{}\" fill-opacity=\"0.55\"/>",
                margin,
                x_range.1 - margin,
                if i % 2 == 0 { "#e8edf4" } else { "#f6f3ea" }
            );
            let _ = writeln!(
                body,
                "<text x=\"{:.1}\" y=\"{:.2}\" font-size=\"11\" fill=\"#4a5568\" dominant-baseline=\"central\">node {node}</text>",
                margin + 4.0,
                y0 + h / 2.0
            );
        }
        for (d, label) in layout.label.iter().enumerate() {
            let Some(lane) = layout.of_device[d] else { continue };
            let lane = first_lane[r] + lane;
            let _ = writeln!(
                body,
                "<text x=\"{:.1}\" y=\"{:.2}\" text-anchor=\"end\" dominant-baseline=\"central\">{}</text>",
                x_range.0 - 8.0,
                lane_y(lane) + lane_h / 2.0,
                xml_escape(label)
            );
            if comm {
                let _ = writeln!(
                    body,
                    "<rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"#f3f3f3\"/>",
                    x_range.0,
                    lane_y(lane) + lane_h + 2.0,
                    x_range.1 - x_range.0,
                    comm_h
                );
            }
        }
        if r > 0 {
            let y = y_range.0 + first_lane[r] as f64 * pitch;
            let _ = writeln!(
                body,
                "<line x1=\"{margin:.1}\" y1=\"{y:.2}\" x2=\"{:.1}\" y2=\"{y:.2}\" stroke=\"#000000\" stroke-opacity=\"0.4\"/>",
                x_range.1
            );
        }
    }
    // Each shown device's ops as runs to draw: one op each, or in a dense
    // chart runs of ops too narrow to tell apart.
    let groups: Vec<Vec<Vec<Group>>> = runs
        .iter()
        .enumerate()
        .map(|(r, run)| {
            let t0 = run.trace.start().as_ns();
            run.trace
                .ops
                .iter()
                .enumerate()
                .map(|(d, recs)| {
                    if layouts[r].of_device[d].is_none() {
                        return Vec::new();
                    }
                    let spans = recs.iter().map(|rec| span(rec.start.as_ns() - t0, rec.end.as_ns() - t0));
                    group_runs(spans, dense)
                })
                .collect()
        })
        .collect();
    body.push_str("</g>\n<g id=\"idle\">\n");
    for (r, run) in runs.iter().enumerate() {
        let t0 = run.trace.start().as_ns();
        for g in &run.report.gaps {
            let Some((x0, x1)) = span(g.start_ns.saturating_sub(t0), g.end_ns.saturating_sub(t0)) else { continue };
            let Some(lane) = layouts[r].of_device.get(g.device as usize).copied().flatten() else { continue };
            if dense && inside_a_run(&groups[r][g.device as usize], x0, x1) {
                continue;
            }
            let lane = first_lane[r] + lane;
            let _ = writeln!(
                body,
                "<rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"url(#idle-{})\" stroke=\"{}\" stroke-width=\"0.5\"><title>{}idle on device {}, {} to {} ({}): {}</title></rect>",
                x0,
                lane_y(lane) + 3.0,
                (x1 - x0).max(0.5),
                (lane_h - 6.0).max(1.0),
                g.cause.as_str(),
                cause_style(g.cause).ink,
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
        let chunks = trace.plan.shape.chunks;
        let p = trace.plan.shape.stages.max(1);
        for (d, recs) in trace.ops.iter().enumerate() {
            let Some(lane) = layouts[r].of_device[d] else { continue };
            let y = lane_y(first_lane[r] + lane);
            for g in &groups[r][d] {
                if g.first == g.last {
                    continue;
                }
                let members = &recs[g.first..=g.last];
                let merged = merged_ops(members, p, chunks);
                let _ = writeln!(
                    body,
                    "<g><title>{}{} ops on device {d}, {} to {} ({}): too narrow to draw one by one at this width</title><rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"{}\"/></g>",
                    if run.label.is_empty() { String::new() } else { format!("{}: ", xml_escape(&run.label)) },
                    members.len(),
                    format_ns(members[0].start.as_ns()),
                    format_ns(members[members.len() - 1].end.as_ns()),
                    merged.1,
                    g.x0,
                    y,
                    (g.x1 - g.x0).max(0.5),
                    lane_h,
                    hex(merged.0)
                );
            }
            let singles = groups[r][d].iter().filter(|g| g.first == g.last).map(|g| &recs[g.first]);
            for rec in singles {
                let Some((x0, x1)) = span(rec.start.as_ns() - t0, rec.end.as_ns() - t0) else { continue };
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
            let prefix = if run.label.is_empty() { String::new() } else { format!("{}: ", xml_escape(&run.label)) };
            let lane = |d: u32| layouts[r].of_device.get(d as usize).copied().flatten().map(|l| first_lane[r] + l);
            let held = |b: Option<u32>| {
                b.and_then(|l| trace.link_names.get(l as usize))
                    .map(|n| format!("; held back most on {}", xml_escape(n)))
                    .unwrap_or_default()
            };
            // What transfer `k` carries (pipeline transfers first, then the
            // collectives'), for its tooltip.
            let what = |k: usize| -> String {
                if let Some(t) = trace.transfers.get(k) {
                    return format!(
                        "{} of micro-batch {} from device {} to device {}, {} bytes: sending {} to {}, arrived {}{}",
                        t.flow.as_str(),
                        t.micro_batch,
                        t.src,
                        t.dst,
                        t.bytes,
                        format_ns(t.start.as_ns()),
                        format_ns(t.sent.as_ns()),
                        format_ns(t.end.as_ns()),
                        held(t.bottleneck)
                    );
                }
                let t = &trace.sync_transfers[k - trace.transfers.len()];
                let c = &trace.collectives[t.collective as usize];
                format!(
                    "{} {} of piece {} bucket {}, round {}: device {} to device {}, {} bytes: sending {} to {}, arrived {}{}",
                    c.algorithm.name(),
                    c.phase.as_str(),
                    c.piece,
                    c.bucket,
                    t.round,
                    t.src,
                    t.dst,
                    t.bytes,
                    format_ns(t.start.as_ns()),
                    format_ns(t.sent.as_ns()),
                    format_ns(t.end.as_ns()),
                    held(t.bottleneck)
                )
            };
            // A transfer's two marks: bytes leaving under the sender, data in
            // flight under the receiver; (transfer, side, y, x0, x1).
            let mut marks: Vec<(usize, usize, f64, f64, f64)> = Vec::new();
            let ends = trace
                .transfers
                .iter()
                .map(|t| (t.src, t.dst, t.start.as_ns(), t.sent.as_ns(), t.end.as_ns(), 0usize))
                .chain(
                    trace
                        .sync_transfers
                        .iter()
                        .map(|t| (t.src, t.dst, t.start.as_ns(), t.sent.as_ns(), t.end.as_ns(), 2)),
                );
            for (k, (src, dst, start, sent, end, sides)) in ends.enumerate() {
                let send_y = lane(src).map(|l| lane_y(l) + lane_h + 2.0 + (comm_h / 2.0 - comm_row) / 2.0);
                let recv_y =
                    lane(dst).map(|l| lane_y(l) + lane_h + 2.0 + comm_h / 2.0 + (comm_h / 2.0 - comm_row) / 2.0);
                for (side, y, until) in [(sides, send_y, sent), (sides + 1, recv_y, end)] {
                    let Some(y) = y else { continue };
                    let Some((x0, x1)) = span(start - t0, until - t0) else { continue };
                    marks.push((k, side, y, x0, x1));
                }
            }
            const SIDES: [(&str, Rgb); 4] =
                [("send", SEND), ("receive", RECEIVE), ("sync send", SYNC_SEND), ("sync receive", SYNC_RECEIVE)];
            if dense {
                // Each row's marks in time order, so that a run of narrow
                // marks of one kind that touch as drawn can become one.
                marks
                    .sort_by(|a, b| (a.2, a.1, a.3).partial_cmp(&(b.2, b.1, b.3)).unwrap_or(std::cmp::Ordering::Equal));
            }
            let mut i = 0;
            while i < marks.len() {
                let (k, side, y, x0, x1) = marks[i];
                let mut j = i + 1;
                // Where the run's marks, as drawn, end.
                let mut right = x1.max(x0 + MIN_MARK_PX);
                if dense && x1 - x0 < MERGE_PX {
                    while j < marks.len() {
                        let m = marks[j];
                        if m.2 != y || m.1 != side || m.4 - m.3 >= MERGE_PX || m.3 > right {
                            break;
                        }
                        right = right.max(m.4).max(m.3 + MIN_MARK_PX);
                        j += 1;
                    }
                }
                let (name, colour) = SIDES[side];
                let tip = if j == i + 1 {
                    format!("{prefix}{name}: {}", what(k))
                } else {
                    format!(
                        "{prefix}{} {name} marks, from {}: too narrow to draw one by one at this width",
                        j - i,
                        what(k)
                    )
                };
                let _ = writeln!(
                    body,
                    "<rect x=\"{:.2}\" y=\"{:.2}\" width=\"{:.2}\" height=\"{:.2}\" fill=\"{}\"><title>{tip}</title></rect>",
                    x0,
                    y,
                    right - x0,
                    comm_row,
                    hex(colour),
                );
                i = j;
            }
        }
        body.push_str("</g>\n");
    }
    // The critical path, outlined over the ops (and, with communication
    // lanes, the data in flight) it runs through.
    body.push_str(&format!("<g id=\"critical\" fill=\"none\" stroke=\"{CRITICAL}\" stroke-width=\"1.6\">\n"));
    for (r, run) in runs.iter().enumerate() {
        let t0 = run.trace.start().as_ns();
        let lane = |d: u32| layouts[r].of_device.get(d as usize).copied().flatten().map(|l| first_lane[r] + l);
        for e in &run.report.critical_path {
            let (y, h) = match (e.kind, e.to_device()) {
                ("send", Some(dst)) if comm => match lane(dst) {
                    Some(l) => (lane_y(l) + lane_h + 2.0 + comm_h / 2.0 + (comm_h / 2.0 - comm_row) / 2.0, comm_row),
                    None => continue,
                },
                ("send", _) | ("sync", _) => continue,
                _ => match lane(e.device) {
                    Some(l) => (lane_y(l), lane_h),
                    None => continue,
                },
            };
            let Some((x0, x1)) = span(e.start_ns() - t0, e.end_ns() - t0) else { continue };
            let _ = writeln!(
                body,
                "<rect x=\"{x0:.2}\" y=\"{y:.2}\" width=\"{:.2}\" height=\"{h:.2}\"/>",
                (x1 - x0).max(0.5)
            );
        }
    }
    body.push_str("</g>\n");
    // Legend and captions.
    let legend_y = title_h + plot_h + 6.0;
    body.push_str("<g id=\"legend\" font-family=\"sans-serif\" font-size=\"12\">\n");
    for ((name, fill), (x, row)) in legend.iter().zip(&legend_pos) {
        let y = legend_y + 20.0 * *row as f64;
        let _ = writeln!(
            body,
            "<rect x=\"{x:.1}\" y=\"{y:.1}\" width=\"16\" height=\"12\" {fill}/><text x=\"{:.1}\" y=\"{:.1}\" dominant-baseline=\"central\">{}</text>",
            x + 22.0,
            y + 6.0,
            xml_escape(name)
        );
    }
    body.push_str("</g>\n<g id=\"captions\" font-family=\"sans-serif\" font-size=\"13\">\n");
    let caption_y = legend_y + legend_h + 4.0;
    for (i, line) in captions.iter().enumerate() {
        let _ = writeln!(
            body,
            "<text x=\"{margin:.1}\" y=\"{:.1}\" dominant-baseline=\"central\">{}</text>",
            caption_y + 20.0 * i as f64 + 6.0,
            xml_escape(line)
        );
    }
    body.push_str("</g>\n");
    let Some(pos) = svg.rfind("</svg>") else {
        return Err(ReportError::Draw("the SVG backend produced no closing tag".into()));
    };
    svg.insert_str(pos, &body);
    Ok(svg)
}

/// A run of a lane's ops drawn as one bar: ops `first..=last` over pixels
/// `x0..x1` (one op when `first == last`).
#[derive(Clone, Copy, Debug, PartialEq)]
struct Group {
    x0: f64,
    x1: f64,
    first: usize,
    last: usize,
}

/// The runs to draw of ops with these pixel spans (`None`: outside the
/// window): every op on its own, or when `dense` consecutive ops narrower
/// than [`MERGE_PX`] with less than that between them as one run.
fn group_runs(spans: impl Iterator<Item = Option<(f64, f64)>>, dense: bool) -> Vec<Group> {
    let mut out: Vec<Group> = Vec::new();
    let mut open = false;
    for (i, sp) in spans.enumerate() {
        let Some((x0, x1)) = sp else {
            open = false;
            continue;
        };
        let narrow = dense && x1 - x0 < MERGE_PX;
        if narrow && open {
            if let Some(g) = out.last_mut() {
                if x0 - g.x1 < MERGE_PX {
                    g.x1 = g.x1.max(x1);
                    g.last = i;
                    continue;
                }
            }
        }
        out.push(Group { x0, x1, first: i, last: i });
        open = narrow;
    }
    out
}

/// Whether `x0..x1` lies within a run of several ops (runs in order).
fn inside_a_run(groups: &[Group], x0: f64, x1: f64) -> bool {
    let k = groups.partition_point(|g| g.x0 <= x0);
    k > 0 && {
        let g = &groups[k - 1];
        g.last > g.first && x1 <= g.x1
    }
}

/// A merged run's colour (the kind and chunk that take most of its time)
/// and what it holds, e.g. `12 forward, 12 backward`.
fn merged_ops(members: &[baton_executor::OpRecord], p: u32, chunks: u32) -> (Rgb, String) {
    let mut by: Vec<((OpKind, u32), u64, usize)> = Vec::new();
    for m in members {
        let key = (m.op.kind, m.op.stage / p);
        let ns = m.end.as_ns() - m.start.as_ns();
        match by.iter_mut().find(|(k, _, _)| *k == key) {
            Some(e) => {
                e.1 += ns;
                e.2 += 1;
            }
            None => by.push((key, ns, 1)),
        }
    }
    let top = by.iter().fold(None::<&((OpKind, u32), u64, usize)>, |best, e| match best {
        Some(b) if b.1 >= e.1 => Some(b),
        _ => Some(e),
    });
    let rgb = top.map_or(bar_rgb(OpKind::Forward, 0, chunks), |e| bar_rgb(e.0 .0, e.0 .1, chunks));
    let mut counts: Vec<(OpKind, usize)> = Vec::new();
    for ((kind, _), _, n) in &by {
        match counts.iter_mut().find(|(k, _)| k == kind) {
            Some(c) => c.1 += n,
            None => counts.push((*kind, *n)),
        }
    }
    let text: Vec<String> = counts.iter().map(|(k, n)| format!("{n} {}", k.as_str())).collect();
    (rgb, text.join(", "))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Euclidean distance between two colours.
    fn distance(a: Rgb, b: Rgb) -> f64 {
        let d = |x: u8, y: u8| (x as f64 - y as f64).powi(2);
        (d(a.0, b.0) + d(a.1, b.1) + d(a.2, b.2)).sqrt()
    }

    #[test]
    fn later_chunks_are_lighter_and_ink_contrasts() {
        let a = bar_rgb(OpKind::Forward, 0, 2);
        let b = bar_rgb(OpKind::Forward, 1, 2);
        assert!(b.0 > a.0 && b.1 > a.1 && b.2 > a.2);
        assert_eq!(ink_on(FORWARD), "#ffffff");
        assert_eq!(ink_on((250, 250, 250)), "#1a1a1a");
    }

    #[test]
    fn receives_look_like_no_chunk_shade() {
        // Every shade of every kind for up to 8 chunks stays far from the
        // receive and send colours (100 is about a clearly different hue).
        for &kind in OpKind::PLANNED {
            for chunks in 1..=8 {
                for c in 0..chunks {
                    let shade = bar_rgb(kind, c, chunks);
                    assert!(distance(shade, RECEIVE) > 100.0, "{kind:?} {c}/{chunks}: {shade:?}");
                    assert!(distance(shade, SEND) > 80.0, "{kind:?} {c}/{chunks}: {shade:?}");
                }
            }
        }
    }

    #[test]
    fn every_cause_has_its_own_look() {
        let looks: Vec<String> = CAUSES
            .iter()
            .map(|&c| {
                let s = cause_style(c);
                let marks = match s.marks {
                    Marks::Lines(a) => format!("lines {a}"),
                    Marks::Cross => "cross".into(),
                    Marks::Dots => "dots".into(),
                    Marks::Grid => "grid".into(),
                };
                format!("{} {} {marks}", s.tint, s.ink)
            })
            .collect();
        for (i, a) in looks.iter().enumerate() {
            for b in &looks[i + 1..] {
                assert_ne!(a, b);
            }
        }
    }
}
