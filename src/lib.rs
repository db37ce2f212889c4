//! # baton: simulate pipeline-parallel training steps
//!
//! The library half of the `baton` command: it connects the concept crates.
//! A [`Scenario`] (from `baton-scenario`) becomes a schedule plan
//! (`baton-schedule`), per-stage costs and a link topology (`baton-link`); the
//! executor (`baton-executor`) plays the step on the event engine
//! (`baton-engine`), and `baton-report` turns the trace into numbers and charts.
#![warn(missing_docs)]

pub mod commands;
pub mod compare;
pub mod layout;
pub mod planner;
mod steps;
pub mod sweep;
pub mod trials;
pub mod whatif;

pub use baton_engine as engine;
pub use baton_executor as executor;
pub use baton_link as link;
pub use baton_report as report;
pub use baton_scenario as scenario;
pub use baton_schedule as schedule;

use baton_engine::SimDuration;
use baton_executor::{
    BucketSpec, Compression, ExecError, RunOptions, Segment, StageCost, SyncConfig, TensorConfig, TiedSpec, Trace,
};
use baton_link::{LinkSpec, Topology};
use baton_report::{Labels, MemoryInputs, Report};
use baton_scenario::Scenario;
use thiserror::Error;

/// A simulated step and its report.
#[derive(Clone, Debug)]
pub struct SimulatedStep {
    /// Every op and transfer as it ran.
    pub trace: Trace,
    /// What it means.
    pub report: Report,
}

impl SimulatedStep {
    /// Fills the report's critical path ([`baton_report::critical`]), which
    /// [`simulate`] leaves empty since it costs about as much again.
    pub fn with_critical_path(mut self) -> Self {
        self.add_critical_path();
        self
    }

    /// [`SimulatedStep::with_critical_path`] in place.
    pub fn add_critical_path(&mut self) {
        self.report.critical_path = baton_report::critical::Graph::of(&self.trace).critical_path();
    }
}

/// Why a scenario could not be simulated.
#[derive(Debug, Error)]
pub enum SimulateError {
    /// The schedule cannot be built for the scenario's shape.
    #[error("cannot build the schedule: {0}")]
    Schedule(#[from] baton_schedule::ScheduleError),
    /// The executor refused the inputs or stopped with work left.
    #[error("cannot simulate: {0}")]
    Exec(#[from] ExecError),
}

impl SimulateError {
    /// Whether this is the simulation's own fault rather than the input's: a
    /// valid plan that stopped with work left.
    pub fn is_internal(&self) -> bool {
        matches!(self, SimulateError::Exec(ExecError::Stuck { .. }))
    }
}

/// Per-virtual-stage costs of a scenario's split.
pub fn stage_costs(s: &Scenario) -> Vec<StageCost> {
    let split = s.shape().split_backward;
    s.pieces()
        .iter()
        .map(|p| {
            let c = StageCost::new(SimDuration(p.forward_ns), SimDuration(p.backward_ns), p.send_bytes);
            if split {
                // B is the backward without its weight-gradient part W.
                let w = p.weight_ns.min(p.backward_ns);
                StageCost { backward: SimDuration(p.backward_ns - w), weight: SimDuration(w), ..c }
            } else {
                c
            }
        })
        .collect()
}

/// The devices the step uses, in topology order: replica r's stage s at
/// `r * stages + s`, then any dedicated parameter servers.
pub fn devices_used(s: &Scenario) -> Vec<u32> {
    s.placement.iter().chain(&s.server_devices).copied().collect()
}

/// The scenario's link topology over the devices in use (topology device
/// `r * stages + s` is the device of replica r's stage s; dedicated servers
/// follow).
pub fn topology(s: &Scenario) -> Topology {
    let spec = |l: baton_scenario::LinkParams| LinkSpec { latency_ns: l.latency_ns, bytes_per_s: l.bytes_per_s };
    let used = devices_used(s);
    match s.cluster.fabric {
        baton_scenario::Fabric::Flat { link } => Topology::full_mesh_of(&used, spec(link)),
        baton_scenario::Fabric::TwoLevel { nodes, devices_per_node, device_link, node_link, cards } => {
            Topology::two_level(nodes, devices_per_node, spec(device_link), spec(node_link), cards, &used)
        }
    }
}

/// How model state is priced per parameter on one device: `replicated`
/// bytes kept whole plus `sharded` bytes split over `replicas`. With
/// `training.shard` the state splits into weights (2 B per parameter),
/// gradients (`gradients.bytes_per_param`) and the optimizer (the rest of
/// `state_bytes_per_param`); `optimizer` shards the optimizer part,
/// `gradients` the gradients and optimizer parts (Rajbhandari et al., "ZeRO",
/// SC 2020, sec. 5).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct StatePrice {
    /// Bytes per parameter every replica keeps.
    pub replicated: u64,
    /// Bytes per parameter split over the replicas.
    pub sharded: u64,
    /// Replicas the sharded part is split over.
    pub replicas: u64,
}

impl StatePrice {
    /// The scenario's price.
    pub fn of(s: &Scenario) -> StatePrice {
        let per = s.training.state_bytes_per_param;
        let grads = s.gradients.bytes_per_param as u64;
        let replicas = s.parallel.data.max(1) as u64;
        let (replicated, sharded) = match s.training.shard {
            baton_scenario::Shard::None => (per, 0),
            baton_scenario::Shard::Optimizer => (2 + grads, per.saturating_sub(2 + grads)),
            baton_scenario::Shard::Gradients => (2, per.saturating_sub(2)),
        };
        StatePrice { replicated, sharded, replicas }
    }

