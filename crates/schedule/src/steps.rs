//! Consecutive steps: one step's order repeated on each device, where each
//! step's optimizer update goes, and which weight version every forward
//! uses when steps run on without a flush.
//!
//! Several steps are one plan of `steps * m` micro-batches: micro-batch `i`
//! of step `k` is `k * m + i` ([`step_of`]). A device updates its weights
//! for step `k` right after its last op of step `k` in its order
//! ([`update_positions`]). Which weights a forward reads depends only on the
//! order, never on time: the updates its device has run before it.
//!
//! * [`WeightVersions::One`]: one set of weights; a step's ops all come
//!   after the previous step's update on their device (staleness 0).
//! * [`WeightVersions::Stash`]: weight stashing (Narayanan et al.,
//!   "PipeDream: Generalized Pipeline Parallelism for DNN Training", SOSP
//!   2019, sec. 3.3): a micro-batch's forward reads the newest version on
//!   its stage, and its backward reads the same version, which is kept
//!   until then.
//! * [`WeightVersions::Double`]: double-buffered weights (Narayanan et al.,
//!   "Memory-Efficient Pipeline-Parallel DNN Training", ICML 2021, sec. 3.1,
//!   PipeDream-2BW): every micro-batch of step `k` on every stage reads
//!   version `k - 1` (the weights after step `k - 2`'s update; step 0 reads
//!   the initial ones), so at most two versions are ever needed.

use std::fmt;
use std::str::FromStr;

use crate::{Op, OpKind, Plan, ScheduleError, Shape};

/// How many versions of its weights a device keeps when steps follow each
/// other without a flush.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum WeightVersions {
    /// One version: each step waits for the previous step's update.
    One,
    /// One version per micro-batch in flight (PipeDream's weight stashing).
    Stash,
    /// Two versions (PipeDream-2BW).
    Double,
}

impl WeightVersions {
    /// Every mode, in the order scenario files list them.
    pub const ALL: [WeightVersions; 3] = [WeightVersions::One, WeightVersions::Stash, WeightVersions::Double];

    /// The name scenario files use.
    pub fn name(self) -> &'static str {
        match self {
            WeightVersions::One => "one",
            WeightVersions::Stash => "stash",
            WeightVersions::Double => "double",
        }
    }
}

impl fmt::Display for WeightVersions {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for WeightVersions {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        WeightVersions::ALL
            .into_iter()
            .find(|w| w.name() == s)
            .ok_or_else(|| format!("unknown weight_versions `{s}`; expected one, stash or double"))
    }
}

/// The step micro-batch `micro_batch` belongs to, with `m` per step.
pub fn step_of(micro_batch: u32, m: u32) -> u32 {
    micro_batch / m.max(1)
}

/// `plan` run `steps` times back to back on every device: step `k`'s ops
/// are the plan's with micro-batch `i` renumbered `k * m + i`.
pub fn repeat(plan: &Plan, steps: u32) -> Result<Plan, ScheduleError> {
    let m = plan.shape.micro_batches;
    let shape = Shape { micro_batches: total_micro_batches(m, steps)?, ..plan.shape };
    let per_device = plan
        .per_device
        .iter()
        .map(|ops| {
            let mut out = Vec::with_capacity(ops.len() * steps as usize);
            for k in 0..steps {
                out.extend(ops.iter().map(|op| Op { micro_batch: k * m + op.micro_batch, ..*op }));
            }
            out
        })
        .collect();
    Ok(Plan { kind: plan.kind, shape, per_device })
}

/// `steps * m`, refused when it does not fit a micro-batch number or makes
/// the plan larger than [`crate::MAX_OPS`].
pub fn total_micro_batches(m: u32, steps: u32) -> Result<u32, ScheduleError> {
    let total = m as u64 * steps as u64;
    u32::try_from(total).map_err(|_| ScheduleError::TooLarge(total))
}

