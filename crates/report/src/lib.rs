//! # baton-report: what a simulated step means to a person
//!
//! Turns an executor [`Trace`] into a [`Report`] (step time, busy and idle time
//! and bubble fraction per device, peak activations held, every idle gap with
//! its cause), and writes it out as JSON, as a CSV trace of every operation and
//! transfer, as a readable text summary, or as an SVG Gantt chart ([`gantt`]).
//!
//! Definitions used throughout:
//! * step time = last operation end - first operation start;
//! * a device's bubble fraction = its idle time / step time;
//! * overall bubble fraction = total idle / (devices in use x step time);
//! * peak activations = the largest number of micro-batches whose activations
//!   a device holds at once, each held from its (first) forward's start to the
//!   matching backward's end.
//!
//! It deliberately knows nothing about scenario files or how the trace was
//! simulated; it only reads the trace.

pub mod gantt;
pub mod memory_chart;

use std::fmt::{self, Write as _};
use std::io;

use baton_engine::{format_ns, SimTime};
use baton_executor::{DataKind, Trace};
use baton_schedule::{Op, OpKind};
use serde::Serialize;
use thiserror::Error;

/// Writing a report failed.
#[derive(Debug, Error)]
pub enum ReportError {
    #[error("cannot write: {0}")]
    Io(#[from] io::Error),
    #[error("cannot write CSV: {0}")]
    Csv(#[from] csv::Error),
    #[error("cannot write JSON: {0}")]
    Json(#[from] serde_json::Error),
    #[error("cannot draw the chart: {0}")]
    Draw(String),
    #[error("{ops} operations are too many to chart (at most {limit}); chart fewer micro-batches or stages")]
    TooLarge { ops: usize, limit: usize },
}

/// Why a device sat idle.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Cause {
    /// Before the device's first operation: the pipeline filling up.
    Fill,
    /// After the device's last operation: the pipeline draining.
    Drain,
    /// Waiting for another device to finish a forward pass.
    Activation,
    /// Waiting for another device to finish a backward pass.
    Gradient,
    /// The data was computed but still in transit.
    Link,
    /// The device's own blocking send had not yet arrived.
    Send,
}

impl Cause {
    pub fn as_str(self) -> &'static str {
        match self {
            Cause::Fill => "fill",
            Cause::Drain => "drain",
            Cause::Activation => "activation",
            Cause::Gradient => "gradient",
            Cause::Link => "link",
            Cause::Send => "send",
        }
    }
}

/// The facts behind a gap, turned into a sentence only when shown.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct GapDetail {
    pub cause: Cause,
    /// The op the device was about to run (fill, activation, gradient, link)
    /// or had just run (drain).
    pub op: Op,
    /// The op that produced the awaited data, and its device.
    pub producer: Option<(Op, u32)>,
    /// Sender and receiver of the transfer that carried it.
    pub route: Option<(u32, u32)>,
    /// The link that held that transfer back the longest (link gaps), or the
    /// receiver of the device's own blocking send (send gaps).
    pub link: Option<String>,
}

impl fmt::Display for GapDetail {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let what = match self.producer.map(|(p, _)| p.kind) {
            Some(OpKind::Backward) => "gradient",
            _ => "activation",
        };
        let mb = self.op.micro_batch;
        match (self.cause, self.producer) {
            (Cause::Fill, _) => write!(f, "pipeline fill before {}", self.op),
            (Cause::Drain, _) => write!(f, "pipeline drain after {}", self.op),
            (Cause::Send, _) => write!(
                f,
                "blocked sending the output of {} to device {}",
                self.op,
                self.route.map_or(0, |(_, dst)| dst)
            ),
            (Cause::Link, Some((_, from))) => match (&self.link, self.route) {
                (Some(link), Some((src, dst))) => write!(
                    f,
                    "the {what} of micro-batch {mb} was in transit from device {src} to device {dst}, held back most on link {link}"
                ),
                (None, Some((src, dst))) => {
                    write!(f, "the {what} of micro-batch {mb} was in transit from device {src} to device {dst}")
                }
                _ => write!(f, "the {what} of micro-batch {mb} from device {from} was in transit"),
            },
            (_, Some((p, from))) => write!(f, "waiting for the {what} of micro-batch {mb} from device {from} ({p})"),
            (_, None) => write!(f, "waiting to start {}", self.op),
        }
    }
}

