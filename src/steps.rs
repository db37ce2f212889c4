//! Several training steps back to back (`pipeline.steps`), with a global
//! barrier between them (`pipeline.flush: true`) or without
//! (`pipeline.flush: false`, weights as `pipeline.weight_versions` says).
//!
//! Flushed steps are simulated one by one (step `k` drawing its variation
//! from the seed's stream pair `k`) and joined: the barrier means nothing
//! of step `k + 1` can start before the end of step `k`, so each step runs
//! on an idle cluster. Steps without
//! a flush are one plan of `steps * m` micro-batches (micro-batch `i` of
//! step `k` is `k * m + i`): one step's order repeated on each device
//! (`one`), or the schedule built for all of them so the next step's
//! forwards fill the drain (`stash`, `double`); each device updates right
//! after its last op of each step.

use baton_engine::SimDuration;
use baton_executor::{StepUpdates, Trace};
use baton_link::Topology;
use baton_report::{ms, Report, StepStage, Steps};
use baton_scenario::Scenario;
use baton_schedule::steps::{self as plan_steps, WeightVersions};
use baton_schedule::{ScheduleError, ScheduleKind, Shape};
use rayon::prelude::*;

use crate::{
    labels, play_one, play_plan_drawn, run_options, schedule_choice, stage_costs, sync_config, tensor_config,
    tensor_config_fast, SimulateError, SimulatedStep,
};

/// Plays `s`'s steps.
pub(crate) fn play(
    s: &Scenario,
    fast: bool,
    one_replica: bool,
    topo: &Topology,
) -> Result<SimulatedStep, SimulateError> {
    if s.pipeline.flush {
        flushed(s, fast, one_replica, topo)
    } else {
        unflushed(s, fast, topo)
    }
}

/// `s` as one step alone.
fn step_scenario(s: &Scenario) -> Scenario {
    let mut one = s.clone();
    one.pipeline.steps = 1;
    one.pipeline.flush = true;
    one
}

fn flushed(s: &Scenario, fast: bool, one_replica: bool, topo: &Topology) -> Result<SimulatedStep, SimulateError> {
    let n = s.pipeline.steps.max(1);
    let mut first = play_one(&step_scenario(s), fast, one_replica, topo)?;
    // zb-auto keeps the order it chose for the first step.
    let plan = first.trace.plan.clone();
    let rest: Vec<Result<SimulatedStep, SimulateError>> = (1..n)
        .into_par_iter()
        .map(|k| {
            let mut x = step_scenario(s);
            if x.pipeline.schedule == ScheduleKind::ZbAuto && !plan.shape.split_backward {
                x.pipeline.schedule = ScheduleKind::OneFOneB;
            }
            let tensor = if fast { tensor_config_fast(&x) } else { tensor_config(&x) };
            // Step k draws from the seed's stream pair k.
            play_plan_drawn(&x, plan.clone(), tensor.as_ref(), one_replica, topo, k as u64)
        })
        .collect();
    let choice = first.report.schedule_choice.take();
    let mut traces = vec![first.trace];
    for r in rest {
        traces.push(r?.trace);
    }
    let step_ns: Vec<u64> = traces.iter().map(|t| t.end().as_ns()).collect();
    let trace = Trace::concat(traces)?;
    let stages = (0..s.shape().virtual_stages())
        .map(|k| StepStage {
            stage: k,
            device: k % s.pipeline.stages,
            staleness_steps: 0,
            weight_versions: 1,
            distinct_versions: 1,
            extra_bytes: 0,
        })
        .collect();
    let mut report = baton_report::build(&trace, &labels_for(s, &[]));
    report.schedule_choice = choice;
    finish(&mut report, s, &trace, step_ns, stages);
    Ok(SimulatedStep { trace, report })
}