/// Per device of `plan` (whose micro-batches are steps of `m`): the
/// position of each step's last op in the device's order, in step order.
/// Refused when a device's steps end out of order (an update would come
/// before the one of an earlier step), which no built schedule does.
pub fn update_positions(plan: &Plan, m: u32) -> Result<Vec<Vec<u32>>, ScheduleError> {
    let steps = plan.shape.micro_batches.div_ceil(m.max(1));
    let mut out = Vec::with_capacity(plan.per_device.len());
    for (d, ops) in plan.per_device.iter().enumerate() {
        let mut last = vec![None::<u32>; steps as usize];
        for (i, op) in ops.iter().enumerate() {
            last[step_of(op.micro_batch, m) as usize] = Some(i as u32);
        }
        let ends: Vec<u32> = last.into_iter().flatten().collect();
        if ends.windows(2).any(|w| w[0] >= w[1]) || (ends.len() as u32 != steps && !ops.is_empty()) {
            return Err(ScheduleError::Steps(format!("device {d}'s steps do not end in step order")));
        }
        out.push(ends);
    }
    Ok(out)
}

/// Which weights each stage's micro-batches read, over a run of steps.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct StepWeights {
    /// Per virtual stage: the most steps any of its micro-batches' weights
    /// lag behind (0: each step reads the weights after the previous step's
    /// update).
    pub staleness: Vec<u32>,
    /// Per virtual stage: the versions of its weights kept: 1 with
    /// [`WeightVersions::One`]; with [`WeightVersions::Stash`] one per
    /// micro-batch in flight at the peak (from its forward to its last
    /// gradient op), as PipeDream stashes a copy per input in flight; with
    /// [`WeightVersions::Double`] 2 (both buffers).
    pub versions: Vec<u32>,
    /// Per virtual stage: the most distinct versions read at once (the
    /// newest and every older one a micro-batch in flight still reads),
    /// which with several micro-batches per step can be fewer than
    /// `versions` (micro-batches of a step share one).
    pub distinct: Vec<u32>,
}

/// The weight versions of `plan` (micro-batches in steps of `m`) under
/// `mode`, each device updating right after its last op of each step.
/// Refused for [`WeightVersions::Double`] when a forward of step `k` comes
/// before its device's update of step `k - 2` or more than two versions
/// would be in use (PipeDream-2BW needs about as many micro-batches per
/// step as stages).
pub fn weights(plan: &Plan, m: u32, mode: WeightVersions) -> Result<StepWeights, ScheduleError> {
    let n = plan.shape.virtual_stages() as usize;
    let ends = update_positions(plan, m)?;
    let last_grad = if plan.shape.split_backward { OpKind::Weight } else { OpKind::Backward };
    let mut staleness = vec![0u32; n];
    let mut versions = vec![1u32; n];
    // Versions actually read at once (the newest and every older one a
    // micro-batch in flight still reads).
    let mut distinct = vec![1u32; n];
    for (d, ops) in plan.per_device.iter().enumerate() {
        let mut done = 0u32; // updates this device has run
        let mut next_end = 0usize;
        // Per virtual stage of this device: versions read by micro-batches
        // in flight, with how many read each.
        let mut in_flight: Vec<std::collections::BTreeMap<u32, u32>> = vec![Default::default(); n];
        let mut reads: std::collections::HashMap<(u32, u32), u32> = std::collections::HashMap::new();
        for (i, op) in ops.iter().enumerate() {
            let s = op.stage as usize;
            let k = step_of(op.micro_batch, m);
            match op.kind {
                OpKind::Forward => {
                    let v = match mode {
                        WeightVersions::One | WeightVersions::Stash => done,
                        WeightVersions::Double => {
                            let v = k.saturating_sub(1);
                            if done < v {
                                return Err(ScheduleError::Steps(format!(
                                    "double weight versions: device {d} starts step {k} before its update of step {} (PipeDream-2BW needs more micro-batches per step)",
                                    k - 2
                                )));
                            }
                            v
                        }
                    };
                    staleness[s] = staleness[s].max(k.saturating_sub(v));
                    *in_flight[s].entry(v).or_insert(0) += 1;
                    reads.insert((op.micro_batch, op.stage), v);
                    let mut live = in_flight[s].len() as u32;
                    if !in_flight[s].contains_key(&done) {
                        live += 1;
                    }
                    distinct[s] = distinct[s].max(live);
                    let count: u32 = in_flight[s].values().sum();
                    versions[s] = versions[s].max(count);
                }
                kind if kind == last_grad => {
                    if let Some(v) = reads.remove(&(op.micro_batch, op.stage)) {
                        if let Some(c) = in_flight[s].get_mut(&v) {
                            *c -= 1;
                            if *c == 0 {
                                in_flight[s].remove(&v);
                            }
                        }
                    }
                }
                _ => {}
            }
            if ends[d].get(next_end) == Some(&(i as u32)) {
                next_end += 1;
                done += 1;
                // The new version beside those still read.
                for (t, flight) in in_flight.iter().enumerate() {
                    if t % plan.shape.stages as usize == d && !flight.contains_key(&done) {
                        distinct[t] = distinct[t].max(flight.len() as u32 + 1);
                    }
                }
            }
        }
    }
    match mode {
        WeightVersions::One => versions.iter_mut().for_each(|v| *v = 1),
        WeightVersions::Stash => {}
        WeightVersions::Double => {
            if let Some(s) = distinct.iter().position(|&v| v > 2) {
                return Err(ScheduleError::Steps(format!(
                    "double weight versions: stage {s} would need {} versions at once (PipeDream-2BW needs more micro-batches per step)",
                    distinct[s]
                )));
            }
            versions.iter_mut().for_each(|v| *v = 2);
        }
    }
    if mode == WeightVersions::One {
        distinct.iter_mut().for_each(|v| *v = 1);
    }
    Ok(StepWeights { staleness, versions, distinct })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{build, validate, ScheduleKind};

    #[test]
    fn repeat_renumbers_and_stays_valid() {
        let plan = build(ScheduleKind::OneFOneB, Shape::new(3, 4, 1)).unwrap();
        let two = repeat(&plan, 2).unwrap();
        assert_eq!(two.shape.micro_batches, 8);
        assert_eq!(two.per_device[0].len(), 2 * plan.per_device[0].len());
        assert_eq!(two.per_device[2][8], Op::forward(4, 2));
        validate(&two).unwrap();
        assert_eq!(update_positions(&two, 4).unwrap(), vec![vec![7, 15]; 3]);
    }

    #[test]
    fn names_round_trip() {
        for w in WeightVersions::ALL {
            assert_eq!(w.name().parse::<WeightVersions>().unwrap(), w);
        }
        assert!("two".parse::<WeightVersions>().is_err());
    }
}

