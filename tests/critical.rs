//! Why a step takes what it takes: the critical path and every op's slack
//! (published bubble counts, an independent recomputation over random
//! scenarios), and `--what-if` (re-simulation with one part faster).

use std::collections::HashMap;

use baton::executor::Trace;
use baton::scenario::{parse, Scenario};
use proptest::prelude::*;

/// `p` stages of one layer each (forward `f`, backward `b` in us), links free
/// and activations of zero bytes.
fn equal(p: u32, m: u32, schedule: &str, f: u64, b: u64) -> Scenario {
    let text = format!(
        "model:\n  layers:\n    - {{ name: l, repeat: {p}, forward: {f}us, backward: {b}us, activation: 0B }}\n\
         cluster:\n  devices: {p}\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n\
         pipeline:\n  stages: {p}\n  micro_batches: {m}\n  schedule: {schedule}\n"
    );
    parse(&text, "c.yaml", "c", &[]).unwrap()
}

#[test]
fn equal_stages_put_m_plus_p_minus_1_slots_on_the_path() {
    // Huang et al., "GPipe", NeurIPS 2019, sec. 2.3, and Narayanan et al.,
    // "Efficient Large-Scale Language Model Training on GPU Clusters Using
    // Megatron-LM", SC 2021, sec. 2.2.1: with p stages of equal time a step
    // is (m + p - 1) forward slots and (m + p - 1) backward slots of one
    // stage each, the p - 1 extra being the bubble. The critical path runs
    // through exactly those: m + p - 1 forwards and m + p - 1 backwards.
    for schedule in ["fill-drain", "1f1b"] {
        for (p, m) in [(4, 8), (3, 5), (5, 2)] {
            let step = baton::simulate(&equal(p, m, schedule, 3, 7)).unwrap().with_critical_path();
            let path = &step.report.critical_path;
            let sum: f64 = path.iter().map(|e| e.end_ms - e.start_ms).sum();
            assert!((sum - step.report.step_time_ms).abs() < 1e-9, "{schedule} {p} {m}");
            assert_eq!(step.report.step_time_ns, (m + p - 1) as u64 * 10_000);
            let count = |k: &str| path.iter().filter(|e| e.kind == k).count() as u32;
            assert_eq!(count("forward"), m + p - 1, "{schedule} p={p} m={m}");
            assert_eq!(count("backward"), m + p - 1, "{schedule} p={p} m={m}");
            // The path starts at the first device's first forward and ends
            // with the first device's last backward.
            assert_eq!((path[0].kind, path[0].device, path[0].start_ms), ("forward", 0, 0.0));
            let last = path.last().unwrap();
            assert_eq!((last.kind, last.device), ("backward", 0));
        }
    }
}

#[test]
fn the_text_compacts_runs_on_one_device() {
    let step = baton::simulate(&equal(4, 8, "1f1b", 3, 7)).unwrap().with_critical_path();
    let text = baton::report::critical::render_text(&step.trace, &step.report.critical_path);
    // The last device runs every micro-batch's forward and backward in turn.
    assert!(text.contains("device 3: F0..F7, B0..B7 (80.000 us)"), "{text}");
    assert!(text.starts_with("critical path (110.000 us in "), "{text}");
}

/// One trace's slack, recomputed here: a memoised latest finish over the
/// successors read off the records (the next op on the device; an op's
/// outgoing transfers; a transfer's consuming op), sharing no code with the
/// report's graph.
fn independent_slack(trace: &Trace) -> (HashMap<(u32, usize), u64>, Vec<u64>) {
    let end = trace.end().as_ns();
    let mut position = HashMap::new();
    for (d, recs) in trace.ops.iter().enumerate() {
        for (i, r) in recs.iter().enumerate() {
            position.insert((d as u32, r.op), i);
        }
    }
    // Successors of op (d, i): ops and transfers.
    let mut op_to_transfers: HashMap<(u32, usize), Vec<usize>> = HashMap::new();
    for (k, t) in trace.transfers.iter().enumerate() {
        let i = position[&(t.src, t.producer())];
        op_to_transfers.entry((t.src, i)).or_default().push(k);
    }
    fn op_latest(
        trace: &Trace,
        d: u32,
        i: usize,
        end: u64,
        memo: &mut HashMap<(u32, usize), u64>,
        position: &HashMap<(u32, baton::schedule::Op), usize>,
        outs: &HashMap<(u32, usize), Vec<usize>>,
    ) -> u64 {
        if let Some(&v) = memo.get(&(d, i)) {
            return v;
        }
        let recs = &trace.ops[d as usize];
        let mut latest = end;
        if i + 1 < recs.len() {
            let next = &recs[i + 1];
            let lf = op_latest(trace, d, i + 1, end, memo, position, outs);
            latest = latest.min(lf - (next.end.as_ns() - next.start.as_ns()));
        }
        for &k in outs.get(&(d, i)).map(Vec::as_slice).unwrap_or(&[]) {
            let t = &trace.transfers[k];
            let j = position[&(t.dst, t.consumer())];
            let c = &trace.ops[t.dst as usize][j];
            let consumer_start =
                op_latest(trace, t.dst, j, end, memo, position, outs) - (c.end.as_ns() - c.start.as_ns());
            latest = latest.min(consumer_start - (t.end.as_ns() - t.start.as_ns()));
        }
        memo.insert((d, i), latest);
        latest
    }
    let mut memo = HashMap::new();
    let mut slack = HashMap::new();
    for (d, recs) in trace.ops.iter().enumerate() {
        for (i, r) in recs.iter().enumerate() {
            let lf = op_latest(trace, d as u32, i, end, &mut memo, &position, &op_to_transfers);
            slack.insert((d as u32, i), lf - r.end.as_ns());
        }
    }
    let transfers = trace
        .transfers
        .iter()
        .map(|t| {
            let j = position[&(t.dst, t.consumer())];
            let c = &trace.ops[t.dst as usize][j];
            let lf = op_latest(trace, t.dst, j, end, &mut memo, &position, &op_to_transfers);
            lf - (c.end.as_ns() - c.start.as_ns()) - t.end.as_ns()
        })
        .collect();
    (slack, transfers)
}

