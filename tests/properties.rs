//! Invariants of every simulated step, over random scenarios (proptest).

use baton::executor::Trace;
use baton::report::{csv, json, svg::gantt, Report};
use baton::scenario::{parse, Scenario};
use baton::schedule::OpKind;
use proptest::prelude::*;

mod common;

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
    (1u32..6, 1u32..5, 0usize..6, 1u32..4, 0u32..3, 0u32..20_000, 1u32..200).prop_flat_map(
        |(p, mult, k, v, extra, latency_ns, gbps)| {
            // Every schedule baton builds (ScheduleKind::ALL).
            let schedule = ["fill-drain", "1f1b", "interleaved", "zb-h1", "zb-h2", "zb-auto"][k];
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
    let mut out = Vec::new();
    csv::write(trace, &mut out).unwrap();
    let run = gantt::Run { trace, report, label: String::new(), note: String::new(), devices_per_node: None };
    (json::render(report, &Default::default()).unwrap(), gantt::render(&[run], &Default::default()).unwrap(), out)
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
                // (A split backward's B is the backward less W, half of it
                // here since no layer gives `weight`.)
                let piece = &s.pieces()[r.op.stage as usize];
                let split = trace.plan.shape.split_backward;
                let w = s.layers[piece.first_layer..piece.first_layer + piece.layers].iter().map(|l| l.backward_ns / 2).sum::<u64>();
                let want = match r.op.kind {
                    OpKind::Forward => piece.forward_ns,
                    OpKind::Backward if split => piece.backward_ns - w,
                    OpKind::Backward => piece.backward_ns,
                    _ => w,
                };
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
                if r.op.kind == OpKind::Weight {
                    let (_, b) = trace.record(baton::schedule::Op::backward(r.op.micro_batch, r.op.stage));
                    prop_assert!(b.end <= r.start);
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
                    // Held until its input-gradient pass ends (peak_activations).
                    OpKind::Weight => {}
                    OpKind::Encode | OpKind::Update => prop_assert!(false, "no synchronisation here"),
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

        // Transfers, checked against the scenario rather than the executor's
        // own look-ups: piece k holds the layers of an even split (the first
        // `n mod pieces` pieces one more), the boundary between pieces k and
        // k+1 carries the activation of piece k's last layer in both
        // directions, and the flat cluster gives each ordered device pair its
        // own link (latency, bandwidth in GB/s = bytes per ns).
        let pieces = (c.p * c.v) as usize;
        let n = c.layers.len();
        let mut last_layer = Vec::with_capacity(pieces);
        let mut end = 0usize;
        for k in 0..pieces {
            end += n / pieces + usize::from(k < n % pieces);
            last_layer.push(end - 1);
        }
        for t in &trace.transfers {
            let boundary = t.from_stage.min(t.to_stage) as usize;
            prop_assert_eq!(t.from_stage.abs_diff(t.to_stage), 1);
            prop_assert_eq!(t.bytes, c.layers[last_layer[boundary]].2 as u64 * 1_000, "boundary {}", boundary);
            prop_assert_eq!((t.src, t.dst), (t.from_stage % c.p, t.to_stage % c.p));
            prop_assert_eq!(t.end.as_ns() - t.sent.as_ns(), latency);
            // Alone on its link from start until its last byte leaves (no other
            // transfer between the same two devices in flight at once: one that
            // starts exactly when another's last byte leaves does not share),
            // it takes latency + ceil(bytes / bandwidth).
            let alone = !trace.transfers.iter().any(|o| {
                !std::ptr::eq(o, t) && (o.src, o.dst) == (t.src, t.dst) && o.start < t.sent && t.start < o.sent
            });
            if alone {
                prop_assert_eq!(t.end.as_ns() - t.start.as_ns(), latency + t.bytes.div_ceil(c.gbps as u64));
            }
        }
        // Every boundary crossing between devices is one transfer per
        // micro-batch and direction; boundaries inside a device move nothing.
        let crossing = (0..pieces.saturating_sub(1)).filter(|&k| k as u32 % c.p != (k as u32 + 1) % c.p).count();
        prop_assert_eq!(trace.transfers.len(), 2 * crossing * c.m as usize);

        // Same input, byte-identical outputs.
        let again = baton::simulate(&scenario(&c)).unwrap();
        prop_assert!(outputs(trace, report) == outputs(&again.trace, &again.report));
    }
}

/// A random scenario with a random input split and memory limit, for `baton split`.
#[derive(Debug, Clone)]
struct SplitCase {
    p: u32,
    m: u32,
    v: u32,
    schedule: &'static str,
    /// forward us, backward us, activation kB, stash kB, params k.
    layers: Vec<(u32, u32, u32, u32, u32)>,
    /// Layers per piece of the input split.
    split: Vec<u32>,
    latency_us: u32,
    gbps: u32,
    memory_mb: Option<u32>,
}

fn split_case() -> impl Strategy<Value = SplitCase> {
    (1u32..5, 1u32..4, 0usize..3, 1u32..3, 0u32..3, 0u32..50, 1u32..50, 0usize..8, prop::option::of(50u32..400))
        .prop_flat_map(|(p, mult, k, v, extra, latency_us, gbps, more, memory_mb)| {
            let schedule = ["fill-drain", "1f1b", "interleaved"][k];
            let (m, v) = if schedule == "interleaved" { (p * mult, v) } else { (p * mult + extra, 1) };
            let pieces = (p * v) as usize;
            let n = pieces + more;
            (
                prop::collection::vec((1u32..300, 1u32..600, 0u32..20_000, 0u32..20_000, 0u32..2_000), n),
                prop::sample::subsequence((1..n).collect::<Vec<_>>(), pieces - 1),
            )
                .prop_map(move |(layers, cuts)| {
                    let mut split = Vec::with_capacity(pieces);
                    let mut at = 0;
                    for c in cuts.iter().copied().chain([n]) {
                        split.push((c - at) as u32);
                        at = c;
                    }
                    SplitCase { p, m, v, schedule, layers, split, latency_us, gbps, memory_mb }
                })
        })
}

fn split_scenario(c: &SplitCase) -> Scenario {
    let mut text = String::from("title: split case\nmodel:\n  layers:\n");
    for (f, b, a, st, pa) in &c.layers {
        text +=
            &format!("    - {{ forward: {f}us, backward: {b}us, activation: {a}kB, stash: {st}kB, params: {pa}k }}\n");
    }
    let memory = c.memory_mb.map_or(String::new(), |mb| format!(", device: {{ memory: {mb}MB }}"));
    let split: Vec<String> = c.split.iter().map(u32::to_string).collect();
    text += &format!(
        "cluster: {{ devices: {}, link: {{ latency: {}us, bandwidth: {}GB/s }}{memory} }}\n\
         pipeline: {{ stages: {}, micro_batches: {}, schedule: {}, chunks: {}, split: [{}] }}\n",
        c.p,
        c.latency_us,
        c.gbps,
        c.p,
        c.m,
        c.schedule,
        c.v,
        split.join(", ")
    );
    parse(&text, "split.yaml", "split", &[]).unwrap()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    /// `baton split` never proposes a split slower than the scenario's own
    /// when that one fits, the proposal fits whenever the input does, and it
    /// keeps the input when nothing found is faster.
    #[test]
    fn split_is_never_slower_than_a_fitting_input(c in split_case()) {
        let s = split_scenario(&c);
        let input = baton::simulate(&s).unwrap().report;
        let plan = baton::planner::plan(&s).unwrap();
        let best = &plan.best.outcome.report;
        prop_assert_eq!(plan.baseline.outcome.report.step_time_ns, input.step_time_ns);
        if input.fits {
            prop_assert!(plan.no_fit.is_none());
            prop_assert!(best.fits);
            prop_assert!(best.step_time_ns <= input.step_time_ns, "{} > {}", best.step_time_ns, input.step_time_ns);
            if best.step_time_ns == input.step_time_ns {
                prop_assert_eq!(&plan.best.split, &c.split, "no change for no gain");
                prop_assert!(plan.baseline_is_best);
            }
        }
        // The proposal, simulated on its own, is what the plan reports.
        let again = baton::simulate(&{
            let mut t = s.clone();
            t.pipeline.split = plan.best.split.clone();
            t
        })
        .unwrap()
        .report;
        prop_assert_eq!(again.step_time_ns, best.step_time_ns);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    /// baton's step time and busy times equal those of the reference model in
    /// tests/common (written from the README's rules, sharing no code with
    /// baton) for fill-drain and 1F1B on flat clusters, whenever no two
    /// transfers are on one link at once (the reference does not model sharing).
    #[test]
    fn steps_match_the_reference_model(
        stages in prop::collection::vec((1u64..500, 0u64..900, 0u64..4_000), 1..6),
        m in 1usize..10,
        one_f_one_b in any::<bool>(),
        latency_us in 0u64..30,
        gbps in 1u64..40,
    ) {
        let schedule = if one_f_one_b { "1f1b" } else { "fill-drain" };
        let p = stages.len();
        let mut text = String::from("title: reference\nmodel:\n  layers:\n");
        for (f, b, kb) in &stages {
            text += &format!("    - {{ forward: {f}us, backward: {b}us, activation: {kb}kB }}\n");
        }
        text += &format!(
            "cluster: {{ devices: {p}, link: {{ latency: {latency_us}us, bandwidth: {gbps}GB/s }} }}\n\
             pipeline: {{ stages: {p}, micro_batches: {m}, schedule: {schedule} }}\n"
        );
        let s = parse(&text, "reference.yaml", "reference", &[]).unwrap();
        let r = baton::simulate(&s).unwrap().report;
        let reference: Vec<common::RefStage> = stages
            .iter()
            .map(|&(f, b, kb)| common::RefStage { forward_ns: f * 1_000, backward_ns: b * 1_000, send_bytes: kb * 1_000 })
            .collect();
        if let Some(want) = common::reference_step(&reference, m, schedule, latency_us * 1_000, gbps * 1_000_000_000) {
            prop_assert_eq!(r.step_time_ns, want.step_ns);
            let busy: Vec<u64> = r.devices.iter().map(|d| d.busy_ns).collect();
            prop_assert_eq!(busy, want.busy_ns);
        }
    }
}

/// A random data-parallel step.
#[derive(Debug, Clone)]
struct ReplicaCase {
    base: Case,
    d: u32,
    sync: &'static str,
    overlap: bool,
    shard: &'static str,
    compression: &'static str,
    /// Parameters (thousands) per layer.
    params_k: Vec<u32>,
    bucket_kb: u32,
    update_us: u32,
    /// Devices per tensor group, and each layer's all-reduce size (kB).
    t: u32,
    tensor_kb: u32,
}

fn replica_case() -> impl Strategy<Value = ReplicaCase> {
    (
        case(),
        1u32..5,
        0usize..6,
        any::<bool>(),
        0usize..3,
        0usize..3,
        prop::collection::vec(0u32..3_000, 12),
        1u32..4_000,
        0u32..300,
        (1u32..4, 0u32..500),
    )
        .prop_map(|(base, d, k, overlap, shard, compression, params_k, bucket_kb, update_us, (t, tensor_kb))| {
            let sync = ["ring", "halving-doubling", "tree", "hierarchical", "parameter-server", "direct"][k];
            let d = if sync == "halving-doubling" && !d.is_power_of_two() { 2 } else { d };
            let halves = !matches!(sync, "tree" | "parameter-server");
            let compression = ["none", "quantize", "top-k"][compression];
            let shard =
                if halves && compression != "top-k" { ["none", "optimizer", "gradients"][shard] } else { "none" };
            ReplicaCase { base, d, sync, overlap, shard, compression, params_k, bucket_kb, update_us, t, tensor_kb }
        })
}

fn replica_scenario(c: &ReplicaCase) -> Result<Scenario, String> {
    let b = &c.base;
    let mut text = String::from("model:\n  layers:\n");
    for (i, (f, bw, a)) in b.layers.iter().enumerate() {
        let params = c.params_k[i % c.params_k.len()];
        text += &format!(
            "    - {{ forward: {f}us, backward: {bw}us, activation: {a}kB, params: {params}k, tensor_bytes: {}kB }}\n",
            c.tensor_kb
        );
    }
    // Two nodes (so hierarchical has work to do when the replicas spread),
    // two spare devices for dedicated servers.
    let devices = c.d * b.p * c.t + 2;
    text += &format!(
        "cluster:\n  nodes: 2\n  devices_per_node: {}\n  device_link: {{ latency: {}ns, bandwidth: {}GB/s }}\n  node_link: {{ latency: 1us, bandwidth: 10GB/s }}\n\
         pipeline: {{ stages: {}, micro_batches: {}, schedule: {}, chunks: {} }}\n\
         parallel: {{ data: {}, tensor: {}, order: [pipeline, data] }}\n\
         gradients: {{ sync: {}, overlap: {}, bucket: {}kB, servers: 2, server_devices: dedicated{} }}\n\
         training: {{ shard: {}, update: {}us }}\n",
        devices.div_ceil(2),
        b.latency_ns,
        b.gbps,
        b.p,
        b.m,
        b.schedule,
        b.v,
        c.d,
        c.t,
        c.sync,
        c.overlap,
        c.bucket_kb,
        match c.compression {
            "quantize" => ", compression: { kind: quantize, bits: 4, rate: 50GB/s }",
            "top-k" => ", compression: { kind: top-k, keep: 0.01, rate: 50GB/s }",
            _ => "",
        },
        c.shard,
        c.update_us,
    );
    parse(&text, "random.yaml", "random", &[]).map_err(|e| format!("{e}\n{text}"))
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    /// Every replica runs the whole plan in order; a group's collectives never
    /// overlap; no device runs two things at once; every device's step end
    /// covers its collectives; the same input gives byte-identical outputs.
    #[test]
    fn data_parallel_steps_respect_the_rules(c in replica_case()) {
        let s = match replica_scenario(&c) {
            Ok(s) => s,
            // Hierarchical with a stage's replicas spread unevenly over the
            // nodes is refused by design; nothing else may be.
            Err(e) => {
                prop_assert!(e.contains("gradients.sync") && e.contains("hierarchical"), "{}", e);
                return Ok(());
            }
        };
        let out = baton::simulate(&s).unwrap();
        let (trace, report) = (&out.trace, &out.report);
        let p = c.base.p as usize;
        let t = c.t as usize;
        prop_assert_eq!(trace.ops.len(), p * c.d as usize * t);
        for (w, recs) in trace.ops.iter().enumerate() {
            let planned: Vec<_> = recs.iter().filter(|r| !r.op.kind.is_device_work()).map(|r| r.op).collect();
            prop_assert_eq!(&planned, &trace.plan.per_device[(w / t) % p]);
            // A tensor group's ranks run in lock-step.
            prop_assert_eq!(recs, &trace.ops[w - w % t]);
            for pair in recs.windows(2) {
                prop_assert!(pair[1].start >= pair[0].end, "device {} overlaps", w);
            }
            let end = trace.device_end[w];
            prop_assert!(recs.last().is_none_or(|r| r.end <= end));
        }
        let mut by_group: std::collections::BTreeMap<Vec<u32>, Vec<(u64, u64)>> = Default::default();
        for col in &trace.collectives {
            prop_assert!(col.start <= col.end);
            for &m in &col.group {
                prop_assert!(trace.device_end[m as usize * t] >= col.end);
            }
            by_group.entry(col.group.clone()).or_default().push((col.start.as_ns(), col.end.as_ns()));
        }
        for spans in by_group.values() {
            for pair in spans.windows(2) {
                prop_assert!(pair[1].0 >= pair[0].1, "a group's collectives overlap: {:?}", spans);
            }
        }
        for t in &trace.sync_transfers {
            prop_assert!(t.start <= t.sent && t.sent <= t.end);
        }
        if c.d == 1 && c.t == 1 {
            // One replica without tied weights: the pipeline runs exactly as
            // without synchronisation (an update, if any, only follows it).
            prop_assert!(trace.collectives.is_empty());
            // The plan that ran (zb-auto's choice among its candidates; a
            // fused choice runs the scenario's costs as 1F1B's).
            let plan = trace.plan.clone();
            let mut costs_of = s.clone();
            if !plan.shape.split_backward {
                costs_of.pipeline.schedule = baton::schedule::ScheduleKind::OneFOneB;
            }
            let alone = baton::executor::simulate(plan, &baton::stage_costs(&costs_of), baton::topology(&s)).unwrap();
            for (w, recs) in trace.ops.iter().enumerate() {
                let planned: Vec<_> = recs.iter().filter(|r| !r.op.kind.is_device_work()).copied().collect();
                prop_assert_eq!(&planned, &alone.ops[w]);
            }
            prop_assert_eq!(&trace.transfers, &alone.transfers);
        }
        // The critical path runs through the collectives: contiguous, adding
        // up to the step, and (without compression, whose encode and decode
        // work interleaves with a collective's transfers) with every wait
        // explained by an op, a send or a collective.
        let path = baton::report::critical::Graph::of(trace).critical_path();
        prop_assert!(!path.is_empty());
        for w in path.windows(2) {
            prop_assert_eq!(w[0].end_ns(), w[1].start_ns());
        }
        let total: u64 = path.iter().map(|e| e.end_ns() - e.start_ns()).sum();
        prop_assert_eq!(total, report.step_time_ns);
        if c.compression == "none" {
            let unexplained: Vec<_> = path.iter().filter(|e| e.kind == "sync" && e.stage.is_none()).collect();
            prop_assert!(unexplained.is_empty(), "{:?}", unexplained);
        }
        let again = baton::simulate(&replica_scenario(&c).unwrap()).unwrap();
        prop_assert!(outputs(trace, report) == outputs(&again.trace, &again.report));
    }
}
