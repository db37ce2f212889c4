//! # baton-report: what a simulated step means to a person
//!
//! Turns an executor [`Trace`](baton_executor::Trace) into a [`Report`] (step
//! time, busy and idle time and bubble fraction per device, peak activations
//! and memory, every idle gap with its cause) and writes it out. The analysis
//! ([`build`], in `analysis.rs`) is kept apart from the formats, one module
//! each, every one behind the same shape of entry point:
//!
//! | module | output | entry point |
//! | --- | --- | --- |
//! | [`text`] | the summary `baton run` prints | `text::render(&Report, &TextOptions) -> String` |
//! | [`json`] | the report as JSON | `json::render(&Report, &JsonOptions)` |
//! | [`csv`] | every op and transfer as CSV | `csv::write(&Trace, impl Write)` |
//! | [`svg::gantt`] | Gantt chart of one or several runs | `gantt::render(&[Run], &GanttOptions)` |
//! | [`svg::memory`] | each device's memory over the step | `memory::render(&MemoryRun, &MemoryOptions)` |
//! | [`svg::line`] | series over categories (sweeps) | `line::render(&LineChart, &LineOptions)` |
//!
//! Definitions used throughout:
//! * step time = last operation end - first operation start;
//! * a device's bubble fraction = its idle time / step time;
//! * overall bubble fraction = total idle / (devices in use x step time);
//! * peak activations = the largest number of micro-batches whose activations
//!   a device holds at once, each held from the op that takes its stash to the
//!   op that frees it (the schedule crate says which: [`baton_schedule::OpKind::stash`]).
//!
//! ```
//! use baton_engine::SimDuration;
//! use baton_executor::{simulate, StageCost};
//! use baton_link::{LinkSpec, Topology};
//! use baton_report::{build, text, Labels};
//! use baton_schedule::{build as plan, ScheduleKind, Shape};
//!
//! // Two stages, two micro-batches, fill-drain, free links: F 10 ns, B 20 ns.
//! let plan = plan(ScheduleKind::FillDrain, Shape::new(2, 2, 1)).unwrap();
//! let cost = StageCost::new(SimDuration(10), SimDuration(20), 0);
//! let free = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };
//! let trace = simulate(plan, &[cost, cost], Topology::full_mesh(2, free)).unwrap();
//! let report = build(&trace, &Labels { title: "two stages".into(), ..Labels::default() });
//! assert_eq!(report.step_time_ns, 90);
//! // Each device is idle 30 of 90 ns: a third of the step.
//! assert!((report.bubble_fraction - 1.0 / 3.0).abs() < 1e-12);
//! assert!(text::render(&report, &text::TextOptions::default()).contains("step time"));
//! ```
//!
//! It deliberately knows nothing about scenario files or how the trace was
//! simulated; it only reads the trace.
#![warn(missing_docs)]

mod analysis;
pub mod critical;
pub mod csv;
pub mod events;
pub mod json;
pub mod svg;
pub mod text;

pub use analysis::*;
pub use text::format_bytes;

use thiserror::Error;

