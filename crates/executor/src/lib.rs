//! # baton-executor: runs a schedule's per-device orders in simulated time
//!
//! Given a [`Plan`] (each device's order of operations), the cost of every
//! virtual stage and a link [`Topology`] over the pipeline's devices, the
//! executor plays one training step on the discrete-event engine:
//!
//! * each device runs its operations one at a time, strictly in its order,
//!   starting each as soon as the device is free and the operation is ready;
//! * an operation is ready when every op it waits for has finished and, for
//!   data crossing to another device, that data has arrived: the schedule
//!   crate says which ops those are and what flows ([`Op::inputs`],
//!   [`Op::outputs`]); the executor restates none of it;
//! * an activation or gradient crossing to another device is a transfer on the
//!   link network (it never occupies the sender's compute); between virtual
//!   stages on the same device nothing moves. Both directions across the
//!   boundary between virtual stages `k` and `k + 1` carry stage `k`'s
//!   [`StageCost::send_bytes`].
//!
//! The link network keeps no event queue of its own: after each simulated
//! instant the executor asks it when its next transfer finishes and keeps one
//! [`Deadline::Network`] there. A new source of deadlines (a collective, an
//! optimizer phase) adds a variant to [`Deadline`].
//!
//! With data parallelism ([`SyncConfig`]) the plan runs on every replica at
//! once (worker `r * p + d` is replica `r`'s pipeline device `d`, topology
//! device `r * p + d`), and each group of devices holding the same piece sums
//! its gradients bucket by bucket with a collective from `baton-collective`,
//! played transfer by transfer on the same network (see the `sync` module).
//!
//! The result is a [`Trace`]: when every operation and transfer started and
//! ended. Statistics and charts are made from it elsewhere.
//!
//! It deliberately knows nothing about scenario files, units or reports.
#![warn(missing_docs)]

use std::collections::VecDeque;

use baton_engine::{Fired, Model, Scheduler, SimDuration, SimTime};
use baton_link::{LinkStats, Network, Topology, TransferId};
use baton_schedule::{validate, Edge, Flow, Op, OpKind, Plan, ScheduleError, Shape};
use thiserror::Error;

mod sync;
mod tensor;
pub use sync::{BucketSpec, CollectiveRecord, Compression, Phase, SyncConfig, SyncTransferRecord, TiedSpec, Waited};
pub use tensor::{Segment, TensorConfig, TensorTransferRecord};

/// Time and data of one virtual stage, per micro-batch.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct StageCost {
    /// Time of a forward pass.
    pub forward: SimDuration,
    /// Time of a backward pass (with a split backward, its input-gradient part).
    pub backward: SimDuration,
    /// Time of a weight-gradient pass (split backward only).
    pub weight: SimDuration,
    /// Bytes of the activation this stage sends to the next one; the
    /// gradient the next stage sends back across the same boundary has the
    /// same size (so the last stage's value never crosses a link).
    pub send_bytes: u64,
}

impl StageCost {
    /// A stage whose backward pass is one op.
    pub fn new(forward: SimDuration, backward: SimDuration, send_bytes: u64) -> Self {
        StageCost { forward, backward, weight: SimDuration::ZERO, send_bytes }
    }

    /// How long an op of `kind` takes on this stage.
    pub fn time(&self, kind: OpKind) -> SimDuration {
        match kind {
            OpKind::Forward => self.forward,
            OpKind::Backward => self.backward,
            OpKind::Weight => self.weight,
            OpKind::Encode | OpKind::Update => SimDuration::ZERO,
        }
    }
}

/// One operation as it ran.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct OpRecord {
    /// The operation.
    pub op: Op,
    /// When it started.
    pub start: SimTime,
    /// When it ended.
    pub end: SimTime,
}

/// One activation or gradient crossing between devices.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct TransferRecord {
    /// What it carries.
    pub flow: Flow,
    /// The micro-batch whose data it carries.
    pub micro_batch: u32,
    /// The virtual stage that produced the data.
    pub from_stage: u32,
    /// The virtual stage that consumes it.
    pub to_stage: u32,
    /// The kind of the op that produced it.
    pub producer_kind: OpKind,
    /// The kind of the op that waits for it.
    pub consumer_kind: OpKind,
    /// Sending pipeline device.
    pub src: u32,
    /// Receiving pipeline device.
    pub dst: u32,
    /// Bytes carried.
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

impl TransferRecord {
    /// The op that produced the data.
    pub fn producer(&self) -> Op {
        Op { kind: self.producer_kind, micro_batch: self.micro_batch, stage: self.from_stage }
    }

    /// The op that waits for it.
    pub fn consumer(&self) -> Op {
        Op { kind: self.consumer_kind, micro_batch: self.micro_batch, stage: self.to_stage }
    }
}

/// The data an operation waited for from another stage.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Dependency {
    /// What it carried.
    pub flow: Flow,
    /// The producing operation.
    pub producer: Op,
    /// The device that ran the producer.
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
    /// The plan that was run.
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
    /// The cluster device each pipeline device ran on (from the topology).
    pub cluster_devices: Vec<u32>,
    /// Events the engine delivered.
    pub events: u64,
    /// Whether sends blocked the sender until delivered.
    pub blocking_sends: bool,
    /// Data-parallel replicas of the pipeline (1: one pipeline). Worker
    /// `r * p + d` of `ops` is replica `r`'s pipeline device `d`.
    pub replicas: u32,
    /// Gradient collectives, in the order they started.
    pub collectives: Vec<CollectiveRecord>,
    /// The point-to-point transfers of the collectives, in the order they
    /// started.
    pub sync_transfers: Vec<SyncTransferRecord>,
    /// When each worker's step ended: its last op, its last collective and
    /// its update.
    pub device_end: Vec<SimTime>,
    /// Per worker: the collective that ended last among those it took part
    /// in, if any.
    pub last_collective: Vec<Option<u32>>,
    /// Devices per tensor-parallel group (1: none). Device `g * tensor + k`
    /// is rank `k` of group `g`, and group `g = r * p + d` is replica `r`'s
    /// pipeline device `d`; `ops`, `device_end` and `last_collective` are
    /// per device (a group's ranks run the same ops at the same times).
    pub tensor: u32,
    /// The point-to-point transfers of the tensor-parallel all-reduces.
    pub tensor_transfers: Vec<TensorTransferRecord>,
    /// Per device: time spent in tensor-parallel all-reduces.
    pub tensor_comm_ns: Vec<u64>,
    // Per replica and `Shape::op_index`: (worker, index in ops[worker]).
    op_index: Vec<(u32, u32)>,
    // Per replica and `Shape::op_index` of the producer: index in transfers, or NONE.
    transfer_index: Vec<u32>,
}

