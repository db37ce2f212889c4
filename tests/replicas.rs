//! Data-parallel steps: gradient synchronisation checked against the
//! alpha-beta costs of the published algorithms, the byte counts each
//! algorithm sends, ZeRO's memory figures, compression ratios, and steps
//! worked out by hand. Each check names its source.

mod common;

use baton::scenario::{parse, Scenario};
use common::{baton, text};

fn scenario(text: &str) -> Scenario {
    parse(text, "check.yaml", "check", &[]).unwrap_or_else(|e| panic!("{e}"))
}

/// `d` replicas of one stage with one micro-batch (forward 1 ns, backward 1
/// ns) and one bucket of `bytes` gradient bytes (2 B per parameter), on a
/// flat cluster where every ordered pair of devices has its own link of
/// `latency` and `bandwidth`.
fn one_bucket(d: u32, bytes: u64, latency: &str, bandwidth: &str, sync: &str) -> Scenario {
    scenario(&format!(
        "model:\n  layers:\n    - {{ name: l, forward: 1ns, backward: 1ns, activation: 0B, params: {} }}\n\
         cluster:\n  devices: {d}\n  link: {{ latency: {latency}, bandwidth: {bandwidth} }}\n\
         pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b }}\n\
         parallel: {{ data: {d} }}\n\
         gradients: {{ sync: {sync}, bucket: 1TB }}\n",
        bytes / 2
    ))
}

#[test]
fn one_bucket_takes_the_alpha_beta_time_of_its_algorithm() {
    // Thakur, Rabenseifner & Gropp, "Optimization of Collective Communication
    // Operations in MPICH", IJHPCA 19(1), 2005, alpha-beta terms with p = 4,
    // n = 1e8 B, alpha = 5 us, beta = 1e-10 s/B (10 GB/s), every device pair
    // its own link. The step is the 2 ns of compute plus:
    // - ring (Patarasuk & Yuan, JPDC 2009): 2(p-1) alpha + 2 n (p-1)/p beta
    //   = 30 us + 15 ms = 15.030 ms;
    // - Rabenseifner's halving-doubling: 2 lg p alpha + 2 n (p-1)/p beta
    //   = 20 us + 15 ms = 15.020 ms;
    // - binomial reduce then broadcast: 2 lg p (alpha + n beta) = 40.020 ms.
    for (sync, want_ns) in [("ring", 15_030_000u64), ("halving-doubling", 15_020_000), ("tree", 40_020_000)] {
        let r = baton::simulate(&one_bucket(4, 100_000_000, "5us", "10GB/s", sync)).unwrap().report;
        assert_eq!(r.step_time_ns, 2 + want_ns, "{sync}");
        assert_eq!(r.collectives.len(), 1);
        assert_eq!(r.collectives[0].algorithm, sync);
    }
}

#[test]
fn members_send_the_bytes_each_algorithm_is_known_for() {
    // Common practice, no source: for K bytes over N members, ring sends
    // 2K(N-1)/N per member, everyone-to-everyone K(N-1), and a parameter
    // server's workers K each.
    let k = 120_000_000u64;
    for (sync, n, per_member) in [("ring", 4u64, 2 * k * 3 / 4), ("direct", 4, k * 3), ("ring", 6, 2 * k * 5 / 6)] {
        let r = baton::simulate(&one_bucket(n as u32, k, "0ns", "100GB/s", sync)).unwrap().report;
        assert_eq!(r.collectives[0].wire_bytes_sent, vec![per_member; n as usize], "{sync} over {n}");
        assert_eq!(r.collectives[0].bytes, k);
    }
}

#[test]
fn dedicated_parameter_servers_take_two_n_k_over_s_b() {
    // Four workers and two dedicated servers on one switch, device links of
    // B = 10 GB/s without latency, K = 1e8 B. Each worker sends K (common
    // practice, no source), each server receives N K / S = 2e8 B and returns
    // as much. A phase is limited by a server's link: N K / (S B) = 20 ms;
    // push then pull, 2 N K / (S B) = 40 ms.
    let s = scenario(
        "model:\n  layers:\n    - { name: l, forward: 1ns, backward: 1ns, activation: 0B, params: 50M }\n\
         cluster:\n  nodes: 1\n  devices_per_node: 6\n\
         \x20 device_link: { latency: 0ns, bandwidth: 10GB/s }\n  node_link: { latency: 0ns, bandwidth: 10GB/s }\n\
         pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n\
         parallel: { data: 4 }\n\
         gradients: { sync: parameter-server, servers: 2, server_devices: dedicated, bucket: 1TB }\n",
    );
    assert_eq!(s.server_devices, vec![4, 5]);
    let r = baton::simulate(&s).unwrap().report;
    assert_eq!(r.step_time_ns, 2 + 40_000_000);
    let c = &r.collectives[0];
    assert_eq!(c.wire_bytes_sent, vec![100_000_000; 4]);
    assert_eq!(c.server_bytes_sent, vec![200_000_000; 2]);
}