    /// Bytes of `params` parameters' state on one device (the sharded part
    /// rounded up).
    pub fn bytes(&self, params: u128) -> u128 {
        params * self.replicated as u128 + (params * self.sharded as u128).div_ceil(self.replicas.max(1) as u128)
    }
}

/// Model-state bytes of `params` parameters on one device ([`StatePrice`]).
pub fn device_state_bytes(s: &Scenario, params: u64) -> u64 {
    StatePrice::of(s).bytes(params as u128).min(u64::MAX as u128) as u64
}

/// What the memory model needs: stash per piece, model state per worker
/// (every replica holds the same).
pub fn memory_inputs(s: &Scenario) -> MemoryInputs {
    let pieces = s.pieces();
    let p = s.pipeline.stages as usize;
    let mut params = vec![0u64; p];
    for (k, piece) in pieces.iter().enumerate() {
        params[k % p] += piece.params;
    }
    let per_device: Vec<u64> = params.iter().map(|&n| device_state_bytes(s, n)).collect();
    let t = s.parallel.tensor.max(1) as usize;
    MemoryInputs {
        stash_bytes: pieces.iter().map(|x| x.stash_bytes).collect(),
        weight_stash_bytes: pieces.iter().map(|x| x.weight_stash_bytes).collect(),
        state_bytes: (0..s.parallel.data)
            .flat_map(|_| per_device.iter().flat_map(|&b| std::iter::repeat_n(b, t)))
            .collect(),
        reserved_bytes: s.training.reserved_bytes,
        capacity_bytes: s.cluster.device.memory_bytes,
    }
}

/// Each piece's gradient buckets: its layers in reverse model order, grouped
/// until a bucket holds at least `gradients.bucket` bytes (parameters x
/// `gradients.bytes_per_param`; the last may be smaller), each final when its
/// layers' share of the piece's backward time has run (last layer first;
/// with a split backward, their share of the weight-gradient time W, since
/// W is the piece's last gradient op).
/// A piece without parameters has no bucket; a layer sharing weights with
/// the first layer counts its copy on any device but the first's. Returns
/// also, per piece, the bucket holding each of its layers (in model order).
pub fn gradient_buckets(s: &Scenario) -> (Vec<Vec<BucketSpec>>, Vec<Vec<u32>>) {
    let bpp = s.gradients.bytes_per_param as u64;
    let p = s.pipeline.stages as usize;
    let mut all = Vec::new();
    let mut layer_bucket = Vec::new();
    let mut first = 0usize;
    let tensor = s.parallel.tensor > 1;
    // With a split backward the last gradient op is W, which runs the
    // layers' weight gradients (last layer first) as plain compute.
    let split = s.shape().split_backward;
    let grad_ns = |l: &baton_scenario::LayerCost| if split { l.weight_ns.min(l.backward_ns) } else { l.backward_ns };
    for (k, &n) in s.pipeline.split.iter().enumerate() {
        let copy = k % p != 0;
        let layers = &s.tensor_layers[first..first + n as usize];
        first += n as usize;
        let total_back: u128 = layers.iter().map(|l| grad_ns(l) as u128).sum();
        let mut buckets: Vec<BucketSpec> = Vec::new();
        let mut which = vec![0u32; layers.len()];
        let (mut params, mut back) = (0u128, 0u128);
        let mut open = false;
        for (i, l) in layers.iter().enumerate().rev() {
            params += l.params as u128 + if copy { l.tied_params as u128 } else { 0 };
            back += grad_ns(l) as u128;
            open = true;
            which[i] = buckets.len() as u32;
            if params * bpp as u128 >= s.gradients.bucket_bytes as u128 {
                buckets.push(bucket(params, back, total_back, bpp));
                params = 0;
                open = false;
            }
        }
        if open && params > 0 {
            buckets.push(bucket(params, back, total_back, bpp));
        } else if open {
            // Trailing layers without parameters join the previous bucket.
            for w in which.iter_mut().filter(|w| **w as usize == buckets.len()) {
                *w = buckets.len().saturating_sub(1) as u32;
            }
        }
        // With tensor groups a bucket is final when the backward segments of
        // its layers have run: after the segment that ends the last of them
        // the backward reaches (the one nearest the model's input).
        if tensor && !split {
            let (_, done) = piece_segments(s, k);
            for (b, spec) in buckets.iter_mut().enumerate() {
                spec.ready_segment = (0..layers.len()).filter(|&i| which[i] as usize == b).map(|i| done[i]).max();
            }
        }
        // Buckets of no parameters have nothing to sum.
        if buckets.iter().all(|b| b.bytes == 0) {
            buckets.clear();
        }
        all.push(buckets);
        layer_bucket.push(which);
    }
    (all, layer_bucket)
}

fn bucket(params: u128, back: u128, total_back: u128, bpp: u64) -> BucketSpec {
    let clamp = |x: u128| x.min(u64::MAX as u128) as u64;
    let (num, den) = if total_back == 0 { (1, 1) } else { (back, total_back) };
    // Keep the fraction's parts within u64 without changing its value much.
    let shift = (128 - den.leading_zeros()).saturating_sub(40);
    BucketSpec {
        bytes: clamp(params * bpp as u128),
        gather_bytes: clamp(params * 2),
        ready_num: clamp(num >> shift),
        ready_den: clamp(den >> shift).max(1),
        ready_segment: None,
    }
}

/// Segments appended with adjacent compute merged and empty compute left out.
#[derive(Default)]
struct Segments(Vec<Segment>);

impl Segments {
    fn compute(&mut self, ns: u64) {
        if ns == 0 {
            return;
        }
        match self.0.last_mut() {
            Some(Segment::Compute(d)) => d.0 += ns,
            _ => self.0.push(Segment::Compute(SimDuration(ns))),
        }
    }
    fn all_reduce(&mut self, bytes: u64) {
        self.0.push(Segment::AllReduce(bytes));
    }
    /// Index of the last segment (0 when none).
    fn last(&self) -> u32 {
        self.0.len().saturating_sub(1) as u32
    }
    /// A layer's pass: its first part, an all-reduce, the rest, an
    /// all-reduce (compute only when it has no tensor traffic).
    fn layer(&mut self, ns: u64, split: (u64, u64), bytes: u64) {
        if bytes == 0 {
            self.compute(ns);
            return;
        }
        let first = (ns as u128 * split.0 as u128 / split.1.max(1) as u128) as u64;
        self.compute(first);
        self.all_reduce(bytes);
        self.compute(ns - first.min(ns));
        self.all_reduce(bytes);
    }
}

/// Piece `k`'s ops as segments on one device of its tensor group (forward,
/// backward, weight), and for each of its layers the backward segment after
/// which that layer's backward is done. Forward: each layer's first part
/// (its `forward_split` share), an all-reduce of `tensor_bytes`, the rest,
/// an all-reduce; the backward runs the layers in reverse with their
/// `backward_split`; with full recomputation the backward first runs the
/// forward again, all-reduces included.
pub fn piece_segments(s: &Scenario, k: usize) -> ([Vec<Segment>; 3], Vec<u32>) {
    let first: usize = s.pipeline.split[..k].iter().map(|&n| n as usize).sum();
    let layers = &s.tensor_layers[first..first + s.pipeline.split[k] as usize];
    let mut forward = Segments::default();
    for l in layers {
        forward.layer(l.forward_ns, l.forward_split, l.tensor_bytes);
    }
    let mut backward = Segments::default();
    if s.training.recompute == baton_scenario::Recompute::Full {
        for l in layers {
            backward.layer(l.forward_ns, l.forward_split, l.tensor_bytes);
        }
    }
    // A schedule that runs W apart leaves it out of B (W is plain compute).
    let split = s.shape().split_backward;
    let mut done = vec![0; layers.len()];
    for (i, l) in layers.iter().enumerate().rev() {
        let ns = if split { l.backward_ns - l.weight_ns.min(l.backward_ns) } else { l.backward_ns };
        backward.layer(ns, l.backward_split, l.tensor_bytes);
        done[i] = backward.last();
    }
    ([forward.0, backward.0, Vec::new()], done)
}

/// The scenario's tensor groups as segments, or `None` with one device per
/// stage.
pub fn tensor_config(s: &Scenario) -> Option<TensorConfig> {
    (s.parallel.tensor > 1).then(|| TensorConfig {
        ranks: s.parallel.tensor,
        segments: (0..s.pipeline.split.len()).map(|k| piece_segments(s, k).0).collect(),
    })
}

/// How the scenario's replicas synchronise their gradients, or `None` when
/// there is nothing to synchronise (one replica, no tied weights across
/// devices, no update time): then the step is the pipeline alone.
pub fn sync_config(s: &Scenario) -> Option<SyncConfig> {
    let d = s.parallel.data;
    let p = s.pipeline.stages;
    let (buckets, layer_bucket) = gradient_buckets(s);
    let g = &s.gradients;
    // The tied copy: the first layer sharing weights that runs on a device
    // other than the first layer's.
    let mut tied = None;
    let mut first = 0usize;
    for (k, &n) in s.pipeline.split.iter().enumerate() {
        for (i, l) in s.layers[first..first + n as usize].iter().enumerate() {
            if tied.is_none()
                && l.tied_params > 0
                && k as u32 % p != 0
                && !buckets[k].is_empty()
                && !buckets[0].is_empty()
            {
                tied = Some(TiedSpec {
                    bytes: l.tied_params.saturating_mul(g.bytes_per_param as u64),
                    first_bucket: layer_bucket[0][0],
                    piece: k as u32,
                    piece_bucket: layer_bucket[k][i],
                });
            }
        }
        first += n as usize;
    }
    let sharded = s.training.shard != baton_scenario::Shard::None;
    if d <= 1 && tied.is_none() && s.training.update_ns == 0 {
        return None;
    }
    // Each device updates its share: 1/t of the stage's parameters, and 1/d
    // of those when the state is sharded.
    let share = s.parallel.tensor.max(1) as u64 * if sharded { d.max(1) as u64 } else { 1 };
    let update_ns = s.training.update_ns.div_ceil(share);
    Some(SyncConfig {
        replicas: d,
        algorithm: g.sync,
        servers: baton_collective::Servers { count: g.servers, dedicated: g.dedicated_servers },
        overlap: g.overlap,
        buckets,
        bytes_per_param: g.bytes_per_param,
        compression: g.compression.map(|c| match c.kind {
            baton_scenario::CompressionKind::Quantize { bits } => Compression::Quantize { bits },
            baton_scenario::CompressionKind::TopK { keep } => Compression::TopK { keep },
        }),
        encode_bytes_per_s: g.compression.map_or(0, |c| c.rate_bytes_per_s),
        shard: sharded,
        update: SimDuration(update_ns),
        tied,
        nodes: devices_used(s).iter().map(|&x| s.node_of(x)).collect(),
    })
}

pub use baton_report::svg::{View, Window};

/// Reads `--width PX`: a whole number of pixels in
/// [`baton_report::svg::WIDTH_RANGE_PX`].
pub fn parse_width(text: &str) -> Result<u32, String> {
    let range = baton_report::svg::WIDTH_RANGE_PX;
    let px: u32 = text.trim().parse().map_err(|_| format!("`{text}` is not a whole number of pixels"))?;
    if !range.contains(&px) {
        return Err(format!("{px} px is outside {} to {} px", range.start(), range.end()));
    }
    Ok(px)
}

/// Reads `--window START..END`: two durations with units (`0` may stand
/// alone), the start before the end, e.g. `20ms..60ms`.
pub fn parse_window(text: &str) -> Result<Window, String> {
    let (a, b) = text
        .split_once("..")
        .ok_or_else(|| format!("`{text}` is not a window; write START..END with units, e.g. 20ms..60ms"))?;
    let time = |t: &str| {
        if t.trim() == "0" {
            Ok(0)
        } else {
            baton_scenario::units::parse_duration_ns(t)
        }
    };
    let (start_ns, end_ns) = (time(a)?, time(b)?);
    if start_ns >= end_ns {
        return Err(format!("the window `{text}` ends before it starts; write START..END with START < END"));
    }
    Ok(Window { start_ns, end_ns })
}

/// Reads `--devices LIST`: device numbers and inclusive ranges separated by
/// commas, e.g. `0-7,12`; returned sorted, without repeats.
pub fn parse_devices(text: &str) -> Result<Vec<u32>, String> {
    let mut out = Vec::new();
    for part in text.split(',') {
        let part = part.trim();
        let number = |t: &str| {
            t.trim().parse::<u32>().map_err(|_| format!("`{t}` in `{text}` is not a device number; write e.g. 0-7,12"))
        };
        match part.split_once('-') {
            Some((a, b)) => {
                let (a, b) = (number(a)?, number(b)?);
                if a > b {
                    return Err(format!("the range `{part}` ends before it starts"));
                }
                if b - a > 1 << 20 {
                    return Err(format!("the range `{part}` is too long"));
                }
                out.extend(a..=b);
            }
            None => out.push(number(part)?),
        }
    }
    out.sort_unstable();
    out.dedup();
    Ok(out)
}

/// Devices per node when the scenario's cluster is made of nodes.
pub fn devices_per_node(s: &Scenario) -> Option<u32> {
    match s.cluster.fabric {
        baton_scenario::Fabric::TwoLevel { devices_per_node, .. } => Some(devices_per_node),
        baton_scenario::Fabric::Flat { .. } => None,
    }
}

/// What `--set` overrides changed, for a chart's caption: `with k=v, k2=v2`
/// (empty for none).
pub fn overrides_note(sets: &[String]) -> String {
    if sets.is_empty() {
        String::new()
    } else {
        format!("with {}", sets.join(", "))
    }
}

/// The per-layer cost table `baton run --show-layers` prints.
pub fn layer_table(s: &Scenario) -> String {
    use baton_engine::format_ns;
    use baton_report::format_bytes;
    use std::fmt::Write as _;
    let source = match &s.source {
        baton_scenario::ModelSource::Layers => "model.layers".to_string(),
        baton_scenario::ModelSource::Profile(p) => format!("profile {}", p.display()),
        baton_scenario::ModelSource::Transformer(t) => {
            let mut shape =
                format!("transformer l={} h={} a={} s={} V={}", t.layers, t.hidden, t.heads, t.seq_len, t.vocab);
            if t.ffn_hidden != 4 * t.hidden {
                shape.push_str(&format!(" ffn={}", t.ffn_hidden));
            }
            if t.gated_ffn {
                shape.push_str(" gated");
            }
            if t.kv_heads != t.heads {
                shape.push_str(&format!(" kv_heads={}", t.kv_heads));
            }
            if t.attention != baton_scenario::Attention::Standard {
                shape.push_str(&format!(" attention={}", t.attention.name()));
            }
            if !t.tied_embeddings {
                shape.push_str(" untied");
            }
            if t.bytes_per_value != 2 {
                shape.push_str(&format!(" {} B/value", t.bytes_per_value));
            }
            format!("{shape}, micro-batch size {}", s.pipeline.micro_batch_size)
        }
    };
    let mut out = format!("layers ({}, from {source})\n", s.layers.len());
    let _ = writeln!(
        out,
        "{:>5}  {:<16} {:>12} {:>12} {:>12} {:>12} {:>16}",
        "#", "name", "forward", "backward", "activation", "stash", "params"
    );
    for (i, l) in s.layers.iter().enumerate() {
        let _ = writeln!(
            out,
            "{:>5}  {:<16} {:>12} {:>12} {:>12} {:>12} {:>16}",
            i,
            l.name,
            format_ns(l.forward_ns),
            format_ns(l.backward_ns),
            format_bytes(l.activation_bytes),
            format_bytes(l.stash_bytes),
            l.params
        );
    }
    let params: u64 = s.layers.iter().map(|l| l.params).sum();
    let _ = writeln!(out, "total parameters {params}");
    // Tied weights: which devices hold a copy.
    let p = s.pipeline.stages as usize;
    let mut first = 0usize;
    for (k, &n) in s.pipeline.split.iter().enumerate() {
        for l in &s.layers[first..first + n as usize] {
            if l.tied_params > 0 && k % p != 0 {
                let _ = writeln!(
                    out,
                    "{} shares {} parameters with {} (tied weights); device {} keeps its own copy, counted in its model state",
                    l.name,
                    l.tied_params,
                    s.layers[0].name,
                    k % p
                );
            }
        }
        first += n as usize;
    }
    out
}

/// The labels a report of `s` carries.
pub fn labels(s: &Scenario) -> Labels {
    Labels {
        title: s.title.clone(),
        seed: s.seed,
        jitter: s.cluster.jitter,
        micro_batch_size: s.pipeline.micro_batch_size,
        recompute: s.training.recompute.name().to_string(),
        memory: memory_inputs(s),
        flops: model_flops_per_step(s).zip(s.cluster.device.peak_flop_per_s.map(|p| p as f64)),
        sequence: s.parallel.sequence,
        variability: variability_note(s),
    }
}

/// Stragglers and rare slow ops in words (empty when there are none).
pub fn variability_note(s: &Scenario) -> String {
    let mut parts = Vec::new();
    if !s.cluster.stragglers.is_empty() {
        let list: Vec<String> = s.cluster.stragglers.iter().map(|(d, f)| format!("device {d} x{f}")).collect();
        parts.push(format!("stragglers {}", list.join(", ")));
    }
    if s.cluster.slow_chance > 0.0 {
        parts.push(format!("{}% of ops x{} slower", s.cluster.slow_chance * 100.0, s.cluster.slow_factor));
    }
    if s.cluster.link_jitter > 0.0 {
        parts.push(format!("link jitter +-{}%", s.cluster.link_jitter * 100.0));
    }
    parts.join("; ")
}

/// Model FLOPs of one step over all replicas, for the transformer form:
/// three times the forward FLOPs of every transformer layer and the logit
/// layer (the backward does twice the forward's; recomputation, including
/// flash attention's, is not counted; Chowdhery et al., "PaLM", 2022,
/// appendix B), for `replicas x micro-batches` micro-batches of
/// `micro_batch_size` sequences. `None` for a model given by its layers.
pub fn model_flops_per_step(s: &Scenario) -> Option<f64> {
    let baton_scenario::ModelSource::Transformer(t) = &s.source else { return None };
    let b = s.pipeline.micro_batch_size as u64;
    let forward = t.layers as f64 * t.layer_forward_flops(b) + t.logit_forward_flops(b);
    Some(3.0 * forward * s.parallel.data as f64 * s.pipeline.micro_batches as f64)
}

/// What one simulated step holds in memory per operation or transfer: its
/// records, indices, events and report (gaps included), measured at 114 to
/// 138 bytes for 1F1B and about 62 for fill-drain and interleaved runs of a
/// million or more operations (see the README's performance section), with
/// room to spare.
pub const BYTES_PER_ELEMENT: u64 = 160;
/// Extra bytes per operation or transfer while the JSON report is made.
pub const JSON_BYTES_PER_ELEMENT: u64 = 320;
/// Extra bytes per operation or transfer while the CSV trace is written.
pub const TRACE_BYTES_PER_ELEMENT: u64 = 96;
/// Extra bytes per charted operation or transfer mark while a chart is drawn.
pub const CHART_BYTES_PER_ELEMENT: u64 = 640;
/// Bytes every run needs beyond its elements (program, scenario, buffers).
pub const BASE_BYTES: u64 = 64 << 20;
/// The default limit on a run's estimated memory: 16 GiB on every machine.
pub const DEFAULT_MAX_MEMORY_BYTES: u64 = 16 << 30;

/// Which outputs a run makes, for its memory estimate.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Making {
    /// The JSON report.
    pub json: bool,
    /// The CSV trace.
    pub trace: bool,
    /// Charts (Gantt or memory).
    pub chart: bool,
}

