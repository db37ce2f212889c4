//! # baton-executor: runs a schedule's per-device orders in simulated time
//!
//! Given a [`Plan`] (each device's order of forward and backward passes), the
//! cost of every virtual stage and a link [`Topology`], the executor plays one
//! training step on the discrete-event engine:
//!
//! * each device runs its operations one at a time, strictly in its order,
//!   starting each as soon as the device is free and the operation is ready;
//! * forward(i, s) is ready when forward(i, s-1) has finished and its
//!   activation has arrived; backward(i, s) when forward(i, s) has finished and,
//!   unless `s` is the last virtual stage, backward(i, s+1) has finished and its
//!   gradient has arrived;
//! * an activation or gradient crossing to another device is a transfer on the
//!   link network (it never occupies the sender's compute); between virtual
//!   stages on the same device nothing moves.
//!
//! The result is a [`Trace`]: when every operation and transfer started and
//! ended. Statistics and charts are made from it elsewhere.
//!
//! It deliberately knows nothing about scenario files, units or reports.

use baton_engine::{Fired, Model, Scheduler, SimDuration, SimTime};
use baton_link::{LinkStats, Network, NextCompletion, Topology, TransferId};
use baton_schedule::{validate, Op, OpKind, Plan, ScheduleError};
use thiserror::Error;

/// Time and data of one virtual stage, per micro-batch.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct StageCost {
    pub forward: SimDuration,
    pub backward: SimDuration,
    /// Bytes of the activation this stage sends to the next one; the
    /// gradient the next stage sends back across the same boundary has the
    /// same size (so the last stage's value never crosses a link).
    pub send_bytes: u64,
}

/// What was simulated and how.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum DataKind {
    Activation,
    Gradient,
}

impl DataKind {
    pub fn as_str(self) -> &'static str {
        match self {
            DataKind::Activation => "activation",
            DataKind::Gradient => "gradient",
        }
    }
}

/// One operation as it ran.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct OpRecord {
    pub op: Op,
    pub start: SimTime,
    pub end: SimTime,
}

/// One activation or gradient crossing between devices.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct TransferRecord {
    pub kind: DataKind,
    pub micro_batch: u32,
    /// The virtual stage that produced the data.
    pub from_stage: u32,
    /// The virtual stage that consumes it.
    pub to_stage: u32,
    /// Pipeline devices (not topology ids).
    pub src: u32,
    pub dst: u32,
    pub bytes: u64,
    /// Producer finished and the send began.
    pub start: SimTime,
    /// Last byte left the sender.
    pub sent: SimTime,
    /// Data arrived at the receiver.
    pub end: SimTime,
    /// The link that held the transfer back the longest (an index into the
    /// topology's links), if it shared a finite link.
    pub bottleneck: Option<u32>,
}

/// The data an operation waited for from another stage, if any.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Dependency {
    pub kind: DataKind,
    /// The producing operation (forward(i, s-1) or backward(i, s+1)).
    pub producer: Op,
    pub producer_device: u32,
    /// When the producer finished.
    pub produced_at: SimTime,
    /// When the data was available to the consumer (equal to `produced_at`
    /// when both stages are on the same device).
    pub available_at: SimTime,
    /// Index into [`Trace::transfers`] when the data crossed a link.
    pub transfer: Option<usize>,
}

/// Everything that happened in one simulated step.
#[derive(Clone, Debug)]
pub struct Trace {
    pub plan: Plan,
    /// `ops[d]` is device `d`'s operations in the order they ran.
    pub ops: Vec<Vec<OpRecord>>,
    /// Transfers in the order they started.
    pub transfers: Vec<TransferRecord>,
    /// Per-link counters, indexed like the topology's links.
    pub link_stats: Vec<LinkStats>,
    /// Names of the topology's links.
    pub link_names: Vec<String>,
    /// Bandwidth of each link in bytes per second (`LinkSpec::UNLIMITED` for
    /// links that never limit).
    pub link_bytes_per_s: Vec<u64>,
    /// Events the engine delivered.
    pub events: u64,
    /// Whether sends blocked the sender until delivered.
    pub blocking_sends: bool,
    // Dense lookups: [kind][micro_batch * S + stage] -> (device, index in ops[device]).
    op_index: Vec<(u32, u32)>,
    // [kind][micro_batch * S + from_stage] -> index in transfers, or NONE.
    transfer_index: Vec<u32>,
}