/// Two replicas of a two-stage 1F1B pipeline, two micro-batches; four layers
/// (forward 100 ns, backward 200 ns, 500 parameters = 1000 B each), a bucket
/// per layer; free pipeline transfers; every device pair its own 10 GB/s link.
fn two_by_two(overlap: bool) -> Scenario {
    scenario(&format!(
        "model:\n  layers:\n    - {{ name: l, repeat: 4, forward: 100ns, backward: 200ns, activation: 0B, params: 500 }}\n\
         cluster:\n  devices: 4\n  link: {{ latency: 0ns, bandwidth: 10GB/s }}\n\
         pipeline: {{ stages: 2, split: [2, 2], micro_batches: 2, schedule: 1f1b }}\n\
         parallel: {{ data: 2 }}\n\
         gradients: {{ sync: ring, bucket: 1000B, overlap: {overlap} }}\n"
    ))
}

#[test]
fn overlapped_buckets_hide_all_but_the_last() {
    // Worked by hand. Each replica: stage 0 runs F0 0-200, F1 200-400, B0
    // 800-1200, B1 1400-1800; stage 1 runs F0 200-400, B0 400-800, F1
    // 800-1000, B1 1000-1400. A ring of two on a 1000 B bucket: reduce-scatter
    // and all-gather rounds of 500 B at 10 GB/s, 50 + 50 ns.
    // Stage 1's last backward (1000-1400): its last layer's bucket is final
    // halfway (200 of 400 ns), at 1200 -> sync 1200-1300; the other at 1400 ->
    // 1400-1500. Stage 0's last backward (1400-1800): 1600-1700, 1800-1900.
    // The step ends at 1900: compute 1800 plus the last bucket's 100 ns.
    let r = baton::simulate(&two_by_two(true)).unwrap().report;
    assert_eq!(r.step_time_ns, 1900);
    let mut spans: Vec<(Vec<u32>, f64, f64)> =
        r.collectives.iter().map(|c| (c.group.clone(), c.start_ms * 1e6, c.end_ms * 1e6)).collect();
    spans.iter_mut().for_each(|s| (s.1, s.2) = (s.1.round(), s.2.round()));
    spans.sort_by(|a, b| a.partial_cmp(b).unwrap());
    assert_eq!(
        spans,
        vec![
            (vec![0, 2], 1600.0, 1700.0),
            (vec![0, 2], 1800.0, 1900.0),
            (vec![1, 3], 1200.0, 1300.0),
            (vec![1, 3], 1400.0, 1500.0)
        ]
    );
    // Exposed: 100 ns after each device's last compute op.
    let exposed: Vec<f64> = r.devices.iter().map(|d| (d.sync_exposed_ms * 1e6).round()).collect();
    assert_eq!(exposed, vec![100.0; 4]);
    // Global batch: 2 replicas x 2 micro-batches x 1 sample.
    assert_eq!(r.global_batch, 4);
    assert_eq!(r.samples_per_s, 4.0 / 1900e-9);
}

#[test]
fn without_overlap_every_bucket_waits_for_the_last_backward() {
    // The same by hand: stage 0's buckets are both final at 1800 and run
    // 1800-1900 and 1900-2000 (the layer nearer the output first); stage 1's
    // at 1400: 1400-1500, 1500-1600. Step 2000.
    let r = baton::simulate(&two_by_two(false)).unwrap().report;
    assert_eq!(r.step_time_ns, 2000);
    let mut stage0: Vec<(u32, f64)> =
        r.collectives.iter().filter(|c| c.group == [0, 2]).map(|c| (c.bucket, (c.start_ms * 1e6).round())).collect();
    stage0.sort_by(|a, b| a.partial_cmp(b).unwrap());
    assert_eq!(stage0, vec![(0, 1800.0), (1, 1900.0)]);
    assert_eq!(r.sync_exposed_ms * 1e6, 200.0);
}

