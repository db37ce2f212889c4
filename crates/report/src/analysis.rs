//! What a step means to a person: step time, busy and idle time, bubbles,
//! peaks of activations and memory, and every idle gap with its cause, read
//! off an executor trace. The output formats (text, JSON, CSV, SVG) are made
//! from this analysis elsewhere in the crate.

use std::fmt;

use baton_engine::SimTime;
use baton_executor::Trace;
use baton_schedule::{Flow, Op, Stash};
use serde::Serialize;

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
    /// Waiting for a gradient collective (or its update) to end.
    Sync,
}

impl Cause {
    /// The name used in reports.
    pub fn as_str(self) -> &'static str {
        match self {
            Cause::Fill => "fill",
            Cause::Drain => "drain",
            Cause::Activation => "activation",
            Cause::Gradient => "gradient",
            Cause::Link => "link",
            Cause::Send => "send",
            Cause::Sync => "sync",
        }
    }
}

/// The facts behind a gap, turned into a sentence only when shown.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct GapDetail {
    /// Why the device waited.
    pub cause: Cause,
    /// What the awaited data was (activation, gradient, link waits).
    pub flow: Option<Flow>,
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
    /// The collective waited for (sync gaps).
    pub collective: Option<SyncWait>,
}

/// The collective a sync gap waited for.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SyncWait {
    /// Its members (devices).
    pub group: Vec<u32>,
    /// The piece whose gradient it carried.
    pub piece: u32,
    /// The bucket within the piece.
    pub bucket: u32,
    /// What it did (`all-reduce`, `reduce-scatter`, ...).
    pub phase: &'static str,
    /// Its algorithm's name.
    pub algorithm: &'static str,
}

impl SyncWait {
    fn of(trace: &Trace, c: u32) -> Option<SyncWait> {
        let c = trace.collectives.get(c as usize)?;
        let t = c.ranks.max(1);
        Some(SyncWait {
            group: c.group.iter().map(|&w| w * t).collect(),
            piece: c.piece,
            bucket: c.bucket,
            phase: c.phase.as_str(),
            algorithm: c.algorithm.name(),
        })
    }
}

impl fmt::Display for GapDetail {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let what = self.flow.map_or("activation", Flow::as_str);
        let mb = self.op.micro_batch;
        match (self.cause, self.producer) {
            (Cause::Fill, _) => write!(f, "pipeline fill before {}", self.op),
            (Cause::Drain, _) => write!(f, "pipeline drain after {}", self.op),
            (Cause::Sync, _) => match &self.collective {
                Some(c) => {
                    let group: Vec<String> = c.group.iter().map(u32::to_string).collect();
                    write!(
                        f,
                        "waiting for the {} {} of piece {} bucket {} among devices {}",
                        c.algorithm,
                        c.phase,
                        c.piece,
                        c.bucket,
                        group.join(",")
                    )
                }
                None => write!(f, "waiting for gradient synchronisation"),
            },
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
    /// The device.
    pub device: u32,
    /// Start, in milliseconds from the step's start.
    pub start_ms: f64,
    /// End, in milliseconds from the step's start.
    pub end_ms: f64,
    /// Length in milliseconds.
    pub duration_ms: f64,
    /// Why the device waited.
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
    /// Start in nanoseconds.
    pub start_ns: u64,
    #[serde(skip)]
    /// End in nanoseconds.
    pub end_ns: u64,
}

/// One device's totals.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct DeviceReport {
    /// The device: replica `replica`'s pipeline device `stage` (numbered
    /// `replica x stages + stage`).
    pub device: u32,
    /// The replica it belongs to.
    pub replica: u32,
    /// Its pipeline device within the replica (it runs stage `stage` and its
    /// chunks).
    pub stage: u32,
    /// Its rank in the stage's tensor group (0 without tensor parallelism).
    pub rank: u32,
    /// Time in the tensor group's all-reduces, in milliseconds (part of the
    /// busy time: inside its ops).
    pub tensor_comm_ms: f64,
    /// The cluster device it is placed on.
    pub cluster_device: u32,
    /// Time spent computing, in milliseconds.
    pub busy_ms: f64,
    /// The part of `busy_ms` in weight-gradient passes (W), run apart by
    /// the zero-bubble schedules.
    pub weight_ms: f64,
    /// Time not computing within the step, in milliseconds.
    pub idle_ms: f64,
    /// Idle time / step time.
    pub bubble_fraction: f64,
    /// Most micro-batches whose activations it held at once.
    pub peak_activations: u32,
    /// Operations run.
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
    /// Synchronisation not hidden behind compute: from its last compute op's
    /// end to its step end, in milliseconds.
    pub sync_exposed_ms: f64,
    #[serde(skip)]
    /// The same in nanoseconds.
    pub sync_exposed_ns: u64,
    #[serde(skip)]
    /// Time spent computing, in nanoseconds.
    pub busy_ns: u64,
    #[serde(skip)]
    /// Idle time in nanoseconds.
    pub idle_ns: u64,
}

