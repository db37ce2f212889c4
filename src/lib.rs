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
pub mod planner;
pub mod sweep;

pub use baton_engine as engine;
pub use baton_executor as executor;
pub use baton_link as link;
pub use baton_report as report;
pub use baton_scenario as scenario;
pub use baton_schedule as schedule;

use baton_engine::SimDuration;
use baton_executor::{ExecError, RunOptions, StageCost, Trace};
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
    s.pieces()
        .iter()
        .map(|p| StageCost::new(SimDuration(p.forward_ns), SimDuration(p.backward_ns), p.send_bytes))
        .collect()
}

/// The scenario's link topology over the devices in use, in stage order
/// (topology device `i` is the device of stage `i`).
pub fn topology(s: &Scenario) -> Topology {
    let spec = |l: baton_scenario::LinkParams| LinkSpec { latency_ns: l.latency_ns, bytes_per_s: l.bytes_per_s };
    match s.cluster.fabric {
        baton_scenario::Fabric::Flat { link } => Topology::full_mesh_of(&s.placement, spec(link)),
        baton_scenario::Fabric::TwoLevel { nodes, devices_per_node, device_link, node_link, cards } => {
            Topology::two_level(nodes, devices_per_node, spec(device_link), spec(node_link), cards, &s.placement)
        }
    }
}

/// What the memory model needs: stash per piece, model state per device.
pub fn memory_inputs(s: &Scenario) -> MemoryInputs {
    let pieces = s.pieces();
    let p = s.pipeline.stages as usize;
    let mut params = vec![0u64; p];
    for (k, piece) in pieces.iter().enumerate() {
        params[k % p] += piece.params;
    }
    MemoryInputs {
        stash_bytes: pieces.iter().map(|x| x.stash_bytes).collect(),
        state_bytes: params.iter().map(|&n| baton_model::state_bytes(n, s.training.state_bytes_per_param)).collect(),
        reserved_bytes: s.training.reserved_bytes,
        capacity_bytes: s.cluster.device.memory_bytes,
    }
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
    }
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

/// The operations and transfers one step of `s` runs: every op of the plan,
/// and two transfers (activation and gradient) per micro-batch for every
/// boundary between pieces on different devices.
pub fn step_elements(s: &Scenario) -> (u64, u64) {
    let shape = s.shape();
    let p = s.pipeline.stages as u64;
    let crossing = if p > 1 { shape.virtual_stages() as u64 - 1 } else { 0 };
    (shape.ops(), 2 * s.pipeline.micro_batches as u64 * crossing)
}

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
    BASE_BYTES.saturating_add(n.saturating_mul(per)).saturating_add(if making.chart {
        charted * CHART_BYTES_PER_ELEMENT
    } else {
        0
    })
}

/// Simulates one training step of `s` and reports on it.
pub fn simulate(s: &Scenario) -> Result<SimulatedStep, SimulateError> {
    let plan = baton_schedule::build(s.pipeline.schedule, s.shape())?;
    let variation = RunOptions { jitter: s.cluster.jitter, seed: s.seed, blocking_sends: s.pipeline.blocking_sends };
    let trace = baton_executor::simulate_with(plan, &stage_costs(s), topology(s), variation)?;
    let report = baton_report::build(&trace, &labels(s));
    Ok(SimulatedStep { trace, report })
}
