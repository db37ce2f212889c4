//! # baton-schedule: per-device operation orders
//!
//! A schedule says, for `p` devices (one pipeline stage each), `m` micro-batches
//! and `v` model chunks per device, in which order each device runs its
//! operations: the forward or backward pass of micro-batch `i` on virtual stage
//! `s`. There are `p * v` virtual stages; virtual stage `s` lives on device
//! `s mod p` (so chunk `c` of device `d` is virtual stage `c * p + d`).
//!
//! Schedules provided ([`ScheduleKind`]):
//! * `fill-drain`: every forward, then every backward;
//! * `1f1b`: device `d` runs a warm-up of `min(p-d-1, m)` forwards, then
//!   alternates one forward and one backward, then drains the backwards;
//! * `interleaved`: 1F1B over `v` chunks per device (requires `m` to be a
//!   multiple of `p`).
//!
//! [`validate`] proves a plan is well formed: each device holds each of its own
//! operations exactly once, and the orders can all run to completion given the
//! data dependencies between stages.
//!
//! ## The dataflow has one owner
//!
//! What an operation needs and what it produces is written once, here:
//! [`Op::inputs`] and [`Op::outputs`] list, for any op, the ops it waits for
//! and the ops that wait for it, with what flows between them ([`Flow`]: an
//! activation or a gradient crossing a stage boundary, or nothing moving
//! within a stage). [`OpKind::stash`] says when an op takes or frees the
//! activations its stage keeps for the backward pass. The op kinds are data
//! ([`OpKind::ALL`]); a plan runs the kinds its [`Shape`] lists
//! ([`Shape::kinds`]: forward and backward, or forward, backward (input
//! gradient) and weight (weight gradient) when the backward pass is split).
//! [`Shape::op_index`] gives every op of a shape a dense index. The executor,
//! the trace, the report and the split planner all ask these; none restates
//! them.
//!
//! This crate deliberately knows nothing about time, durations, links or
//! devices' speed: it only orders work and says what depends on what.
#![warn(missing_docs)]

use std::fmt;
use std::str::FromStr;

use thiserror::Error;

pub mod auto;
pub mod order;
pub mod steps;

/// What an operation does: a forward pass, a backward pass (with a split
/// backward, only its input-gradient part), or a weight-gradient pass.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum OpKind {
    /// Forward pass of a micro-batch through a stage.
    Forward,
    /// Backward pass: the whole backward, or with a split backward the part
    /// that computes the gradient the previous stage needs.
    Backward,
    /// The weight-gradient part of a split backward pass, which nothing
    /// downstream waits for.
    Weight,
    /// Device work outside the plan: compressing gradients before a
    /// collective or decompressing them after it (micro-batch = bucket,
    /// stage = piece). No plan contains it and no op waits for it.
    Encode,
    /// Device work outside the plan: the optimizer update after the device's
    /// gradients are synchronised. No plan contains it and no op waits for it.
    Update,
}

/// What an op does to the activations its stage keeps from a micro-batch's
/// forward pass for its backward pass.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Stash {
    /// Takes them when it starts.
    TakeAtStart,
    /// Frees them when it ends.
    FreeAtEnd,
    /// Neither.
    Keep,
}

impl OpKind {
    /// Every kind, in index order.
    pub const ALL: [OpKind; 5] = [OpKind::Forward, OpKind::Backward, OpKind::Weight, OpKind::Encode, OpKind::Update];

    /// The kinds a plan can contain (the dense op index covers only these).
    pub const PLANNED: &'static [OpKind] = &[OpKind::Forward, OpKind::Backward, OpKind::Weight];

    /// The kinds of a plan whose backward pass is one op.
    pub const FUSED: &'static [OpKind] = &[OpKind::Forward, OpKind::Backward];

    /// The kinds of a plan whose backward pass is split in two.
    pub const SPLIT: &'static [OpKind] = &[OpKind::Forward, OpKind::Backward, OpKind::Weight];

    /// Position in [`OpKind::ALL`].
    #[inline]
    pub fn index(self) -> usize {
        self as usize
    }

    /// The name used in traces and reports.
    pub fn as_str(self) -> &'static str {
        match self {
            OpKind::Forward => "forward",
            OpKind::Backward => "backward",
            OpKind::Weight => "weight",
            OpKind::Encode => "encode",
            OpKind::Update => "update",
        }
    }

    /// The letter used in short op names (`F3@1`).
    pub fn letter(self) -> char {
        match self {
            OpKind::Forward => 'F',
            OpKind::Backward => 'B',
            OpKind::Weight => 'W',
            OpKind::Encode => 'E',
            OpKind::Update => 'U',
        }
    }

    /// When the op takes or frees its stage's stashed activations: a forward
    /// takes them as it starts, the backward frees them as it ends.
    #[inline]
    pub fn stash(self) -> Stash {
        match self {
            OpKind::Forward => Stash::TakeAtStart,
            OpKind::Backward => Stash::FreeAtEnd,
            OpKind::Weight | OpKind::Encode | OpKind::Update => Stash::Keep,
        }
    }

    /// Whether the kind is device work outside any plan (gradient
    /// synchronisation's encode and update), which has no place in the dense
    /// op index and no dataflow edges.
    #[inline]
    pub fn is_device_work(self) -> bool {
        matches!(self, OpKind::Encode | OpKind::Update)
    }
}

/// What flows from an op to an op that waits for it.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Flow {
    /// A stage's output activation, to the next stage's forward.
    Activation,
    /// The gradient of that activation, back to the previous stage's backward.
    Gradient,
    /// Nothing moves: both ops run on the same stage (a backward needs its
    /// forward's stash; a weight pass needs its backward's result).
    Within,
}

impl Flow {
    /// The name used in traces and reports.
    pub fn as_str(self) -> &'static str {
        match self {
            Flow::Activation => "activation",
            Flow::Gradient => "gradient",
            Flow::Within => "within",
        }
    }

    /// Whether data crosses a stage boundary (and so, between stages on
    /// different devices, a link).
    #[inline]
    pub fn crosses_stages(self) -> bool {
        self != Flow::Within
    }
}

