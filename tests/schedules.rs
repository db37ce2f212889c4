//! Split-backward schedules, `zb-auto` and orders written by the user:
//! published values, hand-worked memory, deadlocks against an independent
//! topological sort, and orders read back byte for byte.

use std::collections::VecDeque;
use std::path::Path;

use baton::report::{csv, json};
use baton::scenario::{parse, parse_in, Scenario};
use baton::schedule::{order, order_text, Op, OpKind, ScheduleKind, Shape};
use proptest::prelude::*;

mod common;
use common::{baton as run_baton, text};

/// Four stages of one layer each, forward `f`, input gradient `b` and
/// weight gradient `w` (in us), links free; `extra` appended to `pipeline`.
fn equal_stages(m: u32, f: u64, b: u64, w: u64, schedule: &str, extra: &str) -> Scenario {
    let text = format!(
        "model:\n  layers:\n    - {{ name: l, repeat: 4, forward: {f}us, backward: {}us, weight: {w}us, activation: 0B }}\n\
         cluster:\n  devices: 4\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n\
         pipeline:\n  stages: 4\n  micro_batches: {m}\n  schedule: {schedule}\n{extra}",
        b + w
    );
    parse(&text, "zb.yaml", "zb", &[]).unwrap()
}

#[test]
fn zb_auto_on_equal_times_stays_within_the_bound_the_issue_sets() {
    // Qi, Wan, Huang, Lin, "Zero Bubble Pipeline Parallelism", ICLR 2024,
    // sec. 3: p = 4, m = 12, T_F = T_B = T_W = 1 unit (1 us). The busiest
    // device's work is 12 x 3 = 36 units; the automatic order must stay
    // within 36 + (p - 1) T_F = 39, which is ZB-H1's published step
    // (36 + (p-1)(T_F + T_B - T_W) = 39). 1F1B takes 36 + 9 = 45.
    let s = equal_stages(12, 1, 1, 1, "zb-auto", "");
    let report = baton::simulate(&s).unwrap().report;
    assert!(report.step_time_ns <= 39_000 && report.step_time_ns >= 36_000, "{}", report.step_time_ns);
    let choice = report.schedule_choice.as_ref().expect("zb-auto reports its choice");
    assert_eq!(choice.busiest_work_ms, 0.036);
    assert_eq!(choice.max_in_flight, 4, "1F1B's peak, p, by default");
    assert!((choice.above_work_ms - (report.step_time_ms - 0.036)).abs() < 1e-12);
    // Every order it tried is listed, 1F1B's fused order (45 units) among them.
    assert!(choice.tried.iter().any(|t| t.order == "1f1b" && (t.step_ms - 0.045).abs() < 1e-12), "{:?}", choice.tried);
    // With room for ZB-H2's 2p - 1 = 7 micro-batches it may use it.
    let roomy = equal_stages(12, 2, 3, 1, "zb-auto", "  max_in_flight: 7\n");
    let r = baton::simulate(&roomy).unwrap().report;
    // T_F = 2, T_B = 3, T_W = 1: ZB-H2 takes 81 units (the formula's
    // 72 + 9; see tests/published.rs); zb-auto is at least as fast.
    assert!(r.step_time_ns <= 81_000, "{}", r.step_time_ns);
    assert!(r.devices.iter().all(|d| d.peak_activations <= 7));
}

#[test]
fn two_unflushed_zb_h2_steps_add_36_units_per_step() {
    // Same paper, sec. 3: ZB-H2's bubble (p-1)(T_F + T_B - 2 T_W) is 0 for
    // equal times once steps follow each other without a flush. One flushed
    // step of m = 12 takes 39 units (the last device starts (p-1) T_F = 3
    // late). Two steps as one order (each device's ZB-H2 order for
    // micro-batches 0-11, then the same order for 12-23, no barrier between)
    // take 39 + 36 = 75: the second step adds exactly its 36 units of work.
    let one = equal_stages(12, 1, 1, 1, "zb-h2", "");
    let plan = baton::fixed_plan(&one).unwrap();
    assert_eq!(baton::simulate(&one).unwrap().report.step_time_ns, 39_000);
    let mut two = String::new();
    for (d, ops) in plan.per_device.iter().enumerate() {
        let toks: Vec<String> = ops
            .iter()
            .chain(ops.iter())
            .enumerate()
            .map(|(k, op)| {
                let shift = if k < ops.len() { 0 } else { 12 };
                format!("{}{}", op.kind.letter(), op.micro_batch + shift)
            })
            .collect();
        two += &format!("{d}: {}\n", toks.join(" "));
    }
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(dir.path().join("two.order"), two).unwrap();
    let text =
        "model:\n  layers:\n    - { name: l, repeat: 4, forward: 1us, backward: 2us, weight: 1us, activation: 0B }\n\
                cluster:\n  devices: 4\n  link: { latency: 0ns, bandwidth: 1GB/s }\n\
                pipeline:\n  stages: 4\n  micro_batches: 24\n  schedule: custom\n  order: two.order\n";
    let s = parse_in(text, "two.yaml", "two", dir.path(), &[]).unwrap();
    assert_eq!(baton::simulate(&s).unwrap().report.step_time_ns, 75_000);
}