const NONE: u32 = u32::MAX;

impl Trace {
    /// First operation start (always 0 for a real plan).
    pub fn start(&self) -> SimTime {
        self.ops.iter().filter_map(|o| o.first()).map(|r| r.start).min().unwrap_or(SimTime::ZERO)
    }

    /// Last operation end.
    pub fn end(&self) -> SimTime {
        self.ops.iter().filter_map(|o| o.last()).map(|r| r.end).max().unwrap_or(SimTime::ZERO)
    }

    /// Step time: last operation end minus first operation start.
    pub fn step_time(&self) -> SimDuration {
        self.end().saturating_since(self.start())
    }

    fn dense(&self, kind: OpKind, micro_batch: u32, stage: u32) -> usize {
        let s = self.plan.shape.virtual_stages() as usize;
        let m = self.plan.shape.micro_batches as usize;
        let k = (kind == OpKind::Backward) as usize;
        k * m * s + micro_batch as usize * s + stage as usize
    }

    /// The record of `op`, with the device it ran on.
    pub fn record(&self, op: Op) -> (u32, &OpRecord) {
        let (d, i) = self.op_index[self.dense(op.kind, op.micro_batch, op.stage)];
        (d, &self.ops[d as usize][i as usize])
    }

    /// The transfer that carried `op`'s output to another device, if any.
    pub fn outgoing(&self, op: Op) -> Option<&TransferRecord> {
        let t = self.transfer_index[self.dense(op.kind, op.micro_batch, op.stage)];
        (t != NONE).then(|| &self.transfers[t as usize])
    }

    /// The cross-stage data `op` needed, and when it was produced and available.
    pub fn dependency(&self, op: Op) -> Option<Dependency> {
        let last = self.plan.shape.virtual_stages() - 1;
        let (kind, producer) = match op.kind {
            OpKind::Forward if op.stage > 0 => (DataKind::Activation, Op::forward(op.micro_batch, op.stage - 1)),
            OpKind::Backward if op.stage < last => (DataKind::Gradient, Op::backward(op.micro_batch, op.stage + 1)),
            _ => return None,
        };
        let (producer_device, rec) = self.record(producer);
        let t = self.transfer_index[self.dense(producer.kind, producer.micro_batch, producer.stage)];
        let transfer = (t != NONE).then_some(t as usize);
        let available_at = transfer.map_or(rec.end, |t| self.transfers[t].end);
        Some(Dependency { kind, producer, producer_device, produced_at: rec.end, available_at, transfer })
    }
}

/// Why a step could not be simulated.
#[derive(Debug, Error, PartialEq)]
pub enum ExecError {
    #[error("invalid schedule: {0}")]
    Schedule(#[from] ScheduleError),
    #[error("{found} stage costs given for {expected} virtual stages")]
    CostCount { found: usize, expected: usize },
    #[error("placement names {found} devices for {expected} pipeline devices")]
    PlacementCount { found: usize, expected: usize },
    #[error("placement names device {device}, but the topology has {devices}")]
    PlacementRange { device: u32, devices: u32 },
    #[error("jitter must be at least 0 and below 1, found {0}")]
    Jitter(f64),
    #[error("the step stopped with operations left: device {device} waits at {op}")]
    Stuck { device: u32, op: Op },
}

#[derive(Clone, Copy, Debug)]
enum Ev {
    OpDone(u32),
    Arrival(u32),
}

struct Exec<'a> {
    plan: &'a Plan,
    costs: &'a [StageCost],
    placement: &'a [u32],
    net: Network,
    n_stages: usize,
    next: Vec<usize>,
    busy: Vec<bool>,
    // Per (micro_batch * S + stage).
    fwd_done: Vec<bool>,
    fwd_in: Vec<bool>,
    grad_in: Vec<bool>,
    ops: Vec<Vec<OpRecord>>,
    transfers: Vec<TransferRecord>,
    transfer_index: Vec<u32>,
    in_flight: Vec<u32>,
    /// Per device and op: the factor its compute time is scaled by.
    jitter: Option<Vec<Vec<f64>>>,
    blocking_sends: bool,
    /// Per device: sends not yet delivered (only counted when sends block).
    pending_sends: Vec<u32>,
    /// Scratch list of transfers whose last byte has left.
    due: Vec<TransferId>,
}