/// One dependency of an op: the op on the other end and what flows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Edge {
    /// The producer (for [`Op::inputs`]) or the consumer (for [`Op::outputs`]).
    pub op: Op,
    /// What flows along it.
    pub flow: Flow,
}

/// Up to two edges, without allocating.
#[derive(Clone, Copy, Debug)]
pub struct Edges {
    items: [Option<Edge>; 2],
    at: usize,
}

impl Edges {
    fn of(a: Option<Edge>, b: Option<Edge>) -> Self {
        Edges { items: [a, b], at: 0 }
    }
}

impl Iterator for Edges {
    type Item = Edge;
    fn next(&mut self) -> Option<Edge> {
        while self.at < self.items.len() {
            self.at += 1;
            if let Some(e) = self.items[self.at - 1] {
                return Some(e);
            }
        }
        None
    }
}

/// One unit of work: a pass of one micro-batch through one virtual stage.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Op {
    /// What pass it is.
    pub kind: OpKind,
    /// The micro-batch, `0 .. m`.
    pub micro_batch: u32,
    /// Virtual stage, `0 .. p * v`.
    pub stage: u32,
}

impl Op {
    /// The forward pass of `micro_batch` through `stage`.
    #[inline]
    pub fn forward(micro_batch: u32, stage: u32) -> Self {
        Op { kind: OpKind::Forward, micro_batch, stage }
    }
    /// The backward pass of `micro_batch` through `stage`.
    #[inline]
    pub fn backward(micro_batch: u32, stage: u32) -> Self {
        Op { kind: OpKind::Backward, micro_batch, stage }
    }
    /// The weight-gradient pass of `micro_batch` on `stage`.
    #[inline]
    pub fn weight(micro_batch: u32, stage: u32) -> Self {
        Op { kind: OpKind::Weight, micro_batch, stage }
    }

    /// The ops this one waits for, and what flows from each: forward(i, s)
    /// needs forward(i, s-1)'s activation; backward(i, s) needs forward(i, s)
    /// and backward(i, s+1)'s gradient; weight(i, s) needs backward(i, s).
    /// (The rule is written once, in [`Op::each_input`].)
    pub fn inputs(self, shape: &Shape) -> Edges {
        let mut e = Edges::of(None, None);
        let mut n = 0;
        self.each_input(shape, |edge| {
            e.items[n] = Some(edge);
            n += 1;
        });
        e
    }

    /// The ops that wait for this one, and what flows to each (the mirror of
    /// [`Op::inputs`], over the kinds `shape` runs; written once, in
    /// [`Op::each_output`]).
    pub fn outputs(self, shape: &Shape) -> Edges {
        let mut e = Edges::of(None, None);
        let mut n = 0;
        self.each_output(shape, |edge| {
            e.items[n] = Some(edge);
            n += 1;
        });
        e
    }

    /// Calls `f` with each of [`Op::inputs`], in order, without building a
    /// list (for the executor's and validator's inner loops).
    #[inline]
    pub fn each_input(self, shape: &Shape, mut f: impl FnMut(Edge)) {
        let (i, s) = (self.micro_batch, self.stage);
        match self.kind {
            OpKind::Forward => {
                if s > 0 {
                    f(Edge { op: Op::forward(i, s - 1), flow: Flow::Activation });
                }
            }
            OpKind::Backward => {
                f(Edge { op: Op::forward(i, s), flow: Flow::Within });
                if s + 1 < shape.virtual_stages() {
                    f(Edge { op: Op::backward(i, s + 1), flow: Flow::Gradient });
                }
            }
            OpKind::Weight => f(Edge { op: Op::backward(i, s), flow: Flow::Within }),
            OpKind::Encode | OpKind::Update => {}
        }
    }

    /// Calls `f` with each of [`Op::outputs`], in order, without building a list.
    #[inline]
    pub fn each_output(self, shape: &Shape, mut f: impl FnMut(Edge)) {
        let (i, s) = (self.micro_batch, self.stage);
        match self.kind {
            OpKind::Forward => {
                if s + 1 < shape.virtual_stages() {
                    f(Edge { op: Op::forward(i, s + 1), flow: Flow::Activation });
                }
                f(Edge { op: Op::backward(i, s), flow: Flow::Within });
            }
            OpKind::Backward => {
                if s > 0 {
                    f(Edge { op: Op::backward(i, s - 1), flow: Flow::Gradient });
                }
                if shape.split_backward {
                    f(Edge { op: Op::weight(i, s), flow: Flow::Within });
                }
            }
            OpKind::Weight | OpKind::Encode | OpKind::Update => {}
        }
    }
}

impl fmt::Display for Op {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}{}@{}", self.kind.letter(), self.micro_batch, self.stage)
    }
}

/// The schedules baton knows.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum ScheduleKind {
    /// Every forward, then every backward.
    FillDrain,
    /// One forward, one backward after a warm-up.
    OneFOneB,
    /// 1F1B over several model chunks per device.
    Interleaved,
    /// Zero-bubble ZB-H1 (Qi et al., ICLR 2024, sec. 3): the backward split
    /// into B and W, each device deferring W passes into its bubbles, with
    /// 1F1B's peak memory.
    ZbH1,
    /// Zero-bubble ZB-H2 (same paper): more forwards in the warm-up and W
    /// passes deferred further, at up to `2p - 1` micro-batches in flight.
    ZbH2,
    /// A split-backward order built for the stage costs at hand
    /// ([`auto::candidates`]): forwards and input-gradient passes as early as
    /// their inputs and the in-flight limit allow, W passes into the waits.
    /// [`build`] makes it for equal unit costs.
    ZbAuto,
    /// An order the user wrote ([`order::parse`]); [`build`] cannot make it.
    Custom,
}

impl ScheduleKind {
    /// Every schedule [`build`] makes, in the order help texts list them
    /// (`custom`, read from a file, is not among them).
    pub const ALL: [ScheduleKind; 6] = [
        ScheduleKind::FillDrain,
        ScheduleKind::OneFOneB,
        ScheduleKind::Interleaved,
        ScheduleKind::ZbH1,
        ScheduleKind::ZbH2,
        ScheduleKind::ZbAuto,
    ];