/// One directed link that carried data.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct LinkReport {
    /// Its name, e.g. `dev0->dev1` or `node0-card0 up`.
    pub name: String,
    /// Its bandwidth in bytes per second (`null` when unlimited).
    pub bytes_per_s: Option<u64>,
    /// Bytes that crossed it.
    pub bytes: u64,
    /// Time during which at least one transfer was pushing bytes over it.
    pub busy_ms: f64,
    /// Busy time / step time.
    pub utilization: f64,
    /// Most transfers sharing it at once.
    pub peak_concurrent: u32,
}

/// The layout of a data-parallel step.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ParallelReport {
    /// Replicas.
    pub data: u32,
    /// Pipeline stages per replica.
    pub pipeline: u32,
    /// Devices per tensor group (each stage's).
    pub tensor: u32,
    /// Whether the tensor groups use sequence parallelism.
    pub sequence: bool,
    /// Devices the replicas use (dedicated servers not counted).
    pub devices_used: u32,
}

/// One gradient collective.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct CollectiveReport {
    /// Its members (devices), in ring order.
    pub group: Vec<u32>,
    /// The piece (virtual stage) whose gradient it carried.
    pub piece: u32,
    /// The bucket within the piece.
    pub bucket: u32,
    /// What it did: `all-reduce`, `reduce-scatter`, `all-gather` or `tied
    /// all-reduce`.
    pub phase: &'static str,
    /// The algorithm.
    pub algorithm: &'static str,
    /// Dense bytes per member.
    pub bytes: u64,
    /// Bytes each member sent after compression, aligned with `group`.
    pub wire_bytes_sent: Vec<u64>,
    /// Bytes each dedicated server sent (empty without them).
    pub server_bytes_sent: Vec<u64>,
    /// When it started, in milliseconds.
    pub start_ms: f64,
    /// When it ended, in milliseconds.
    pub end_ms: f64,
}