impl Exec<'_> {
    fn idx(&self, micro_batch: u32, stage: u32) -> usize {
        micro_batch as usize * self.n_stages + stage as usize
    }

    fn ready(&self, op: Op) -> bool {
        let i = self.idx(op.micro_batch, op.stage);
        match op.kind {
            OpKind::Forward => self.fwd_in[i],
            OpKind::Backward => self.fwd_done[i] && self.grad_in[i],
        }
    }

    fn try_start(&mut self, d: usize, sched: &mut Scheduler<Ev, NextCompletion>) {
        if self.busy[d] || self.pending_sends[d] > 0 {
            return;
        }
        let Some(&op) = self.plan.per_device[d].get(self.next[d]) else { return };
        if !self.ready(op) {
            return;
        }
        let cost = &self.costs[op.stage as usize];
        let mut dur = match op.kind {
            OpKind::Forward => cost.forward,
            OpKind::Backward => cost.backward,
        };
        if let Some(factors) = &self.jitter {
            dur = SimDuration((dur.as_ns() as f64 * factors[d][self.next[d]]).round() as u64);
        }
        self.busy[d] = true;
        let now = sched.now();
        self.ops[d].push(OpRecord { op, start: now, end: now + dur });
        sched.schedule(now + dur, Ev::OpDone(d as u32));
    }

    /// Hands data from `from_stage` to `to_stage` of `micro_batch`.
    fn send(&mut self, sched: &mut Scheduler<Ev, NextCompletion>, kind: DataKind, op: Op, to_stage: u32) {
        let p = self.plan.shape.stages;
        let (src, dst) = (op.stage % p, to_stage % p);
        let target = self.idx(op.micro_batch, to_stage);
        if src == dst {
            match kind {
                DataKind::Activation => self.fwd_in[target] = true,
                DataKind::Gradient => self.grad_in[target] = true,
            }
            self.try_start(dst as usize, sched);
            return;
        }
        // Both directions across the boundary between virtual stages k and
        // k+1 carry stage k's output activation: the gradient coming back is
        // the gradient of that same tensor.
        let boundary = op.stage.min(to_stage);
        let bytes = self.costs[boundary as usize].send_bytes;
        let rec = self.transfers.len() as u32;
        let now = sched.now();
        self.transfers.push(TransferRecord {
            kind,
            micro_batch: op.micro_batch,
            from_stage: op.stage,
            to_stage,
            src,
            dst,
            bytes,
            start: now,
            sent: now,
            end: now,
            bottleneck: None,
        });
        let k = (op.kind == OpKind::Backward) as usize;
        let slot = k * self.plan.shape.micro_batches as usize * self.n_stages + self.idx(op.micro_batch, op.stage);
        self.transfer_index[slot] = rec;
        if self.blocking_sends {
            self.pending_sends[src as usize] += 1;
        }
        let tid = self.net.start(sched, self.placement[src as usize], self.placement[dst as usize], bytes);
        let t = tid.0 as usize;
        if self.in_flight.len() <= t {
            self.in_flight.resize(t + 1, NONE);
        }
        self.in_flight[t] = rec;
    }
}