    /// Every name a scenario may give: [`ScheduleKind::ALL`] and `custom`.
    pub const NAMED: [ScheduleKind; 7] = [
        ScheduleKind::FillDrain,
        ScheduleKind::OneFOneB,
        ScheduleKind::Interleaved,
        ScheduleKind::ZbH1,
        ScheduleKind::ZbH2,
        ScheduleKind::ZbAuto,
        ScheduleKind::Custom,
    ];

    /// The name used in scenario files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            ScheduleKind::FillDrain => "fill-drain",
            ScheduleKind::OneFOneB => "1f1b",
            ScheduleKind::Interleaved => "interleaved",
            ScheduleKind::ZbH1 => "zb-h1",
            ScheduleKind::ZbH2 => "zb-h2",
            ScheduleKind::ZbAuto => "zb-auto",
            ScheduleKind::Custom => "custom",
        }
    }

    /// Whether the schedule runs the weight-gradient pass (W) apart from the
    /// input-gradient pass (B). A `custom` order splits it when it holds W
    /// tokens (its plan's shape says so), and `zb-auto` may choose 1F1B's
    /// fused order when nothing splits better.
    pub fn splits_backward(self) -> bool {
        matches!(self, ScheduleKind::ZbH1 | ScheduleKind::ZbH2 | ScheduleKind::ZbAuto)
    }
}

impl fmt::Display for ScheduleKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for ScheduleKind {
    type Err = ScheduleError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        ScheduleKind::NAMED
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| ScheduleError::UnknownSchedule(s.to_string()))
    }
}

/// The size of a pipeline: devices (= stages), micro-batches, chunks per
/// device, and whether the backward pass is split into two ops.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Shape {
    /// `p`: pipeline stages, one device each.
    pub stages: u32,
    /// `m`: micro-batches per step.
    pub micro_batches: u32,
    /// `v`: model chunks per device.
    pub chunks: u32,
    /// Whether each backward pass is split into a backward (input gradient)
    /// and a weight (weight gradient) op.
    pub split_backward: bool,
}

impl Shape {
    /// A shape whose backward pass is one op.
    pub fn new(stages: u32, micro_batches: u32, chunks: u32) -> Self {
        Shape { stages, micro_batches, chunks, split_backward: false }
    }

    /// The op kinds every (micro-batch, virtual stage) runs.
    #[inline]
    pub fn kinds(&self) -> &'static [OpKind] {
        if self.split_backward {
            OpKind::SPLIT
        } else {
            OpKind::FUSED
        }
    }

    /// Size of the dense op index: one slot per kind the shape runs,
    /// micro-batch and virtual stage.
    #[inline]
    pub fn op_slots(&self) -> usize {
        self.kinds().len() * self.micro_batches as usize * self.virtual_stages() as usize
    }

    /// Dense index of `op`: `(kind * m + micro_batch) * S + stage`, below
    /// [`Shape::op_slots`] for the kinds the shape runs (its kinds are always
    /// the first ones of [`OpKind::ALL`], so a kind's index is its place).
    #[inline]
    pub fn op_index(&self, op: Op) -> usize {
        let s = self.virtual_stages() as usize;
        (op.kind.index() * self.micro_batches as usize + op.micro_batch as usize) * s + op.stage as usize
    }

    /// `p * v`.
    #[inline]
    pub fn virtual_stages(&self) -> u32 {
        self.stages * self.chunks
    }

    /// The device that runs virtual stage `stage`.
    #[inline]
    pub fn device_of(&self, stage: u32) -> u32 {
        stage % self.stages
    }

    /// Operations each device runs: one per kind, micro-batch and chunk.
    pub fn ops_per_device(&self) -> usize {
        self.kinds().len() * self.micro_batches as usize * self.chunks as usize
    }

    /// Operations in the whole plan.
    pub fn ops(&self) -> u64 {
        self.kinds().len() as u64 * self.micro_batches as u64 * self.virtual_stages() as u64
    }
}

/// Why a schedule could not be built or is not valid.
#[derive(Debug, Error, PartialEq, Eq)]
pub enum ScheduleError {
    /// A name that is no schedule.
    #[error("unknown schedule `{0}`; expected one of: fill-drain, 1f1b, interleaved, zb-h1, zb-h2, zb-auto, custom")]
    UnknownSchedule(String),
    /// A size of zero.
    #[error("{what} must be at least 1")]
    Zero {
        /// Which size.
        what: &'static str,
    },
    /// Chunks with a schedule that runs one per device.
    #[error("schedule {schedule} runs one chunk per device, but chunks = {chunks}; use `interleaved` for more")]
    ChunksNotSupported {
        /// The schedule.
        schedule: ScheduleKind,
        /// The chunks asked for.
        chunks: u32,
    },
    /// Interleaved with micro-batches not a multiple of stages.
    #[error(
        "interleaved needs micro_batches to be a multiple of stages: {micro_batches} is not a multiple of {stages}"
    )]
    NotMultiple {
        /// Micro-batches.
        micro_batches: u32,
        /// Stages.
        stages: u32,
    },
    /// More operations than a plan may hold.
    #[error("the plan is too large: {0} operations (at most {MAX_OPS})")]
    TooLarge(u64),
    /// Not one order per device.
    #[error("plan has {found} device orders, expected {expected}")]
    DeviceCount {
        /// Orders given.
        found: usize,
        /// Devices.
        expected: usize,
    },
    /// An op on a device its stage is not on.
    #[error("device {device} holds {op}, which belongs to device {owner}")]
    WrongDevice {
        /// The device holding it.
        device: u32,
        /// The op.
        op: Op,
        /// The device it belongs to.
        owner: u32,
    },
    /// An op outside the shape.
    #[error("device {device} holds {op}, which is out of range")]
    OutOfRange {
        /// The device holding it.
        device: u32,
        /// The op.
        op: Op,
    },
    /// An op held twice.
    #[error("device {device} holds {op} more than once")]
    Duplicate {
        /// The device holding it.
        device: u32,
        /// The op.
        op: Op,
    },
    /// An op held by no device.
    #[error("device {device} is missing {op}")]
    Missing {
        /// The device it belongs to.
        device: u32,
        /// The op.
        op: Op,
    },
    /// The orders wait on each other forever: a cycle of waits.
    #[error("deadlock: {}", wait_text(.cycle))]
    Deadlock {
        /// Each link of the cycle: a device stuck at an op, waiting for an op
        /// of the next link's device (the last waits for the first's).
        cycle: Vec<Wait>,
    },
    /// `custom` is read from an order file; it has no built-in order.
    #[error("schedule `custom` needs `pipeline.order`, a file of each device's order")]
    NeedsOrder,
    /// Consecutive steps that cannot run as asked (see [`steps`]).
    #[error("{0}")]
    Steps(String),
}