/// The operations and transfers `s` runs: per step, every op of the plan,
/// and two transfers (activation and gradient) per micro-batch for every
/// boundary between pieces on different devices; times `pipeline.steps`.
pub fn step_elements(s: &Scenario) -> (u64, u64) {
    let shape = s.shape();
    let p = s.pipeline.stages as u64;
    let d = s.parallel.data as u64;
    let crossing = if p > 1 { shape.virtual_stages() as u64 - 1 } else { 0 };
    let t = s.parallel.tensor.max(1) as u64;
    let pipeline = (2 * s.pipeline.micro_batches as u64).saturating_mul(crossing).saturating_mul(d * t);
    // Tensor all-reduces: a ring of t moves 2 (t - 1) t transfers each.
    let tensor = if t > 1 {
        let per_micro_batch: u64 = (0..s.pipeline.split.len())
            .map(|k| {
                let segments = piece_segments(s, k).0;
                segments.iter().flatten().filter(|x| matches!(x, Segment::AllReduce(_))).count() as u64
            })
            .sum();
        per_micro_batch.saturating_mul(s.pipeline.micro_batches as u64).saturating_mul(d * 2 * (t - 1) * t)
    } else {
        0
    };
    let steps = s.pipeline.steps.max(1) as u64;
    (
        shape.ops().saturating_mul(d * t).saturating_mul(steps),
        pipeline.saturating_add(collective_transfers(s)).saturating_add(tensor).saturating_mul(steps),
    )
}

