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
//! This crate deliberately knows nothing about time, durations, links or
//! devices' speed: it only orders work.

use std::fmt;
use std::str::FromStr;

use thiserror::Error;

/// Forward or backward pass.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum OpKind {
    Forward,
    Backward,
}

impl OpKind {
    pub fn as_str(self) -> &'static str {
        match self {
            OpKind::Forward => "forward",
            OpKind::Backward => "backward",
        }
    }
}

/// One unit of work: a pass of one micro-batch through one virtual stage.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Op {
    pub kind: OpKind,
    pub micro_batch: u32,
    /// Virtual stage, `0 .. p * v`.
    pub stage: u32,
}

impl Op {
    pub fn forward(micro_batch: u32, stage: u32) -> Self {
        Op { kind: OpKind::Forward, micro_batch, stage }
    }
    pub fn backward(micro_batch: u32, stage: u32) -> Self {
        Op { kind: OpKind::Backward, micro_batch, stage }
    }
}

impl fmt::Display for Op {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let k = match self.kind {
            OpKind::Forward => 'F',
            OpKind::Backward => 'B',
        };
        write!(f, "{k}{}@{}", self.micro_batch, self.stage)
    }
}

/// The schedules baton knows.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum ScheduleKind {
    FillDrain,
    OneFOneB,
    Interleaved,
}

impl ScheduleKind {
    pub const ALL: [ScheduleKind; 3] = [ScheduleKind::FillDrain, ScheduleKind::OneFOneB, ScheduleKind::Interleaved];

    /// The name used in scenario files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            ScheduleKind::FillDrain => "fill-drain",
            ScheduleKind::OneFOneB => "1f1b",
            ScheduleKind::Interleaved => "interleaved",
        }
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
        ScheduleKind::ALL
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| ScheduleError::UnknownSchedule(s.to_string()))
    }
}

/// The size of a pipeline: devices (= stages), micro-batches, chunks per device.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub struct Shape {
    /// `p`: pipeline stages, one device each.
    pub stages: u32,
    /// `m`: micro-batches per step.
    pub micro_batches: u32,
    /// `v`: model chunks per device.
    pub chunks: u32,
}

impl Shape {
    pub fn new(stages: u32, micro_batches: u32, chunks: u32) -> Self {
        Shape { stages, micro_batches, chunks }
    }

    /// `p * v`.
    pub fn virtual_stages(&self) -> u32 {
        self.stages * self.chunks
    }

    /// The device that runs virtual stage `stage`.
    pub fn device_of(&self, stage: u32) -> u32 {
        stage % self.stages
    }

    /// Operations each device runs: `2 * m * v`.
    pub fn ops_per_device(&self) -> usize {
        2 * self.micro_batches as usize * self.chunks as usize
    }
}

/// Why a schedule could not be built or is not valid.
#[derive(Debug, Error, PartialEq, Eq)]
pub enum ScheduleError {
    #[error("unknown schedule `{0}`; expected one of: fill-drain, 1f1b, interleaved")]
    UnknownSchedule(String),
    #[error("{what} must be at least 1")]
    Zero { what: &'static str },
    #[error("schedule {schedule} runs one chunk per device, but chunks = {chunks}; use `interleaved` for more")]
    ChunksNotSupported { schedule: ScheduleKind, chunks: u32 },
    #[error(
        "interleaved needs micro_batches to be a multiple of stages: {micro_batches} is not a multiple of {stages}"
    )]
    NotMultiple { micro_batches: u32, stages: u32 },
    #[error("the plan is too large: {0} operations (at most {MAX_OPS})")]
    TooLarge(u64),
    #[error("plan has {found} device orders, expected {expected}")]
    DeviceCount { found: usize, expected: usize },
    #[error("device {device} holds {op}, which belongs to device {owner}")]
    WrongDevice { device: u32, op: Op, owner: u32 },
    #[error("device {device} holds {op}, which is out of range")]
    OutOfRange { device: u32, op: Op },
    #[error("device {device} holds {op} more than once")]
    Duplicate { device: u32, op: Op },
    #[error("device {device} is missing {op}")]
    Missing { device: u32, op: Op },
    #[error("the orders cannot complete: device {device} waits forever at {op}")]
    Deadlock { device: u32, op: Op },
}

/// Each device's ordered operations for one training step.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Plan {
    pub kind: ScheduleKind,
    pub shape: Shape,
    /// `per_device[d]` is device `d`'s order.
    pub per_device: Vec<Vec<Op>>,
}

/// Largest plan accepted (operations over all devices): keeps memory and time
/// bounded on any input (a simulation of this size needs about 1 GiB).
pub const MAX_OPS: u64 = 16 * 1024 * 1024;

/// Builds the plan for `kind` and `shape`; the result always passes [`validate`].
pub fn build(kind: ScheduleKind, shape: Shape) -> Result<Plan, ScheduleError> {
    check_shape(kind, shape)?;
    let p = shape.stages;
    let per_device = (0..p)
        .map(|d| match kind {
            ScheduleKind::FillDrain => fill_drain(shape, d),
            ScheduleKind::OneFOneB => one_f_one_b(shape, d),
            ScheduleKind::Interleaved if shape.chunks == 1 => one_f_one_b(shape, d),
            ScheduleKind::Interleaved => interleaved(shape, d),
        })
        .collect();
    Ok(Plan { kind, shape, per_device })
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
    let total = shape.stages as u64 * shape.chunks as u64 * shape.micro_batches as u64 * 2;
    if total > MAX_OPS {
        return Err(ScheduleError::TooLarge(total));
    }
    match kind {
        ScheduleKind::FillDrain | ScheduleKind::OneFOneB if shape.chunks != 1 => {
            Err(ScheduleError::ChunksNotSupported { schedule: kind, chunks: shape.chunks })
        }
        ScheduleKind::Interleaved if shape.micro_batches % shape.stages != 0 => {
            Err(ScheduleError::NotMultiple { micro_batches: shape.micro_batches, stages: shape.stages })
        }
        _ => Ok(()),
    }
}