impl Serialize for GapDetail {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

/// One idle interval of one device, with its cause.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Gap {
    pub device: u32,
    pub start_ms: f64,
    pub end_ms: f64,
    pub duration_ms: f64,
    pub cause: Cause,
    /// What the device waited for; serialized as a sentence.
    pub detail: GapDetail,
    /// The device that produced the awaited data (activation, gradient, link).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub from_device: Option<u32>,
    /// The awaited micro-batch (activation, gradient, link).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub micro_batch: Option<u32>,
    /// The virtual stage the device was about to run (activation, gradient, link).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub stage: Option<u32>,
    #[serde(skip)]
    pub start_ns: u64,
    #[serde(skip)]
    pub end_ns: u64,
}

/// One device's totals.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct DeviceReport {
    /// Pipeline device: the one that runs stage `device` (and its chunks).
    pub device: u32,
    /// The cluster device it is placed on.
    pub cluster_device: u32,
    pub busy_ms: f64,
    pub idle_ms: f64,
    pub bubble_fraction: f64,
    pub peak_activations: u32,
    pub ops: usize,
    /// Model state + reserved + the largest activation stash held at once.
    pub peak_memory_bytes: u64,
    /// The device's capacity; `null` when unlimited.
    pub memory_capacity_bytes: Option<u64>,
    /// Whether the peak fits the capacity.
    pub fits: bool,
    /// Parameters' state (weights, gradients, optimizer) on this device.
    pub state_bytes: u64,
    /// The largest activation stash held at once.
    pub peak_activation_bytes: u64,
    #[serde(skip)]
    pub busy_ns: u64,
    #[serde(skip)]
    pub idle_ns: u64,
}

/// One directed link that carried data.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct LinkReport {
    pub name: String,
    /// Its bandwidth in bytes per second (`null` when unlimited).
    pub bytes_per_s: Option<u64>,
    pub bytes: u64,
    /// Time during which at least one transfer was pushing bytes over it.
    pub busy_ms: f64,
    /// Busy time / step time.
    pub utilization: f64,
    /// Most transfers sharing it at once.
    pub peak_concurrent: u32,
}

/// Everything a run reports.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Report {
    pub title: String,
    pub schedule: String,
    pub stages: u32,
    pub micro_batches: u32,
    pub chunks: u32,
    pub seed: u64,
    pub jitter: f64,
    pub step_time_ms: f64,
    pub step_time_ns: u64,
    pub bubble_fraction: f64,
    /// Samples per second: micro-batches x micro-batch size / step time.
    pub samples_per_s: f64,
    pub micro_batch_size: u32,
    pub recompute: String,
    /// Whether every device's peak memory fits its capacity.
    pub fits: bool,
    pub ops: usize,
    pub transfers: usize,
    pub devices: Vec<DeviceReport>,
    /// Every directed link that carried data, in topology order.
    pub links: Vec<LinkReport>,
    /// Every idle interval, by device then start time.
    pub gaps: Vec<Gap>,
}

fn ms(ns: u64) -> f64 {
    ns as f64 / 1e6
}

/// Labels shown with a report that come from outside the trace.
#[derive(Clone, Debug, Default)]
pub struct Labels {
    pub title: String,
    pub seed: u64,
    /// The compute-time jitter the step was simulated with (0: none).
    pub jitter: f64,
    /// Samples per micro-batch (for `samples_per_s`).
    pub micro_batch_size: u32,
    /// `none` or `full`, shown in reports.
    pub recompute: String,
    pub memory: MemoryInputs,
    /// The cluster device each pipeline device is placed on (empty: the same number).
    pub placement: Vec<u32>,
}

/// What the memory model needs beyond the trace.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct MemoryInputs {
    /// Bytes each micro-batch holds on each virtual stage, from its forward's
    /// start to its backward's end. Empty: no activation memory.
    pub stash_bytes: Vec<u64>,
    /// Model-state bytes per device.
    pub state_bytes: Vec<u64>,
    /// Bytes every device keeps aside.
    pub reserved_bytes: u64,
    /// Capacity of each device; `None` means unlimited.
    pub capacity_bytes: Option<u64>,
}