const NONE: u32 = u32::MAX;

impl Trace {
    /// First operation start (always 0 for a real plan).
    pub fn start(&self) -> SimTime {
        self.ops.iter().filter_map(|o| o.first()).map(|r| r.start).min().unwrap_or(SimTime::ZERO)
    }

    /// The step's end: the last operation end, or a later end of a
    /// device's synchronisation.
    pub fn end(&self) -> SimTime {
        let ops = self.ops.iter().filter_map(|o| o.last()).map(|r| r.end).max().unwrap_or(SimTime::ZERO);
        self.device_end.iter().copied().max().map_or(ops, |e| e.max(ops))
    }

    /// Pipeline devices per replica.
    pub fn stages(&self) -> u32 {
        self.plan.shape.stages
    }

    /// Step time: last operation end minus first operation start.
    pub fn step_time(&self) -> SimDuration {
        self.end().saturating_since(self.start())
    }

    /// The record of replica 0's `op`, with the worker it ran on.
    pub fn record(&self, op: Op) -> (u32, &OpRecord) {
        self.record_in(0, op)
    }

    /// The record of replica `replica`'s `op`, with the worker it ran on.
    pub fn record_in(&self, replica: u32, op: Op) -> (u32, &OpRecord) {
        let (d, i) = self.op_index[self.slot(replica, op)];
        (d, &self.ops[d as usize][i as usize])
    }

    /// Where replica `replica`'s `op` ran: (device of its group's rank 0,
    /// index in that device's `ops`; every rank of a group runs its ops in
    /// the same order).
    pub fn position_in(&self, replica: u32, op: Op) -> (u32, u32) {
        self.op_index[self.slot(replica, op)]
    }

    /// The device that ran rank 0 of replica `replica`'s pipeline device `d`.
    pub fn device_of(&self, replica: u32, d: u32) -> u32 {
        (replica * self.plan.shape.stages + d) * self.tensor.max(1)
    }

    fn slot(&self, replica: u32, op: Op) -> usize {
        replica as usize * self.plan.shape.op_slots() + self.plan.shape.op_index(op)
    }

    /// The transfer that carried replica 0's `op`'s output to another
    /// device, if any.
    pub fn outgoing(&self, op: Op) -> Option<&TransferRecord> {
        self.outgoing_in(0, op)
    }

    /// The transfer that carried replica `replica`'s `op`'s output to
    /// another device, if any.
    pub fn outgoing_in(&self, replica: u32, op: Op) -> Option<&TransferRecord> {
        if op.kind.is_device_work() {
            return None;
        }
        let t = self.transfer_index[self.slot(replica, op)];
        (t != NONE).then(|| &self.transfers[t as usize])
    }

    /// The index in [`Trace::transfers`] of the (first, with tensor groups)
    /// transfer that carried replica `replica`'s `op`'s output to another
    /// device, if any.
    pub fn outgoing_index_in(&self, replica: u32, op: Op) -> Option<usize> {
        if op.kind.is_device_work() {
            return None;
        }
        let t = self.transfer_index[self.slot(replica, op)];
        (t != NONE).then_some(t as usize)
    }

    /// The data from another stage that replica 0's `op` waited for longest.
    pub fn dependency(&self, op: Op) -> Option<Dependency> {
        self.dependency_in(0, op)
    }

    /// The data from another stage that replica `replica`'s `op` waited for
    /// longest: of its inputs that cross a stage boundary, the one available
    /// last (`None` when it has none).
    pub fn dependency_in(&self, replica: u32, op: Op) -> Option<Dependency> {
        let shape = &self.plan.shape;
        let mut latest: Option<Dependency> = None;
        op.each_input(shape, |input| {
            if !input.flow.crosses_stages() {
                return;
            }
            let k = self.slot(replica, input.op);
            let (producer_device, i) = self.op_index[k];
            let produced_at = self.ops[producer_device as usize][i as usize].end;
            let t = self.transfer_index[k];
            let transfer = (t != NONE).then_some(t as usize);
            // A tensor group's ranks each send their share: the data is
            // there when the last share is.
            let shares = self.tensor.max(1) as usize;
            let available_at = transfer.map_or(produced_at, |t| {
                self.transfers[t..t + shares].iter().map(|r| r.end).max().unwrap_or(produced_at)
            });
            if latest.is_none_or(|l| available_at > l.available_at) {
                latest = Some(Dependency {
                    flow: input.flow,
                    producer: input.op,
                    producer_device,
                    produced_at,
                    available_at,
                    transfer,
                });
            }
        });
        latest
    }
}

