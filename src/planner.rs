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
                tied_params: l.tied_params,
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
#[derive(Clone, Debug)]
pub struct Candidate {
    pub split: Vec<u32>,
    pub outcome: Sim,
}

impl Candidate {
    fn step_ns(&self) -> u64 {
        self.outcome.report.step_time_ns
    }
}

/// Where the winning local search started.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Start {
    /// The exact proxy's split.
    Proxy,
    /// The scenario's own split.
    Scenario,
}

impl Start {
    pub fn name(self) -> &'static str {
        match self {
            Start::Proxy => "proxy",
            Start::Scenario => "scenario",
        }
    }
}

/// What `baton split` found.
#[derive(Debug)]
pub struct SplitPlan {
    /// The scenario's own split, simulated.
    pub baseline: Candidate,
    /// The exact proxy's answer, and its simulation.
    pub proxy: Solution,
    pub proxy_run: Candidate,
    /// The best split found: never slower than the scenario's own when that
    /// fits, and the scenario's own when nothing found is faster.
    pub best: Candidate,
    /// Where the local search that found `best` started.
    pub start: Start,
    /// Boundary moves that search kept (0 when `best` is its start).
    pub moves: usize,
    /// Simulations run in all (the two starts and every move tried).
    pub simulations: usize,
    /// The scenario's own split fits and no split found is faster.
    pub baseline_is_best: bool,
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

/// Moves one boundary by one layer at a time from `from`, keeping the move
/// that most shortens the simulated step while every device fits, until no
/// move helps or `budget` simulations have run. Returns the split reached and
/// the moves kept.
fn local_search(s: &Scenario, from: Candidate, budget: &mut usize) -> Result<(Candidate, usize), SimulateError> {
    let mut best = from;
    let mut moves = 0;
    loop {
        let mut improved: Option<Candidate> = None;
        'moves: for b in 0..best.split.len().saturating_sub(1) {
            for towards_left in [true, false] {
                let mut split = best.split.clone();
                let (from, to) = if towards_left { (b + 1, b) } else { (b, b + 1) };
                if split[from] <= 1 {
                    continue;
                }
                split[from] -= 1;
                split[to] += 1;
                if *budget == 0 {
                    break 'moves;
                }
                *budget -= 1;
                let c = run(s, &split)?;
                if c.outcome.report.fits && c.step_ns() < improved.as_ref().unwrap_or(&best).step_ns() {
                    improved = Some(c);
                }
            }
        }
        match improved {
            Some(c) => {
                best = c;
                moves += 1;
            }
            None => return Ok((best, moves)),
        }
    }
}

/// Finds the best split for `s` (its stages, chunks and schedule).
///
/// The local search runs from the proxy's split and, when it fits and
/// differs, from the scenario's own; the faster result wins, ties going to
/// the scenario's split (no change for no gain). So the proposal is never
/// slower than a scenario split that fits.
pub fn plan(s: &Scenario) -> Result<SplitPlan, PlanError> {
    let problem = problem(s)?;
    let baseline = run(s, &s.pipeline.split)?;
    let (proxy, mut no_fit) = match baton_split::solve(&problem)? {
        Outcome::Fits(sol) => (sol, None),
        Outcome::NoFit { shortfall_bytes, device, closest } => (closest, Some((shortfall_bytes, device))),
    };
    // The proxy's memory bound is conservative with several chunks per
    // device; a scenario split that fits in the simulation is a split that fits.
    if baseline.outcome.report.fits {
        no_fit = None;
    }
    let proxy_run = run(s, &proxy.split)?;
    let simulations = 2;
    if no_fit.is_some() {
        let best = proxy_run.clone();
        return Ok(SplitPlan {
            baseline,
            proxy,
            proxy_run,
            best,
            start: Start::Proxy,
            moves: 0,
            simulations,
            baseline_is_best: false,
            no_fit,
        });
    }
    let mut budget = MAX_SEARCH_SIMULATIONS.saturating_sub(simulations);
    let mut results: Vec<(Candidate, usize, Start)> = Vec::new();
    if proxy_run.outcome.report.fits || !baseline.outcome.report.fits {
        let (c, moves) = local_search(s, proxy_run.clone(), &mut budget)?;
        results.push((c, moves, Start::Proxy));
    }
    if baseline.outcome.report.fits && baseline.split != proxy.split {
        let (c, moves) = local_search(s, baseline.clone(), &mut budget)?;
        results.push((c, moves, Start::Scenario));
    }
    let simulations = MAX_SEARCH_SIMULATIONS - budget;
    // Fastest first; on a tie the scenario's own split, then the scenario's start.
    let key =
        |(c, _, start): &(Candidate, usize, Start)| (c.step_ns(), c.split != baseline.split, *start != Start::Scenario);
    results.sort_by_key(key);
    let (best, moves, start) = results.into_iter().next().unwrap_or_else(|| (proxy_run.clone(), 0, Start::Proxy));
    let baseline_is_best = baseline.outcome.report.fits && best.split == baseline.split;
    Ok(SplitPlan { baseline, proxy, proxy_run, best, start, moves, simulations, baseline_is_best, no_fit })
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