/// One link of a deadlock: `device` is stuck at position `index` of its
/// order, at op `at`, which waits for `needs` (not yet run, on another
/// device or later on the same one).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Wait {
    /// The device that waits.
    pub device: u32,
    /// Where in its order it is stuck (0-based).
    pub index: usize,
    /// The op it is stuck at.
    pub at: Op,
    /// The input `at` waits for.
    pub needs: Op,
}

fn wait_text(cycle: &[Wait]) -> String {
    let n = cycle.len();
    let links: Vec<String> = (0..n)
        .map(|k| {
            let w = cycle[k];
            let next = cycle[(k + 1) % n];
            let after = if next.at == w.needs { String::new() } else { format!(", which comes after {}", next.at) };
            format!("device {} waits at {} for {} on device {}{after}", w.device, w.at, w.needs, next.device)
        })
        .collect();
    links.join("; ")
}

/// Each device's ordered operations for one training step.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Plan {
    /// The schedule that made it.
    pub kind: ScheduleKind,
    /// Its size.
    pub shape: Shape,
    /// `per_device[d]` is device `d`'s order.
    pub per_device: Vec<Vec<Op>>,
}

/// Largest plan accepted (operations over all devices): keeps memory and time
/// bounded on any input (a simulation of this size needs about 1 GiB).
pub const MAX_OPS: u64 = 16 * 1024 * 1024;

/// Builds the plan for `kind` and `shape`; the result always passes [`validate`].
pub fn build(kind: ScheduleKind, shape: Shape) -> Result<Plan, ScheduleError> {
    // The zero-bubble schedules run W apart; the others fuse it into B.
    let shape = Shape { split_backward: kind.splits_backward(), ..shape };
    check_shape(kind, shape)?;
    let p = shape.stages;
    let per_device = (0..p)
        .map(|d| match kind {
            ScheduleKind::FillDrain => fill_drain(shape, d),
            ScheduleKind::OneFOneB => one_f_one_b(shape, d),
            ScheduleKind::Interleaved if shape.chunks == 1 => one_f_one_b(shape, d),
            ScheduleKind::Interleaved => interleaved(shape, d),
            ScheduleKind::ZbH1 => zero_bubble(shape, d, shape.stages - d - 1, d),
            ScheduleKind::ZbH2 => zero_bubble(shape, d, 2 * (shape.stages - d - 1), 2 * d),
            ScheduleKind::ZbAuto | ScheduleKind::Custom => Vec::new(),
        })
        .collect();
    match kind {
        ScheduleKind::Custom => Err(ScheduleError::NeedsOrder),
        ScheduleKind::ZbAuto => {
            let n = shape.stages as usize;
            let unit = auto::Costs { forward: vec![1; n], backward: vec![1; n], weight: vec![1; n], comm: vec![0; n] };
            Ok(auto::best_by_estimate(shape, &unit, shape.stages))
        }
        _ => Ok(Plan { kind, shape, per_device }),
    }
}

/// Checks the sizes a schedule needs, without building it.
pub fn check_shape(kind: ScheduleKind, shape: Shape) -> Result<(), ScheduleError> {
    if shape.stages == 0 {
        return Err(ScheduleError::Zero { what: "stages" });
    }
    if shape.micro_batches == 0 {
        return Err(ScheduleError::Zero { what: "micro_batches" });
    }
    if shape.chunks == 0 {
        return Err(ScheduleError::Zero { what: "chunks" });
    }
    let total = shape.ops();
    if total > MAX_OPS {
        return Err(ScheduleError::TooLarge(total));
    }
    match kind {
        ScheduleKind::FillDrain
        | ScheduleKind::OneFOneB
        | ScheduleKind::ZbH1
        | ScheduleKind::ZbH2
        | ScheduleKind::ZbAuto
            if shape.chunks != 1 =>
        {
            Err(ScheduleError::ChunksNotSupported { schedule: kind, chunks: shape.chunks })
        }
        ScheduleKind::Interleaved if shape.micro_batches % shape.stages != 0 => {
            Err(ScheduleError::NotMultiple { micro_batches: shape.micro_batches, stages: shape.stages })
        }
        _ => Ok(()),
    }
}

pub(crate) fn fill_drain(shape: Shape, d: u32) -> Vec<Op> {
    let m = shape.micro_batches;
    let mut ops = Vec::with_capacity(shape.ops_per_device());
    ops.extend((0..m).map(|i| Op::forward(i, d)));
    ops.extend((0..m).map(|i| Op::backward(i, d)));
    ops
}

pub(crate) fn one_f_one_b(shape: Shape, d: u32) -> Vec<Op> {
    let (p, m) = (shape.stages, shape.micro_batches);
    let warmup = (p - d - 1).min(m);
    let mut ops = Vec::with_capacity(shape.ops_per_device());
    ops.extend((0..warmup).map(|i| Op::forward(i, d)));
    for i in 0..(m - warmup) {
        ops.push(Op::forward(warmup + i, d));
        ops.push(Op::backward(i, d));
    }
    ops.extend((m - warmup..m).map(|i| Op::backward(i, d)));
    ops
}