#[cfg(test)]
mod papers {
    use super::*;
    use crate::{build, ScheduleKind};

    // PipeDream (SOSP 2019, sec. 3.3): with one micro-batch per update and
    // 1F1B, stage s of p reads weights p - 1 - s updates old and keeps
    // p - s versions (one per micro-batch in flight).
    #[test]
    fn pipedream_staleness_and_versions() {
        let (p, steps) = (4u32, 8u32);
        let plan = build(ScheduleKind::OneFOneB, Shape::new(p, steps, 1)).unwrap();
        let w = weights(&plan, 1, WeightVersions::Stash).unwrap();
        assert_eq!(w.staleness, (0..p).map(|s| p - 1 - s).collect::<Vec<_>>());
        assert_eq!(w.versions, (0..p).map(|s| p - s).collect::<Vec<_>>());
    }

    // PipeDream-2BW (ICML 2021, sec. 3.1): W(t+1) = W(t) - lr * grad(W(t-1)),
    // a delay of one step on every stage, two versions, when m >= p.
    #[test]
    fn two_bw_delay_one() {
        let (p, m, steps) = (4u32, 4u32, 5u32);
        let plan = build(ScheduleKind::OneFOneB, Shape::new(p, m * steps, 1)).unwrap();
        let w = weights(&plan, m, WeightVersions::Double).unwrap();
        assert_eq!(w.staleness, vec![1; p as usize]);
        assert_eq!(w.versions, vec![2; p as usize]);
        // Fewer micro-batches than stages: step k+2 would start before step
        // k's update on the first device.
        let short = build(ScheduleKind::OneFOneB, Shape::new(p, 2 * steps, 1)).unwrap();
        assert!(weights(&short, 2, WeightVersions::Double).is_err());
        // Synchronous steps read the newest weights.
        let one = repeat(&build(ScheduleKind::OneFOneB, Shape::new(p, m, 1)).unwrap(), steps).unwrap();
        let w = weights(&one, m, WeightVersions::One).unwrap();
        assert_eq!((w.staleness, w.versions), (vec![0; 4], vec![1; 4]));
    }
}