/// Everything a run reports.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Report {
    /// The scenario's title.
    pub title: String,
    /// The schedule's name.
    pub schedule: String,
    /// Pipeline stages (devices).
    pub stages: u32,
    /// Micro-batches per step.
    pub micro_batches: u32,
    /// Model chunks per device.
    pub chunks: u32,
    /// Seed of the random generator.
    pub seed: u64,
    /// Compute-time jitter (0: none).
    pub jitter: f64,
    /// Compute variation besides jitter, in words (empty: none; then left
    /// out of the JSON).
    #[serde(skip_serializing_if = "String::is_empty")]
    pub variability: String,
    /// Step time in milliseconds.
    pub step_time_ms: f64,
    /// Step time in nanoseconds.
    pub step_time_ns: u64,
    /// Idle time / step time.
    pub bubble_fraction: f64,
    /// Samples per second over all replicas: global batch / step time.
    pub samples_per_s: f64,
    /// Samples per micro-batch.
    pub micro_batch_size: u32,
    /// Samples per step over all replicas: replicas x micro-batches x
    /// micro-batch size.
    pub global_batch: u64,
    /// Replicas, stages and devices.
    pub parallel: ParallelReport,
    /// The worst device's synchronisation not hidden behind compute, in
    /// milliseconds.
    pub sync_exposed_ms: f64,
    /// Model FLOPs utilisation: model FLOPs per second over devices x peak
    /// (Chowdhery et al., "PaLM", 2022, appendix B); `null` when the model's
    /// FLOPs or the device's peak are not known.
    pub mfu: Option<f64>,
    /// Recomputation: `none` or `full`.
    pub recompute: String,
    /// Whether every device's peak memory fits its capacity.
    pub fits: bool,
    /// Operations run.
    pub ops: usize,
    /// Transfers between devices.
    pub transfers: usize,
    /// Point-to-point transfers of the gradient collectives.
    pub sync_transfers: usize,
    /// Point-to-point transfers of the tensor groups' all-reduces.
    pub tensor_transfers: usize,
    /// One entry per pipeline device.
    pub devices: Vec<DeviceReport>,
    /// Every directed link that carried data, in topology order.
    pub links: Vec<LinkReport>,
    /// Every idle interval, by device then start time.
    pub gaps: Vec<Gap>,
    /// Every gradient collective, in the order they started.
    pub collectives: Vec<CollectiveReport>,
    /// The chain of ops, transfers and waits that sets the step time, first
    /// link first ([`crate::critical`]); [`build`] leaves it empty (it costs
    /// about as much as the simulation): fill it with
    /// `critical::Graph::of(trace).critical_path()` when an output needs it.
    pub critical_path: Vec<crate::critical::PathEntry>,
    /// With `--what-if`: how much the step shortens when each stage, layer
    /// or link takes less time, ranked by gain (empty otherwise, and then
    /// left out of the JSON).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub what_if: Vec<WhatIf>,
    /// With `--trials N`: the step time over N draws of the variability
    /// (left out of the JSON otherwise).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub trials: Option<Trials>,
    /// `zb-auto` only: the order it chose among those it tried, and how far
    /// the step is above the busiest device's total work (a lower bound).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub schedule_choice: Option<ScheduleChoice>,
    /// Several steps back to back, or steps without a flush (left out of
    /// the JSON for one flushed step). Then `step_time_ms` and every
    /// device's busy and idle time cover the whole run, `micro_batches` and
    /// `global_batch` are per step, and this section has each step's time.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub steps: Option<Steps>,
}

/// Consecutive steps (`pipeline.steps`, `pipeline.flush`,
/// `pipeline.weight_versions`).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Steps {
    /// Steps simulated.
    pub count: u32,
    /// Whether a global barrier separated them.
    pub flush: bool,
    /// `one`, `stash` or `double`.
    pub weight_versions: &'static str,
    /// Each step's time in milliseconds: from the previous step's end (0
    /// for the first) to the moment every device has finished the step's
    /// ops, synchronisation and update.
    pub step_ms: Vec<f64>,
    /// Each step's time in nanoseconds.
    pub step_ns: Vec<u64>,
    /// All steps, first op to last end, in milliseconds.
    pub total_ms: f64,
    /// `total_ms / count`.
    pub mean_ms: f64,
    /// The mean of the steps after the first (the first when there is one).
    pub steady_ms: f64,
    /// Per virtual stage: the weights its micro-batches read.
    pub stages: Vec<StepStage>,
}

/// One virtual stage's weights over consecutive steps.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct StepStage {
    /// The virtual stage.
    pub stage: u32,
    /// The pipeline device that runs it.
    pub device: u32,
    /// The most steps its weights lag behind (0: each step reads the
    /// weights after the previous step's update).
    pub staleness_steps: u32,
    /// The versions of its weights kept: 1 for `one`; for `stash` one per
    /// micro-batch in flight at the peak (PipeDream's copy per input); 2 for
    /// `double`.
    pub weight_versions: u32,
    /// The most distinct versions its micro-batches read at once, with the
    /// newest (micro-batches of one step share a version, so this can be
    /// fewer than `weight_versions` with `stash`).
    pub distinct_versions: u32,
    /// Bytes the versions beyond the first add to its device's memory.
    pub extra_bytes: u64,
}