#[test]
fn across_two_boxes_hierarchical_puts_less_through_the_cards_than_ring() {
    // Two nodes of four devices, one card each; eight replicas of one stage,
    // one bucket of n = 8e8 B. A flat ring over the eight crosses between the
    // nodes at two points: each card carries one chunk of n/8 in each of the
    // 2(8-1) = 14 rounds, 1.75 n. The two-level ring crosses only in its
    // middle phase: four rings of two all-reduce n/4 each, n/8 per member in
    // each direction, four members a node: n per card.
    let text = |sync: &str| {
        format!(
            "model:\n  layers:\n    - {{ name: l, forward: 1ns, backward: 1ns, activation: 0B, params: 400M }}\n\
             cluster:\n  nodes: 2\n  devices_per_node: 4\n\
             \x20 device_link: {{ latency: 1us, bandwidth: 200GB/s }}\n  node_link: {{ latency: 5us, bandwidth: 25GB/s }}\n\
             pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b }}\n\
             parallel: {{ data: 8 }}\n\
             gradients: {{ sync: {sync}, bucket: 1TB }}\n"
        )
    };
    let card = |r: &baton::report::Report| r.links.iter().find(|l| l.name == "node0-card0 up").unwrap().bytes;
    let ring = baton::simulate(&scenario(&text("ring"))).unwrap().report;
    let hier = baton::simulate(&scenario(&text("hierarchical"))).unwrap().report;
    assert_eq!(card(&ring), 1_400_000_000);
    assert_eq!(card(&hier), 800_000_000);
    // Times, latencies aside: the ring's 14 rounds each put n/8 = 1e8 B
    // through a 25 GB/s card, 4 ms each: 56 ms. The two-level ring: inside
    // each node, 3 reduce-scatter rounds of n/4 = 2e8 B at 200 GB/s (1 ms
    // each), then 2 rounds in which four members each put n/8 through the
    // card (4e8 B, 16 ms), then 3 all-gather rounds inside: 3 + 32 + 3 = 38 ms.
    assert!(ring.step_time_ns > 56_000_000 && ring.step_time_ns < 56_200_000, "{}", ring.step_time_ns);
    assert!(hier.step_time_ns > 38_000_000 && hier.step_time_ns < 38_100_000, "{}", hier.step_time_ns);
}

#[test]
fn zero_sharding_matches_the_papers_model_state_per_device() {
    // Rajbhandari et al., "ZeRO", SC 2020, fig. 1: 7.5B parameters, 64
    // replicas, K = 12 optimizer bytes per parameter (2 + 2 + 12 = 16 in all):
    // 120 GB per device without sharding, 2 + 2 + 12/64 = 4.1875 B per
    // parameter = 31.4 GB with the optimizer sharded, 2 + 14/64 = 2.21875 B =
    // 16.6 GB with gradients too.
    let state = |shard: &str| {
        let s = scenario(&format!(
            "model:\n  layers:\n    - {{ name: l, forward: 1ms, backward: 2ms, activation: 0B, params: 7.5B }}\n\
             cluster:\n  devices: 64\n  link: {{ latency: 5us, bandwidth: 100GB/s }}\n\
             pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b }}\n\
             parallel: {{ data: 64 }}\n\
             training: {{ state_bytes_per_param: 16, shard: {shard} }}\n"
        ));
        baton::memory_inputs(&s).state_bytes[0]
    };
    assert_eq!(state("none"), 120_000_000_000);
    assert_eq!(state("optimizer"), 31_406_250_000);
    assert_eq!(state("gradients"), 16_640_625_000);
}

#[test]
fn sharded_state_syncs_by_reduce_scatter_update_and_all_gather() {
    // Two replicas, one bucket of 2000 B (1000 parameters at 2 B), free
    // compute links of 1 GB/s without latency: reduce-scatter one round of
    // 1000 B (1000 ns), the update 600 ns / 2 replicas = 300 ns, then the
    // all-gather of the updated weights (2 B per parameter: 2000 B), one
    // round of 1000 B. Backward ends at 3 ns: 3 + 1000 + 300 + 1000.
    let s = scenario(
        "model:\n  layers:\n    - { name: l, forward: 1ns, backward: 2ns, activation: 0B, params: 1000 }\n\
         cluster:\n  devices: 2\n  link: { latency: 0ns, bandwidth: 1GB/s }\n\
         pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n\
         parallel: { data: 2 }\n\
         training: { shard: gradients, update: 600ns }\n",
    );
    let r = baton::simulate(&s).unwrap().report;
    assert_eq!(r.step_time_ns, 3 + 1000 + 300 + 1000);
    let phases: Vec<&str> = r.collectives.iter().map(|c| c.phase).collect();
    assert_eq!(phases, vec!["reduce-scatter", "all-gather"]);
}