impl Trace {
    /// Steps simulated one after another with a barrier between them, as
    /// one trace: step `k` starts when steps `0..k` have all ended (their
    /// ops, synchronisation and updates), its times move by that much, its
    /// plan ops' micro-batches are renumbered `k * m + i` (an update's is
    /// `k`), and its records' indices follow the earlier steps'. Every part must have run a plan of
    /// the same shape on the same devices.
    pub fn concat(parts: Vec<Trace>) -> Result<Trace, ExecError> {
        let mut parts = parts.into_iter();
        let Some(first) = parts.next() else {
            return Err(ExecError::Sync("no steps to join".into()));
        };
        let shape = first.plan.shape;
        let m = shape.micro_batches;
        let mut out = first;
        let mut offset = out.end().saturating_since(SimTime::ZERO);
        for (k, part) in (1u32..).zip(parts) {
            if part.plan.shape != shape
                || part.ops.len() != out.ops.len()
                || part.link_stats.len() != out.link_stats.len()
            {
                return Err(ExecError::Sync("the steps to join did not run the same shape on the same devices".into()));
            }
            let at = |t: SimTime| t + offset;
            let mb = k * m;
            // An update is numbered by its step; other device work (encode:
            // the bucket) keeps its number.
            let plan_op = |op: Op| match op.kind {
                OpKind::Update => Op { micro_batch: k, ..op },
                kind if kind.is_device_work() => op,
                _ => Op { micro_batch: op.micro_batch + mb, ..op },
            };
            for (d, ops) in part.plan.per_device.iter().enumerate() {
                out.plan.per_device[d].extend(ops.iter().map(|&op| plan_op(op)));
            }
            for (w, recs) in part.ops.iter().enumerate() {
                out.ops[w].extend(recs.iter().map(|r| OpRecord {
                    op: plan_op(r.op),
                    start: at(r.start),
                    end: at(r.end),
                }));
            }
            out.transfers.extend(part.transfers.iter().map(|r| TransferRecord {
                micro_batch: r.micro_batch + mb,
                start: at(r.start),
                sent: at(r.sent),
                end: at(r.end),
                ..*r
            }));
            for (a, b) in out.link_stats.iter_mut().zip(&part.link_stats) {
                a.bytes += b.bytes;
                a.busy_ns += b.busy_ns;
                a.peak_concurrent = a.peak_concurrent.max(b.peak_concurrent);
            }
            out.events += part.events;
            let coll_base = out.collectives.len() as u32;
            out.collectives.extend(part.collectives.iter().map(|c| {
                CollectiveRecord {
                    start: at(c.start),
                    end: at(c.end),
                    waited: c
                        .waited
                        .iter()
                        .map(|w| match *w {
                            Waited::Gradient { worker, at: t } => Waited::Gradient { worker, at: at(t) },
                            Waited::Update { worker, at: t } => Waited::Update { worker, at: at(t) },
                            Waited::Collective(k) => Waited::Collective(k + coll_base),
                        })
                        .collect(),
                    ..c.clone()
                }
            }));
            out.sync_transfers.extend(part.sync_transfers.iter().map(|r| SyncTransferRecord {
                collective: r.collective + coll_base,
                start: at(r.start),
                sent: at(r.sent),
                end: at(r.end),
                ..*r
            }));
            for (a, b) in out.device_end.iter_mut().zip(&part.device_end) {
                *a = at(*b);
            }
            for (a, b) in out.last_collective.iter_mut().zip(&part.last_collective) {
                if let Some(c) = b {
                    *a = Some(c + coll_base);
                }
            }
            out.tensor_transfers.extend(part.tensor_transfers.iter().map(|r| TensorTransferRecord {
                op: plan_op(r.op),
                start: at(r.start),
                sent: at(r.sent),
                end: at(r.end),
                ..*r
            }));
            for (a, b) in out.tensor_comm_ns.iter_mut().zip(&part.tensor_comm_ns) {
                *a += b;
            }
            offset = out.end().saturating_since(SimTime::ZERO);
        }
        // The dense indices, for the joined shape.
        let steps = out.plan.per_device.first().map_or(1, |o| o.len() / shape.ops_per_device().max(1)) as u32;
        let joined = Shape { micro_batches: m * steps.max(1), ..shape };
        out.plan.shape = joined;
        let (p, t, replicas) = (shape.stages as usize, out.tensor.max(1) as usize, out.replicas.max(1) as usize);
        let slots = joined.op_slots();
        let mut op_index = vec![(0u32, 0u32); slots * replicas];
        for g in 0..out.ops.len() / t {
            let base = (g / p) * slots;
            for (i, r) in out.ops[g * t].iter().enumerate() {
                if !r.op.kind.is_device_work() {
                    op_index[base + joined.op_index(r.op)] = ((g * t) as u32, i as u32);
                }
            }
        }
        // A producer's first transfer: transfers run in start order, so the
        // first record of an op's output is the one the index keeps.
        let mut transfer_index = vec![NONE; slots * replicas];
        for (i, r) in out.transfers.iter().enumerate().rev() {
            let replica = (r.src as usize / t) / p;
            transfer_index[replica * slots + joined.op_index(r.producer())] = i as u32;
        }
        out.op_index = op_index;
        out.transfer_index = transfer_index;
        Ok(out)
    }
}