impl Model for Exec<'_> {
    type Event = Ev;
    type Key = NextCompletion;

    fn handle(&mut self, fired: Fired<Ev, NextCompletion>, sched: &mut Scheduler<Ev, NextCompletion>) {
        match fired {
            Fired::Event(Ev::OpDone(d)) => {
                let d = d as usize;
                let op = self.plan.per_device[d][self.next[d]];
                self.next[d] += 1;
                self.busy[d] = false;
                let last = self.n_stages as u32 - 1;
                match op.kind {
                    OpKind::Forward => {
                        let i = self.idx(op.micro_batch, op.stage);
                        self.fwd_done[i] = true;
                        if op.stage < last {
                            self.send(sched, DataKind::Activation, op, op.stage + 1);
                        }
                    }
                    OpKind::Backward => {
                        if op.stage > 0 {
                            self.send(sched, DataKind::Gradient, op, op.stage - 1);
                        }
                    }
                }
                self.try_start(d, sched);
            }
            Fired::Deadline(NextCompletion) => {
                let mut due = std::mem::take(&mut self.due);
                due.clear();
                self.net.take_due(sched.now(), &mut due);
                for &tid in &due {
                    let fin = self.net.finish(sched, tid);
                    let rec = self.in_flight[tid.0 as usize];
                    let t = &mut self.transfers[rec as usize];
                    t.sent = sched.now();
                    t.bottleneck = fin.bottleneck.map(|l| l.0);
                    sched.schedule(fin.delivered_at, Ev::Arrival(rec));
                }
                self.due = due;
            }
            Fired::Event(Ev::Arrival(rec)) => {
                let now = sched.now();
                let t = &mut self.transfers[rec as usize];
                t.end = now;
                let (kind, mb, to, src, dst) = (t.kind, t.micro_batch, t.to_stage, t.src, t.dst);
                let target = self.idx(mb, to);
                match kind {
                    DataKind::Activation => self.fwd_in[target] = true,
                    DataKind::Gradient => self.grad_in[target] = true,
                }
                self.try_start(dst as usize, sched);
                if self.blocking_sends {
                    self.pending_sends[src as usize] -= 1;
                    self.try_start(src as usize, sched);
                }
            }
        }
        // Hand out bandwidth once this instant's starts and finishes are in.
        if self.net.needs_settle() && sched.peek_time() != Some(sched.now()) {
            self.net.settle(sched);
        }
    }
}

/// How a step is run: compute-time variation and whether sends block.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct RunOptions {
    /// Each op's compute time is scaled by a factor drawn uniformly from
    /// `[1 - jitter, 1 + jitter]`; 0 means every op takes exactly its cost.
    pub jitter: f64,
    /// Seed of the generator the factors are drawn from, in plan order
    /// (device 0's ops in order, then device 1's, ...), so the draws do not
    /// depend on timing.
    pub seed: u64,
    /// A device that sends data to another device waits until the data has
    /// arrived before it starts its next operation (blocking point-to-point
    /// sends); by default sends run beside compute.
    pub blocking_sends: bool,
}

/// Simulates one step of `plan` with every op taking exactly its cost.
///
/// `costs[s]` is virtual stage `s`'s cost; `placement[d]` is the topology
/// device that pipeline device `d` runs on (identity for a flat cluster).
pub fn simulate(plan: Plan, costs: &[StageCost], topology: Topology, placement: &[u32]) -> Result<Trace, ExecError> {
    simulate_with(plan, costs, topology, placement, RunOptions::default())
}