/// An upper bound on the point-to-point transfers of the step's gradient
/// collectives: at most 2 d (d - 1 + S) per bucket and phase (ring, tree,
/// direct and the parameter server all stay within it).
pub fn collective_transfers(s: &Scenario) -> u64 {
    let d = s.parallel.data as u64;
    if d <= 1 {
        return 0;
    }
    let buckets: u64 = gradient_buckets(s).0.iter().map(|b| b.len() as u64).sum();
    let phases = if s.training.shard == baton_scenario::Shard::None { 1 } else { 2 };
    let t = s.parallel.tensor.max(1) as u64;
    buckets.saturating_mul(phases).saturating_mul(2 * d * (d - 1 + s.gradients.servers as u64) * t)
}

/// Extra bytes per collective transfer beyond [`BYTES_PER_ELEMENT`]: its
/// graph (chunks, dependencies, dependents) and its record; measured at about
/// 185 bytes per transfer in all for a ring of 1,024 replicas.
pub const COLLECTIVE_BYTES_PER_TRANSFER: u64 = 96;

/// An estimate of the memory simulating one step of `s` needs, before it
/// runs: [`BASE_BYTES`] plus, per operation and transfer,
/// [`BYTES_PER_ELEMENT`] and what the outputs `making` add.
pub fn memory_estimate_bytes(s: &Scenario, making: Making) -> u64 {
    let (ops, transfers) = step_elements(s);
    let n = ops + transfers;
    let charted = n.min(baton_report::svg::MAX_CHART_OPS as u64);
    let per = BYTES_PER_ELEMENT
        + if making.json { JSON_BYTES_PER_ELEMENT } else { 0 }
        + if making.trace { TRACE_BYTES_PER_ELEMENT } else { 0 };
    BASE_BYTES
        .saturating_add(n.saturating_mul(per))
        .saturating_add(collective_transfers(s).saturating_mul(COLLECTIVE_BYTES_PER_TRANSFER))
        .saturating_add(if making.chart { charted * CHART_BYTES_PER_ELEMENT } else { 0 })
}