/// Why a step could not be simulated.
#[derive(Debug, Error, PartialEq)]
pub enum ExecError {
    /// The plan is not well formed.
    #[error("invalid schedule: {0}")]
    Schedule(#[from] ScheduleError),
    /// Not one cost per virtual stage.
    #[error("{found} stage costs given for {expected} virtual stages")]
    CostCount {
        /// Costs given.
        found: usize,
        /// Virtual stages.
        expected: usize,
    },
    /// The topology joins fewer devices than the step uses.
    #[error("the topology joins {devices} devices, but the step uses {stages}")]
    TopologyDevices {
        /// Devices in the topology.
        devices: u32,
        /// Devices the step uses (pipeline stages x replicas, plus dedicated
        /// servers).
        stages: u32,
    },
    /// The synchronisation settings do not fit the plan.
    #[error("gradient synchronisation: {0}")]
    Sync(String),
    /// A collective cannot be built for its group.
    #[error("gradient synchronisation: {0}")]
    Collective(#[from] baton_collective::CollectiveError),
    /// The compute-time jitter is out of range.
    #[error("jitter must be at least 0 and below 1, found {0}")]
    Jitter(f64),
    /// The simulation ended with work left (an internal fault: a valid plan
    /// always completes).
    #[error("the step stopped with operations left: device {device} waits at {op}")]
    Stuck {
        /// A device with work left.
        device: u32,
        /// The op it waits at.
        op: Op,
    },
}

/// The executor's fixed events.
#[derive(Clone, Copy, Debug)]
pub enum Event {
    /// The op a device was running has ended.
    OpDone(u32),
    /// The transfer at this index of the trace has arrived.
    Arrival(u32),
    /// The collective transfer at this index of the trace has arrived.
    SyncArrival(u32),
    /// A compute segment of a tensor-parallel op has ended on this worker.
    SegmentDone(u32),
    /// The tensor-parallel transfer at this index of the trace has arrived.
    TensorArrival(u32),
    /// A gradient bucket (global bucket index) has become final on a worker.
    BucketReady {
        /// The worker.
        worker: u32,
        /// The bucket, numbered across pieces.
        bucket: u32,
    },
}

/// The executor's movable deadlines, one per source that needs one.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Deadline {
    /// The link network's next transfer completion.
    Network,
}

/// Marks an in-flight network transfer as a collective's (its index in
/// `sync_transfers`) rather than the pipeline's.
const SYNC_BIT: u32 = 1 << 31;
/// Marks an in-flight network transfer as a tensor-parallel all-reduce's.
const TENSOR_BIT: u32 = 1 << 30;

/// The data crossing between devices: the link network and the records of
/// what it carried.
struct Transfers {
    net: Network,
    /// When the network's deadline is set for (as last told by settle).
    deadline: Option<SimTime>,
    records: Vec<TransferRecord>,
    /// Per replica and `Shape::op_index` of the producer: index in
    /// `records`, or NONE.
    index: Vec<u32>,
    /// Per network transfer id: index in `records`, or in the collectives'
    /// transfers with [`SYNC_BIT`] set.
    in_flight: Vec<u32>,
    blocking_sends: bool,
    /// Per worker: sends not yet delivered (only counted when sends block).
    pending_sends: Vec<u32>,
    /// Scratch list of transfers whose last byte has left.
    due: Vec<TransferId>,
    /// With link jitter: its amount and the generator its factors come
    /// from (the seed's stream `2 * stream + 1`), drawn as transfers start.
    link_jitter: Option<(f64, baton_engine::SimRng)>,
}

impl Transfers {
    /// Hands `out`'s data from `producer` (on worker `src`) to its consumer on
    /// worker `dst`, at `now`: a transfer of the boundary's bytes.
    /// With tensor groups of `t`, rank k of worker `src` sends its share to
    /// rank k of worker `dst`: `t` transfers, recorded one after another.
    #[allow(clippy::too_many_arguments)]
    fn send(
        &mut self,
        now: SimTime,
        slot: usize,
        costs: &[StageCost],
        producer: Op,
        out: Edge,
        src: u32,
        dst: u32,
        t: u32,
    ) {
        let boundary = producer.stage.min(out.op.stage);
        let bytes = costs[boundary as usize].send_bytes;
        self.index[slot] = self.records.len() as u32;
        if self.blocking_sends {
            self.pending_sends[src as usize] += t;
        }
        for k in 0..t {
            let (from, to) = (src * t + k, dst * t + k);
            let rec = self.records.len() as u32;
            self.records.push(TransferRecord {
                flow: out.flow,
                micro_batch: producer.micro_batch,
                from_stage: producer.stage,
                to_stage: out.op.stage,
                producer_kind: producer.kind,
                consumer_kind: out.op.kind,
                src: from,
                dst: to,
                bytes,
                start: now,
                sent: now,
                end: now,
                bottleneck: None,
            });
            self.start(now, from, to, bytes, rec);
        }
    }

    /// Starts `bytes` from `src` to `dst` on the network, remembering `tag`.
    fn start(&mut self, now: SimTime, src: u32, dst: u32, bytes: u64, tag: u32) {
        let factor = match &mut self.link_jitter {
            Some((j, rng)) => {
                use rand::RngExt;
                rng.random_range(1.0 - *j..=1.0 + *j)
            }
            None => 1.0,
        };
        let t = self.net.start_varied(now, src, dst, bytes, factor).0 as usize;
        if self.in_flight.len() <= t {
            self.in_flight.resize(t + 1, NONE);
        }
        self.in_flight[t] = tag;
    }
}

/// Device work outside the plan waiting for its device, and what follows it.
#[derive(Clone, Copy, Debug)]
struct Work {
    op: Op,
    duration: SimDuration,
    then: sync::Then,
}

struct Executor<'a> {
    plan: &'a Plan,
    /// The plan's shape, kept by value for the inner loop.
    shape: Shape,
    costs: &'a [StageCost],
    /// Pipeline devices per replica.
    p: usize,
    /// Dense op slots per replica.
    slots: usize,
    next: Vec<usize>,
    busy: Vec<bool>,
    /// Per replica and `Shape::op_index`: inputs not yet satisfied (an input
    /// from another stage counts once per tensor rank sending a share).
    waiting: Vec<u16>,
    ops: Vec<Vec<OpRecord>>,
    transfers: Transfers,
    /// Per worker and op: the factor its compute time is scaled by.
    jitter: Option<Vec<Vec<f64>>>,
    /// Per worker: device work queued ahead of its next plan op.
    work: Vec<VecDeque<Work>>,
    /// Per worker: what follows the device work it is running, if any.
    running_work: Vec<Option<sync::Then>>,
    /// Per worker: when its step ended so far.
    device_end: Vec<SimTime>,
    /// Workers that run plan ops (all, or replica 0's when the others
    /// mirror it).
    playing: usize,
    sync: Option<sync::State>,
    /// Devices per tensor group.
    t: usize,
    tensor: Option<tensor::State>,
    /// Updates inside a run of several steps (only when they take time).
    step_updates: Option<StepUpdates>,
    /// Per worker: step updates queued so far.
    updates_done: Vec<u32>,
}

type Sched = Scheduler<Event, Deadline>;