/// A zero-bubble order for device `d` (Qi, Wan, Huang, Lin, "Zero Bubble
/// Pipeline Parallelism", ICLR 2024, sec. 3): `warmup` forwards, then one
/// forward and one input-gradient pass (B) at a time, the weight-gradient
/// pass (W) of micro-batch `j` deferred until `lag` later B passes have run
/// (filling the waits those B passes would otherwise leave), the last W
/// passes at the end. ZB-H1 is `warmup = p - d - 1` (1F1B's) and `lag = d`;
/// ZB-H2 `warmup = 2(p - d - 1)` and `lag = 2d`. These parameters are ours,
/// chosen to give the paper's bubbles with equal per-stage times (for
/// ZB-H1, `(p-1)(T_F + T_B - T_W)`) and its peak memory (`p`, and
/// `2p - 1`, micro-batches from F to B on the first device).
pub(crate) fn zero_bubble(shape: Shape, d: u32, warmup: u32, lag: u32) -> Vec<Op> {
    let m = shape.micro_batches;
    let warmup = warmup.min(m);
    let mut ops = Vec::with_capacity(shape.ops_per_device());
    let mut pending = std::collections::VecDeque::new();
    let mut backward = |ops: &mut Vec<Op>, j: u32| {
        ops.push(Op::backward(j, d));
        pending.push_back(j);
        while pending.len() > lag as usize {
            if let Some(w) = pending.pop_front() {
                ops.push(Op::weight(w, d));
            }
        }
    };
    ops.extend((0..warmup).map(|i| Op::forward(i, d)));
    for j in 0..(m - warmup) {
        ops.push(Op::forward(warmup + j, d));
        backward(&mut ops, j);
    }
    for j in (m - warmup)..m {
        backward(&mut ops, j);
    }
    ops.extend(pending.into_iter().map(|w| Op::weight(w, d)));
    ops
}

/// Interleaved 1F1B. The device's `k`-th forward (and, mirrored, its `k`-th
/// backward) walks the micro-batches in groups of `p`: a group of `p`
/// micro-batches goes through chunk 0, then the same group through chunk 1,
/// and so on; backwards visit the chunks in reverse. Device `d` warms up with
/// `2(p-d-1) + (v-1)p` forwards (all of them when `m = p`), then alternates.
fn interleaved(shape: Shape, d: u32) -> Vec<Op> {
    let (p, m, v) = (shape.stages, shape.micro_batches, shape.chunks);
    let total = m * v;
    let warmup = if m == p { total } else { (2 * (p - d - 1) + (v - 1) * p).min(total) };
    let group = p * v;
    let nth = |k: u32, kind: OpKind| {
        let in_group = k % group;
        let mut chunk = in_group / p;
        if kind == OpKind::Backward {
            chunk = v - 1 - chunk;
        }
        let micro_batch = (k / group) * p + in_group % p;
        Op { kind, micro_batch, stage: chunk * p + d }
    };
    let mut ops = Vec::with_capacity(shape.ops_per_device());
    ops.extend((0..warmup).map(|k| nth(k, OpKind::Forward)));
    for j in 0..(total - warmup) {
        ops.push(nth(warmup + j, OpKind::Forward));
        ops.push(nth(j, OpKind::Backward));
    }
    ops.extend((total - warmup..total).map(|k| nth(k, OpKind::Backward)));
    ops
}

/// `op` as a token of the order syntax: its kind's letter and micro-batch
/// (`F3`, `B3`, `W3`), and with several chunks per device `.chunk`
/// (`F3.1`).
pub fn order_token(op: Op, shape: &Shape) -> String {
    let chunk = op.stage / shape.stages.max(1);
    if shape.chunks > 1 {
        format!("{}{}.{chunk}", op.kind.letter(), op.micro_batch)
    } else {
        format!("{}{}", op.kind.letter(), op.micro_batch)
    }
}

/// `plan` in the order syntax: one line per device, `<device>: tok tok ...`.
pub fn order_text(plan: &Plan) -> String {
    let mut out = String::new();
    for (d, ops) in plan.per_device.iter().enumerate() {
        let tokens: Vec<String> = ops.iter().map(|&op| order_token(op, &plan.shape)).collect();
        out.push_str(&format!("{d}: {}\n", tokens.join(" ")));
    }
    out
}

/// Proves that `plan` is complete and can run to the end.
///
/// Every device must hold each of its operations (one of each kind the shape
/// runs, for each micro-batch on each of its virtual stages) exactly once and
/// nothing else; and executing the orders, each device strictly in its own
/// order, each op waiting for its [`Op::inputs`], must finish every
/// operation. Runs in time linear in the number of operations.
pub fn validate(plan: &Plan) -> Result<(), ScheduleError> {
    let shape = plan.shape;
    let p = shape.stages as usize;
    if plan.per_device.len() != p {
        return Err(ScheduleError::DeviceCount { found: plan.per_device.len(), expected: p });
    }
    let n_stages = shape.virtual_stages();
    let mut seen = vec![false; shape.op_slots()];
    for (d, ops) in plan.per_device.iter().enumerate() {
        let device = d as u32;
        for &op in ops {
            if op.stage >= n_stages || op.micro_batch >= shape.micro_batches || !shape.kinds().contains(&op.kind) {
                return Err(ScheduleError::OutOfRange { device, op });
            }
            let owner = shape.device_of(op.stage);
            if owner != device {
                return Err(ScheduleError::WrongDevice { device, op, owner });
            }
            if std::mem::replace(&mut seen[shape.op_index(op)], true) {
                return Err(ScheduleError::Duplicate { device, op });
            }
        }
    }
    for &kind in shape.kinds() {
        for micro_batch in 0..shape.micro_batches {
            for stage in 0..n_stages {
                let op = Op { kind, micro_batch, stage };
                if !seen[shape.op_index(op)] {
                    return Err(ScheduleError::Missing { device: shape.device_of(stage), op });
                }
            }
        }
    }

    // Completion: advance devices from a worklist; an op completing wakes the
    // devices of the ops that wait for it.
    let mut done = vec![false; shape.op_slots()];
    let mut next = vec![0usize; p];
    let mut work: Vec<usize> = (0..p).collect();
    let ready = |op: Op, done: &[bool]| {
        let mut all = true;
        op.each_input(&shape, |e| all &= done[shape.op_index(e.op)]);
        all
    };
    while let Some(d) = work.pop() {
        let ops = &plan.per_device[d];
        while next[d] < ops.len() && ready(ops[next[d]], &done) {
            let op = ops[next[d]];
            done[shape.op_index(op)] = true;
            next[d] += 1;
            op.each_output(&shape, |e| {
                if e.flow.crosses_stages() {
                    let to = shape.device_of(e.op.stage) as usize;
                    if to != d {
                        work.push(to);
                    }
                }
            });
        }
    }
    match (0..p).find(|&d| next[d] < plan.per_device[d].len()) {
        None => Ok(()),
        Some(start) => Err(ScheduleError::Deadlock { cycle: wait_cycle(plan, &next, &done, start) }),
    }
}