/// The time `bytes` take from topology device `a` to `b` when nothing else
/// shares the route: its latency plus the bytes at its narrowest link.
fn route_alone_ns(topology: &Topology, a: u32, b: u32, bytes: u64) -> u64 {
    let slowest = topology.route(a, b).iter().map(|&l| topology.link(l).bytes_per_s).min();
    let push = slowest.map_or(0, |bw| {
        if bw == LinkSpec::UNLIMITED {
            0
        } else {
            (bytes as u128 * 1_000_000_000).div_ceil(bw as u128).min(u64::MAX as u128) as u64
        }
    });
    topology.route_latency(a, b).as_ns().saturating_add(push)
}

/// For each pipeline device, the time one transfer of `bytes` takes between
/// neighbours of its tensor groups' rings when nothing else shares the links
/// (route latency + bytes at the route's narrowest link), over every replica's
/// group and every hop: `(fastest, slowest)`.
fn ring_hop_ns(s: &Scenario, topology: &Topology, bytes: u64) -> Vec<(u64, u64)> {
    let (p, t, d) = (s.pipeline.stages, s.parallel.tensor.max(1), s.parallel.data.max(1));
    (0..p)
        .map(|stage| {
            let mut lo = u64::MAX;
            let mut hi = 0;
            for r in 0..d {
                let first = (r * p + stage) * t;
                for k in 0..t {
                    let (a, b) = (first + k, first + (k + 1) % t);
                    let ns = route_alone_ns(topology, a, b, bytes);
                    lo = lo.min(ns);
                    hi = hi.max(ns);
                }
            }
            (if lo == u64::MAX { 0 } else { lo }, hi)
        })
        .collect()
}