impl Executor<'_> {
    fn try_start(&mut self, w: usize, sched: &mut Sched) {
        if self.busy[w] || self.transfers.pending_sends[w] > 0 {
            return;
        }
        let now = sched.now();
        if let Some(work) = self.work[w].pop_front() {
            self.busy[w] = true;
            self.running_work[w] = Some(work.then);
            self.ops[w].push(OpRecord { op: work.op, start: now, end: now + work.duration });
            sched.schedule(now + work.duration, Event::OpDone(w as u32));
            return;
        }
        if w >= self.playing {
            return;
        }
        let (r, d) = (w / self.p, w % self.p);
        let Some(&op) = self.plan.per_device[d].get(self.next[w]) else { return };
        if self.waiting[r * self.slots + self.shape.op_index(op)] != 0 {
            return;
        }
        let factor = self.jitter.as_ref().map_or(1.0, |f| f[w][self.next[w]]);
        if self.tensor.as_ref().is_some_and(|t| t.segments(op).is_some()) {
            self.busy[w] = true;
            self.ops[w].push(OpRecord { op, start: now, end: now });
            if self.sync.is_some() {
                self.sync_op_started(w, self.next[w], now, None, sched);
                // (buckets follow the segments: see sync_segment_done)
            }
            self.start_segments(w, op, factor, sched);
            return;
        }
        let mut dur = self.costs[op.stage as usize].time(op.kind);
        if self.jitter.is_some() {
            dur = SimDuration((dur.as_ns() as f64 * factor).round() as u64);
        }
        self.busy[w] = true;
        self.ops[w].push(OpRecord { op, start: now, end: now + dur });
        sched.schedule(now + dur, Event::OpDone(w as u32));
        if self.sync.is_some() {
            self.sync_op_started(w, self.next[w], now, Some(dur), sched);
        }
    }

    fn op_done(&mut self, w: usize, sched: &mut Sched) {
        let shape = self.shape;
        let now = sched.now();
        self.busy[w] = false;
        self.device_end[w] = self.device_end[w].max(now);
        if let Some(then) = self.running_work[w].take() {
            self.work_done(w, then, sched);
            self.try_start(w, sched);
            return;
        }
        let (r, d) = (w / self.p, w % self.p);
        let index = self.next[w];
        let op = self.plan.per_device[d][index];
        self.next[w] += 1;
        let base = r * self.slots;
        // Outputs on this device are satisfied now; the others are
        // sent, in output order (two fit without allocating).
        let (mut near, mut far) = ([None; 2], Vec::new());
        let mut n = 0;
        let t = self.t;
        let waiting = &mut self.waiting;
        op.each_output(&shape, |out| {
            // Within a stage nothing moves; across stages, only to
            // another device.
            let crosses = out.flow.crosses_stages();
            let to = if crosses { shape.device_of(out.op.stage) as usize } else { d };
            if to == d {
                waiting[base + shape.op_index(out.op)] -= if crosses { t as u16 } else { 1 };
            } else if n < near.len() {
                near[n] = Some((out, to));
                n += 1;
            } else {
                far.push((out, to));
            }
        });
        let slot = base + shape.op_index(op);
        let first = r * self.p;
        for (out, to) in near.into_iter().flatten().chain(far) {
            self.transfers.send(now, slot, self.costs, op, out, w as u32, (first + to) as u32, t as u32);
        }
        if self.sync.is_some() {
            self.sync_op_done(w, index, sched);
        }
        if let Some(u) = &self.step_updates {
            let k = self.updates_done[w];
            if u.after[d].get(k as usize) == Some(&(index as u32)) {
                self.updates_done[w] += 1;
                let op = Op { kind: OpKind::Update, micro_batch: k, stage: d as u32 };
                self.work[w].push_back(Work { op, duration: u.duration, then: sync::Then::StepUpdated });
            }
        }
        self.try_start(w, sched);
    }
}

impl Model for Executor<'_> {
    type Event = Event;
    type Key = Deadline;

    fn handle(&mut self, fired: Fired<Event, Deadline>, sched: &mut Sched) {
        let shape = self.shape;
        match fired {
            Fired::Event(Event::OpDone(w)) => self.op_done(w as usize, sched),
            Fired::Deadline(Deadline::Network) => {
                let tr = &mut self.transfers;
                tr.deadline = None;
                let now = sched.now();
                let mut due = std::mem::take(&mut tr.due);
                due.clear();
                tr.net.take_due(now, &mut due);
                for &tid in &due {
                    let fin = tr.net.finish(now, tid);
                    let rec = tr.in_flight[tid.0 as usize];
                    let bottleneck = fin.bottleneck.map(|l| l.0);
                    if rec & TENSOR_BIT != 0 && rec & SYNC_BIT == 0 {
                        let i = rec & !TENSOR_BIT;
                        if let Some(st) = self.tensor.as_mut() {
                            let t = &mut st.records[i as usize];
                            t.sent = now;
                            t.bottleneck = bottleneck;
                        }
                        sched.schedule(fin.delivered_at, Event::TensorArrival(i));
                    } else if rec & SYNC_BIT != 0 {
                        let i = rec & !SYNC_BIT;
                        if let Some(st) = self.sync.as_mut() {
                            let t = &mut st.transfers[i as usize];
                            t.sent = now;
                            t.bottleneck = bottleneck;
                        }
                        sched.schedule(fin.delivered_at, Event::SyncArrival(i));
                    } else {
                        let t = &mut tr.records[rec as usize];
                        t.sent = now;
                        t.bottleneck = bottleneck;
                        sched.schedule(fin.delivered_at, Event::Arrival(rec));
                    }
                }
                tr.due = due;
            }
            Fired::Event(Event::Arrival(rec)) => {
                let now = sched.now();
                let t = &mut self.transfers.records[rec as usize];
                t.end = now;
                let (consumer, src, dst) = (t.consumer(), t.src as usize / self.t, t.dst as usize / self.t);
                let r = dst / self.p;
                self.waiting[r * self.slots + shape.op_index(consumer)] -= 1;
                self.try_start(dst, sched);
                if self.transfers.blocking_sends {
                    self.transfers.pending_sends[src] -= 1;
                    self.try_start(src, sched);
                }
            }
            Fired::Event(Event::SyncArrival(i)) => self.sync_arrival(i, sched),
            Fired::Event(Event::SegmentDone(w)) => self.segment_done(w as usize, sched),
            Fired::Event(Event::TensorArrival(i)) => self.tensor_arrival(i, sched),
            Fired::Event(Event::BucketReady { worker, bucket }) => self.bucket_ready(worker, bucket, sched),
        }
        // Collectives whose buckets became ready this instant start once
        // every event of the instant is in (so equal times go in piece and
        // bucket order); then bandwidth is handed out, and the network's
        // deadline kept where it says.
        if sched.peek_time() != Some(sched.now()) && self.sync.is_some() {
            self.start_ready_collectives(sched);
        }
        let tr = &mut self.transfers;
        if tr.net.needs_settle() && sched.peek_time() != Some(sched.now()) {
            let next = tr.net.settle(sched.now());
            if next != tr.deadline {
                match next {
                    Some(t) => sched.set_deadline(Deadline::Network, t),
                    None => {
                        sched.cancel_deadline(&Deadline::Network);
                    }
                }
                tr.deadline = next;
            }
        }
    }
}