#[test]
fn weight_stash_is_held_from_b_to_w_as_worked_by_hand() {
    // p = 2, m = 2, ZB-H1, every pass 1 us, links free; each stage stashes
    // 100 MiB per micro-batch and keeps 30 MiB of it for W.
    // Device 0: F0 F1 B0 W0 B1 W1; device 1: F0 B0 F1 B1 W0 W1 (lag d = 1).
    // Device 1: F0 [1,2] holds 100; B0 [2,3] ends: 30; F1 [3,4] starts:
    //   130; B1 [4,5]: 60; W0 [5,6]: 30; W1 [6,7]: 0. Peak 130 MiB.
    // Device 0: F0 [0,1], F1 [1,2]: 200; B0 [3,4]: 100 + 30 = 130; W0 [4,5]:
    //   100; B1 [5,6]: 30; W1 [6,7]: 0. Peak 200 MiB.
    let text = |weight_stash: &str| {
        format!(
            "model:\n  layers:\n    - {{ name: l, repeat: 2, forward: 1us, backward: 2us, weight: 1us, activation: 0B, stash: 100MiB{weight_stash} }}\n\
             cluster:\n  devices: 2\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n\
             pipeline:\n  stages: 2\n  micro_batches: 2\n  schedule: zb-h1\n"
        )
    };
    let mib = 1u64 << 20;
    let s = parse(&text(", weight_stash: 30MiB"), "w.yaml", "w", &[]).unwrap();
    let r = baton::simulate(&s).unwrap().report;
    assert_eq!(r.step_time_ns, 7_000);
    assert_eq!(r.devices[0].peak_activation_bytes, 200 * mib);
    assert_eq!(r.devices[1].peak_activation_bytes, 130 * mib);
    // Left out, W keeps the whole stash: device 1 then holds 100 + 100 at
    // F1's start.
    let s = parse(&text(""), "w.yaml", "w", &[]).unwrap();
    assert_eq!(baton::simulate(&s).unwrap().report.devices[1].peak_activation_bytes, 200 * mib);
    // A fused schedule never holds a weight stash: 1F1B's device 1 holds one
    // micro-batch at a time, 100 MiB.
    let s = parse(&text(", weight_stash: 30MiB").replace("zb-h1", "1f1b"), "w.yaml", "w", &[]).unwrap();
    assert_eq!(baton::simulate(&s).unwrap().report.devices[1].peak_activation_bytes, 100 * mib);
    // The split search prices the same holds: 2 x 100 on stage 0 and
    // 100 + 30 on stage 1 ([`baton::memory_holds`]).
    let s = parse(&text(", weight_stash: 30MiB"), "w.yaml", "w", &[]).unwrap();
    let holds = baton::memory_holds(&s).unwrap();
    assert_eq!(baton::schedule::held_bytes(&holds[0], 100, 30), 200);
    assert_eq!(baton::schedule::held_bytes(&holds[1], 100, 30), 130);
}