/// The uncontended time of a ring all-reduce of `bytes` among a tensor group
/// of `t`: `2 (t - 1)` rounds of chunks of `ceil(bytes / t)`, each round as
/// long as its slowest hop (`slowest = true`) or its fastest (a lower bound).
fn ring_all_reduce_ns(s: &Scenario, topology: &Topology, bytes: u64, stage: usize, slowest: bool) -> u64 {
    let t = s.parallel.tensor.max(1) as u64;
    if t <= 1 {
        return 0;
    }
    let hops = ring_hop_ns(s, topology, bytes.div_ceil(t));
    let (lo, hi) = hops[stage];
    2 * (t - 1) * if slowest { hi } else { lo }
}

/// [`tensor_config`] with every all-reduce replaced by its uncontended ring
/// time on the group's own links (the slowest hop of any replica's group
/// setting each round): what [`simulate_fast`] plays.
pub fn tensor_config_fast(s: &Scenario) -> Option<TensorConfig> {
    let topology = topology(s);
    let p = s.pipeline.stages as usize;
    tensor_config(s).map(|mut c| {
        for (k, kinds) in c.segments.iter_mut().enumerate() {
            for segs in kinds.iter_mut() {
                let merged: Vec<Segment> = segs
                    .iter()
                    .map(|x| match *x {
                        Segment::AllReduce(bytes) => {
                            Segment::Compute(SimDuration(ring_all_reduce_ns(s, &topology, bytes, k % p, true)))
                        }
                        other => other,
                    })
                    .collect();
                *segs = merged;
            }
        }
        c
    })
}

/// A lower bound on the step time of `s` (any schedule, any contention):
/// each pipeline device must run `m` forwards and backwards of its pieces,
/// each at least its compute plus its tensor all-reduces' uncontended ring
/// time at the group's fastest hop (the ring's rounds depend on each other,
/// and sharing links only slows a transfer). With one chunk per device,
/// device `k` cannot start before the first micro-batch's forward has gone
/// through the devices before it, nor finish the step before the last
/// backward has come back through them: `max_k (sum_{j<k} F_j + m (F_k +
/// B_k) + sum_{j<k} B_j)`. Gradient synchronisation, transfers and waits
/// only add to it. With compute (or link) jitter every time may shrink by
/// the jitter, and the bound with it.
pub fn step_lower_bound_ns(s: &Scenario) -> u64 {
    let topology = topology(s);
    let p = s.pipeline.stages as usize;
    let m = s.pipeline.micro_batches as u128;
    let (mut f, mut b) = (vec![0u128; p], vec![0u128; p]);
    let costs = s.pieces();
    for k in 0..s.pipeline.split.len() {
        let (segments, _) = piece_segments(s, k);
        let pass = |segs: &[Segment]| -> u128 {
            segs.iter()
                .map(|x| match *x {
                    Segment::Compute(d) => d.as_ns() as u128,
                    Segment::AllReduce(bytes) => ring_all_reduce_ns(s, &topology, bytes, k % p, false) as u128,
                })
                .sum()
        };
        let (pf, pb) = if s.parallel.tensor > 1 {
            (pass(&segments[0]), pass(&segments[1]))
        } else {
            (costs[k].forward_ns as u128, costs[k].backward_ns as u128)
        };
        f[k % p] += pf;
        b[k % p] += pb;
    }
    let chained = s.pipeline.chunks == 1;
    let bound = (0..p)
        .map(|k| {
            let before: u128 = if chained { (0..k).map(|j| f[j] + b[j]).sum() } else { 0 };
            before + m * (f[k] + b[k])
        })
        .max()
        .unwrap_or(0);
    let bound = bound as f64 * (1.0 - s.cluster.jitter.max(s.cluster.link_jitter));
    bound.min(u64::MAX as f64) as u64
}

/// Whether every replica's pipeline (its transfers between stages and its
/// tensor groups' all-reduces) runs on links no other replica uses, each
/// route with the same latencies and bandwidths as replica 0's, and nothing
/// varies: then, before the gradient collectives, nothing can tell
/// the replicas apart and [`simulate_fast`] plays replica 0 alone.
pub fn replicas_look_alike(s: &Scenario) -> bool {
    let (d, p, t) = (s.parallel.data, s.pipeline.stages, s.parallel.tensor.max(1));
    if d <= 1
        || s.cluster.jitter > 0.0
        || s.cluster.link_jitter > 0.0
        || s.cluster.slow_chance > 0.0
        || !s.cluster.stragglers.is_empty()
    {
        return false;
    }
    let topology = topology(s);
    let device = |r: u32, st: u32, k: u32| (r * p + st) * t + k;
    let mut pairs: Vec<(u32, u32, u32, u32)> = Vec::new();
    for st in 0..p {
        for k in 0..t {
            if st + 1 < p || (s.pipeline.chunks > 1 && p > 1) {
                let next = (st + 1) % p;
                pairs.push((st, k, next, k));
                pairs.push((next, k, st, k));
            }
            if t > 1 {
                pairs.push((st, k, st, (k + 1) % t));
            }
        }
    }
    let specs = |r: u32| -> Vec<Vec<(u64, u64)>> {
        pairs
            .iter()
            .map(|&(a, ka, b, kb)| {
                topology
                    .route(device(r, a, ka), device(r, b, kb))
                    .iter()
                    .map(|&l| (topology.link(l).latency_ns, topology.link(l).bytes_per_s))
                    .collect()
            })
            .collect()
    };
    let first = specs(0);
    let mut used = std::collections::HashSet::new();
    for r in 0..d {
        if r > 0 && specs(r) != first {
            return false;
        }
        let mine: std::collections::HashSet<u32> = pairs
            .iter()
            .flat_map(|&(a, ka, b, kb)| topology.route(device(r, a, ka), device(r, b, kb)).iter().map(|l| l.0))
            .collect();
        if mine.iter().any(|l| used.contains(l)) {
            return false;
        }
        used.extend(mine);
    }
    true
}

