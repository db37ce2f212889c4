//! Invariants of every simulated step, over random scenarios (proptest).

use baton::executor::Trace;
use baton::report::{gantt, to_json, write_trace_csv, Report};
use baton::scenario::{parse, Scenario};
use baton::schedule::OpKind;
use proptest::prelude::*;

#[derive(Debug, Clone)]
struct Case {
    p: u32,
    m: u32,
    v: u32,
    schedule: &'static str,
    layers: Vec<(u32, u32, u32)>,
    latency_ns: u32,
    gbps: u32,
}

fn case() -> impl Strategy<Value = Case> {
    (1u32..6, 1u32..5, 0usize..3, 1u32..4, 0u32..3, 0u32..20_000, 1u32..200).prop_flat_map(
        |(p, mult, k, v, extra, latency_ns, gbps)| {
            let schedule = ["fill-drain", "1f1b", "interleaved"][k];
            let (m, v) = if schedule == "interleaved" { (p * mult, v) } else { (p * mult + extra, 1) };
            let pieces = (p * v) as usize;
            // Forward 1..200 us, backward 0..400 us, activation 0..8 MB.
            prop::collection::vec((1u32..200, 0u32..400, 0u32..8_000), pieces..pieces + 6)
                .prop_map(move |layers| Case { p, m, v, schedule, layers, latency_ns, gbps })
        },
    )
}

fn scenario(c: &Case) -> Scenario {
    let mut text = String::from("title: \"random <&> case\"\nmodel:\n  layers:\n");
    for (f, b, a) in &c.layers {
        text += &format!("    - {{ forward: {f}us, backward: {b}us, activation: {a}kB }}\n");
    }
    text += &format!(
        "cluster: {{ devices: {}, link: {{ latency: {}ns, bandwidth: {}GB/s }} }}\npipeline: {{ stages: {}, micro_batches: {}, schedule: {}, chunks: {} }}\n",
        c.p, c.latency_ns, c.gbps, c.p, c.m, c.schedule, c.v
    );
    parse(&text, "random.yaml", "random", &[]).unwrap()
}

fn outputs(trace: &Trace, report: &Report) -> (String, String, Vec<u8>) {
    let mut csv = Vec::new();
    write_trace_csv(trace, &mut csv).unwrap();
    (to_json(report).unwrap(), gantt::render(trace, report).unwrap(), csv)
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

    #[test]
    fn every_step_respects_the_rules(c in case()) {
        let s = scenario(&c);
        let out = baton::simulate(&s).unwrap();
        let (trace, report) = (&out.trace, &out.report);
        let latency = c.latency_ns as u64;

        for (d, recs) in trace.ops.iter().enumerate() {
            // Ran in plan order, one at a time.
            let ran: Vec<_> = recs.iter().map(|r| r.op).collect();
            prop_assert_eq!(&ran, &trace.plan.per_device[d]);
            for w in recs.windows(2) {
                prop_assert!(w[0].end <= w[1].start, "device {d} overlaps: {:?} {:?}", w[0], w[1]);
            }
            for r in recs {
                // Duration is the piece's cost.
                let piece = &s.pieces()[r.op.stage as usize];
                let want = if r.op.kind == OpKind::Forward { piece.forward_ns } else { piece.backward_ns };
                prop_assert_eq!(r.end.as_ns() - r.start.as_ns(), want);
                // Dependencies: data available before start; transfers start when
                // the producer ends and take at least the latency.
                if let Some(dep) = trace.dependency(r.op) {
                    prop_assert!(dep.available_at <= r.start);
                    prop_assert!(dep.produced_at <= dep.available_at);
                    if let Some(t) = dep.transfer {
                        let t = &trace.transfers[t];
                        prop_assert_eq!(t.start, dep.produced_at);
                        prop_assert!(t.end.as_ns() >= t.start.as_ns() + latency);
                        prop_assert_eq!(t.end.as_ns() - t.sent.as_ns(), latency);
                    }
                }
                if r.op.kind == OpKind::Backward {
                    let (_, f) = trace.record(baton::schedule::Op::forward(r.op.micro_batch, r.op.stage));
                    prop_assert!(f.end <= r.start);
                }
            }
        }

        // Peak activations equal a brute-force count of distinct micro-batches
        // held, over every instant at which one is taken: micro-batch i is held
        // from its earliest forward start to its latest backward end on the device.
        for (d, recs) in trace.ops.iter().enumerate() {
            let mut held: std::collections::BTreeMap<u32, (u64, u64)> = Default::default();
            for r in recs {
                let e = held.entry(r.op.micro_batch).or_insert((u64::MAX, 0));
                match r.op.kind {
                    OpKind::Forward => e.0 = e.0.min(r.start.as_ns()),
                    OpKind::Backward => e.1 = e.1.max(r.end.as_ns()),
                }
            }
            let spans: Vec<(u64, u64)> = held.into_values().collect();
            let brute = spans.iter().map(|&(t, _)| spans.iter().filter(|&&(a, b)| a <= t && t < b).count()).max().unwrap_or(0);
            prop_assert_eq!(report.devices[d].peak_activations as usize, brute, "device {}", d);
        }

        // Busy + idle = step time; bubbles in [0, 1]; gaps cover idle exactly.
        prop_assert!(report.bubble_fraction >= 0.0 && report.bubble_fraction <= 1.0);
        for d in &report.devices {
            prop_assert_eq!(d.busy_ns + d.idle_ns, report.step_time_ns);
            prop_assert!(d.bubble_fraction >= 0.0 && d.bubble_fraction <= 1.0);
            let gap_ns: u64 = report.gaps.iter().filter(|g| g.device == d.device).map(|g| g.end_ns - g.start_ns).sum();
            prop_assert_eq!(gap_ns, d.idle_ns);
        }

        // Same input, byte-identical outputs.
        let again = baton::simulate(&scenario(&c)).unwrap();
        prop_assert!(outputs(trace, report) == outputs(&again.trace, &again.report));
    }
}