#[test]
fn a_transformer_layer_keeps_32_s_b_h_bytes_for_w() {
    use baton::scenario::Transformer;
    // What W needs of one layer, from its matrix shapes (values per position):
    // QKV projection: input h, output gradient h + 2w; output projection:
    // input h, output gradient h; FFN: input h, the first matrix's output
    // gradient f, the second's input f and output gradient h. With w = h and
    // f = 4h: h + 3h + h + h + h + 4h + 4h + h = 16h values, 2 bytes each:
    // 32 s b h bytes. s = 2048, b = 1, h = 12288: 32 x 2048 x 12288 =
    // 805,306,368 bytes (Korthikanti et al.'s eq. 1 whole stash for the same
    // layer, a = 96: s b h (34 + 5 a s / h) = 2,868,903,936 bytes).
    let t = Transformer::new(80, 12288, 96, 2048, 51200);
    assert_eq!(t.layer_weight_stash_bytes(1), 32 * 2048 * 12288);
    assert_eq!(t.layer_weight_stash_bytes(1), 805_306_368);
    assert_eq!(t.layer_stash_bytes(1), 2_868_903_936);
    // Gated FFN (3 matrices) with f = 2h and grouped-query attention with
    // w = h / 4: 6h + 2(h/4) + 3(2h) = 12.5 h values per position: h = 1024,
    // s = 512, b = 2: 512 x 2 x 12.5 x 1024 x 2 bytes = 26,214,400.
    let mut g = Transformer::new(4, 1024, 16, 512, 1000);
    g.gated_ffn = true;
    g.ffn_hidden = 2048;
    g.kv_heads = 4;
    assert_eq!(g.layer_weight_stash_bytes(2), 26_214_400);
}

/// Every op of a shape (one chunk per device), per device, in a plain order.
fn all_ops(p: u32, m: u32, split: bool) -> Vec<Vec<Op>> {
    (0..p)
        .map(|d| {
            let mut v = Vec::new();
            for i in 0..m {
                v.push(Op::forward(i, d));
                v.push(Op::backward(i, d));
                if split {
                    v.push(Op::weight(i, d));
                }
            }
            v
        })
        .collect()
}

/// Whether `orders` can all run to their end, by a topological sort (Kahn)
/// of the graph whose edges are the dataflow (F(i,s-1) -> F(i,s),
/// F(i,s) -> B(i,s), B(i,s+1) -> B(i,s), B(i,s) -> W(i,s)) and each device's
/// order (each op -> the next on its device): written here from the
/// dataflow's definition, sharing nothing with the validator.
fn completes_by_topological_sort(orders: &[Vec<Op>], p: u32) -> bool {
    let mut ids = std::collections::HashMap::new();
    for ops in orders {
        for &op in ops {
            let n = ids.len();
            ids.insert(op, n);
        }
    }
    let n = ids.len();
    let mut out: Vec<Vec<usize>> = vec![Vec::new(); n];
    let mut indegree = vec![0usize; n];
    let edge = |a: Op, b: Op, out: &mut Vec<Vec<usize>>, indegree: &mut Vec<usize>| {
        if let (Some(&x), Some(&y)) = (ids.get(&a), ids.get(&b)) {
            out[x].push(y);
            indegree[y] += 1;
        }
    };
    for ops in orders {
        for w in ops.windows(2) {
            edge(w[0], w[1], &mut out, &mut indegree);
        }
        for &op in ops {
            let (i, s) = (op.micro_batch, op.stage);
            match op.kind {
                OpKind::Forward if s > 0 => edge(Op::forward(i, s - 1), op, &mut out, &mut indegree),
                OpKind::Backward => {
                    edge(Op::forward(i, s), op, &mut out, &mut indegree);
                    if s + 1 < p {
                        edge(Op::backward(i, s + 1), op, &mut out, &mut indegree);
                    }
                }
                OpKind::Weight => edge(Op::backward(i, s), op, &mut out, &mut indegree),
                _ => {}
            }
        }
    }
    let mut queue: VecDeque<usize> = (0..n).filter(|&x| indegree[x] == 0).collect();
    let mut seen = 0;
    while let Some(x) = queue.pop_front() {
        seen += 1;
        for &y in &out[x] {
            indegree[y] -= 1;
            if indegree[y] == 0 {
                queue.push_back(y);
            }
        }
    }
    seen == n
}