/// Stages, micro-batch multiple, chunks, schedule index, layers (forward
/// us, backward us, activation kB), latency ns, bandwidth GB/s.
type RandomCase = (u32, u32, u32, usize, Vec<(u32, u32, u32)>, u32, u32);

fn random_case() -> impl Strategy<Value = RandomCase> {
    (1u32..5, 1u32..4, 1u32..3, 0usize..6, 0u32..20_000, 1u32..100).prop_flat_map(|(p, mult, v, k, lat, gbps)| {
        prop::collection::vec((1u32..200, 0u32..400, 0u32..8_000), (p * 2) as usize..(p * 2 + 4) as usize)
            .prop_map(move |layers| (p, mult, v, k, layers, lat, gbps))
    })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

    /// Over random pipelines (every built schedule, links with latency and
    /// shared bandwidth): the path's links follow each other without a gap
    /// and add up to the step time; each is a real dependency or the
    /// device's own order; the trace CSV's slack equals an independent
    /// recomputation; the path's ops have no slack; and every op without
    /// slack has a predecessor and a successor without slack that meet it
    /// exactly (so it lies on some critical path).
    #[test]
    fn the_path_and_the_slack_agree_with_the_realised_graph((p, mult, v, k, layers, lat, gbps) in random_case()) {
        let schedule = ["fill-drain", "1f1b", "interleaved", "zb-h1", "zb-h2", "zb-auto"][k];
        let (m, v) = if schedule == "interleaved" { (p * mult, v) } else { (p * mult + 1, 1) };
        let mut text = String::from("model:\n  layers:\n");
        for (f, b, a) in &layers {
            text += &format!("    - {{ forward: {f}us, backward: {b}us, activation: {a}kB }}\n");
        }
        text += &format!(
            "cluster: {{ devices: {p}, link: {{ latency: {lat}ns, bandwidth: {gbps}GB/s }} }}\n\
             pipeline: {{ stages: {p}, micro_batches: {m}, schedule: {schedule}, chunks: {v} }}\n"
        );
        let s = parse(&text, "r.yaml", "r", &[]).unwrap();
        let step = baton::simulate(&s).unwrap().with_critical_path();
        let (trace, report) = (&step.trace, &step.report);
        let path = &report.critical_path;
        prop_assert!(!path.is_empty());
        prop_assert_eq!(path[0].start_ms, 0.0);
        for w in path.windows(2) {
            prop_assert!((w[0].end_ms - w[1].start_ms).abs() < 1e-12, "{:?} then {:?}", w[0], w[1]);
            // A send leaves its producer's device; the op after it runs on
            // its receiver; two ops in a row share a device.
            match (w[0].kind, w[1].kind) {
                (_, "send") => prop_assert_eq!(w[0].device, w[1].device),
                ("send", _) => prop_assert_eq!(Some(w[1].device), w[0].to_device()),
                _ => prop_assert!(w[0].device == w[1].device || w[0].stage.zip(w[1].stage).is_some_and(|(a, b)| a.abs_diff(b) == 1)),
            }
        }
        let total: f64 = path.iter().map(|e| e.end_ms - e.start_ms).sum();
        prop_assert!((total - report.step_time_ms).abs() < 1e-6);

        // Slack from the CSV against the independent one.
        let mut csv = Vec::new();
        baton::report::csv::write(trace, &mut csv).unwrap();
        let csv = String::from_utf8(csv).unwrap();
        prop_assert!(csv.starts_with("device,kind,micro_batch,stage,start_ns,end_ns,slack_ns\n"));
        let (ops_slack, transfer_slack) = independent_slack(trace);
        let mut from_csv: HashMap<(u32, String, u32, u32, u64), u64> = HashMap::new();
        for line in csv.lines().skip(1) {
            let f: Vec<&str> = line.split(',').collect();
            let key = (f[0].parse().unwrap(), f[1].to_string(), f[2].parse().unwrap(), f[3].parse().unwrap(), f[4].parse().unwrap());
            from_csv.insert(key, f[6].parse().unwrap());
        }
        for (d, recs) in trace.ops.iter().enumerate() {
            for (i, r) in recs.iter().enumerate() {
                let key = (d as u32, r.op.kind.as_str().to_string(), r.op.micro_batch, r.op.stage, r.start.as_ns());
                prop_assert_eq!(from_csv[&key], ops_slack[&(d as u32, i)], "op {} on device {}", r.op, d);
            }
        }
        for (k, t) in trace.transfers.iter().enumerate() {
            let key = (t.src, "send".to_string(), t.micro_batch, t.from_stage, t.start.as_ns());
            prop_assert_eq!(from_csv[&key], transfer_slack[k]);
        }
        // The path's ops have no slack.
        for e in path.iter().filter(|e| e.kind != "send") {
            let recs = &trace.ops[e.device as usize];
            let i = recs.iter().position(|r| r.start.as_ns() == e.start_ns() && r.op.micro_batch == e.micro_batch.unwrap()).unwrap();
            prop_assert_eq!(ops_slack[&(e.device, i)], 0);
        }
        // Every op without slack meets a slack-free predecessor exactly
        // (unless it starts the step) and a slack-free successor (unless it
        // ends it): it lies on a critical path.
        let t_end = trace.end().as_ns();
        let zero = |d: u32, i: usize| ops_slack[&(d, i)] == 0;
        for (d, recs) in trace.ops.iter().enumerate() {
            let d = d as u32;
            for (i, r) in recs.iter().enumerate() {
                if !zero(d, i) {
                    continue;
                }
                let start = r.start.as_ns();
                let before = start == 0
                    || (i > 0 && recs[i - 1].end.as_ns() == start && zero(d, i - 1))
                    || trace.transfers.iter().enumerate().any(|(k, t)| {
                        t.dst == d && t.consumer() == r.op && t.end.as_ns() == start && transfer_slack[k] == 0
                    });
                let end = r.end.as_ns();
                let after = end == t_end
                    || (i + 1 < recs.len() && recs[i + 1].start.as_ns() == end && zero(d, i + 1))
                    || trace.transfers.iter().enumerate().any(|(k, t)| {
                        t.src == d && t.producer() == r.op && t.start.as_ns() == end && transfer_slack[k] == 0
                    });
                prop_assert!(before && after, "op {} on device {}: before {} after {}", r.op, d, before, after);
            }
        }
    }
}