/// Writing a report failed.
#[derive(Debug, Error)]
pub enum ReportError {
    /// The output could not be written.
    #[error("cannot write: {0}")]
    Io(#[from] std::io::Error),
    /// The CSV writer failed.
    #[error("cannot write CSV: {0}")]
    Csv(#[from] ::csv::Error),
    /// The JSON encoder failed.
    #[error("cannot write JSON: {0}")]
    Json(#[from] serde_json::Error),
    /// The chart could not be drawn.
    #[error("cannot draw the chart: {0}")]
    Draw(String),
    /// Too many operations to chart.
    #[error("{ops} operations are too many to chart (at most {limit}); chart fewer micro-batches or stages, a --window or fewer --devices")]
    TooLarge {
        /// Operations (and transfer marks) the chart would draw.
        ops: usize,
        /// The most a chart draws.
        limit: usize,
    },
}
#[cfg(test)]
mod tests {
    use super::*;
    use baton_engine::SimDuration;
    use baton_executor::{simulate, StageCost, Trace};
    use baton_link::{LinkSpec, Topology};
    use baton_schedule::{build as plan, ScheduleKind, Shape};

    fn run(kind: ScheduleKind, p: u32, m: u32, f: u64, b: u64, link: LinkSpec, bytes: u64) -> (Trace, Report) {
        let pl = plan(kind, Shape::new(p, m, 1)).unwrap();
        let costs = vec![StageCost::new(SimDuration(f), SimDuration(b), bytes); p as usize];
        let tr = simulate(pl, &costs, Topology::full_mesh(p, link)).unwrap();
        let rep = build(&tr, &Labels { title: "t".into(), seed: 7, ..Labels::default() });
        (tr, rep)
    }

    const FREE: LinkSpec = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };

    #[test]
    fn gaps_cover_idle_time_exactly() {
        let (_, rep) =
            run(ScheduleKind::OneFOneB, 4, 6, 10, 20, LinkSpec { latency_ns: 7, bytes_per_s: 1_000_000_000 }, 50);
        for d in &rep.devices {
            let gap_ns: u64 = rep.gaps.iter().filter(|g| g.device == d.device).map(|g| g.end_ns - g.start_ns).sum();
            assert_eq!(gap_ns, d.idle_ns, "device {}", d.device);
            assert_eq!(d.busy_ns + d.idle_ns, rep.step_time_ns);
        }
        assert!(rep.gaps.iter().any(|g| g.cause == Cause::Link));
    }

    #[test]
    fn two_stage_gaps_by_hand() {
        // p=2, m=2 fill-drain, F=10, B=20, free links. Device 1: fill 0-10,
        // busy 10-70, no drain. Device 0: F0 0-10, F1 10-20, waits 20-50 for the
        // gradient of micro-batch 0 from device 1 (B0@1 ends at 50), B0 50-70, B1 70-90.
        let (_, rep) = run(ScheduleKind::FillDrain, 2, 2, 10, 20, FREE, 0);
        assert_eq!(rep.step_time_ns, 90);
        let g0: Vec<_> = rep.gaps.iter().filter(|g| g.device == 0).collect();
        assert_eq!(g0.len(), 1);
        assert_eq!((g0[0].start_ns, g0[0].end_ns, g0[0].cause), (20, 50, Cause::Gradient));
        assert_eq!((g0[0].from_device, g0[0].micro_batch), (Some(1), Some(0)));
        let g1: Vec<_> = rep.gaps.iter().filter(|g| g.device == 1).map(|g| (g.start_ns, g.end_ns, g.cause)).collect();
        assert_eq!(g1, vec![(0, 10, Cause::Fill), (70, 90, Cause::Drain)]);
        // Overall bubble = (30 + 30) / (2 x 90).
        assert!((rep.bubble_fraction - 60.0 / 180.0).abs() < 1e-12);
        assert_eq!(rep.devices[0].peak_activations, 2);
    }

    #[test]
    fn transit_time_is_attributed_to_the_link() {
        // p=2, m=1, 1000 B at 1 GB/s + 500 ns latency: the gradient leaves device 1
        // at 1900 and arrives at 3400; device 0 idles 100-3400: 100-1900 waiting for
        // device 1, 1900-3400 link.
        let (_, rep) =
            run(ScheduleKind::OneFOneB, 2, 1, 100, 200, LinkSpec { latency_ns: 500, bytes_per_s: 1_000_000_000 }, 1000);
        let g0: Vec<_> = rep.gaps.iter().filter(|g| g.device == 0).map(|g| (g.start_ns, g.end_ns, g.cause)).collect();
        assert_eq!(g0, vec![(100, 1900, Cause::Gradient), (1900, 3400, Cause::Link)]);
        let top = longest_gaps(&rep, 1);
        assert_eq!((top[0].device, top[0].cause), (0, Cause::Gradient), "1800 ns, longer than device 1's 1600 ns fill");
        let text = text::render(&rep, &text::TextOptions::default());
        assert!(text.contains("step time") && text.contains("longest idle gaps") && text.contains("seed 7"), "{text}");
    }

    #[test]
    fn trace_csv_has_a_row_per_op_and_transfer() {
        let (tr, _) = run(ScheduleKind::OneFOneB, 2, 2, 10, 20, FREE, 8);
        let mut out = Vec::new();
        csv::write(&tr, &mut out).unwrap();
        let text = String::from_utf8(out).unwrap();
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines[0], "device,kind,micro_batch,stage,start_ns,end_ns,slack_ns");
        assert_eq!(lines.len(), 1 + 8 + 4);
        // By hand: device 0 F0 0-10, F1 10-20, B0 40-60, B1 70-90; device 1
        // F0 10-20, B0 20-40, F1 40-50, B1 50-70. F0 on device 0 starts the
        // chain that ends the step at 90: no slack. F1 on device 0 (10-20)
        // feeds F1 on device 1, which could start as late as 40 (its device
        // is busy with B0 until then): 20 ns of slack.
        assert_eq!(lines[1], "0,forward,0,0,0,10,0");
        assert!(lines.contains(&"0,forward,1,0,10,20,20"), "{text}");
        assert!(lines.iter().any(|l| l.starts_with("0,send,0,0,10,")));
        let json = json::render(&build(&tr, &Labels::default()), &json::JsonOptions::default()).unwrap();
        let v: serde_json::Value = serde_json::from_str(&json).unwrap();
        assert!(v["devices"][1]["peak_activations"].is_u64());
        assert!(v["gaps"][0]["cause"].is_string());
    }
}
