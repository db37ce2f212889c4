//! `baton split`: the exact split for a scenario, checked and refined by
//! simulation.
//!
//! 1. The exact search ([`baton_split::solve`]) minimises the largest piece's
//!    forward + backward time per micro-batch under each device's memory,
//!    given how many micro-batches the schedule keeps in flight on each piece.
//! 2. That proxy ignores links and the schedule's order, so a local search
//!    then moves one boundary by one layer at a time, keeping the move that
//!    shortens the simulated step the most, while the step time drops and
//!    every device still fits its memory.

use baton_scenario::{Recompute, Scenario};
use baton_schedule::{OpKind, Plan};
use baton_split::{Layer, Memory, Outcome, Problem, Solution};

pub use baton_split::{evaluate, Problem as SplitProblem, Solution as SplitSolution};

use crate::{simulate, Outcome as Sim, SimulateError};

/// Upper bound on the simulations the local search runs.
pub const MAX_SEARCH_SIMULATIONS: usize = 2_000;

/// Micro-batches held at once on each virtual stage, read off the schedule's
/// per-device orders (each device runs its ops one at a time, so counting
/// forwards up and backwards down in order gives the peak).
pub fn in_flight(plan: &Plan) -> Vec<u64> {
    let n = plan.shape.virtual_stages() as usize;
    let (mut held, mut peak) = (vec![0u64; n], vec![0u64; n]);
    for ops in &plan.per_device {
        for op in ops {
            let s = op.stage as usize;
            match op.kind {
                OpKind::Forward => {
                    held[s] += 1;
                    peak[s] = peak[s].max(held[s]);
                }
                OpKind::Backward => held[s] = held[s].saturating_sub(1),
            }
        }
    }
    peak
}

/// The split problem a scenario poses.
pub fn problem(s: &Scenario) -> Result<Problem, SimulateError> {
    let plan = baton_schedule::build(s.pipeline.schedule, s.shape())?;
    let recompute = s.training.recompute == Recompute::Full;
    Ok(Problem {
        layers: s
            .layers
            .iter()
            .map(|l| Layer {
                cost_ns: l.forward_ns + l.backward_ns + if recompute { l.forward_ns } else { 0 },
                params: l.params,
                stash_bytes: l.stash_bytes,
                activation_bytes: l.activation_bytes,
            })
            .collect(),
        devices: s.pipeline.stages as usize,
        chunks: s.pipeline.chunks as usize,
        in_flight: in_flight(&plan),
        memory: s.cluster.device.memory_bytes.map(|capacity_bytes| Memory {
            capacity_bytes,
            reserved_bytes: s.training.reserved_bytes,
            state_bytes_per_param: s.training.state_bytes_per_param,
            recompute,
        }),
    })
}

/// A split and its simulated step.
#[derive(Debug)]
pub struct Candidate {
    pub split: Vec<u32>,
    pub outcome: Sim,
}

/// What `baton split` found.
#[derive(Debug)]
pub struct SplitPlan {
    /// The scenario's own split, simulated.
    pub baseline: Candidate,
    /// The exact proxy's answer, and its simulation.
    pub proxy: Solution,
    pub proxy_run: Candidate,
    /// After the local search (equal to the proxy when no move helped).
    pub best: Candidate,
    /// Boundary moves the local search kept, and simulations it ran.
    pub moves: usize,
    pub simulations: usize,
    /// When no split fits: the smallest shortfall in bytes and the device.
    pub no_fit: Option<(u64, usize)>,
}

fn with_split(s: &Scenario, split: &[u32]) -> Scenario {
    let mut t = s.clone();
    t.pipeline.split = split.to_vec();
    t
}

fn run(s: &Scenario, split: &[u32]) -> Result<Candidate, SimulateError> {
    Ok(Candidate { split: split.to_vec(), outcome: simulate(&with_split(s, split))? })
}

/// Finds the best split for `s` (its stages, chunks and schedule).
pub fn plan(s: &Scenario) -> Result<SplitPlan, PlanError> {
    let problem = problem(s)?;
    let baseline = run(s, &s.pipeline.split)?;
    let (proxy, no_fit) = match baton_split::solve(&problem)? {
        Outcome::Fits(sol) => (sol, None),
        Outcome::NoFit { shortfall_bytes, device, closest } => (closest, Some((shortfall_bytes, device))),
    };
    let proxy_run = run(s, &proxy.split)?;
    let mut best = run(s, &proxy.split)?;
    let (mut moves, mut simulations) = (0, 2);
    if no_fit.is_none() {
        loop {
            let mut improved: Option<Candidate> = None;
            for b in 0..best.split.len().saturating_sub(1) {
                for towards_left in [true, false] {
                    let mut split = best.split.clone();
                    let (from, to) = if towards_left { (b + 1, b) } else { (b, b + 1) };
                    if split[from] <= 1 {
                        continue;
                    }
                    split[from] -= 1;
                    split[to] += 1;
                    if simulations >= MAX_SEARCH_SIMULATIONS {
                        break;
                    }
                    simulations += 1;
                    let c = run(s, &split)?;
                    let better_than = |x: &Candidate| c.outcome.report.step_time_ns < x.outcome.report.step_time_ns;
                    if c.outcome.report.fits && better_than(improved.as_ref().unwrap_or(&best)) {
                        improved = Some(c);
                    }
                }
            }
            match improved {
                Some(c) => {
                    best = c;
                    moves += 1;
                }
                None => break,
            }
        }
    }
    Ok(SplitPlan { baseline, proxy, proxy_run, best, moves, simulations, no_fit })
}

#[derive(Debug, thiserror::Error)]
pub enum PlanError {
    #[error(transparent)]
    Simulate(#[from] SimulateError),
    #[error("cannot split: {0}")]
    Split(#[from] baton_split::SplitError),
}

#[cfg(test)]
mod tests {
    use super::*;
    use baton_schedule::{build, ScheduleKind, Shape};

    #[test]
    fn in_flight_follows_the_schedule() {
        // Narayanan et al., ICML 2021, sec. 3: 1F1B keeps at most p - d micro-batches
        // in flight on device d; fill-drain keeps all m.
        let p = build(ScheduleKind::OneFOneB, Shape::new(4, 8, 1)).unwrap();
        assert_eq!(in_flight(&p), vec![4, 3, 2, 1]);
        let p = build(ScheduleKind::FillDrain, Shape::new(4, 8, 1)).unwrap();
        assert_eq!(in_flight(&p), vec![8, 8, 8, 8]);
        let p = build(ScheduleKind::OneFOneB, Shape::new(4, 2, 1)).unwrap();
        assert_eq!(in_flight(&p), vec![2, 2, 2, 1]);
    }
}