/// The step time over independent draws (`--trials`), percentiles by the
/// nearest-rank method: the p-th percentile of n sorted values is the one at
/// rank `ceil(p / 100 x n)` (1-based).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Trials {
    /// Draws (seeds `seed` to `seed + count - 1`).
    pub count: u32,
    /// Median step time, in milliseconds.
    pub p50_ms: f64,
    /// 90th percentile.
    pub p90_ms: f64,
    /// 99th percentile.
    pub p99_ms: f64,
    /// The longest.
    pub max_ms: f64,
    /// The mean.
    pub mean_ms: f64,
}

impl Trials {
    /// The figures of these step times (ns; at least one).
    pub fn of(step_ns: &[u64]) -> Option<Trials> {
        let mut v = step_ns.to_vec();
        v.sort_unstable();
        let n = v.len();
        if n == 0 {
            return None;
        }
        let rank = |p: u64| v[((p as usize * n).div_ceil(100)).clamp(1, n) - 1];
        let sum: u128 = v.iter().map(|&x| x as u128).sum();
        Some(Trials {
            count: n as u32,
            p50_ms: ms(rank(50)),
            p90_ms: ms(rank(90)),
            p99_ms: ms(rank(99)),
            max_ms: ms(v[n - 1]),
            mean_ms: sum as f64 / n as f64 / 1e6,
        })
    }
}

/// One re-simulation of `--what-if`.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct WhatIf {
    /// `stage N`, `layer NAME` or `link NAME` (as in `links[]`).
    pub target: String,
    /// The factor its time was multiplied by (0.9: 10% less).
    pub factor: f64,
    /// The re-simulated step time, in milliseconds.
    pub step_time_ms: f64,
    /// The same in nanoseconds.
    pub step_time_ns: u64,
    /// How much shorter the step is than the run's, in milliseconds (negative
    /// when it got longer).
    pub gain_ms: f64,
    /// The work the change removes, in milliseconds: the stage's or layer's
    /// compute on one device of one pipeline, or the link's busy time, times
    /// `1 - factor`.
    pub saved_ms: f64,
    /// `gain_ms / saved_ms` (0 when nothing is saved).
    pub gain_per_ms_saved: f64,
}

/// One order `zb-auto` tried and its simulated step.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Tried {
    /// The order's name (`greedy`, `greedy-fit`, `zb-h1`, `zb-h2`,
    /// `1f1b-split`, `1f1b`).
    pub order: &'static str,
    /// Its step time in milliseconds.
    pub step_ms: f64,
}

/// What `zb-auto` chose.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ScheduleChoice {
    /// The order it kept: the fastest (the first of equals).
    pub chosen: &'static str,
    /// Every order it tried, in order.
    pub tried: Vec<Tried>,
    /// The limit on micro-batches a device holds at once.
    pub max_in_flight: u32,
    /// The busiest device's total work (its F, B and W passes), in
    /// milliseconds: no order can take less.
    pub busiest_work_ms: f64,
    /// The step time above that bound, in milliseconds.
    pub above_work_ms: f64,
    /// The same as a percentage of the bound.
    pub above_work_pct: f64,
}

impl Report {
    /// The devices whose peak memory exceeds their capacity, in order.
    pub fn over_capacity(&self) -> Vec<u32> {
        self.devices.iter().filter(|d| !d.fits).map(|d| d.device).collect()
    }
}

/// Nanoseconds as milliseconds, as every `_ms` field shows them.
pub fn ms(ns: u64) -> f64 {
    ns as f64 / 1e6
}

/// Labels shown with a report that come from outside the trace.
#[derive(Clone, Debug, Default)]
pub struct Labels {
    /// The scenario's title.
    pub title: String,
    /// Seed of the random generator.
    pub seed: u64,
    /// The compute-time jitter the step was simulated with (0: none).
    pub jitter: f64,
    /// Samples per micro-batch (for `samples_per_s`).
    pub micro_batch_size: u32,
    /// `none` or `full`, shown in reports.
    pub recompute: String,
    /// What the memory model needs.
    pub memory: MemoryInputs,
    /// Model FLOPs of one step over all replicas and the devices' peak FLOP
    /// per second, for `mfu` (when both are known).
    pub flops: Option<(f64, f64)>,
    /// Whether the tensor groups use sequence parallelism (shown only).
    pub sequence: bool,
    /// Compute variation besides jitter, in words (stragglers, rare slow
    /// ops), or empty.
    pub variability: String,
}