/// How a step is run: compute-time variation and whether sends block.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct RunOptions {
    /// Each op's compute time is scaled by a factor drawn uniformly from
    /// `[1 - jitter, 1 + jitter]`; 0 means every op takes exactly its cost.
    pub jitter: f64,
    /// Seed of the generator the factors are drawn from, in plan order
    /// (worker 0's ops in order, then worker 1's, ...), so the draws do not
    /// depend on timing.
    pub seed: u64,
    /// A device that sends data to another device waits until the data has
    /// arrived before it starts its next operation (blocking point-to-point
    /// sends); by default sends run beside compute.
    pub blocking_sends: bool,
    /// Play replica 0's pipeline only and let every other replica mirror it
    /// (its buckets ready, its compute done at the same instants), while
    /// the gradient collectives run among all replicas on the full
    /// topology. Exact only when the replicas cannot tell each other apart
    /// (no jitter, each replica's pipeline on links of its own with the same
    /// speeds); the caller decides.
    pub one_replica: bool,
    /// Devices (topology device ids, `w * t + k`) whose every op takes this
    /// many times longer; a tensor group runs at its slowest rank's pace.
    pub stragglers: Vec<(u32, f64)>,
    /// The chance that an op is a rare slow one, drawn per op after its
    /// jitter factor from the same generator.
    pub slow_chance: f64,
    /// How many times longer a rare slow op takes.
    pub slow_factor: f64,
    /// Each transfer's latency and the time its bytes take are scaled by a
    /// factor drawn uniformly from `[1 - link_jitter, 1 + link_jitter]`, as
    /// transfers start, from a stream of the seeded generator of their own
    /// (so compute draws stay as they are); 0: none.
    pub link_jitter: f64,
    /// Which of the seed's streams the draws come from: compute factors
    /// from stream `2 * stream`, link factors from `2 * stream + 1` (0: the
    /// seed's first two; flushed step `k` of several uses `k`, so steps
    /// and `--trials` draws never share their numbers).
    pub stream: u64,
    /// The caller vouches that the plan is well formed (made by
    /// `baton_schedule::build`, or read by `order::parse`, which checks
    /// it): [`validate`] is not run again. Leave `false` for any other plan.
    pub plan_checked: bool,
    /// Several steps in one plan: where each worker updates its weights.
    /// Only without gradient synchronisation (whose own update ends a
    /// single step).
    pub step_updates: Option<StepUpdates>,
}

/// Optimizer updates inside a plan of several consecutive steps: device
/// work of kind `update` (micro-batch = the step) that a device runs right
/// after the op at each listed position of its order, before its next op.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct StepUpdates {
    /// Per pipeline device: the positions in its order after which it
    /// updates, ascending (see `baton_schedule::steps::update_positions`).
    pub after: Vec<Vec<u32>>,
    /// Time of one update (0: nothing is recorded).
    pub duration: SimDuration,
}

/// Simulates one step of `plan` with every op taking exactly its cost.
///
/// `costs[s]` is virtual stage `s`'s cost; topology device `d` is pipeline
/// device `d` (the topology carries where each is placed on the cluster).
pub fn simulate(plan: Plan, costs: &[StageCost], topology: Topology) -> Result<Trace, ExecError> {
    simulate_with(plan, costs, topology, RunOptions::default())
}

/// [`simulate`] with compute times varied and sends blocking as `options` say.
pub fn simulate_with(
    plan: Plan,
    costs: &[StageCost],
    topology: Topology,
    options: RunOptions,
) -> Result<Trace, ExecError> {
    simulate_step(plan, costs, topology, options, None)
}

/// [`simulate_with`] for `sync.replicas` replicas of the pipeline whose
/// gradients are synchronised as `sync` says (`None`: one pipeline, no
/// synchronisation). Topology device `r * p + d` is replica `r`'s pipeline
/// device `d`; dedicated parameter servers follow the replicas' devices.
pub fn simulate_step(
    plan: Plan,
    costs: &[StageCost],
    topology: Topology,
    options: RunOptions,
    sync: Option<&SyncConfig>,
) -> Result<Trace, ExecError> {
    simulate_parallel(plan, costs, topology, options, sync, None)
}