#[test]
fn compression_shrinks_the_payload_by_the_expected_ratios() {
    // Lin et al., "Deep Gradient Compression", ICLR 2018: 270x to 600x less
    // exchanged. Our arithmetic: keeping 0.1% of fp32 values as (4-byte value,
    // 4-byte index) pairs is 8 B per 1000 elements of 4 B: 1/500 of the dense
    // bytes. Two replicas exchange their pairs (an all-gather: each sends its
    // own payload once); the dense ring of two sends n/2 + n/2 = n per member.
    let with = |compression: &str| {
        let s = scenario(&format!(
            "model:\n  layers:\n    - {{ name: l, forward: 1ms, backward: 2ms, activation: 0B, params: 100M }}\n\
             cluster:\n  devices: 2\n  link: {{ latency: 5us, bandwidth: 100GB/s }}\n\
             pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b }}\n\
             parallel: {{ data: 2 }}\n\
             gradients: {{ bytes_per_param: 4, bucket: 1TB{compression} }}\n"
        ));
        baton::simulate(&s).unwrap().report.collectives[0].wire_bytes_sent[0]
    };
    let dense = with("");
    assert_eq!(dense, 400_000_000);
    let top_k = with(", compression: { kind: top-k, keep: 0.001, rate: 400GB/s }");
    assert_eq!(dense / top_k, 500);
    assert!((270..=600).contains(&(dense / top_k)));
    // 8-bit quantisation of 32-bit values: 4x fewer bytes.
    let quantized = with(", compression: { kind: quantize, bits: 8, rate: 400GB/s }");
    assert_eq!(dense / quantized, 4);
}