fn unflushed(s: &Scenario, fast: bool, topo: &Topology) -> Result<SimulatedStep, SimulateError> {
    let n = s.pipeline.steps.max(1);
    let m = s.pipeline.micro_batches;
    let mode = s.pipeline.weight_versions;
    let sync = sync_config(s);
    if let Some(c) = &sync {
        if c.replicas > 1 {
            return Err(steps_error("steps without a flush are simulated for one replica (parallel.data: 1)"));
        }
        if c.tied.is_some() {
            return Err(steps_error(
                "steps without a flush cannot keep the tied weights' all-reduce between the first and last devices; set pipeline.flush: true",
            ));
        }
    }
    let update = sync.as_ref().map_or(SimDuration::ZERO, |c| c.update);
    let all = Shape::new(s.pipeline.stages, plan_steps::total_micro_batches(m, n)?, s.pipeline.chunks);
    // (name, plan of every step)
    let mut candidates: Vec<(&'static str, baton_schedule::Plan)> = Vec::new();
    match s.pipeline.schedule {
        ScheduleKind::ZbAuto => {
            let costs = crate::auto_costs(s);
            let limit = s.pipeline.max_in_flight;
            if mode == WeightVersions::One {
                for c in baton_schedule::auto::candidates(s.shape(), &costs, limit) {
                    candidates.push((c.name, plan_steps::repeat(&c.plan, n)?));
                }
            } else {
                for c in baton_schedule::auto::candidates(all, &costs, limit) {
                    candidates.push((c.name, c.plan));
                }
            }
        }
        kind => {
            let plan = if mode == WeightVersions::One {
                plan_steps::repeat(&crate::fixed_plan(s)?, n)?
            } else {
                baton_schedule::build(kind, all)?
            };
            candidates.push(("", plan));
        }
    }
    let mut best: Option<(Trace, plan_steps::StepWeights, &'static str)> = None;
    let mut tried = Vec::new();
    let mut refusal = None;
    for (name, plan) in candidates {
        let weights = match plan_steps::weights(&plan, m, mode) {
            Ok(w) => w,
            Err(e) => {
                refusal.get_or_insert(e);
                continue;
            }
        };
        let after = plan_steps::update_positions(&plan, m)?;
        // A fused zb-auto order runs the scenario as 1F1B.
        let mut x = s.clone();
        if x.pipeline.schedule == ScheduleKind::ZbAuto && !plan.shape.split_backward {
            x.pipeline.schedule = ScheduleKind::OneFOneB;
        }
        let tensor = if fast { tensor_config_fast(&x) } else { tensor_config(&x) };
        let mut options = run_options(&x, false);
        options.step_updates = Some(StepUpdates { after, duration: update });
        // A plan of several steps is checked again before it runs.
        options.plan_checked = false;
        let kind = plan.kind;
        let mut trace =
            baton_executor::simulate_parallel(plan, &stage_costs(&x), topo.clone(), options, None, tensor.as_ref())?;
        trace.plan.kind = if s.pipeline.schedule == ScheduleKind::ZbAuto { ScheduleKind::ZbAuto } else { kind };
        let total = trace.step_time().as_ns();
        tried.push(baton_report::Tried { order: name, step_ms: ms(total) / n as f64 });
        if best.as_ref().is_none_or(|(b, _, _)| total < b.step_time().as_ns()) {
            best = Some((trace, weights, name));
        }
    }
    let Some((trace, weights, chosen)) = best else {
        return Err(refusal.unwrap_or(ScheduleError::Zero { what: "max_in_flight" }).into());
    };
    let step_ns = step_times(&trace, m, n);
    let pieces = s.pieces();
    let stages: Vec<StepStage> = (0..s.shape().virtual_stages())
        .map(|k| {
            let versions = weights.versions[k as usize];
            let params = pieces.get(k as usize).map_or(0, |x| x.params);
            StepStage {
                stage: k,
                device: k % s.pipeline.stages,
                staleness_steps: weights.staleness[k as usize],
                weight_versions: versions,
                distinct_versions: weights.distinct[k as usize],
                extra_bytes: (versions.saturating_sub(1) as u64)
                    .saturating_mul(params)
                    .saturating_mul(s.pipeline.version_bytes_per_param as u64),
            }
        })
        .collect();
    let mut report = baton_report::build(&trace, &labels_for(s, &stages));
    if s.pipeline.schedule == ScheduleKind::ZbAuto {
        let mean = trace.step_time().as_ns() / n as u64;
        report.schedule = ScheduleKind::ZbAuto.name().to_string();
        report.schedule_choice = Some(schedule_choice(s, &trace, chosen, tried, mean));
    }
    finish(&mut report, s, &trace, step_ns, stages);
    Ok(SimulatedStep { trace, report })
}

fn steps_error(message: &str) -> SimulateError {
    SimulateError::Schedule(ScheduleError::Steps(message.to_string()))
}

/// The labels of `s`'s report over all its steps: FLOPs of every step, and
/// the weight versions beyond the first in each device's state.
fn labels_for(s: &Scenario, stages: &[StepStage]) -> baton_report::Labels {
    let n = s.pipeline.steps.max(1) as f64;
    let mut l = labels(s);
    l.flops = l.flops.map(|(f, peak)| (f * n, peak));
    let t = s.parallel.tensor.max(1) as usize;
    for st in stages {
        for r in 0..t {
            if let Some(b) = l.memory.state_bytes.get_mut(st.device as usize * t + r) {
                *b = b.saturating_add(st.extra_bytes);
            }
        }
    }
    l
}

/// Each step's time in a trace of several: from the previous step's end to
/// the last end of the step's ops and updates on any device (device work
/// belongs to the step of the plan op before it).
fn step_times(trace: &Trace, m: u32, n: u32) -> Vec<u64> {
    let mut end = vec![0u64; n as usize];
    for recs in &trace.ops {
        let mut k = 0usize;
        for r in recs {
            if !r.op.kind.is_device_work() {
                k = plan_steps::step_of(r.op.micro_batch, m) as usize;
            }
            if let Some(e) = end.get_mut(k) {
                *e = (*e).max(r.end.as_ns());
            }
        }
    }
    let mut prev = trace.start().as_ns();
    end.iter()
        .map(|&e| {
            let e = e.max(prev);
            let d = e - prev;
            prev = e;
            d
        })
        .collect()
}

/// Gives a report over all steps the steps' own section; its step time
/// stays the whole run (what its devices' busy and idle times add up to),
/// its micro-batches and global batch become per step.
fn finish(report: &mut Report, s: &Scenario, trace: &Trace, step_ns: Vec<u64>, stages: Vec<StepStage>) {
    let n = step_ns.len().max(1) as u64;
    let total = trace.step_time().as_ns();
    report.micro_batches = s.pipeline.micro_batches;
    report.global_batch /= n;
    let later = &step_ns[1.min(step_ns.len() - 1)..];
    let steady =
        if step_ns.len() > 1 { later.iter().sum::<u64>() as f64 / later.len() as f64 } else { step_ns[0] as f64 };
    report.steps = Some(Steps {
        count: n as u32,
        flush: s.pipeline.flush,
        weight_versions: s.pipeline.weight_versions.name(),
        step_ms: step_ns.iter().map(|&x| ms(x)).collect(),
        step_ns,
        total_ms: ms(total),
        mean_ms: total as f64 / n as f64 / 1e6,
        steady_ms: steady / 1e6,
        stages,
    });
}
