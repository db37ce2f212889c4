//! `baton run --what-if`: which stage, layer or link is worth speeding up,
//! found by re-simulating the step with each one's time cut.
//!
//! A stage's target scales the forward, backward and weight-gradient times
//! of every layer its device runs; a layer's, that layer's; a link's, its
//! latency and the time its bytes take (bandwidth divided by the factor).
//! Each variant is simulated in full (on the rayon pool, results in target
//! order, so the output never depends on the thread count) and ranked by
//! how much it shortens the step.

use baton_link::LinkSpec;
use baton_report::WhatIf;
use baton_scenario::Scenario;
use rayon::prelude::*;

use crate::{simulate, simulate_on, topology, SimulateError, SimulatedStep};

/// What to try besides every link that carried data.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Scope {
    /// Each pipeline stage.
    Stages,
    /// Each stage and each layer.
    Layers,
}

enum Target {
    Stage(u32),
    Layer(usize),
    Link(String),
}

fn scale(x: u64, factor: f64) -> u64 {
    ((x as f64) * factor).round().min(u64::MAX as f64) as u64
}

/// `s` with layers `which` taking `factor` times as long.
fn with_layers_scaled(s: &Scenario, which: &[usize], factor: f64) -> Scenario {
    let mut v = s.clone();
    for &i in which {
        for l in [&mut v.tensor_layers[i], &mut v.layers[i]] {
            l.forward_ns = scale(l.forward_ns, factor);
            l.backward_ns = scale(l.backward_ns, factor);
            l.weight_ns = scale(l.weight_ns, factor).min(l.backward_ns);
        }
    }
    v
}

/// The layers pipeline device `d` runs (all its pieces).
fn layers_of_stage(s: &Scenario, d: u32) -> Vec<usize> {
    let p = s.pipeline.stages as usize;
    let mut first = 0usize;
    let mut out = Vec::new();
    for (k, &n) in s.pipeline.split.iter().enumerate() {
        if k % p == d as usize {
            out.extend(first..first + n as usize);
        }
        first += n as usize;
    }
    out
}

/// Every target's re-simulated step, ranked by gain (ties in target order:
/// stages, layers, links).
pub fn analyse(s: &Scenario, base: &SimulatedStep, factor: f64, scope: Scope) -> Result<Vec<WhatIf>, SimulateError> {
    let mut targets: Vec<Target> = (0..s.pipeline.stages).map(Target::Stage).collect();
    if scope == Scope::Layers {
        targets.extend((0..s.layers.len()).map(Target::Layer));
    }
    targets.extend(base.report.links.iter().map(|l| Target::Link(l.name.clone())));
    let base_ns = base.report.step_time_ns;
    let m = s.pipeline.micro_batches as u64;
    let trace = &base.trace;
    let compute_ns = |device: u32| -> u64 {
        trace.ops[device as usize]
            .iter()
            .filter(|r| !r.op.kind.is_device_work())
            .map(|r| r.end.saturating_since(r.start).as_ns())
            .sum()
    };
    let results: Vec<(usize, WhatIf)> = targets
        .par_iter()
        .enumerate()
        .map(|(k, t)| {
            let (name, step, work_ns) = match t {
                Target::Stage(d) => {
                    let v = with_layers_scaled(s, &layers_of_stage(s, *d), factor);
                    (format!("stage {d}"), simulate(&v)?, compute_ns(trace.device_of(0, *d)) as f64)
                }
                Target::Layer(i) => {
                    let v = with_layers_scaled(s, &[*i], factor);
                    let l = &s.tensor_layers[*i];
                    let work = (l.forward_ns + l.backward_ns) as f64 * m as f64;
                    (format!("layer {}", s.layers[*i].name), simulate(&v)?, work)
                }
                Target::Link(name) => {
                    let mut topo = topology(s);
                    let busy = base.report.links.iter().find(|l| &l.name == name).map_or(0.0, |l| l.busy_ms * 1e6);
                    if let Some(id) = topo.link_named(name) {
                        let spec = topo.link(id);
                        let bytes_per_s = if spec.bytes_per_s == LinkSpec::UNLIMITED {
                            spec.bytes_per_s
                        } else {
                            ((spec.bytes_per_s as f64) / factor).round().clamp(1.0, (LinkSpec::UNLIMITED - 1) as f64)
                                as u64
                        };
                        topo.set_link(id, LinkSpec { latency_ns: scale(spec.latency_ns, factor), bytes_per_s });
                    }
                    (format!("link {name}"), simulate_on(s, &topo)?, busy)
                }
            };
            let step_ns = step.report.step_time_ns;
            let gain_ms = (base_ns as f64 - step_ns as f64) / 1e6;
            let saved_ms = work_ns * (1.0 - factor) / 1e6;
            Ok((
                k,
                WhatIf {
                    target: name,
                    factor,
                    step_time_ms: step_ns as f64 / 1e6,
                    step_time_ns: step_ns,
                    gain_ms,
                    saved_ms,
                    gain_per_ms_saved: if saved_ms > 0.0 { gain_ms / saved_ms } else { 0.0 },
                },
            ))
        })
        .collect::<Result<_, SimulateError>>()?;
    let mut results = results;
    results.sort_by(|a, b| b.1.gain_ms.total_cmp(&a.1.gain_ms).then(a.0.cmp(&b.0)));
    Ok(results.into_iter().map(|(_, w)| w).collect())
}

/// The ranked table `baton run --what-if` prints.
pub fn render_text(results: &[WhatIf], base_ns: u64) -> String {
    use std::fmt::Write as _;
    let factor = results.first().map_or(0.9, |w| w.factor);
    let mut s = String::new();
    let _ = writeln!(
        s,
        "what if one part took {}% less time (each re-simulated; the step now takes {}):",
        ((1.0 - factor) * 100.0 * 1000.0).round() / 1000.0,
        baton_engine::format_ns(base_ns)
    );
    let width = results.iter().map(|w| w.target.len()).max().unwrap_or(6).max(6);
    let _ = writeln!(
        s,
        " rank  {:<width$}  {:>13}  {:>12}  {:>12}  {:>14}",
        "target", "step time", "gain", "work saved", "gain per ms"
    );
    for (k, w) in results.iter().enumerate() {
        let ns = |ms: f64| {
            if ms < 0.0 {
                format!("-{}", baton_engine::format_ns((-ms * 1e6).round() as u64))
            } else {
                baton_engine::format_ns((ms * 1e6).round() as u64)
            }
        };
        let _ = writeln!(
            s,
            " {:>4}  {:<width$}  {:>13}  {:>12}  {:>12}  {:>14.2}",
            k + 1,
            w.target,
            ns(w.step_time_ms),
            ns(w.gain_ms),
            ns(w.saved_ms),
            w.gain_per_ms_saved
        );
    }
    s
}