/// The cycle of waits among the stuck devices (`next[d]` is where device `d`
/// stopped; `done` marks the ops that ran), found by following, from device
/// `start`, each stuck op's first missing input to the device that owns it:
/// that device is stuck too (the input has not run), so the walk must come
/// back to a device it has seen.
fn wait_cycle(plan: &Plan, next: &[usize], done: &[bool], start: usize) -> Vec<Wait> {
    let shape = plan.shape;
    let mut seen = vec![usize::MAX; next.len()];
    let mut path: Vec<Wait> = Vec::new();
    let mut d = start;
    while seen[d] == usize::MAX {
        seen[d] = path.len();
        let at = plan.per_device[d][next[d]];
        let mut needs = None;
        at.each_input(&shape, |e| {
            if needs.is_none() && !done[shape.op_index(e.op)] {
                needs = Some(e.op);
            }
        });
        // A stuck op always has a missing input (otherwise it would have run).
        let Some(needs) = needs else { break };
        path.push(Wait { device: d as u32, index: next[d], at, needs });
        d = shape.device_of(needs.stage) as usize;
    }
    let from = seen[d].min(path.len());
    path.split_off(from)
}

/// Micro-batches whose stash each virtual stage holds at once at most, read
/// off the device orders: each device runs its ops one at a time, so counting
/// the ops that take a stash up and those that free one down, in order, gives
/// the peak.
pub fn peak_stashes(plan: &Plan) -> Vec<u64> {
    let n = plan.shape.virtual_stages() as usize;
    let (mut held, mut peak) = (vec![0u64; n], vec![0u64; n]);
    for ops in &plan.per_device {
        for op in ops {
            let s = op.stage as usize;
            match op.kind.stash() {
                Stash::TakeAtStart => {
                    held[s] += 1;
                    peak[s] = peak[s].max(held[s]);
                }
                Stash::FreeAtEnd => held[s] = held[s].saturating_sub(1),
                Stash::Keep => {}
            }
        }
    }
    peak
}

/// What each virtual stage holds at once, read off the device orders: the
/// pairs (micro-batches between their forward's start and their backward's
/// end, micro-batches between a split backward's end and its weight pass's
/// end) that no other point of the order exceeds in both. Memory on a stage
/// is at most the largest `a * stash + w * weight_stash` over its pairs (one
/// pair `(peak_stashes, 0)` with a fused backward).
pub fn peak_holds(plan: &Plan) -> Vec<Vec<(u64, u64)>> {
    let n = plan.shape.virtual_stages() as usize;
    let (mut a, mut w) = (vec![0u64; n], vec![0u64; n]);
    let mut front: Vec<Vec<(u64, u64)>> = vec![vec![(0, 0)]; n];
    let note = |front: &mut Vec<(u64, u64)>, x: (u64, u64)| {
        if front.iter().any(|&(p, q)| p >= x.0 && q >= x.1) {
            return;
        }
        front.retain(|&(p, q)| !(x.0 >= p && x.1 >= q));
        front.push(x);
    };
    for ops in &plan.per_device {
        for op in ops {
            let s = op.stage as usize;
            match op.kind {
                OpKind::Forward => a[s] += 1,
                OpKind::Backward => {
                    a[s] = a[s].saturating_sub(1);
                    if plan.shape.split_backward {
                        w[s] += 1;
                    }
                }
                OpKind::Weight => w[s] = w[s].saturating_sub(1),
                _ => {}
            }
            note(&mut front[s], (a[s], w[s]));
        }
    }
    for f in &mut front {
        f.sort_unstable();
    }
    front
}