#[test]
fn encode_and_update_are_device_work_in_the_trace() {
    // One collective with 8-bit compression and an update: the CSV trace
    // carries `encode` (before and after) and `update` rows on each device,
    // and the collective's transfers as `sync` rows (micro_batch = bucket,
    // stage = piece).
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.yaml");
    std::fs::write(
        &path,
        "model:\n  layers:\n    - { name: l, forward: 1ms, backward: 2ms, activation: 0B, params: 1M }\n\
         cluster:\n  devices: 2\n  link: { latency: 5us, bandwidth: 100GB/s }\n\
         pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n\
         parallel: { data: 2 }\n\
         gradients: { compression: { kind: quantize, bits: 8, rate: 200GB/s } }\n\
         training: { update: 1ms }\n",
    )
    .unwrap();
    let out = baton(&["run", path.to_str().unwrap(), "--trace", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let csv = text(&out.stdout);
    let kinds = |k: &str| csv.lines().filter(|l| l.split(',').nth(1) == Some(k)).count();
    assert_eq!(kinds("encode"), 4);
    assert_eq!(kinds("update"), 2);
    assert_eq!(kinds("sync"), 4);
    assert!(csv.lines().any(|l| l.starts_with("0,sync,0,0,")));
}

#[test]
fn bad_layouts_are_refused_naming_the_key() {
    let base = "model:\n  layers:\n    - { name: l, forward: 1ms, activation: 1MiB, params: 1M }\n\
                cluster:\n  devices: 8\n  link: { latency: 5us, bandwidth: 100GB/s }\n\
                pipeline: { stages: 2, micro_batches: 2, schedule: 1f1b, split: [1, 1] }\n";
    let base = base.replace("- { name: l,", "- { name: l, repeat: 2,");
    let cases = [
        ("parallel: { data: 5 }\n", "parallel.data", "need 10 devices"),
        ("parallel: { data: 3 }\ngradients: { sync: halving-doubling }\n", "gradients.sync", "powers of two"),
        (
            "parallel: { data: 2 }\ngradients: { sync: parameter-server, servers: 3 }\n",
            "gradients.servers",
            "colocated",
        ),
        (
            "parallel: { data: 2 }\ntraining: { shard: optimizer }\ngradients: { sync: tree }\n",
            "training.shard",
            "tree",
        ),
        (
            "parallel: { data: 2 }\ntraining: { shard: optimizer, state_bytes_per_param: 3 }\n",
            "training.state_bytes_per_param",
            "at least 4",
        ),
        ("parallel: { data: 2 }\nplacement: spread\n", "placement", "spread"),
        ("parallel: { data: 2 }\nplacement: [0, 1, 2]\n", "placement", "need 4"),
        ("parallel: { data: 2, order: [data, data] }\n", "parallel.order.1", "twice"),
        ("gradients: { compression: { kind: quantize } }\n", "gradients.compression", "rate"),
        ("gradients: { sync: ringg }\n", "gradients.sync", "ring"),
    ];
    for (extra, key, words) in cases {
        let err = parse(&format!("{base}{extra}"), "s.yaml", "s", &[]).unwrap_err().to_string();
        assert!(err.contains(key) && err.contains(words), "{extra}: {err}");
    }
}

#[test]
fn packed_numbering_follows_parallel_order() {
    let with = |order: &str| {
        scenario(&format!(
            "model:\n  layers:\n    - {{ name: l, repeat: 2, forward: 1ms, activation: 1MiB, params: 1M }}\n\
             cluster:\n  devices: 6\n  link: {{ latency: 5us, bandwidth: 100GB/s }}\n\
             pipeline: {{ stages: 2, micro_batches: 2, schedule: 1f1b }}\n\
             parallel: {{ data: 3{order} }}\n"
        ))
        .placement
    };
    // [data, pipeline]: a stage's replicas side by side (device = s d + r).
    assert_eq!(with(""), vec![0, 3, 1, 4, 2, 5]);
    // [pipeline, data]: a replica's stages side by side (device = r p + s).
    assert_eq!(with(", order: [pipeline, data]"), vec![0, 1, 2, 3, 4, 5]);
}

#[test]
fn split_sweep_and_compare_take_the_new_keys() {
    // split prices every replica's state alike and reports replica 0's
    // devices; its proposal is simulated with the synchronisation.
    let out = baton(&["split", "scenarios/replicas.yaml", "--json", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v = common::json(&out);
    assert_eq!(v["devices"].as_array().unwrap().len(), 4);
    let run = baton(&["run", "scenarios/replicas.yaml", "--json", "-"]);
    let r = common::json(&run);
    assert!(v["baseline_step_time_ms"].as_f64() == r["step_time_ms"].as_f64());
    // sweep over the algorithm and the replicas; compare with a variant.
    let out = baton(&[
        "sweep",
        "scenarios/replicas.yaml",
        "--vary",
        "gradients.sync=ring,hierarchical",
        "--vary",
        "parallel.data=1,2,4",
        "--json",
        "-",
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let out = baton(&["compare", "scenarios/replicas.yaml", "--set", "gradients.sync=hierarchical"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    // Global batch and layout in the JSON.
    assert_eq!(r["global_batch"], 32);
    assert_eq!(r["parallel"]["data"], 4);
    assert_eq!(r["parallel"]["devices_used"], 16);
    assert_eq!(r["devices"][5]["replica"], 1);
    assert_eq!(r["devices"][5]["stage"], 1);
}

#[test]
fn charts_show_a_subset_or_replica_zero_above_64_devices() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("c.svg");
    let out = baton(&["run", "scenarios/replicas.yaml", "--svg", svg.to_str().unwrap(), "--devices", "0-3,12"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let chart = std::fs::read_to_string(&svg).unwrap();
    assert!(chart.contains("Showing 5 of 16 devices"));
    assert!(chart.contains("r3 stage 0") && !chart.contains("r1 stage 0"));
    assert!(chart.contains("gradient sync send") && chart.contains("ring all-reduce of piece"));
    // 20 replicas x 4 stages: the chart shows replica 0 and says so.
    let out = baton(&[
        "run",
        "scenarios/replicas.yaml",
        "--set",
        "parallel.data=20",
        "--set",
        "cluster.devices_per_node=40",
        "--svg",
        svg.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let chart = std::fs::read_to_string(&svg).unwrap();
    assert!(chart.contains("Showing replica 0 only: 4 of 80 devices"));
    // A device that does not exist is refused, exit 2, nothing written.
    let other = dir.path().join("none.svg");
    let out = baton(&["run", "scenarios/replicas.yaml", "--svg", other.to_str().unwrap(), "--devices", "16"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("--devices names device 16"));
    assert!(!other.exists());
}

#[test]
fn a_bad_layout_exits_2_naming_the_key_and_writes_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let json_path = dir.path().join("r.json");
    let out = baton(&[
        "run",
        "scenarios/replicas.yaml",
        "--set",
        "gradients.sync=halving-doubling",
        "--set",
        "parallel.data=3",
        "--json",
        json_path.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("gradients.sync") && err.contains("parallel.data is 3"), "{err}");
    assert!(!json_path.exists());
}

#[test]
fn the_memory_chart_of_replicas_shows_replica_zero() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("m.svg");
    let out = baton(&["run", "scenarios/replicas.yaml", "--memory-svg", svg.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let chart = std::fs::read_to_string(&svg).unwrap();
    assert!(chart.contains("replica 0 of 4 shown"));
    assert!(chart.contains("device 3:") && !chart.contains("device 4:"));
}