/// [`simulate`] with compute times varied as `variation` says.
pub fn simulate_with(
    plan: Plan,
    costs: &[StageCost],
    topology: Topology,
    placement: &[u32],
    options: RunOptions,
) -> Result<Trace, ExecError> {
    validate(&plan)?;
    if !(0.0..1.0).contains(&options.jitter) {
        return Err(ExecError::Jitter(options.jitter));
    }
    let jitter = (options.jitter > 0.0).then(|| {
        use rand::RngExt;
        let mut rng = baton_engine::seeded_rng(options.seed);
        let j = options.jitter;
        plan.per_device.iter().map(|ops| ops.iter().map(|_| rng.random_range(1.0 - j..=1.0 + j)).collect()).collect()
    });
    let shape = plan.shape;
    let n_stages = shape.virtual_stages() as usize;
    let p = shape.stages as usize;
    if costs.len() != n_stages {
        return Err(ExecError::CostCount { found: costs.len(), expected: n_stages });
    }
    if placement.len() != p {
        return Err(ExecError::PlacementCount { found: placement.len(), expected: p });
    }
    if let Some(&device) = placement.iter().find(|&&d| d >= topology.devices()) {
        return Err(ExecError::PlacementRange { device, devices: topology.devices() });
    }
    let m = shape.micro_batches as usize;
    let cells = m * n_stages;
    let mut fwd_in = vec![false; cells];
    let mut grad_in = vec![false; cells];
    for i in 0..m {
        fwd_in[i * n_stages] = true;
        grad_in[i * n_stages + n_stages - 1] = true;
    }
    let link_names =
        (0..topology.link_count()).map(|l| topology.link_name(baton_link::LinkId(l as u32)).to_string()).collect();
    let link_bytes_per_s =
        (0..topology.link_count()).map(|l| topology.link(baton_link::LinkId(l as u32)).bytes_per_s).collect();
    let mut exec = Exec {
        plan: &plan,
        costs,
        placement,
        net: Network::new(topology),
        n_stages,
        next: vec![0; p],
        busy: vec![false; p],
        fwd_done: vec![false; cells],
        fwd_in,
        grad_in,
        ops: plan.per_device.iter().map(|o| Vec::with_capacity(o.len())).collect(),
        transfers: Vec::with_capacity(2 * cells),
        transfer_index: vec![NONE; 2 * cells],
        in_flight: Vec::new(),
        jitter,
        blocking_sends: options.blocking_sends,
        pending_sends: vec![0; p],
        due: Vec::new(),
    };
    let mut sched = Scheduler::with_capacity(2 * p + 16);
    for d in 0..p {
        exec.try_start(d, &mut sched);
    }
    baton_engine::run(&mut exec, &mut sched);
    for d in 0..p {
        if let Some(&op) = plan.per_device[d].get(exec.next[d]) {
            return Err(ExecError::Stuck { device: d as u32, op });
        }
    }
    let mut op_index = vec![(0u32, 0u32); 2 * cells];
    for (d, recs) in exec.ops.iter().enumerate() {
        for (i, r) in recs.iter().enumerate() {
            let k = (r.op.kind == OpKind::Backward) as usize;
            op_index[k * cells + r.op.micro_batch as usize * n_stages + r.op.stage as usize] = (d as u32, i as u32);
        }
    }
    let link_stats = exec.net.stats().to_vec();
    let Exec { ops, transfers, transfer_index, .. } = exec;
    Ok(Trace {
        plan,
        ops,
        transfers,
        link_stats,
        link_names,
        link_bytes_per_s,
        events: sched.delivered(),
        blocking_sends: options.blocking_sends,
        op_index,
        transfer_index,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use baton_link::LinkSpec;
    use baton_schedule::{build, ScheduleKind, Shape};

    fn ideal(p: u32) -> Topology {
        Topology::full_mesh(p, LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 })
    }

    fn uniform(n: usize, f: u64, b: u64, bytes: u64) -> Vec<StageCost> {
        vec![StageCost { forward: SimDuration(f), backward: SimDuration(b), send_bytes: bytes }; n]
    }

    fn identity(p: u32) -> Vec<u32> {
        (0..p).collect()
    }

    #[test]
    fn single_device_runs_back_to_back() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(1, 3, 1)).unwrap();
        let tr = simulate(plan.clone(), &uniform(1, 10, 20, 0), ideal(1), &[0]).unwrap();
        assert_eq!(tr.step_time(), SimDuration(90));
        assert!(tr.transfers.is_empty());
    }

    #[test]
    fn two_stage_fill_drain_by_hand() {
        // p=2, m=2, forward 10, backward 20, no link cost (0 bytes, 0 latency).
        // Dev0: F0 0-10, F1 10-20; dev1: F0 10-20, F1 20-30, B0 30-50, B1 50-70;
        // dev0: B0 50-70, B1 70-90. Step 90.
        let plan = build(ScheduleKind::FillDrain, Shape::new(2, 2, 1)).unwrap();
        let tr = simulate(plan.clone(), &uniform(2, 10, 20, 0), ideal(2), &identity(2)).unwrap();
        let starts: Vec<u64> = tr.ops[0].iter().map(|r| r.start.0).collect();
        assert_eq!(starts, vec![0, 10, 50, 70]);
        let starts: Vec<u64> = tr.ops[1].iter().map(|r| r.start.0).collect();
        assert_eq!(starts, vec![10, 20, 30, 50]);
        assert_eq!(tr.step_time(), SimDuration(90));
        assert_eq!(tr.transfers.len(), 4);
        let dep = tr.dependency(Op::backward(1, 0)).unwrap();
        assert_eq!(
            (dep.kind, dep.producer_device, dep.produced_at, dep.available_at),
            (DataKind::Gradient, 1, SimTime(70), SimTime(70))
        );
    }

    #[test]
    fn link_time_delays_the_consumer() {
        // 1000 bytes at 1 GB/s = 1000 ns, plus 500 ns latency, per hop.
        let plan = build(ScheduleKind::OneFOneB, Shape::new(2, 1, 1)).unwrap();
        let topo = Topology::full_mesh(2, LinkSpec { latency_ns: 500, bytes_per_s: 1_000_000_000 });
        let tr = simulate(plan.clone(), &uniform(2, 100, 200, 1000), topo, &identity(2)).unwrap();
        // F0@0 0-100, send 100-1600, F0@1 1600-1700, B0@1 1700-1900, send 1900-3400, B0@0 3400-3600.
        assert_eq!(tr.step_time(), SimDuration(3600));
        assert_eq!(tr.transfers[0].sent, SimTime(1100));
        assert_eq!(tr.transfers[0].end, SimTime(1600));
    }

    #[test]
    fn errors_on_mismatched_inputs() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(2, 2, 1)).unwrap();
        assert_eq!(
            simulate(plan.clone(), &uniform(3, 1, 1, 0), ideal(2), &identity(2)).unwrap_err(),
            ExecError::CostCount { found: 3, expected: 2 }
        );
        assert!(matches!(
            simulate(plan.clone(), &uniform(2, 1, 1, 0), ideal(2), &[0, 5]),
            Err(ExecError::PlacementRange { .. })
        ));
    }

    #[test]
    fn jitter_varies_times_within_bounds_and_repeats_with_the_seed() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(3, 6, 1)).unwrap();
        let run = |jitter, seed| {
            simulate_with(
                plan.clone(),
                &uniform(3, 1000, 2000, 0),
                ideal(3),
                &identity(3),
                RunOptions { jitter, seed, ..RunOptions::default() },
            )
            .unwrap()
        };
        let exact = simulate(plan.clone(), &uniform(3, 1000, 2000, 0), ideal(3), &identity(3)).unwrap();
        assert_eq!(run(0.0, 5).ops, exact.ops, "no jitter, no change");
        let a = run(0.2, 5);
        assert_eq!(a.ops, run(0.2, 5).ops, "same seed, same step");
        assert_ne!(a.ops, run(0.2, 6).ops, "another seed, another step");
        for r in a.ops.iter().flatten() {
            let base = if r.op.kind == OpKind::Forward { 1000.0 } else { 2000.0 };
            let d = (r.end.as_ns() - r.start.as_ns()) as f64;
            assert!(d >= (base * 0.8f64).floor() && d <= (base * 1.2f64).ceil(), "{d} outside +-20% of {base}");
        }
        assert_ne!(a.ops, exact.ops);
        assert!(matches!(
            simulate_with(
                plan,
                &uniform(3, 1, 1, 0),
                ideal(3),
                &identity(3),
                RunOptions { jitter: 1.5, ..RunOptions::default() }
            ),
            Err(ExecError::Jitter(_))
        ));
    }

    #[test]
    fn one_device_with_chunks_moves_nothing() {
        let plan = build(ScheduleKind::Interleaved, Shape::new(1, 2, 3)).unwrap();
        let tr = simulate(plan.clone(), &uniform(3, 10, 20, 99), ideal(1), &[0]).unwrap();
        assert!(tr.transfers.is_empty());
        assert_eq!(tr.step_time(), SimDuration(2 * 3 * 30));
    }
}