/// Activation bytes held on device `d` over time: `(time, bytes held from
/// then on)` at every change, in time order (several changes at one time are
/// all listed; the last is what holds after it).
pub fn activation_timeline(trace: &Trace, stash_bytes: &[u64], d: usize) -> Vec<(SimTime, u64)> {
    // Forward starts and backward ends each come in time order (one op at a
    // time per device): merge them, releases first at equal times.
    let stash = |stage: u32| stash_bytes.get(stage as usize).copied().unwrap_or(0);
    let recs = &trace.ops[d];
    let mut acquire =
        recs.iter().filter(|r| r.op.kind == OpKind::Forward).map(|r| (r.start, stash(r.op.stage))).peekable();
    let mut release =
        recs.iter().filter(|r| r.op.kind == OpKind::Backward).map(|r| (r.end, stash(r.op.stage))).peekable();
    let mut held = 0u64;
    let mut out = Vec::with_capacity(recs.len() + 1);
    out.push((trace.start(), 0));
    loop {
        let take_release = match (acquire.peek(), release.peek()) {
            (None, None) => break,
            (Some(_), None) => false,
            (None, Some(_)) => true,
            (Some(a), Some(r)) => r.0 <= a.0,
        };
        if take_release {
            let Some((t, b)) = release.next() else { break };
            held = held.saturating_sub(b);
            out.push((t, held));
        } else {
            let Some((t, b)) = acquire.next() else { break };
            held += b;
            out.push((t, held));
        }
    }
    out
}

/// Builds the report of `trace`.
pub fn build(trace: &Trace, labels: &Labels) -> Report {
    let shape = trace.plan.shape;
    let t0 = trace.start();
    let t1 = trace.end();
    let step_ns = t1.saturating_since(t0).as_ns();
    let mut devices = Vec::with_capacity(trace.ops.len());
    let mut gaps = Vec::new();
    for (d, recs) in trace.ops.iter().enumerate() {
        let device = d as u32;
        let busy_ns: u64 = recs.iter().map(|r| r.end.saturating_since(r.start).as_ns()).sum();
        let idle_ns = step_ns - busy_ns.min(step_ns);
        let mem = &labels.memory;
        let peak_activation_bytes = if mem.stash_bytes.is_empty() {
            0
        } else {
            activation_timeline(trace, &mem.stash_bytes, d).iter().map(|&(_, b)| b).max().unwrap_or(0)
        };
        let state_bytes = mem.state_bytes.get(d).copied().unwrap_or(0);
        let peak_memory_bytes = state_bytes.saturating_add(mem.reserved_bytes).saturating_add(peak_activation_bytes);
        devices.push(DeviceReport {
            device,
            cluster_device: labels.placement.get(d).copied().unwrap_or(device),
            busy_ms: ms(busy_ns),
            idle_ms: ms(idle_ns),
            bubble_fraction: if step_ns == 0 { 0.0 } else { idle_ns as f64 / step_ns as f64 },
            peak_activations: peak_held(trace, d),
            ops: recs.len(),
            peak_memory_bytes,
            memory_capacity_bytes: mem.capacity_bytes,
            fits: mem.capacity_bytes.is_none_or(|c| peak_memory_bytes <= c),
            state_bytes,
            peak_activation_bytes,
            busy_ns,
            idle_ns,
        });
        device_gaps(trace, d, t0, t1, &mut gaps);
    }
    let total_idle: u64 = devices.iter().map(|d| d.idle_ns).sum();
    let denom = step_ns as f64 * devices.len() as f64;
    Report {
        title: labels.title.clone(),
        schedule: trace.plan.kind.name().to_string(),
        stages: shape.stages,
        micro_batches: shape.micro_batches,
        chunks: shape.chunks,
        seed: labels.seed,
        jitter: labels.jitter,
        step_time_ms: ms(step_ns),
        step_time_ns: step_ns,
        bubble_fraction: if denom == 0.0 { 0.0 } else { total_idle as f64 / denom },
        samples_per_s: if step_ns == 0 {
            0.0
        } else {
            shape.micro_batches as f64 * labels.micro_batch_size.max(1) as f64 / (step_ns as f64 / 1e9)
        },
        micro_batch_size: labels.micro_batch_size.max(1),
        recompute: if labels.recompute.is_empty() { "none".into() } else { labels.recompute.clone() },
        fits: devices.iter().all(|d| d.fits),
        ops: trace.ops.iter().map(Vec::len).sum(),
        transfers: trace.transfers.len(),
        devices,
        links: trace
            .link_stats
            .iter()
            .zip(&trace.link_names)
            .zip(&trace.link_bytes_per_s)
            .filter(|((st, _), _)| st.bytes > 0 || st.peak_concurrent > 0)
            .map(|((st, name), &bw)| LinkReport {
                name: name.clone(),
                bytes_per_s: (bw != baton_link::LinkSpec::UNLIMITED).then_some(bw),
                bytes: st.bytes,
                busy_ms: ms(st.busy_ns),
                utilization: if step_ns == 0 { 0.0 } else { st.busy_ns as f64 / step_ns as f64 },
                peak_concurrent: st.peak_concurrent,
            })
            .collect(),
        gaps,
    }
}