/// A lower bound on the step time of `s` over every split of its layers
/// (what `baton layout` prunes with, so that a better split found later
/// cannot beat a pruned layout): each layer costs a device of its group its
/// compute per micro-batch (forward, backward, the forward again with full
/// recomputation) plus its all-reduces at the fastest uncontended ring time
/// of any stage's group; the busiest device does `m` times the largest
/// piece of the best possible cut (the linear partition of those costs
/// over the devices; with several chunks per device, at least an even
/// share and the dearest layer). Anything else only adds. With compute (or
/// link) jitter the bound shrinks by the jitter.
pub fn layout_lower_bound_ns(s: &Scenario) -> u64 {
    let topology = topology(s);
    let p = s.pipeline.stages as usize;
    let recompute = s.training.recompute == baton_scenario::Recompute::Full;
    let all_reduce = |bytes: u64| -> u64 {
        if bytes == 0 {
            return 0;
        }
        (0..p).map(|k| ring_all_reduce_ns(s, &topology, bytes, k, false)).min().unwrap_or(0)
    };
    let weights: Vec<u64> = s
        .tensor_layers
        .iter()
        .map(|l| {
            let passes = if recompute { 3 } else { 2 };
            let compute = l.forward_ns * if recompute { 2 } else { 1 } + l.backward_ns;
            let comm = if s.parallel.tensor > 1 { 2 * passes * all_reduce(l.tensor_bytes) } else { 0 };
            compute.saturating_add(comm)
        })
        .collect();
    let per_device = if s.pipeline.chunks == 1 {
        baton_split::linear_partition(&weights, p).map_or(0, |(max, _)| max)
    } else {
        let total: u64 = weights.iter().sum();
        total.div_ceil(p as u64).max(weights.iter().copied().max().unwrap_or(0))
    };
    let bound =
        per_device as f64 * s.pipeline.micro_batches as f64 * (1.0 - s.cluster.jitter.max(s.cluster.link_jitter));
    bound.min(u64::MAX as f64) as u64
}

/// [`simulate`] with the tensor groups' all-reduces in closed form (their
/// uncontended ring time, [`tensor_config_fast`]) instead of played transfer
/// by transfer, and, when [`replicas_look_alike`], replica 0's pipeline
/// played alone with the others mirroring it while the gradient collectives
/// run among all replicas on the full topology: what `baton layout` ranks
/// large searches with. Exact with one device per stage and one replica;
/// otherwise it leaves out the contention between the all-reduces and other
/// traffic, and between the collectives and the other replicas' pipelines.
pub fn simulate_fast(s: &Scenario) -> Result<SimulatedStep, SimulateError> {
    let mirror = replicas_look_alike(s);
    if s.parallel.tensor <= 1 && !mirror {
        return simulate(s);
    }
    play(s, true, mirror)
}

/// The plan `s` runs, for every schedule but `zb-auto` (whose order depends
/// on the costs and is chosen by simulation in [`simulate`]): the built-in
/// order, or the one read from `pipeline.order`.
pub fn fixed_plan(s: &Scenario) -> Result<baton_schedule::Plan, SimulateError> {
    match &s.pipeline.order {
        Some((_, plan)) => Ok(plan.as_ref().clone()),
        None => Ok(baton_schedule::build(s.pipeline.schedule, s.shape())?),
    }
}

/// What each virtual stage of `s` may hold at once, for memory prices
/// ([`baton_schedule::peak_holds`]); for `zb-auto`, whose order is chosen
/// later, anything within `pipeline.max_in_flight` micro-batches held for
/// either B or W.
pub fn memory_holds(s: &Scenario) -> Result<Vec<Vec<(u64, u64)>>, SimulateError> {
    if s.pipeline.schedule == baton_schedule::ScheduleKind::ZbAuto {
        let limit = s.pipeline.max_in_flight as u64;
        return Ok(vec![vec![(limit, 0), (0, limit)]; s.shape().virtual_stages() as usize]);
    }
    Ok(baton_schedule::peak_holds(&fixed_plan(s)?))
}

/// The costs `zb-auto` builds its orders for: each stage's F, B and W on
/// one device of its group (tensor all-reduces at their uncontended ring
/// time), and each boundary's transfer at its route's latency plus the
/// activation at the route's narrowest link, between replica 0's devices.
pub fn auto_costs(s: &Scenario) -> baton_schedule::auto::Costs {
    let costs = stage_costs(s);
    let topology = topology(s);
    let p = s.pipeline.stages as usize;
    let t = s.parallel.tensor.max(1);
    let tensor = tensor_config_fast(s);
    let comm_of = |k: usize, kind: usize| -> u64 {
        tensor.as_ref().map_or(0, |c| {
            c.segments[k][kind].iter().map(|x| if let Segment::AllReduce(ns) = x { *ns } else { 0 }).sum::<u64>()
        })
    };
    let mut forward = vec![0u64; p];
    let mut backward = vec![0u64; p];
    let mut weight = vec![0u64; p];
    for (k, c) in costs.iter().enumerate() {
        forward[k % p] += c.forward.as_ns() + comm_of(k, 0);
        backward[k % p] += c.backward.as_ns() + comm_of(k, 1);
        weight[k % p] += c.weight.as_ns();
    }
    let comm = (0..p)
        .map(|k| {
            if k + 1 >= p {
                return 0;
            }
            let (a, b) = (k as u32 * t, (k as u32 + 1) * t);
            let bytes = costs.get(k).map_or(0, |c| c.send_bytes);
            route_alone_ns(&topology, a, b, bytes)
        })
        .collect();
    baton_schedule::auto::Costs { forward, backward, weight, comm }
}

/// Plays `s` with these tensor groups, replica 0 alone when `one_replica`;
/// for `zb-auto`, plays each of its candidate orders and keeps the fastest
/// (the first of equals), noting the choice in the report.
fn play(s: &Scenario, fast: bool, one_replica: bool) -> Result<SimulatedStep, SimulateError> {
    play_on(s, fast, one_replica, &topology(s))
}