/// What the memory model needs beyond the trace.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct MemoryInputs {
    /// Bytes each micro-batch holds on each virtual stage, from its forward's
    /// start to its backward's end. Empty: no activation memory.
    pub stash_bytes: Vec<u64>,
    /// With a split backward: bytes each micro-batch holds on each virtual
    /// stage from its backward's (B's) end to its weight pass's end. Empty
    /// or short: nothing.
    pub weight_stash_bytes: Vec<u64>,
    /// Model-state bytes per device.
    pub state_bytes: Vec<u64>,
    /// Bytes every device keeps aside.
    pub reserved_bytes: u64,
    /// Capacity of each device; `None` means unlimited.
    pub capacity_bytes: Option<u64>,
}

/// Activation bytes held on device `d` over time: `(time, bytes held from
/// then on)` at every change, in time order (several changes at one time are
/// all listed; the last is what holds after it). A micro-batch's stash is
/// held from its forward's start to its backward's end; with a split
/// backward, its weight stash from that end to its weight pass's end.
pub fn activation_timeline(trace: &Trace, memory: &MemoryInputs, d: usize) -> Vec<(SimTime, u64)> {
    let size = |v: &[u64], stage: u32| v.get(stage as usize).copied().unwrap_or(0);
    let recs = &trace.ops[d];
    let split = trace.plan.shape.split_backward;
    // Every change as (time, release first, +/- bytes), in op order; a
    // stable sort by time with releases first at equal times keeps op order
    // among equals (so a fused plan lists exactly what it always did).
    let mut changes: Vec<(SimTime, bool, u64, bool)> = Vec::with_capacity(2 * recs.len());
    for r in recs {
        match r.op.kind.stash() {
            Stash::TakeAtStart => changes.push((r.start, false, size(&memory.stash_bytes, r.op.stage), true)),
            Stash::FreeAtEnd => changes.push((r.end, true, size(&memory.stash_bytes, r.op.stage), false)),
            Stash::Keep => {}
        }
        if split {
            let w = size(&memory.weight_stash_bytes, r.op.stage);
            match r.op.kind {
                baton_schedule::OpKind::Backward => changes.push((r.end, false, w, true)),
                baton_schedule::OpKind::Weight => changes.push((r.end, true, w, false)),
                _ => {}
            }
        }
    }
    changes.sort_by_key(|&(t, release, _, _)| (t, !release));
    let mut held = 0u64;
    let mut out = Vec::with_capacity(changes.len() + 1);
    out.push((trace.start(), 0));
    for (t, _, bytes, take) in changes {
        held = if take { held.saturating_add(bytes) } else { held.saturating_sub(bytes) };
        out.push((t, held));
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
    let p = shape.stages.max(1);
    let t = trace.tensor.max(1);
    for (d, recs) in trace.ops.iter().enumerate() {
        let device = d as u32;
        let busy_ns: u64 = recs.iter().map(|r| r.end.saturating_since(r.start).as_ns()).sum();
        let weight_ns: u64 = recs
            .iter()
            .filter(|r| r.op.kind == baton_schedule::OpKind::Weight)
            .map(|r| r.end.saturating_since(r.start).as_ns())
            .sum();
        let last_compute = recs.iter().rev().find(|r| !r.op.kind.is_device_work()).map_or(t0, |r| r.end);
        let device_end = trace.device_end.get(d).copied().unwrap_or(t0).max(recs.last().map_or(t0, |r| r.end));
        let sync_exposed_ns = device_end.saturating_since(last_compute).as_ns();
        let idle_ns = step_ns - busy_ns.min(step_ns);
        let mem = &labels.memory;
        let peak_activation_bytes = if mem.stash_bytes.is_empty() {
            0
        } else {
            activation_timeline(trace, mem, d).iter().map(|&(_, b)| b).max().unwrap_or(0)
        };
        let state_bytes = mem.state_bytes.get(d).copied().unwrap_or(0);
        let peak_memory_bytes = state_bytes.saturating_add(mem.reserved_bytes).saturating_add(peak_activation_bytes);
        devices.push(DeviceReport {
            device,
            replica: device / t / p,
            stage: device / t % p,
            rank: device % t,
            tensor_comm_ms: ms(trace.tensor_comm_ns.get(d).copied().unwrap_or(0)),
            cluster_device: trace.cluster_devices.get(d).copied().unwrap_or(device),
            busy_ms: ms(busy_ns),
            weight_ms: ms(weight_ns),
            idle_ms: ms(idle_ns),
            bubble_fraction: if step_ns == 0 { 0.0 } else { idle_ns as f64 / step_ns as f64 },
            peak_activations: peak_held(trace, d),
            ops: recs.len(),
            peak_memory_bytes,
            memory_capacity_bytes: mem.capacity_bytes,
            fits: mem.capacity_bytes.is_none_or(|c| peak_memory_bytes <= c),
            state_bytes,
            peak_activation_bytes,
            sync_exposed_ms: ms(sync_exposed_ns),
            sync_exposed_ns,
            busy_ns,
            idle_ns,
        });
        device_gaps(trace, d, t0, t1, &mut gaps);
    }
    let total_idle: u64 = devices.iter().map(|d| d.idle_ns).sum();
    let global_batch =
        trace.replicas.max(1) as u64 * shape.micro_batches as u64 * labels.micro_batch_size.max(1) as u64;
    // With tensor groups each collective ran once per rank, among the
    // devices of that rank (reported with the whole collective's times).
    let collectives = trace
        .collectives
        .iter()
        .flat_map(|c| (0..c.ranks.max(1)).map(move |k| (c, k)))
        .map(|(c, k)| CollectiveReport {
            group: c.group.iter().map(|&w| w * c.ranks.max(1) + k).collect(),
            piece: c.piece,
            bucket: c.bucket,
            phase: c.phase.as_str(),
            algorithm: c.algorithm.name(),
            bytes: c.bytes,
            wire_bytes_sent: c.wire_bytes_sent.clone(),
            server_bytes_sent: c.server_bytes_sent.clone(),
            start_ms: ms(c.start.saturating_since(t0).as_ns()),
            end_ms: ms(c.end.saturating_since(t0).as_ns()),
        })
        .collect();
    let denom = step_ns as f64 * devices.len() as f64;
    Report {
        title: labels.title.clone(),
        schedule: trace.plan.kind.name().to_string(),
        stages: shape.stages,
        micro_batches: shape.micro_batches,
        chunks: shape.chunks,
        seed: labels.seed,
        jitter: labels.jitter,
        variability: labels.variability.clone(),
        step_time_ms: ms(step_ns),
        step_time_ns: step_ns,
        bubble_fraction: if denom == 0.0 { 0.0 } else { total_idle as f64 / denom },
        samples_per_s: if step_ns == 0 { 0.0 } else { global_batch as f64 / (step_ns as f64 / 1e9) },
        micro_batch_size: labels.micro_batch_size.max(1),
        global_batch,
        parallel: ParallelReport {
            data: trace.replicas.max(1),
            pipeline: shape.stages,
            tensor: t,
            sequence: labels.sequence,
            devices_used: trace.ops.len() as u32,
        },
        mfu: labels
            .flops
            .filter(|_| step_ns > 0)
            .map(|(flops, peak)| flops / (step_ns as f64 / 1e9) / (peak * trace.ops.len().max(1) as f64)),
        sync_exposed_ms: ms(devices.iter().map(|d| d.sync_exposed_ns).max().unwrap_or(0)),
        recompute: if labels.recompute.is_empty() { "none".into() } else { labels.recompute.clone() },
        fits: devices.iter().all(|d| d.fits),
        ops: trace.ops.iter().map(Vec::len).sum(),
        transfers: trace.transfers.len(),
        sync_transfers: trace.sync_transfers.len(),
        tensor_transfers: trace.tensor_transfers.len(),
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
        collectives,
        critical_path: Vec::new(),
        what_if: Vec::new(),
        trials: None,
        schedule_choice: None,
        steps: None,
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
        recs.iter().filter(first_chunk).filter(|r| r.op.kind.stash() == Stash::TakeAtStart).map(|r| r.start).peekable();
    let mut release =
        recs.iter().filter(first_chunk).filter(|r| r.op.kind.stash() == Stash::FreeAtEnd).map(|r| r.end).peekable();
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

#[inline(always)]
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
    let replica = device / trace.tensor.max(1) / trace.plan.shape.stages.max(1);
    let recs = &trace.ops[d];
    let (Some(first), Some(last)) = (recs.first(), recs.last()) else {
        return;
    };
    let plain =
        |cause, op| GapDetail { cause, flow: None, op, producer: None, route: None, link: None, collective: None };
    let last_sync = || trace.last_collective.get(d).copied().flatten().and_then(|c| SyncWait::of(trace, c));
    push_gap(gaps, device, t0, first.start, plain(Cause::Fill, first.op));
    for w in recs.windows(2) {
        let (a, b) = (&w[0], &w[1]);
        if b.start <= a.end {
            continue;
        }
        // Device work (encode, update) waits for a collective.
        if b.op.kind.is_device_work() {
            let collective = match b.op.kind {
                baton_schedule::OpKind::Encode => trace
                    .collectives
                    .iter()
                    .position(|c| {
                        c.piece == b.op.stage
                            && c.bucket == b.op.micro_batch
                            && c.group.contains(&(device / c.ranks.max(1)))
                            && c.end >= b.start
                    })
                    .and_then(|c| SyncWait::of(trace, c as u32)),
                _ => last_sync(),
            };
            push_gap(gaps, device, a.end, b.start, GapDetail { collective, ..plain(Cause::Sync, b.op) });
            continue;
        }
        let mut from = a.end;
        // A blocking send keeps the device until its data has arrived.
        if trace.blocking_sends && !a.op.kind.is_device_work() {
            if let Some(t) = trace.outgoing_in(replica, a.op).filter(|t| t.end > a.end) {
                let until = t.end.min(b.start);
                let detail = GapDetail { route: Some((t.src, t.dst)), ..plain(Cause::Send, a.op) };
                push_gap(gaps, device, from, until, detail);
                from = until;
            }
        }
        // Only an op that needs data from another stage can find its device
        // free but itself not ready, so a dependency always exists here.
        let Some(dep) = trace.dependency_in(replica, b.op) else { continue };
        let cause = match dep.flow {
            Flow::Activation => Cause::Activation,
            Flow::Gradient => Cause::Gradient,
            Flow::Within => continue,
        };
        let flow = Some(dep.flow);
        let transfer = dep.transfer.map(|t| &trace.transfers[t]);
        let route = transfer.map(|t| (t.src, t.dst));
        let producer = Some((dep.producer, dep.producer_device));
        let waiting_until = dep.produced_at.min(b.start);
        if waiting_until > from {
            push_gap(
                gaps,
                device,
                from,
                waiting_until,
                GapDetail { cause, flow, op: b.op, producer, route, link: None, collective: None },
            );
        }
        let link_from = dep.produced_at.max(from);
        if b.start > link_from {
            // The link's name is only looked up for a gap that is there.
            let link = transfer.and_then(|t| t.bottleneck).and_then(|l| trace.link_names.get(l as usize).cloned());
            let detail = GapDetail { cause: Cause::Link, flow, op: b.op, producer, route, link, collective: None };
            push_gap(gaps, device, link_from, b.start, detail);
        }
    }
    // After its last op a device may still wait for its collectives.
    let end = trace.device_end.get(d).copied().unwrap_or(last.end).max(last.end);
    push_gap(gaps, device, last.end, end, GapDetail { collective: last_sync(), ..plain(Cause::Sync, last.op) });
    push_gap(gaps, device, end, t1, plain(Cause::Drain, last.op));
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