/// [`simulate_step`] with each stage run by a tensor-parallel group of
/// `tensor.ranks` devices (`None` or one rank: one device per stage).
/// Topology device `(r * p + d) * t + k` is rank `k` of replica `r`'s
/// pipeline device `d`; dedicated servers follow.
pub fn simulate_parallel(
    plan: Plan,
    costs: &[StageCost],
    topology: Topology,
    options: RunOptions,
    sync: Option<&SyncConfig>,
    tensor: Option<&TensorConfig>,
) -> Result<Trace, ExecError> {
    if !options.plan_checked {
        validate(&plan)?;
    }
    let t = tensor.map_or(1, |c| c.ranks.max(1)) as usize;
    if t > 4096 {
        return Err(ExecError::Sync(format!("{t} devices per tensor group is more than 4096")));
    }
    if let Some(c) = tensor {
        if c.segments.len() != costs.len() {
            return Err(ExecError::CostCount { found: c.segments.len(), expected: costs.len() });
        }
    }
    if !(0.0..1.0).contains(&options.jitter) {
        return Err(ExecError::Jitter(options.jitter));
    }
    if !(0.0..1.0).contains(&options.link_jitter) {
        return Err(ExecError::Jitter(options.link_jitter));
    }
    let shape = plan.shape;
    let n_stages = shape.virtual_stages() as usize;
    let p = shape.stages as usize;
    let replicas = sync.map_or(1, |s| s.replicas.max(1)) as usize;
    let workers = p * replicas;
    if costs.len() != n_stages {
        return Err(ExecError::CostCount { found: costs.len(), expected: n_stages });
    }
    let needed = (workers * t) as u32 + sync.map_or(0, |s| s.dedicated_servers());
    if topology.devices() < needed {
        return Err(ExecError::TopologyDevices { devices: topology.devices(), stages: needed });
    }
    if options.slow_chance > 0.0 && !(options.slow_chance <= 1.0 && options.slow_factor >= 1.0) {
        return Err(ExecError::Jitter(options.slow_chance));
    }
    if let Some(u) = &options.step_updates {
        if sync.is_some() {
            return Err(ExecError::Sync(
                "updates inside a run of steps cannot be combined with gradient synchronisation".into(),
            ));
        }
        if u.after.len() != p
            || u.after.iter().enumerate().any(|(d, a)| {
                a.windows(2).any(|w| w[0] >= w[1]) || a.last().is_some_and(|&i| i as usize >= plan.per_device[d].len())
            })
        {
            return Err(ExecError::Sync("step updates must list ascending positions of each device's order".into()));
        }
    }
    let varied = options.jitter > 0.0 || options.slow_chance > 0.0 || !options.stragglers.is_empty();
    let jitter = varied.then(|| {
        use rand::RngExt;
        let mut rng = baton_engine::seeded_stream(options.seed, 2 * options.stream);
        let (j, chance) = (options.jitter, options.slow_chance);
        // A worker's group runs at its slowest rank's pace.
        let slowdown = |w: usize| {
            options.stragglers.iter().filter(|&&(d, _)| (d as usize) / t == w).map(|&(_, f)| f).fold(1.0f64, f64::max)
        };
        (0..workers)
            .map(|w| {
                let fixed = slowdown(w);
                plan.per_device[w % p]
                    .iter()
                    .map(|_| {
                        let mut f = if j > 0.0 { rng.random_range(1.0 - j..=1.0 + j) } else { 1.0 };
                        if chance > 0.0 && rng.random_range(0.0..1.0) < chance {
                            f *= options.slow_factor;
                        }
                        f * fixed
                    })
                    .collect()
            })
            .collect()
    });
    let slots = shape.op_slots();
    // Each op's inputs, counted in dense-index order, for every replica.
    let mut waiting = Vec::with_capacity(slots * replicas);
    for &kind in shape.kinds() {
        for micro_batch in 0..shape.micro_batches {
            for stage in 0..shape.virtual_stages() {
                let mut n = 0u16;
                Op { kind, micro_batch, stage }
                    .each_input(&shape, |e| n += if e.flow.crosses_stages() { t as u16 } else { 1 });
                waiting.push(n);
            }
        }
    }
    for _ in 1..replicas {
        waiting.extend_from_within(..slots);
    }
    let link_names =
        (0..topology.link_count()).map(|l| topology.link_name(baton_link::LinkId(l as u32)).to_string()).collect();
    let link_bytes_per_s =
        (0..topology.link_count()).map(|l| topology.link(baton_link::LinkId(l as u32)).bytes_per_s).collect();
    let cluster_devices = (0..(workers * t) as u32).map(|d| topology.cluster_device(d)).collect();
    let sync_state = match sync {
        Some(cfg) => Some(sync::State::new(cfg, &plan, costs.len(), t as u32)?),
        None => None,
    };
    let mut exec = Executor {
        plan: &plan,
        shape,
        costs,
        p,
        slots,
        next: vec![0; workers],
        busy: vec![false; workers],
        waiting,
        ops: (0..workers).map(|w| Vec::with_capacity(plan.per_device[w % p].len())).collect(),
        transfers: Transfers {
            net: Network::new(topology),
            deadline: None,
            records: Vec::with_capacity(slots * replicas),
            index: vec![NONE; slots * replicas],
            in_flight: Vec::new(),
            blocking_sends: options.blocking_sends,
            pending_sends: vec![0; workers],
            due: Vec::new(),
            link_jitter: (options.link_jitter > 0.0)
                .then(|| (options.link_jitter, baton_engine::seeded_stream(options.seed, 2 * options.stream + 1))),
        },
        jitter,
        work: vec![VecDeque::new(); workers],
        running_work: vec![None; workers],
        device_end: vec![SimTime::ZERO; workers],
        playing: if options.one_replica && sync.is_some() { p } else { workers },
        sync: sync_state,
        t,
        tensor: tensor.filter(|_| t > 1).map(|c| tensor::State::new(c.clone(), workers)),
        step_updates: options.step_updates.clone().filter(|u| u.duration > SimDuration::ZERO),
        updates_done: vec![0; workers],
    };
    let mut sched = Scheduler::with_capacity(2 * workers + 16);
    for w in 0..workers {
        exec.try_start(w, &mut sched);
    }
    baton_engine::run(&mut exec, &mut sched);
    for w in 0..exec.playing {
        if let Some(&op) = plan.per_device[w % p].get(exec.next[w]) {
            return Err(ExecError::Stuck { device: w as u32, op });
        }
    }
    // Mirrored replicas ran replica 0's ops at the same times (and their own
    // device work).
    if exec.playing < workers {
        for w in exec.playing..workers {
            let mut recs = exec.ops[w % p].iter().filter(|r| !r.op.kind.is_device_work()).copied().collect::<Vec<_>>();
            recs.extend(exec.ops[w].iter().copied());
            recs.sort_by_key(|r| (r.start, r.end));
            exec.ops[w] = recs;
            exec.device_end[w] = exec.device_end[w].max(exec.device_end[w % p]);
        }
    }
    let (collectives, sync_transfers, last_collective) = match exec.sync.take() {
        Some(st) => st.finish(workers)?,
        None => (Vec::new(), Vec::new(), vec![None; workers]),
    };
    let mut op_index = vec![(0u32, 0u32); slots * replicas];
    for (w, recs) in exec.ops.iter().enumerate() {
        let base = (w / p) * slots;
        for (i, r) in recs.iter().enumerate() {
            if !r.op.kind.is_device_work() {
                op_index[base + shape.op_index(r.op)] = ((w * t) as u32, i as u32);
            }
        }
    }
    let link_stats = exec.transfers.net.stats().to_vec();
    let (tensor_transfers, comm) = match exec.tensor.take() {
        Some(st) => (st.records, st.comm_ns),
        None => (Vec::new(), vec![0; workers]),
    };
    let Executor { ops, device_end, transfers: Transfers { records: transfers, index: transfer_index, .. }, .. } = exec;
    // Every rank of a group ran the group's ops at the same times.
    fn spread<T: Clone>(v: Vec<T>, t: usize) -> Vec<T> {
        if t == 1 {
            return v;
        }
        v.into_iter().flat_map(|x| std::iter::repeat_n(x, t)).collect()
    }
    let ops = spread(ops, t);
    let device_end = spread(device_end, t);
    let last_collective = spread(last_collective, t);
    let tensor_comm_ns = spread(comm, t);
    Ok(Trace {
        plan,
        ops,
        transfers,
        link_stats,
        link_names,
        link_bytes_per_s,
        cluster_devices,
        events: sched.delivered(),
        blocking_sends: options.blocking_sends,
        replicas: replicas as u32,
        collectives,
        sync_transfers,
        device_end,
        last_collective,
        tensor: t as u32,
        tensor_transfers,
        tensor_comm_ns,
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
        vec![StageCost::new(SimDuration(f), SimDuration(b), bytes); n]
    }

    #[test]
    fn single_device_runs_back_to_back() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(1, 3, 1)).unwrap();
        let tr = simulate(plan.clone(), &uniform(1, 10, 20, 0), ideal(1)).unwrap();
        assert_eq!(tr.step_time(), SimDuration(90));
        assert!(tr.transfers.is_empty());
    }

    #[test]
    fn two_stage_fill_drain_by_hand() {
        // p=2, m=2, forward 10, backward 20, no link cost (0 bytes, 0 latency).
        // Dev0: F0 0-10, F1 10-20; dev1: F0 10-20, F1 20-30, B0 30-50, B1 50-70;
        // dev0: B0 50-70, B1 70-90. Step 90.
        let plan = build(ScheduleKind::FillDrain, Shape::new(2, 2, 1)).unwrap();
        let tr = simulate(plan.clone(), &uniform(2, 10, 20, 0), ideal(2)).unwrap();
        let starts: Vec<u64> = tr.ops[0].iter().map(|r| r.start.0).collect();
        assert_eq!(starts, vec![0, 10, 50, 70]);
        let starts: Vec<u64> = tr.ops[1].iter().map(|r| r.start.0).collect();
        assert_eq!(starts, vec![10, 20, 30, 50]);
        assert_eq!(tr.step_time(), SimDuration(90));
        assert_eq!(tr.transfers.len(), 4);
        let dep = tr.dependency(Op::backward(1, 0)).unwrap();
        assert_eq!(
            (dep.flow, dep.producer_device, dep.produced_at, dep.available_at),
            (Flow::Gradient, 1, SimTime(70), SimTime(70))
        );
    }

    #[test]
    fn link_time_delays_the_consumer() {
        // 1000 bytes at 1 GB/s = 1000 ns, plus 500 ns latency, per hop.
        let plan = build(ScheduleKind::OneFOneB, Shape::new(2, 1, 1)).unwrap();
        let topo = Topology::full_mesh(2, LinkSpec { latency_ns: 500, bytes_per_s: 1_000_000_000 });
        let tr = simulate(plan.clone(), &uniform(2, 100, 200, 1000), topo).unwrap();
        // F0@0 0-100, send 100-1600, F0@1 1600-1700, B0@1 1700-1900, send 1900-3400, B0@0 3400-3600.
        assert_eq!(tr.step_time(), SimDuration(3600));
        assert_eq!(tr.transfers[0].sent, SimTime(1100));
        assert_eq!(tr.transfers[0].end, SimTime(1600));
    }

    #[test]
    fn errors_on_mismatched_inputs() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(2, 2, 1)).unwrap();
        assert_eq!(
            simulate(plan.clone(), &uniform(3, 1, 1, 0), ideal(2)).unwrap_err(),
            ExecError::CostCount { found: 3, expected: 2 }
        );
        assert_eq!(
            simulate(plan.clone(), &uniform(2, 1, 1, 0), ideal(1)).unwrap_err(),
            ExecError::TopologyDevices { devices: 1, stages: 2 }
        );
    }

    #[test]
    fn jitter_varies_times_within_bounds_and_repeats_with_the_seed() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(3, 6, 1)).unwrap();
        let run = |jitter, seed| {
            simulate_with(
                plan.clone(),
                &uniform(3, 1000, 2000, 0),
                ideal(3),
                RunOptions { jitter, seed, ..RunOptions::default() },
            )
            .unwrap()
        };
        let exact = simulate(plan.clone(), &uniform(3, 1000, 2000, 0), ideal(3)).unwrap();
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
            simulate_with(plan, &uniform(3, 1, 1, 0), ideal(3), RunOptions { jitter: 1.5, ..RunOptions::default() }),
            Err(ExecError::Jitter(_))
        ));
    }

    #[test]
    fn a_split_backward_runs_weight_passes_where_the_plan_puts_them() {
        // Worked by hand: two stages, one micro-batch, F 10, B 20, W 5, free
        // links. Device 1: F0 10-20, B0 20-40, W0 40-45. Device 0: F0 0-10,
        // B0 40-60 (the gradient is ready at 40), W0 60-65. Step 65.
        let shape = Shape { split_backward: true, ..Shape::new(2, 1, 1) };
        let plan = Plan {
            kind: ScheduleKind::FillDrain,
            shape,
            per_device: vec![
                vec![Op::forward(0, 0), Op::backward(0, 0), Op::weight(0, 0)],
                vec![Op::forward(0, 1), Op::backward(0, 1), Op::weight(0, 1)],
            ],
        };
        let cost = StageCost { weight: SimDuration(5), ..StageCost::new(SimDuration(10), SimDuration(20), 0) };
        let tr = simulate(plan, &[cost, cost], ideal(2)).unwrap();
        let times = |d: usize| tr.ops[d].iter().map(|r| (r.start.0, r.end.0)).collect::<Vec<_>>();
        assert_eq!(times(1), vec![(10, 20), (20, 40), (40, 45)]);
        assert_eq!(times(0), vec![(0, 10), (40, 60), (60, 65)]);
        assert_eq!(tr.step_time(), SimDuration(65));
        // The gradient B0@1 -> B0@0 is the one transfer back; W sends nothing.
        assert_eq!(tr.transfers.iter().filter(|t| t.flow == Flow::Gradient).count(), 1);
        assert!(tr.outgoing(Op::weight(0, 1)).is_none());
    }

    #[test]
    fn one_device_with_chunks_moves_nothing() {
        let plan = build(ScheduleKind::Interleaved, Shape::new(1, 2, 3)).unwrap();
        let tr = simulate(plan.clone(), &uniform(3, 10, 20, 99), ideal(1)).unwrap();
        assert!(tr.transfers.is_empty());
        assert_eq!(tr.step_time(), SimDuration(2 * 3 * 30));
    }
}