#[test]
fn what_if_ranks_the_head_heavy_stage_first_by_the_hand_worked_gain() {
    // The unbalanced demo: stage 3 holds two blocks (1.1 ms forward, 2.2 ms
    // backward) and the head (2.4 ms, 4.8 ms): 13.8 ms per micro-batch, 110.4
    // ms for its 8, all on the critical path (the README says so). 10% less
    // is 11.04 ms less, and since stage 3 stays the bottleneck the step
    // shortens by exactly that. Each directed link carries 8 transfers of 12 MiB
    // at 48 GB/s (262.144 us each): 10% of 2.097152 ms = 209.7152 us saved.
    let s = baton::scenario::load(std::path::Path::new("scenarios/unbalanced-split.yaml"), &[]).unwrap();
    let base = baton::simulate(&s).unwrap();
    let w = baton::whatif::analyse(&s, &base, 0.9, baton::whatif::Scope::Stages).unwrap();
    assert_eq!(w[0].target, "stage 3");
    assert!((w[0].gain_ms - 11.04).abs() < 1e-9, "{:?}", w[0]);
    assert!((w[0].saved_ms - 11.04).abs() < 1e-9);
    assert!((w[0].gain_per_ms_saved - 1.0).abs() < 1e-9);
    let link = w.iter().find(|x| x.target == "link dev0->dev1").unwrap();
    assert!((link.saved_ms - 0.2097152).abs() < 1e-9, "{link:?}");
    // Stages, then every link that carried data (6 directed links).
    assert_eq!(w.len(), 4 + 6);
    assert!(w.windows(2).all(|p| p[0].gain_ms >= p[1].gain_ms));
    // With layers: one target per layer as well, named as in the table.
    let w = baton::whatif::analyse(&s, &base, 0.5, baton::whatif::Scope::Layers).unwrap();
    assert_eq!(w.len(), 4 + 12 + 6);
    assert!(w.iter().any(|x| x.target == "layer head" && x.factor == 0.5));
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    /// A stage none of whose ops is on the critical path gains nothing from
    /// being made a little faster (links that only add latency, so nothing
    /// shares bandwidth and a faster op can only make others earlier).
    #[test]
    fn speeding_up_a_stage_off_the_critical_path_changes_nothing((p, mult, _v, k, layers, lat, _gbps) in random_case()) {
        let schedule = ["fill-drain", "1f1b", "1f1b", "zb-h1", "zb-h2", "1f1b"][k];
        let m = p * mult + 1;
        let mut text = String::from("model:\n  layers:\n");
        for (f, b, _) in &layers {
            text += &format!("    - {{ forward: {f}us, backward: {b}us, activation: 0B }}\n");
        }
        text += &format!(
            "cluster: {{ devices: {p}, link: {{ latency: {lat}ns, bandwidth: 1GB/s }} }}\n\
             pipeline: {{ stages: {p}, micro_batches: {m}, schedule: {schedule} }}\n"
        );
        let s = parse(&text, "w.yaml", "w", &[]).unwrap();
        let base = baton::simulate(&s).unwrap().with_critical_path();
        let on_path: Vec<u32> = base.report.critical_path.iter().filter(|e| e.kind != "send" && e.kind != "sync").map(|e| e.device).collect();
        let w = baton::whatif::analyse(&s, &base, 0.95, baton::whatif::Scope::Stages).unwrap();
        for d in 0..p {
            if !on_path.contains(&d) {
                let x = w.iter().find(|x| x.target == format!("stage {d}")).unwrap();
                prop_assert_eq!(x.gain_ms, 0.0, "stage {} is off the path: {:?}", d, x);
            }
        }
    }
}