fn fill_drain(shape: Shape, d: u32) -> Vec<Op> {
    let m = shape.micro_batches;
    let mut ops = Vec::with_capacity(shape.ops_per_device());
    ops.extend((0..m).map(|i| Op::forward(i, d)));
    ops.extend((0..m).map(|i| Op::backward(i, d)));
    ops
}

fn one_f_one_b(shape: Shape, d: u32) -> Vec<Op> {
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

/// Dense index of an op: `((kind * m) + micro_batch) * S + stage`.
fn dense(shape: &Shape, op: Op) -> usize {
    let s = shape.virtual_stages() as usize;
    let m = shape.micro_batches as usize;
    let k = match op.kind {
        OpKind::Forward => 0,
        OpKind::Backward => 1,
    };
    (k * m + op.micro_batch as usize) * s + op.stage as usize
}

/// Proves that `plan` is complete and can run to the end.
///
/// Every device must hold each of its operations (forward and backward of each
/// micro-batch on each of its virtual stages) exactly once and nothing else;
/// and executing the orders, each device strictly in its own order, with
/// forward(i, s) waiting for forward(i, s-1) and backward(i, s) waiting for
/// forward(i, s) and backward(i, s+1), must finish every operation. Runs in time
/// linear in the number of operations.
pub fn validate(plan: &Plan) -> Result<(), ScheduleError> {
    let shape = plan.shape;
    let p = shape.stages as usize;
    if plan.per_device.len() != p {
        return Err(ScheduleError::DeviceCount { found: plan.per_device.len(), expected: p });
    }
    let n_stages = shape.virtual_stages();
    let total = 2 * shape.micro_batches as usize * n_stages as usize;
    let mut seen = vec![false; total];
    for (d, ops) in plan.per_device.iter().enumerate() {
        let device = d as u32;
        for &op in ops {
            if op.stage >= n_stages || op.micro_batch >= shape.micro_batches {
                return Err(ScheduleError::OutOfRange { device, op });
            }
            let owner = shape.device_of(op.stage);
            if owner != device {
                return Err(ScheduleError::WrongDevice { device, op, owner });
            }
            let idx = dense(&shape, op);
            if std::mem::replace(&mut seen[idx], true) {
                return Err(ScheduleError::Duplicate { device, op });
            }
        }
    }
    for kind in [OpKind::Forward, OpKind::Backward] {
        for micro_batch in 0..shape.micro_batches {
            for stage in 0..n_stages {
                let op = Op { kind, micro_batch, stage };
                if !seen[dense(&shape, op)] {
                    return Err(ScheduleError::Missing { device: shape.device_of(stage), op });
                }
            }
        }
    }

    // Completion: advance devices from a worklist; an op completing wakes the
    // devices of the ops that depend on it.
    let mut done = vec![false; total];
    let mut next = vec![0usize; p];
    let mut work: Vec<usize> = (0..p).collect();
    let ready = |op: Op, done: &[bool]| -> bool {
        match op.kind {
            OpKind::Forward => op.stage == 0 || done[dense(&shape, Op::forward(op.micro_batch, op.stage - 1))],
            OpKind::Backward => {
                done[dense(&shape, Op::forward(op.micro_batch, op.stage))]
                    && (op.stage + 1 == n_stages || done[dense(&shape, Op::backward(op.micro_batch, op.stage + 1))])
            }
        }
    };
    while let Some(d) = work.pop() {
        let ops = &plan.per_device[d];
        while next[d] < ops.len() && ready(ops[next[d]], &done) {
            let op = ops[next[d]];
            done[dense(&shape, op)] = true;
            next[d] += 1;
            match op.kind {
                OpKind::Forward if op.stage + 1 < n_stages => work.push(shape.device_of(op.stage + 1) as usize),
                OpKind::Backward if op.stage > 0 => work.push(shape.device_of(op.stage - 1) as usize),
                _ => {}
            }
        }
    }
    for (d, ops) in plan.per_device.iter().enumerate() {
        if next[d] < ops.len() {
            return Err(ScheduleError::Deadlock { device: d as u32, op: ops[next[d]] });
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

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

    proptest! {
        #[test]
        fn every_built_plan_is_valid(p in 1u32..7, mult in 1u32..5, extra in 0u32..3, v in 1u32..4, k in 0usize..3) {
            let kind = ScheduleKind::ALL[k];
            let m = if kind == ScheduleKind::Interleaved { p * mult } else { p * mult + extra };
            let v = if kind == ScheduleKind::Interleaved { v } else { 1 };
            let plan = build(kind, Shape::new(p, m, v)).unwrap();
            prop_assert_eq!(validate(&plan), Ok(()));
            for ops in &plan.per_device {
                prop_assert_eq!(ops.len(), Shape::new(p, m, v).ops_per_device());
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