/// The link busy the largest share of the step (ties: the slower link, then
/// the first).
pub fn busiest_link(report: &Report) -> Option<&LinkReport> {
    let speed = |l: &LinkReport| l.bytes_per_s.unwrap_or(u64::MAX);
    report.links.iter().fold(None, |best: Option<&LinkReport>, l| match best {
        Some(b) if b.utilization > l.utilization || (b.utilization == l.utilization && speed(b) <= speed(l)) => Some(b),
        _ => Some(l),
    })
}

/// Largest number of micro-batches whose activations device `d` holds at once.
fn peak_held(trace: &Trace, d: usize) -> u32 {
    // A micro-batch is held from its forward's start to its backward's end. With
    // several chunks on the device, its first chunk's forward comes before the
    // later chunks' (the data flows through them in order) and that chunk's
    // backward after theirs, so the first chunk's interval covers the others.
    // A device runs one op at a time, so those forward starts and backward ends
    // each come in time order: merge the two lists. At equal times the release
    // goes first, since memory freed at t can be reused at t.
    let first_chunk = |r: &&baton_executor::OpRecord| r.op.stage < trace.plan.shape.stages;
    let recs = &trace.ops[d];
    let mut acquire =
        recs.iter().filter(first_chunk).filter(|r| r.op.kind == OpKind::Forward).map(|r| r.start).peekable();
    let mut release =
        recs.iter().filter(first_chunk).filter(|r| r.op.kind == OpKind::Backward).map(|r| r.end).peekable();
    let (mut held, mut peak) = (0u32, 0u32);
    while let Some(&t) = acquire.peek() {
        if release.peek().is_some_and(|&r| r <= t) {
            release.next();
            held = held.saturating_sub(1);
        } else {
            acquire.next();
            held += 1;
            peak = peak.max(held);
        }
    }
    peak
}

fn push_gap(gaps: &mut Vec<Gap>, device: u32, start: SimTime, end: SimTime, detail: GapDetail) {
    if end <= start {
        return;
    }
    let who = detail.producer.map(|(_, from)| (from, detail.op.micro_batch, detail.op.stage));
    let cause = detail.cause;
    gaps.push(Gap {
        device,
        start_ms: ms(start.as_ns()),
        end_ms: ms(end.as_ns()),
        duration_ms: ms(end.as_ns() - start.as_ns()),
        cause,
        detail,
        from_device: who.map(|w| w.0),
        micro_batch: who.map(|w| w.1),
        stage: who.map(|w| w.2),
        start_ns: start.as_ns(),
        end_ns: end.as_ns(),
    });
}