/// The most bytes `holds` (one stage's [`peak_holds`]) can reach with these
/// sizes per micro-batch.
pub fn held_bytes(holds: &[(u64, u64)], stash_bytes: u128, weight_stash_bytes: u128) -> u128 {
    holds.iter().map(|&(a, w)| a as u128 * stash_bytes + w as u128 * weight_stash_bytes).max().unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    #[test]
    fn peak_holds_count_both_kinds_of_memory() {
        // 1F1B: p - d micro-batches on device d, nothing held for W.
        let plan = build(ScheduleKind::OneFOneB, Shape::new(4, 8, 1)).unwrap();
        assert_eq!(peak_holds(&plan), vec![vec![(4, 0)], vec![(3, 0)], vec![(2, 0)], vec![(1, 0)]]);
        // ZB-H1 on the last device: F0 B0 F1 B1 F2 B2 F3 B3 W0 ...: one
        // micro-batch between F and B while up to 3 wait for W (lag d = 3),
        // and 4 held for W after the fourth B.
        let plan = build(ScheduleKind::ZbH1, Shape::new(4, 8, 1)).unwrap();
        let last = &peak_holds(&plan)[3];
        assert!(last.contains(&(1, 3)) && last.contains(&(0, 4)), "{last:?}");
        assert_eq!(held_bytes(last, 10, 1), 13);
        assert_eq!(held_bytes(last, 1, 10), 40);
    }

    fn names(ops: &[Op]) -> String {
        ops.iter().map(|o| o.to_string()).collect::<Vec<_>>().join(" ")
    }

    #[test]
    fn one_f_one_b_orders_for_four_stages() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(4, 6, 1)).unwrap();
        // Device 0 warms up with p-d-1 = 3 forwards.
        assert_eq!(names(&plan.per_device[0]), "F0@0 F1@0 F2@0 F3@0 B0@0 F4@0 B1@0 F5@0 B2@0 B3@0 B4@0 B5@0");
        // The last device alternates from the start.
        assert_eq!(names(&plan.per_device[3]), "F0@3 B0@3 F1@3 B1@3 F2@3 B2@3 F3@3 B3@3 F4@3 B4@3 F5@3 B5@3");
    }

    #[test]
    fn warmup_is_capped_by_micro_batches() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(4, 2, 1)).unwrap();
        assert_eq!(names(&plan.per_device[0]), "F0@0 F1@0 B0@0 B1@0");
        validate(&plan).unwrap();
    }

    #[test]
    fn fill_drain_runs_all_forwards_first() {
        let plan = build(ScheduleKind::FillDrain, Shape::new(2, 3, 1)).unwrap();
        assert_eq!(names(&plan.per_device[1]), "F0@1 F1@1 F2@1 B0@1 B1@1 B2@1");
    }

    #[test]
    fn interleaved_walks_groups_through_chunks() {
        let plan = build(ScheduleKind::Interleaved, Shape::new(2, 4, 2)).unwrap();
        // p=2, v=2: forwards go mb 0,1 on chunk 0 (stage 0), mb 0,1 on chunk 1 (stage 2), ...
        // Device 0 warms up with 2(p-1) + (v-1)p = 4 forwards.
        assert_eq!(
            names(&plan.per_device[0]),
            "F0@0 F1@0 F0@2 F1@2 F2@0 B0@2 F3@0 B1@2 F2@2 B0@0 F3@2 B1@0 B2@2 B3@2 B2@0 B3@0"
        );
        validate(&plan).unwrap();
    }

    #[test]
    fn interleaved_refuses_micro_batches_not_multiple_of_stages() {
        let err = build(ScheduleKind::Interleaved, Shape::new(4, 6, 2)).unwrap_err();
        assert_eq!(err, ScheduleError::NotMultiple { micro_batches: 6, stages: 4 });
        assert!(err.to_string().contains("multiple of"));
    }

    #[test]
    fn zero_sizes_and_chunks_are_refused() {
        assert_eq!(
            build(ScheduleKind::OneFOneB, Shape::new(0, 1, 1)).unwrap_err(),
            ScheduleError::Zero { what: "stages" }
        );
        assert!(matches!(
            build(ScheduleKind::OneFOneB, Shape::new(2, 2, 2)),
            Err(ScheduleError::ChunksNotSupported { .. })
        ));
        assert!("zigzag".parse::<ScheduleKind>().is_err());
        assert_eq!("1f1b".parse::<ScheduleKind>().unwrap(), ScheduleKind::OneFOneB);
    }

    #[test]
    fn validator_catches_broken_plans() {
        let good = build(ScheduleKind::OneFOneB, Shape::new(3, 3, 1)).unwrap();
        let mut dup = good.clone();
        dup.per_device[1][2] = dup.per_device[1][1];
        assert!(matches!(validate(&dup), Err(ScheduleError::Duplicate { .. })));
        let mut missing = good.clone();
        missing.per_device[2].pop();
        assert!(matches!(validate(&missing), Err(ScheduleError::Missing { .. })));
        let mut wrong = good.clone();
        wrong.per_device[0][0] = Op::forward(0, 1);
        assert!(matches!(validate(&wrong), Err(ScheduleError::WrongDevice { .. })));
        // Device 1 does all backwards before forwards: it waits forever.
        let mut dead = good.clone();
        dead.per_device[1].sort_by_key(|o| std::cmp::Reverse(o.kind));
        assert!(matches!(validate(&dead), Err(ScheduleError::Deadlock { .. })));
    }

    #[test]
    fn a_deadlock_is_reported_as_its_cycle_of_waits() {
        // Two devices, two micro-batches, 1F1B with device 1's order swapped
        // around: device 1 wants B0 first, which needs F0 on device 1 itself,
        // which comes after it; so the cycle is device 1 alone.
        let shape = Shape::new(2, 1, 1);
        let plan = Plan {
            kind: ScheduleKind::FillDrain,
            shape,
            per_device: vec![vec![Op::forward(0, 0), Op::backward(0, 0)], vec![Op::backward(0, 1), Op::forward(0, 1)]],
        };
        let err = validate(&plan).unwrap_err();
        assert_eq!(err.to_string(), "deadlock: device 1 waits at B0@1 for F0@1 on device 1, which comes after B0@1");
        // A two-device swap: device 0 runs B0 before F1, device 1 wants F1
        // before B0.
        let plan = Plan {
            kind: ScheduleKind::FillDrain,
            shape: Shape::new(2, 2, 1),
            per_device: vec![
                vec![Op::forward(0, 0), Op::backward(0, 0), Op::forward(1, 0), Op::backward(1, 0)],
                vec![Op::forward(0, 1), Op::forward(1, 1), Op::backward(0, 1), Op::backward(1, 1)],
            ],
        };
        let ScheduleError::Deadlock { cycle } = validate(&plan).unwrap_err() else { panic!("a deadlock") };
        let text = ScheduleError::Deadlock { cycle: cycle.clone() }.to_string();
        assert_eq!(
            text,
            "deadlock: device 0 waits at B0@0 for B0@1 on device 1, which comes after F1@1; \
             device 1 waits at F1@1 for F1@0 on device 0, which comes after B0@0"
        );
        assert_eq!((cycle[0].index, cycle[1].index), (1, 1));
    }

    #[test]
    fn dataflow_of_each_kind() {
        let shape = Shape::new(3, 2, 1);
        let edges = |e: Edges| e.map(|e| (e.op.to_string(), e.flow)).collect::<Vec<_>>();
        assert_eq!(edges(Op::forward(1, 0).inputs(&shape)), vec![]);
        assert_eq!(edges(Op::forward(1, 2).inputs(&shape)), vec![("F1@1".into(), Flow::Activation)]);
        assert_eq!(
            edges(Op::backward(1, 1).inputs(&shape)),
            vec![("F1@1".into(), Flow::Within), ("B1@2".into(), Flow::Gradient)]
        );
        assert_eq!(edges(Op::backward(1, 2).inputs(&shape)), vec![("F1@2".into(), Flow::Within)]);
        assert_eq!(edges(Op::backward(0, 0).outputs(&shape)), vec![], "a fused backward of stage 0 feeds nothing");
        let split = Shape { split_backward: true, ..shape };
        assert_eq!(edges(Op::backward(0, 0).outputs(&split)), vec![("W0@0".into(), Flow::Within)]);
        assert_eq!(edges(Op::weight(0, 1).inputs(&split)), vec![("B0@1".into(), Flow::Within)]);
        assert_eq!(split.ops_per_device(), 6);
        assert_eq!(shape.kinds(), &[OpKind::Forward, OpKind::Backward]);
    }

    #[test]
    fn op_index_is_dense_and_distinct() {
        let shape = Shape { split_backward: true, ..Shape::new(2, 3, 2) };
        let mut seen = vec![false; shape.op_slots()];
        for &kind in OpKind::PLANNED {
            for i in 0..3 {
                for s in 0..4 {
                    let k = shape.op_index(Op { kind, micro_batch: i, stage: s });
                    assert!(!std::mem::replace(&mut seen[k], true));
                }
            }
        }
        assert!(seen.iter().all(|&x| x));
    }

    #[test]
    fn a_split_backward_plan_validates_and_its_order_matters() {
        // Two stages, one micro-batch, backward split: W may run any time
        // after its B on the same device.
        let shape = Shape { split_backward: true, ..Shape::new(2, 1, 1) };
        let ok = Plan {
            kind: ScheduleKind::FillDrain,
            shape,
            per_device: vec![
                vec![Op::forward(0, 0), Op::backward(0, 0), Op::weight(0, 0)],
                vec![Op::forward(0, 1), Op::backward(0, 1), Op::weight(0, 1)],
            ],
        };
        assert_eq!(validate(&ok), Ok(()));
        let mut early = ok.clone();
        early.per_device[1].swap(1, 2);
        assert!(matches!(validate(&early), Err(ScheduleError::Deadlock { .. })));
        let mut fused = ok.clone();
        fused.shape.split_backward = false;
        assert!(matches!(validate(&fused), Err(ScheduleError::OutOfRange { .. })), "W in a fused plan");
        // The weight pass neither takes nor frees the stash.
        assert_eq!(peak_stashes(&ok), vec![1, 1]);
    }

    #[test]
    fn peak_stashes_follow_the_schedule() {
        // Narayanan et al., ICML 2021, sec. 3: 1F1B keeps at most p - d
        // micro-batches in flight on device d; fill-drain keeps all m.
        let p = build(ScheduleKind::OneFOneB, Shape::new(4, 8, 1)).unwrap();
        assert_eq!(peak_stashes(&p), vec![4, 3, 2, 1]);
        let p = build(ScheduleKind::FillDrain, Shape::new(4, 8, 1)).unwrap();
        assert_eq!(peak_stashes(&p), vec![8, 8, 8, 8]);
        let p = build(ScheduleKind::OneFOneB, Shape::new(4, 2, 1)).unwrap();
        assert_eq!(peak_stashes(&p), vec![2, 2, 2, 1]);
    }

    proptest! {
        /// Inputs and outputs are mirror images: every input edge of an op is
        /// an output edge of its producer with the same flow, and back.
        #[test]
        fn inputs_and_outputs_mirror(p in 1u32..5, m in 1u32..4, v in 1u32..3, split in any::<bool>()) {
            let shape = Shape { split_backward: split, ..Shape::new(p, m, v) };
            for &kind in shape.kinds() {
                for i in 0..m {
                    for s in 0..shape.virtual_stages() {
                        let op = Op { kind, micro_batch: i, stage: s };
                        for e in op.inputs(&shape) {
                            prop_assert!(e.op.outputs(&shape).any(|o| o.op == op && o.flow == e.flow), "{op} <- {}", e.op);
                        }
                        for e in op.outputs(&shape) {
                            prop_assert!(e.op.inputs(&shape).any(|o| o.op == op && o.flow == e.flow), "{op} -> {}", e.op);
                            prop_assert_eq!(e.flow.crosses_stages(), e.op.stage != s);
                        }
                    }
                }
            }
        }
    }

    proptest! {
        #[test]
        fn every_built_plan_is_valid(p in 1u32..7, mult in 1u32..5, extra in 0u32..3, v in 1u32..4, k in 0usize..ScheduleKind::ALL.len()) {
            let kind = ScheduleKind::ALL[k];
            let m = if kind == ScheduleKind::Interleaved { p * mult } else { p * mult + extra };
            let v = if kind == ScheduleKind::Interleaved { v } else { 1 };
            let plan = build(kind, Shape::new(p, m, v)).unwrap();
            prop_assert_eq!(validate(&plan), Ok(()));
            prop_assert_eq!(plan.kind, kind);
            for ops in &plan.per_device {
                prop_assert_eq!(ops.len(), plan.shape.ops_per_device());
            }
        }

        #[test]
        fn one_f_one_b_warmup_matches_definition(p in 1u32..9, m in 1u32..20) {
            let plan = build(ScheduleKind::OneFOneB, Shape::new(p, m, 1)).unwrap();
            for (d, ops) in plan.per_device.iter().enumerate() {
                let leading = ops.iter().take_while(|o| o.kind == OpKind::Forward).count() as u32;
                // Warm-up forwards plus the first steady-state forward (when any remain).
                let warm = (p - d as u32 - 1).min(m);
                prop_assert_eq!(leading, if warm < m { warm + 1 } else { warm });
            }
        }
    }
}