fn order_file(orders: &[Vec<Op>], shape: &Shape) -> String {
    orders
        .iter()
        .enumerate()
        .map(|(d, ops)| {
            let toks: Vec<String> = ops.iter().map(|&op| baton::schedule::order_token(op, shape)).collect();
            format!("{d}: {}\n", toks.join(" "))
        })
        .collect()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    /// A random order of each device's ops either runs to its end (and
    /// simulates) or is refused as a deadlock (or a W before its B, a
    /// deadlock of one device), exactly when an independent topological
    /// sort of the waits finds a cycle.
    #[test]
    fn random_orders_run_or_are_refused_as_the_topological_sort_says(
        p in 1u32..5, m in 1u32..4, split in any::<bool>(), keys in prop::collection::vec(any::<u32>(), 36), sorted in 0usize..3,
    ) {
        let mut orders = all_ops(p, m, split);
        for ops in orders.iter_mut() {
            // A random permutation: sort the ops by random keys.
            let mut keyed: Vec<(u32, Op)> = ops.iter().enumerate().map(|(k, &op)| (keys[k], op)).collect();
            keyed.sort_by_key(|&(key, _)| key);
            *ops = keyed.into_iter().map(|(_, op)| op).collect();
            // Some cases with kinds grouped, which deadlock less often.
            if sorted == 1 {
                ops.sort_by_key(|o| o.kind);
            }
        }
        let shape = Shape { split_backward: split, ..Shape::new(p, m, 1) };
        let text = order_file(&orders, &shape);
        let expected = completes_by_topological_sort(&orders, p);
        match order::parse(&text, p, m, 1) {
            Ok(parsed) => {
                prop_assert!(expected, "accepted, but the sort finds a cycle:\n{text}");
                prop_assert_eq!(&parsed.plan.per_device, &orders);
                // It simulates to the end.
                let dir = tempfile::tempdir().unwrap();
                std::fs::write(dir.path().join("r.order"), &text).unwrap();
                let yaml = format!(
                    "model:\n  layers:\n    - {{ name: l, repeat: {p}, forward: 3us, backward: 5us, activation: 1MB }}\n\
                     cluster:\n  devices: {p}\n  link: {{ latency: 1us, bandwidth: 10GB/s }}\n\
                     pipeline:\n  stages: {p}\n  micro_batches: {m}\n  schedule: custom\n  order: r.order\n"
                );
                let s = parse_in(&yaml, "r.yaml", "r", dir.path(), &[]).unwrap();
                let r = baton::simulate(&s).unwrap().report;
                prop_assert_eq!(r.ops as u32, p * m * if split { 3 } else { 2 });
            }
            Err(e) => {
                prop_assert!(!expected, "refused, but the sort completes: {e}\n{text}");
                prop_assert!(
                    e.message.starts_with("deadlock: ") || e.message.contains("comes before its"),
                    "{e}"
                );
            }
        }
    }
}

fn scenario_in(dir: &Path, schedule: &str, p: u32, m: u32, v: u32, extra: &str) -> Scenario {
    let yaml = format!(
        "title: round trip\nmodel:\n  layers:\n    - {{ name: a, repeat: {}, forward: 7us, backward: 13us, weight: 5us, activation: 2MB, stash: 3MB, weight_stash: 1MB }}\n\
         cluster:\n  devices: {p}\n  link: {{ latency: 2us, bandwidth: 5GB/s }}\n  device: {{ memory: 1GB }}\n\
         pipeline:\n  stages: {p}\n  micro_batches: {m}\n  schedule: {schedule}\n  chunks: {v}\n{extra}",
        p * v + 1
    );
    parse_in(&yaml, "rt.yaml", "rt", dir, &[]).unwrap()
}