fn device_gaps(trace: &Trace, d: usize, t0: SimTime, t1: SimTime, gaps: &mut Vec<Gap>) {
    let device = d as u32;
    let recs = &trace.ops[d];
    let (Some(first), Some(last)) = (recs.first(), recs.last()) else {
        return;
    };
    let plain = |cause, op| GapDetail { cause, op, producer: None, route: None, link: None };
    push_gap(gaps, device, t0, first.start, plain(Cause::Fill, first.op));
    for w in recs.windows(2) {
        let (a, b) = (&w[0], &w[1]);
        if b.start <= a.end {
            continue;
        }
        let mut from = a.end;
        // A blocking send keeps the device until its data has arrived.
        if trace.blocking_sends {
            if let Some(t) = trace.outgoing(a.op).filter(|t| t.end > a.end) {
                let until = t.end.min(b.start);
                let detail = GapDetail { route: Some((t.src, t.dst)), ..plain(Cause::Send, a.op) };
                push_gap(gaps, device, from, until, detail);
                from = until;
            }
        }
        // Only an op that needs data from another stage can find its device
        // free but itself not ready, so a dependency always exists here.
        let Some(dep) = trace.dependency(b.op) else { continue };
        let cause = match dep.kind {
            DataKind::Activation => Cause::Activation,
            DataKind::Gradient => Cause::Gradient,
        };
        let transfer = dep.transfer.map(|t| &trace.transfers[t]);
        let route = transfer.map(|t| (t.src, t.dst));
        let link = transfer.and_then(|t| t.bottleneck).and_then(|l| trace.link_names.get(l as usize).cloned());
        let producer = Some((dep.producer, dep.producer_device));
        let waiting_until = dep.produced_at.min(b.start);
        push_gap(gaps, device, from, waiting_until, GapDetail { cause, op: b.op, producer, route, link: None });
        let link_from = dep.produced_at.max(from);
        push_gap(gaps, device, link_from, b.start, GapDetail { cause: Cause::Link, op: b.op, producer, route, link });
    }
    push_gap(gaps, device, last.end, t1, plain(Cause::Drain, last.op));
}

/// The `n` longest gaps, longest first (ties: by device, then start).
pub fn longest_gaps(report: &Report, n: usize) -> Vec<&Gap> {
    let key = |g: &Gap| (std::cmp::Reverse(g.end_ns - g.start_ns), g.device, g.start_ns);
    let mut v: Vec<&Gap> = report.gaps.iter().collect();
    if n < v.len() {
        if n == 0 {
            return Vec::new();
        }
        v.select_nth_unstable_by_key(n - 1, |g| key(g));
        v.truncate(n);
    }
    v.sort_unstable_by_key(|g| key(g));
    v
}

/// The report as pretty JSON.
pub fn to_json(report: &Report) -> Result<String, ReportError> {
    let mut s = serde_json::to_string_pretty(report)?;
    s.push('\n');
    Ok(s)
}

/// Writes the CSV trace: header `device,kind,micro_batch,stage,start_ns,end_ns`,
/// one row per operation and per transfer (`kind` is `forward`, `backward` or
/// `send`; for a send `device` is the sender, `stage` the sending virtual stage
/// and `end_ns` the arrival). Rows are ordered by start, then end, device, kind.
pub fn write_trace_csv<W: io::Write>(trace: &Trace, out: W) -> Result<(), ReportError> {
    let mut rows: Vec<(u64, u64, u32, u8, u32, u32)> =
        Vec::with_capacity(trace.ops.iter().map(Vec::len).sum::<usize>() + trace.transfers.len());
    for (d, recs) in trace.ops.iter().enumerate() {
        for r in recs {
            let k = match r.op.kind {
                OpKind::Forward => 0,
                OpKind::Backward => 1,
            };
            rows.push((r.start.as_ns(), r.end.as_ns(), d as u32, k, r.op.micro_batch, r.op.stage));
        }
    }
    for t in &trace.transfers {
        rows.push((t.start.as_ns(), t.end.as_ns(), t.src, 2, t.micro_batch, t.from_stage));
    }
    rows.sort_unstable();
    let mut w = csv::Writer::from_writer(out);
    w.write_record(["device", "kind", "micro_batch", "stage", "start_ns", "end_ns"])?;
    for (start, end, device, kind, mb, stage) in rows {
        let kind = ["forward", "backward", "send"][kind as usize];
        w.serialize((device, kind, mb, stage, start, end))?;
    }
    w.flush()?;
    Ok(())
}

/// Bytes with a binary unit: `512 B`, `1.50 KiB`, `80.00 GiB`.
pub fn format_bytes(b: u64) -> String {
    const UNITS: [&str; 5] = ["KiB", "MiB", "GiB", "TiB", "PiB"];
    if b < 1024 {
        return format!("{b} B");
    }
    let mut v = b as f64 / 1024.0;
    let mut i = 0;
    while v >= 1024.0 && i + 1 < UNITS.len() {
        v /= 1024.0;
        i += 1;
    }
    format!("{v:.2} {}", UNITS[i])
}