/// [`play`] on this topology (the scenario's, or one with a link changed).
fn play_on(s: &Scenario, fast: bool, one_replica: bool, topo: &Topology) -> Result<SimulatedStep, SimulateError> {
    if s.pipeline.steps > 1 || !s.pipeline.flush {
        return steps::play(s, fast, one_replica, topo);
    }
    play_one(s, fast, one_replica, topo)
}

/// One flushed step of `s`.
pub(crate) fn play_one(
    s: &Scenario,
    fast: bool,
    one_replica: bool,
    topo: &Topology,
) -> Result<SimulatedStep, SimulateError> {
    let tensor_of = |x: &Scenario| if fast { tensor_config_fast(x) } else { tensor_config(x) };
    if s.pipeline.schedule != baton_schedule::ScheduleKind::ZbAuto {
        return play_plan(s, fixed_plan(s)?, tensor_of(s).as_ref(), one_replica, topo);
    }
    let costs = auto_costs(s);
    let shape = s.shape();
    let mut tried = Vec::new();
    let mut best: Option<SimulatedStep> = None;
    let mut chosen = "";
    for c in baton_schedule::auto::candidates(shape, &costs, s.pipeline.max_in_flight) {
        let step = if c.plan.shape.split_backward {
            play_plan(s, c.plan, tensor_of(s).as_ref(), one_replica, topo)?
        } else {
            // The fused order runs the scenario as 1F1B (B and W in one op).
            let mut fused = s.clone();
            fused.pipeline.schedule = baton_schedule::ScheduleKind::OneFOneB;
            let mut step = play_plan(&fused, c.plan, tensor_of(&fused).as_ref(), one_replica, topo)?;
            step.trace.plan.kind = baton_schedule::ScheduleKind::ZbAuto;
            step.report.schedule = baton_schedule::ScheduleKind::ZbAuto.name().to_string();
            step
        };
        let ns = step.report.step_time_ns;
        tried.push(baton_report::Tried { order: c.name, step_ms: baton_report::ms(ns) });
        if best.as_ref().is_none_or(|b| ns < b.report.step_time_ns) {
            best = Some(step);
            chosen = c.name;
        }
    }
    let mut best = best.ok_or(baton_schedule::ScheduleError::Zero { what: "max_in_flight" })?;
    let step_ns = best.report.step_time_ns;
    best.report.schedule_choice = Some(schedule_choice(s, &best.trace, chosen, tried, step_ns));
    Ok(best)
}

/// What `zb-auto` chose for `s`: `chosen` among `tried`, with how far
/// `step_ns` is above the busiest device's work in `trace` (per step when
/// the trace holds several).
pub(crate) fn schedule_choice(
    s: &Scenario,
    trace: &Trace,
    chosen: &'static str,
    tried: Vec<baton_report::Tried>,
    step_ns: u64,
) -> baton_report::ScheduleChoice {
    let busiest_ns = trace
        .ops
        .iter()
        .map(|recs| {
            recs.iter()
                .filter(|r| !r.op.kind.is_device_work())
                .map(|r| r.end.saturating_since(r.start).as_ns())
                .sum::<u64>()
        })
        .max()
        .unwrap_or(0)
        / s.pipeline.steps.max(1) as u64;
    baton_report::ScheduleChoice {
        chosen,
        tried,
        max_in_flight: s.pipeline.max_in_flight,
        busiest_work_ms: baton_report::ms(busiest_ns),
        above_work_ms: baton_report::ms(step_ns.saturating_sub(busiest_ns)),
        above_work_pct: if busiest_ns == 0 {
            0.0
        } else {
            100.0 * step_ns.saturating_sub(busiest_ns) as f64 / busiest_ns as f64
        },
    }
}

/// Plays `plan` for `s`.
pub(crate) fn play_plan(
    s: &Scenario,
    plan: baton_schedule::Plan,
    tensor: Option<&TensorConfig>,
    one_replica: bool,
    topo: &Topology,
) -> Result<SimulatedStep, SimulateError> {
    play_plan_drawn(s, plan, tensor, one_replica, topo, 0)
}

/// [`play_plan`] with its variation drawn from the seed's stream pair
/// `stream` (see `RunOptions::stream`).
pub(crate) fn play_plan_drawn(
    s: &Scenario,
    plan: baton_schedule::Plan,
    tensor: Option<&TensorConfig>,
    one_replica: bool,
    topo: &Topology,
    stream: u64,
) -> Result<SimulatedStep, SimulateError> {
    let sync = sync_config(s);
    let mut options = run_options(s, one_replica);
    options.stream = stream;
    let trace = baton_executor::simulate_parallel(plan, &stage_costs(s), topo.clone(), options, sync.as_ref(), tensor)?;
    let report = baton_report::build(&trace, &labels(s));
    Ok(SimulatedStep { trace, report })
}

/// How `s`'s ops vary and whether its sends block.
pub(crate) fn run_options(s: &Scenario, one_replica: bool) -> RunOptions {
    RunOptions {
        jitter: s.cluster.jitter,
        seed: s.seed,
        blocking_sends: s.pipeline.blocking_sends,
        one_replica,
        stragglers: s.cluster.stragglers.clone(),
        slow_chance: s.cluster.slow_chance,
        slow_factor: s.cluster.slow_factor,
        link_jitter: s.cluster.link_jitter,
        stream: 0,
        // Every plan a scenario runs was built by the schedule crate or
        // checked by `order::parse` when the scenario was read.
        plan_checked: true,
        step_updates: None,
    }
}

/// Simulates one training step of `s` and reports on it.
pub fn simulate(s: &Scenario) -> Result<SimulatedStep, SimulateError> {
    play(s, false, false)
}

/// [`simulate`] on `topo` instead of the scenario's own topology (built by
/// [`topology`] and then changed, e.g. one link made faster).
pub fn simulate_on(s: &Scenario, topo: &Topology) -> Result<SimulatedStep, SimulateError> {
    play_on(s, false, false, topo)
}