fn without_schedule(json: &str) -> serde_json::Value {
    let mut v: serde_json::Value = serde_json::from_str(json).unwrap();
    let o = v.as_object_mut().unwrap();
    o.remove("schedule");
    o.remove("schedule_choice");
    v
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    /// The order `baton order` writes for any built-in schedule, read back
    /// as `custom`, gives the same step: the trace CSV byte for byte, the
    /// JSON report byte for byte but for the schedule's name (and
    /// `zb-auto`'s note of its choice).
    #[test]
    fn an_exported_order_read_back_gives_the_same_report(k in 0usize..6, p in 1u32..5, mult in 1u32..4, extra in 0u32..3) {
        let kind = ScheduleKind::ALL[k];
        let (m, v) = if kind == ScheduleKind::Interleaved { (p * mult, 2) } else { (p * mult + extra, 1) };
        let dir = tempfile::tempdir().unwrap();
        let built = scenario_in(dir.path(), kind.name(), p, m, v, "");
        let first = baton::simulate(&built).unwrap();
        std::fs::write(dir.path().join("x.order"), order_text(&first.trace.plan)).unwrap();
        let custom = scenario_in(dir.path(), "custom", p, m, v, "  order: x.order\n");
        let again = baton::simulate(&custom).unwrap();
        let (mut a, mut b) = (Vec::new(), Vec::new());
        csv::write(&first.trace, &mut a).unwrap();
        csv::write(&again.trace, &mut b).unwrap();
        prop_assert!(a == b, "{kind}: trace CSV differs");
        let ja = json::render(&first.report, &Default::default()).unwrap();
        let jb = json::render(&again.report, &Default::default()).unwrap();
        prop_assert_eq!(without_schedule(&ja), without_schedule(&jb));
        prop_assert_eq!(again.report.schedule.as_str(), "custom");
        // Byte for byte once the one line naming the schedule is set aside.
        let strip = |s: &str| s.lines().filter(|l| !l.contains("\"schedule\"")).collect::<Vec<_>>().join("\n");
        if first.report.schedule_choice.is_none() {
            prop_assert_eq!(strip(&ja), strip(&jb));
        }
    }
}

/// Stages, micro-batches, replicas, layers (forward us, backward us,
/// activation kB), latency ns, bandwidth GB/s, overlap.
type AutoCase = (u32, u32, u32, Vec<(u32, u32, u32)>, u32, u32, bool);

/// Random layers, stages, micro-batches, links and replicas, no jitter.
fn auto_case() -> impl Strategy<Value = AutoCase> {
    (1u32..5, 1u32..10, 1u32..3, 0u32..20_000, 1u32..100, any::<bool>()).prop_flat_map(
        |(p, m, d, lat, gbps, overlap)| {
            prop::collection::vec((1u32..300, 1u32..600, 0u32..8_000), (p as usize)..(p as usize + 4))
                .prop_map(move |layers| (p, m, d, layers, lat, gbps, overlap))
        },
    )
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 40, ..ProptestConfig::default() })]

    /// `zb-auto` is never slower than `1f1b` on a scenario without jitter:
    /// it plays 1F1B's own order among its candidates whenever 1F1B fits the
    /// default in-flight limit (always), and keeps the fastest.
    #[test]
    fn zb_auto_is_never_slower_than_one_f_one_b((p, m, d, layers, lat, gbps, overlap) in auto_case()) {
        let mut yaml = String::from("model:\n  layers:\n");
        for (f, b, a) in &layers {
            yaml += &format!("    - {{ forward: {f}us, backward: {b}us, activation: {a}kB, params: 10M }}\n");
        }
        yaml += &format!(
            "cluster: {{ devices: {}, link: {{ latency: {lat}ns, bandwidth: {gbps}GB/s }} }}\n\
             pipeline: {{ stages: {p}, micro_batches: {m}, schedule: 1f1b }}\n\
             parallel: {{ data: {d} }}\ngradients: {{ overlap: {overlap} }}\n",
            p * d
        );
        let one = parse(&yaml, "a.yaml", "a", &[]).unwrap();
        let auto = parse(&yaml, "a.yaml", "a", &["pipeline.schedule=zb-auto".to_string()]).unwrap();
        let t1 = baton::simulate(&one).unwrap().report.step_time_ns;
        let ta = baton::simulate(&auto).unwrap().report;
        prop_assert!(ta.step_time_ns <= t1, "zb-auto {} > 1f1b {t1}", ta.step_time_ns);
        let c = ta.schedule_choice.unwrap();
        prop_assert!(c.busiest_work_ms <= ta.step_time_ms + 1e-9);
    }
}