/// The readable summary printed by `baton run`.
pub fn summary(report: &Report) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{}", report.title);
    let _ = writeln!(
        s,
        "schedule {}, {} stages, {} micro-batches{}, seed {}{}",
        report.schedule,
        report.stages,
        report.micro_batches,
        if report.chunks > 1 { format!(", {} chunks per device", report.chunks) } else { String::new() },
        report.seed,
        if report.jitter > 0.0 { format!(", compute jitter +-{}%", report.jitter * 100.0) } else { String::new() }
    );
    let _ = writeln!(s);
    let _ = writeln!(s, "step time        {}", format_ns(report.step_time_ns));
    let _ = writeln!(s, "bubble fraction  {:.2}% (idle / (devices x step time))", report.bubble_fraction * 100.0);
    let _ = writeln!(
        s,
        "throughput       {:.2} samples/s ({} micro-batches x {} samples / step time)",
        report.samples_per_s, report.micro_batches, report.micro_batch_size
    );
    let _ = writeln!(s, "simulated        {} ops, {} transfers", report.ops, report.transfers);
    let _ = writeln!(s);
    let placed = report.devices.iter().any(|d| d.cluster_device != d.device);
    let _ = writeln!(
        s,
        "{:>6}  {:>12}  {:>12}  {:>8}  {:>16}  {:>25}{}",
        "device",
        "busy",
        "idle",
        "bubble",
        "peak activations",
        "peak mem / capacity",
        if placed { "  placed on" } else { "" }
    );
    for d in &report.devices {
        let capacity = d.memory_capacity_bytes.map_or_else(|| "unlimited".to_string(), format_bytes);
        let _ = writeln!(
            s,
            "{:>6}  {:>12}  {:>12}  {:>7.2}%  {:>16}  {:>25}{}",
            d.device,
            format_ns(d.busy_ns),
            format_ns(d.idle_ns),
            d.bubble_fraction * 100.0,
            d.peak_activations,
            format!("{} / {}", format_bytes(d.peak_memory_bytes), capacity),
            if placed { format!("  cluster device {}", d.cluster_device) } else { String::new() }
        );
        if !d.fits {
            s.pop();
            let _ = writeln!(s, "  OVER CAPACITY");
        }
    }
    if let Some(l) = busiest_link(report) {
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "most utilised link: {} ({:.1}% of the step busy, {} carried, up to {} transfer{} at once)",
            l.name,
            l.utilization * 100.0,
            format_bytes(l.bytes),
            l.peak_concurrent,
            if l.peak_concurrent == 1 { "" } else { "s" }
        );
    }
    let over: Vec<String> = report.devices.iter().filter(|d| !d.fits).map(|d| d.device.to_string()).collect();
    if !over.is_empty() {
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "memory: device(s) {} exceed their capacity (baton run --strict fails on this)",
            over.join(", ")
        );
    }
    let top = longest_gaps(report, 5);
    if !top.is_empty() {
        let _ = writeln!(s);
        let _ = writeln!(s, "longest idle gaps");
        for g in top {
            let _ = writeln!(
                s,
                "  device {:<3} {:>12} .. {:<12} {:>12}  {:<10} {}",
                g.device,
                format_ns(g.start_ns),
                format_ns(g.end_ns),
                format_ns(g.end_ns - g.start_ns),
                g.cause.as_str(),
                g.detail
            );
        }
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use baton_engine::SimDuration;
    use baton_executor::{simulate, StageCost};
    use baton_link::{LinkSpec, Topology};
    use baton_schedule::{build as plan, ScheduleKind, Shape};

    fn run(kind: ScheduleKind, p: u32, m: u32, f: u64, b: u64, link: LinkSpec, bytes: u64) -> (Trace, Report) {
        let pl = plan(kind, Shape::new(p, m, 1)).unwrap();
        let costs =
            vec![StageCost { forward: SimDuration(f), backward: SimDuration(b), send_bytes: bytes }; p as usize];
        let tr = simulate(pl, &costs, Topology::full_mesh(p, link), &(0..p).collect::<Vec<_>>()).unwrap();
        let rep = build(&tr, &Labels { title: "t".into(), seed: 7, ..Labels::default() });
        (tr, rep)
    }

    const FREE: LinkSpec = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };

    #[test]
    fn gaps_cover_idle_time_exactly() {
        let (_, rep) =
            run(ScheduleKind::OneFOneB, 4, 6, 10, 20, LinkSpec { latency_ns: 7, bytes_per_s: 1_000_000_000 }, 50);
        for d in &rep.devices {
            let gap_ns: u64 = rep.gaps.iter().filter(|g| g.device == d.device).map(|g| g.end_ns - g.start_ns).sum();
            assert_eq!(gap_ns, d.idle_ns, "device {}", d.device);
            assert_eq!(d.busy_ns + d.idle_ns, rep.step_time_ns);
        }
        assert!(rep.gaps.iter().any(|g| g.cause == Cause::Link));
    }

    #[test]
    fn two_stage_gaps_by_hand() {
        // p=2, m=2 fill-drain, F=10, B=20, free links. Device 1: fill 0-10,
        // busy 10-70, no drain. Device 0: F0 0-10, F1 10-20, waits 20-50 for the
        // gradient of micro-batch 0 from device 1 (B0@1 ends at 50), B0 50-70, B1 70-90.
        let (_, rep) = run(ScheduleKind::FillDrain, 2, 2, 10, 20, FREE, 0);
        assert_eq!(rep.step_time_ns, 90);
        let g0: Vec<_> = rep.gaps.iter().filter(|g| g.device == 0).collect();
        assert_eq!(g0.len(), 1);
        assert_eq!((g0[0].start_ns, g0[0].end_ns, g0[0].cause), (20, 50, Cause::Gradient));
        assert_eq!((g0[0].from_device, g0[0].micro_batch), (Some(1), Some(0)));
        let g1: Vec<_> = rep.gaps.iter().filter(|g| g.device == 1).map(|g| (g.start_ns, g.end_ns, g.cause)).collect();
        assert_eq!(g1, vec![(0, 10, Cause::Fill), (70, 90, Cause::Drain)]);
        // Overall bubble = (30 + 30) / (2 x 90).
        assert!((rep.bubble_fraction - 60.0 / 180.0).abs() < 1e-12);
        assert_eq!(rep.devices[0].peak_activations, 2);
    }

    #[test]
    fn transit_time_is_attributed_to_the_link() {
        // p=2, m=1, 1000 B at 1 GB/s + 500 ns latency: the gradient leaves device 1
        // at 1900 and arrives at 3400; device 0 idles 100-3400: 100-1900 waiting for
        // device 1, 1900-3400 link.
        let (_, rep) =
            run(ScheduleKind::OneFOneB, 2, 1, 100, 200, LinkSpec { latency_ns: 500, bytes_per_s: 1_000_000_000 }, 1000);
        let g0: Vec<_> = rep.gaps.iter().filter(|g| g.device == 0).map(|g| (g.start_ns, g.end_ns, g.cause)).collect();
        assert_eq!(g0, vec![(100, 1900, Cause::Gradient), (1900, 3400, Cause::Link)]);
        let top = longest_gaps(&rep, 1);
        assert_eq!((top[0].device, top[0].cause), (0, Cause::Gradient), "1800 ns, longer than device 1's 1600 ns fill");
        let text = summary(&rep);
        assert!(text.contains("step time") && text.contains("longest idle gaps") && text.contains("seed 7"), "{text}");
    }

    #[test]
    fn trace_csv_has_a_row_per_op_and_transfer() {
        let (tr, _) = run(ScheduleKind::OneFOneB, 2, 2, 10, 20, FREE, 8);
        let mut out = Vec::new();
        write_trace_csv(&tr, &mut out).unwrap();
        let text = String::from_utf8(out).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], "device,kind,micro_batch,stage,start_ns,end_ns");
        assert_eq!(lines.len(), 1 + 8 + 4);
        assert_eq!(lines[1], "0,forward,0,0,0,10");
        assert!(lines.iter().any(|l| l.starts_with("0,send,0,0,10,")));
        let json = to_json(&build(&tr, &Labels::default())).unwrap();
        let v: serde_json::Value = serde_json::from_str(&json).unwrap();
        assert!(v["devices"][1]["peak_activations"].is_u64());
        assert!(v["gaps"][0]["cause"].is_string());
    }
}
