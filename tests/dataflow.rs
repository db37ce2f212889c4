//! An op kind beyond forward and backward flows through every part of baton
//! once the schedule crate states its rule: a plan whose backward passes are
//! split into a backward (input gradient) and a weight (weight gradient) op
//! runs in the executor, shows in the trace and its CSV, in the report's
//! gaps and peaks, and in the chart, with no other crate naming the kind.

use baton::engine::SimDuration;
use baton::executor::{simulate, StageCost};
use baton::link::{LinkSpec, Topology};
use baton::report::{build, csv, svg::gantt, Cause, Labels, MemoryInputs};
use baton::schedule::{Op, Plan, ScheduleKind, Shape};

#[test]
fn a_split_backward_flows_through_executor_trace_report_and_chart() {
    // Worked by hand: two stages, two micro-batches, F 10, B 20, W 5 ns, free
    // links (zero bytes, zero latency).
    //   device 0: F0 F1 B0 W0 B1 W1;  device 1: F0 B0 F1 B1 W0 W1.
    //   d0: F0 0-10, F1 10-20.  d1: F0 10-20, B0 20-40, F1 40-50, B1 50-70,
    //       W0 70-75, W1 75-80.
    //   d0: B0 needs B0@1 (40): 40-60, W0 60-65, B1 needs B1@1 (70): 70-90,
    //       W1 90-95. Step 95.
    let shape = Shape { split_backward: true, ..Shape::new(2, 2, 1) };
    let (f, b, w) = (Op::forward, Op::backward, Op::weight);
    let plan = Plan {
        kind: ScheduleKind::OneFOneB,
        shape,
        per_device: vec![
            vec![f(0, 0), f(1, 0), b(0, 0), w(0, 0), b(1, 0), w(1, 0)],
            vec![f(0, 1), b(0, 1), f(1, 1), b(1, 1), w(0, 1), w(1, 1)],
        ],
    };
    let cost = StageCost { weight: SimDuration(5), ..StageCost::new(SimDuration(10), SimDuration(20), 0) };
    let free = LinkSpec { latency_ns: 0, bytes_per_s: 1_000_000_000 };
    let trace = simulate(plan, &[cost, cost], Topology::full_mesh(2, free)).unwrap();
    let times =
        |d: usize| trace.ops[d].iter().map(|r| (r.op.to_string(), r.start.as_ns(), r.end.as_ns())).collect::<Vec<_>>();
    let t = |s: &str, a: u64, z: u64| (s.to_string(), a, z);
    assert_eq!(
        times(0),
        vec![
            t("F0@0", 0, 10),
            t("F1@0", 10, 20),
            t("B0@0", 40, 60),
            t("W0@0", 60, 65),
            t("B1@0", 70, 90),
            t("W1@0", 90, 95)
        ]
    );
    assert_eq!(
        times(1),
        vec![
            t("F0@1", 10, 20),
            t("B0@1", 20, 40),
            t("F1@1", 40, 50),
            t("B1@1", 50, 70),
            t("W0@1", 70, 75),
            t("W1@1", 75, 80)
        ]
    );

    // Report: step 95; device 0 waits 20-40 and 65-70 for gradients; a weight
    // pass neither takes nor frees a stash, so device 0 holds 2 micro-batches
    // (F1 starts before B0 ends) and device 1 one at a time.
    let labels =
        Labels { memory: MemoryInputs { stash_bytes: vec![100, 100], ..MemoryInputs::default() }, ..Labels::default() };
    let report = build(&trace, &labels);
    assert_eq!(report.step_time_ns, 95);
    let gaps0: Vec<(u64, u64, Cause)> =
        report.gaps.iter().filter(|g| g.device == 0).map(|g| (g.start_ns, g.end_ns, g.cause)).collect();
    assert_eq!(gaps0, vec![(20, 40, Cause::Gradient), (65, 70, Cause::Gradient)]);
    assert_eq!(report.devices.iter().map(|d| d.peak_activations).collect::<Vec<_>>(), vec![2, 1]);
    assert_eq!(report.devices.iter().map(|d| d.peak_activation_bytes).collect::<Vec<_>>(), vec![200, 100]);
    assert_eq!(report.devices[0].busy_ns, 2 * (10 + 20 + 5));

    // CSV: four weight rows, named by the kind.
    let mut out = Vec::new();
    csv::write(&trace, &mut out).unwrap();
    let text = String::from_utf8(out).unwrap();
    assert_eq!(text.lines().filter(|l| l.contains(",weight,")).count(), 4);
    assert!(text.contains("0,weight,0,0,60,65"), "{text}");

    // Chart: the legend and the tooltips name the kind; its bars have their own colour.
    let svg = gantt::render(
        &[gantt::Run {
            trace: &trace,
            report: &report,
            label: String::new(),
            note: String::new(),
            devices_per_node: None,
        }],
        &Default::default(),
    )
    .unwrap();
    assert!(svg.contains("dominant-baseline=\"central\">weight</text>"), "the legend lists the kind");
    assert_eq!(svg.matches("<title>weight of micro-batch").count(), 4);
    assert!(svg.contains("fill=\"#009e73\""), "its own colour");
}