#[test]
fn hand_written_deadlocks_are_refused_with_their_cycle() {
    let dir = tempfile::tempdir().unwrap();
    let yaml = |chunks: u32| {
        format!(
            "model:\n  layers:\n    - {{ name: l, repeat: 6, forward: 1ms, backward: 2ms, activation: 1MB }}\n\
             cluster:\n  devices: 3\n  link: {{ latency: 1us, bandwidth: 10GB/s }}\n\
             pipeline:\n  stages: 3\n  micro_batches: 2\n  chunks: {chunks}\n  schedule: custom\n  order: o.order\n"
        )
    };
    let scenario = dir.path().join("s.yaml");
    let scenario2 = dir.path().join("s2.yaml");
    std::fs::write(&scenario, yaml(1)).unwrap();
    std::fs::write(&scenario2, yaml(2)).unwrap();
    let cases: [(&Path, &str, &[&str]); 5] = [
        // Two devices swap: device 1 runs B0 before F1 while device 2 wants
        // F1 before B0 (device 0 waits behind them, outside the cycle).
        (
            &scenario,
            "0: F0 F1 B0 B1\n1: F0 B0 F1 B1\n2: F0 F1 B0 B1\n",
            &[
                "o.order:2:7: pipeline.order: deadlock: device 1 waits at B0 (line 2, col 7) for B0 on device 2, which comes after F1; \
                 device 2 waits at F1 (line 3, col 7) for F1 on device 1, which comes after B0\n",
            ],
        ),
        // The same swap between devices 0 and 1.
        (
            &scenario,
            "0: F0 B0 F1 B1\n1: F0 F1 B0 B1\n2: F0 B0 F1 B1\n",
            &["o.order:1:7: pipeline.order: deadlock: device 0 waits at B0 (line 1, col 7) for B0 on device 1, which comes after F1; \
               device 1 waits at F1 (line 2, col 7) for F1 on device 0, which comes after B0\n"],
        ),
        // A longer cycle, through all three devices: with two chunks, device
        // 0's chunk 1 (virtual stage 3) waits for device 2's chunk 0.
        (
            &scenario2,
            "0: F0.0 F0.1 F1.0 F1.1 B0.1 B1.1 B0.0 B1.0\n\
             1: F1.0 F0.0 F0.1 F1.1 B0.1 B1.1 B0.0 B1.0\n\
             2: F1.0 F0.0 F0.1 F1.1 B0.1 B1.1 B0.0 B1.0\n",
            &["o.order:1:9: pipeline.order: deadlock: device 0 waits at F0.1 (line 1, col 9) for F0.0 on device 2, which comes after F1.0; \
               device 2 waits at F1.0 (line 3, col 4) for F1.0 on device 1; \
               device 1 waits at F1.0 (line 2, col 4) for F1.0 on device 0, which comes after F0.1\n"],
        ),
        // W before its B on one device.
        (
            &scenario,
            "0: F0 B0 W0 F1 B1 W1\n1: F0 B0 W0 F1 B1 W1\n2: F0 W0 B0 F1 B1 W1\n",
            &["o.order:3:7: pipeline.order: W0 comes before its B0, which comes later (line 3, col 10)"],
        ),
        // A device the pipeline does not have.
        (
            &scenario,
            "0: F0 B0 F1 B1\n1: F0 B0 F1 B1\n2: F0 B0 F1 B1\n3: F0\n",
            &["o.order:4:1: pipeline.order: device 3 is not in the pipeline: it has 3 stages, devices 0 to 2"],
        ),
    ];
    for (path, order, needles) in cases {
        std::fs::write(dir.path().join("o.order"), order).unwrap();
        let out = run_baton(&["run", &path.display().to_string()]);
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{err}");
        for n in needles {
            assert!(err.contains(n), "stderr lacks `{n}`:\n{err}");
        }
        assert!(out.stdout.is_empty());
    }
    // A repeated op, an unknown token, a missing op.
    let s = scenario.display().to_string();
    std::fs::write(dir.path().join("o.order"), "0: F0 B0 F1 B1\n1: F0 B0 F1 B1 F1\n2: F0 B0 F1\n").unwrap();
    let err = text(&run_baton(&["run", &s]).stderr);
    assert!(
        err.contains("o.order:2:16: pipeline.order: F1 appears twice on device 1 (first at line 2, col 10)"),
        "{err}"
    );
    std::fs::write(dir.path().join("o.order"), "0: F0 B0 F1 B1\n1: F0 B0 F1 B1\n2: F0 B0 F1 Q1\n").unwrap();
    let err = text(&run_baton(&["run", &s]).stderr);
    assert!(err.contains("o.order:3:13: pipeline.order: unknown token `Q1`"), "{err}");
    std::fs::write(dir.path().join("o.order"), "0: F0 B0 F1 B1\n1: F0 B0 F1 B1\n2: F0 B0 F1\n").unwrap();
    let err = text(&run_baton(&["run", &s]).stderr);
    assert!(err.contains("o.order:3:1: pipeline.order: device 2 misses B1"), "{err}");
}