#[test]
fn the_path_runs_through_the_gradient_collectives_as_worked_by_hand() {
    // Two replicas of a one-stage pipeline, one micro-batch; two layers of
    // forward 50 ns, backward 100 ns and 1000 parameters (2 bytes each on
    // the wire), a bucket per layer, a 1 GB/s link each way, no latency, an
    // update of 500 ns. F 0..100, B 100..300; the last layer's bucket is
    // final half-way through B (its share of the backward), at 200. A ring
    // all-reduce takes 2(p-1) alpha + 2 n (p-1)/p beta (Patarasuk and Yuan,
    // JPDC 2009, costed as in Thakur, Rabenseifner and Gropp, IJHPCA 2005):
    // p = 2, n = 2000 B, alpha = 0, beta = 1 ns/B: 2 x 1000 = 2000 ns. Bucket 0: 200..2200; bucket 1 (final at 300)
    // waits for the group: 2200..4200; the update 4200..4700. The path: F,
    // B up to the instant bucket 0 was final, both all-reduces, the update:
    // 100 + 100 + 2000 + 2000 + 500 = 4700.
    let text = "model:\n  layers:\n\
        \x20   - { name: a, forward: 50ns, backward: 100ns, activation: 0B, params: 1000 }\n\
        \x20   - { name: b, forward: 50ns, backward: 100ns, activation: 0B, params: 1000 }\n\
        cluster:\n  devices: 2\n  link: { latency: 0ns, bandwidth: 1GB/s }\n\
        pipeline:\n  stages: 1\n  micro_batches: 1\n  schedule: 1f1b\n\
        parallel:\n  data: 2\n\
        gradients:\n  sync: ring\n  bucket: 1B\n  bytes_per_param: 2\n\
        training:\n  update: 500ns\n";
    let s = parse(text, "c.yaml", "c", &[]).unwrap();
    let step = baton::simulate(&s).unwrap().with_critical_path();
    assert_eq!(step.report.step_time_ns, 4_700);
    let path: Vec<(&str, Option<u32>, u64, u64)> =
        step.report.critical_path.iter().map(|e| (e.kind, e.micro_batch, e.start_ns(), e.end_ns())).collect();
    assert_eq!(
        path,
        vec![
            ("forward", Some(0), 0, 100),
            ("backward", Some(0), 100, 200),
            ("sync", Some(0), 200, 2_200),
            ("sync", Some(1), 2_200, 4_200),
            ("update", Some(0), 4_200, 4_700),
        ]
    );
    // Every op is on a critical path (both replicas' buckets are final
    // together), so none has slack.
    let (ops, _) = baton::report::critical::Graph::of(&step.trace).slack();
    assert!(ops.iter().flatten().all(|&x| x == 0), "{ops:?}");
    let text = baton::report::critical::render_text(&step.trace, &step.report.critical_path);
    assert!(text.contains("-> all-reduce of piece 0 bucket 1 among devices 0, 1 (ring, 2.000 us)"), "{text}");
}