#[test]
fn with_a_split_backward_a_bucket_is_final_when_its_weight_gradients_are() {
    // Worked by hand. One stage, two replicas, one micro-batch, two layers:
    // forward 100 ns each, backward 300 ns of which W is 100 ns (layer 0)
    // and 200 ns (layer 1); 500 parameters each at 2 bytes make one 1,000 B
    // bucket per layer. ZB-H1 on one stage: F0 0-200, B0 200-500 (the
    // backwards less W: 200 + 100), W0 500-800, W running the last layer
    // first. Layer 1's bucket is final when its 200 ns of W have run, at
    // 700; layer 0's at 800. A ring of two at 10 GB/s: 500 B rounds of
    // 50 ns, 100 ns a bucket: 700-800 and 800-900. The step ends at 900.
    let text = "model:\n  layers:\n    - { name: a, forward: 100ns, backward: 300ns, weight: 100ns, activation: 0B, params: 500 }\n\
                \x20   - { name: b, forward: 100ns, backward: 300ns, weight: 200ns, activation: 0B, params: 500 }\n\
                cluster:\n  devices: 2\n  link: { latency: 0ns, bandwidth: 10GB/s }\n\
                pipeline: { stages: 1, micro_batches: 1, schedule: zb-h1 }\n\
                parallel: { data: 2 }\n\
                gradients: { sync: ring, bucket: 1000B, overlap: true }\n";
    let r = baton::simulate(&parse(text, "b.yaml", "b", &[]).unwrap()).unwrap().report;
    let mut spans: Vec<(u32, f64, f64)> =
        r.collectives.iter().map(|c| (c.bucket, (c.start_ms * 1e6).round(), (c.end_ms * 1e6).round())).collect();
    spans.sort_by(|a, b| a.partial_cmp(b).unwrap());
    assert_eq!(spans, vec![(0, 700.0, 800.0), (1, 800.0, 900.0)]);
    assert_eq!(r.step_time_ns, 900);
}

#[test]
fn split_apply_keeps_a_custom_order_reachable_from_the_copy() {
    // The copy lives in another directory: its `pipeline.order` is rewritten
    // relative to it, and the copy runs the same order.
    let dir = tempfile::tempdir().unwrap();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let demo = std::fs::read_to_string(root.join("scenarios/zero-bubble.yaml")).unwrap();
    let custom = demo.replacen("  schedule: 1f1b\n", "  schedule: custom\n  order: drain.order\n", 1);
    assert_ne!(custom, demo);
    std::fs::write(dir.path().join("s.yaml"), custom).unwrap();
    std::fs::copy(root.join("scenarios/zero-bubble-drain.order"), dir.path().join("drain.order")).unwrap();
    std::fs::create_dir(dir.path().join("sub")).unwrap();
    let s = dir.path().join("s.yaml").display().to_string();
    let copy = dir.path().join("sub/copy.yaml").display().to_string();
    let out = run_baton(&["split", &s, "--apply", &copy]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(std::fs::read_to_string(&copy).unwrap().contains("order: ../drain.order"));
    let out = run_baton(&["run", &copy]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stdout).contains("schedule custom"));
}

#[test]
fn schedule_keys_that_do_not_fit_together_are_refused() {
    let refused = |args: &[&str], needle: &str| {
        let out = run_baton(args);
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(err.contains(needle), "stderr lacks `{needle}`:\n{err}");
    };
    let demo = "scenarios/zero-bubble.yaml";
    refused(&["run", demo, "--set", "pipeline.schedule=custom"], "custom needs pipeline.order");
    refused(
        &["run", demo, "--set", "pipeline.order=zero-bubble-drain.order"],
        "applies to schedule custom only, but the schedule is 1f1b",
    );
    refused(&["run", demo, "--set", "pipeline.max_in_flight=3"], "applies to schedule zb-auto only");
    refused(
        &["run", demo, "--set", "pipeline.schedule=custom", "--set", "pipeline.order=missing.order"],
        "cannot read",
    );
    // The order is for 12 micro-batches; with 13 the last one is missing.
    refused(
        &[
            "run",
            demo,
            "--set",
            "pipeline.schedule=custom",
            "--set",
            "pipeline.order=zero-bubble-drain.order",
            "--set",
            "pipeline.micro_batches=13",
        ],
        "device 0 misses F12 B12 W12",
    );
}
