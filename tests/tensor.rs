//! Tensor-parallel stages: activation memory and parameter counts against
//! the published formulas, all-reduce traffic from the link counters, a
//! step worked out by hand, model FLOPs utilisation, and refusals. Each
//! check names its source.

mod common;

use baton::scenario::{parse, Scenario, Transformer};
use common::{baton, text};

fn scenario(text: &str) -> Scenario {
    parse(text, "check.yaml", "check", &[]).unwrap_or_else(|e| panic!("{e}"))
}

#[test]
fn activation_memory_per_device_follows_korthikanti_eq_2_and_3() {
    // Korthikanti et al., "Reducing Activation Recomputation in Large
    // Transformer Models", MLSys 2023. s = 2048, b = 1, h = 12288, a = 96,
    // t = 8: eq. 2 s b h (10 + 24/t + 5 a s / (h t)) = s b h (10 + 3 + 10)
    // = 23 s b h = 578,813,952 bytes per layer; eq. 3 s b h (34 + 5 a s / h)
    // / t = (34 + 80) / 8 s b h = 14.25 s b h = 358,612,992 bytes.
    let t = Transformer::new(80, 12288, 96, 2048, 51200);
    assert_eq!(t.layer_stash_bytes_tensor(1, 8, false), 578_813_952);
    assert_eq!(t.layer_stash_bytes_tensor(1, 8, true), 358_612_992);
    assert_eq!(t.layer_stash_bytes_tensor(1, 1, false), t.layer_stash_bytes(1), "t = 1 is eq. 1");
    // The same through a scenario: each device of the group stashes that.
    let text = |sequence: bool| {
        format!(
            "model:\n  transformer: {{ layers: 2, hidden: 12288, heads: 96, seq_len: 2048, vocab: 51200 }}\n\
             cluster:\n  devices: 8\n  link: {{ latency: 1us, bandwidth: 100GB/s }}\n\
             \x20 device: {{ peak: 300TFLOP/s, efficiency: 0.5 }}\n\
             pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b }}\n\
             parallel: {{ tensor: 8, sequence: {sequence} }}\n"
        )
    };
    let s = scenario(&text(false));
    assert_eq!(s.tensor_layers[1].stash_bytes, 578_813_952);
    assert_eq!(scenario(&text(true)).tensor_layers[1].stash_bytes, 358_612_992);
    // Parameters per device: the layer's 12 h^2 + 13 h over 8.
    assert_eq!(s.tensor_layers[1].params, (12 * 12288u64 * 12288 + 13 * 12288).div_ceil(8));
}

#[test]
fn the_transformer_form_reproduces_the_model_sizes_of_narayanan_et_al() {
    // Narayanan et al., "Efficient Large-Scale Language Model Training on GPU
    // Clusters Using Megatron-LM", SC 2021, table 1 (values from memory;
    // each re-derived from their eq. 2 with V = 51200, s = 2048):
    // layers / hidden / heads -> billions of parameters.
    let table = [
        (24, 2304, 24, 1.7),
        (30, 3072, 32, 3.6),
        (36, 4096, 32, 7.5),
        (40, 6144, 48, 18.4),
        (48, 8192, 64, 39.1),
        (60, 10240, 80, 76.1),
        (80, 12288, 96, 145.6),
        (96, 16384, 128, 310.1),
        (105, 20480, 128, 529.6),
        (128, 25600, 160, 1008.0),
    ];
    for (l, h, a, billions) in table {
        let p = Transformer::new(l, h, a, 2048, 51200).total_params();
        assert_eq!((p as f64 / 1e8).round() / 10.0, billions, "l={l} h={h}: {p}");
    }
}

#[test]
fn each_device_sends_the_ring_share_of_four_all_reduces_per_layer() {
    // Shoeybi et al., "Megatron-LM", 2019, sec. 3: two all-reduces of b s h
    // values in the forward and two in the backward per layer; on a ring each
    // device sends 2 (t-1)/t of each: 8 b s h (t-1)/t values per layer and
    // micro-batch (Narayanan et al., SC 2021, sec. 3.2, from memory). b = 1,
    // s = 128, h = 256, t = 4, 2 layers, 2 bytes a value: 2 x 8 x 128 x 256
    // x 3/4 x 2 = 786,432 bytes leave each device. One stage and one replica:
    // nothing else crosses a link.
    let s = scenario(
        "model:\n  transformer: { layers: 2, hidden: 256, heads: 4, seq_len: 128, vocab: 1000 }\n\
         cluster:\n  devices: 4\n  link: { latency: 1us, bandwidth: 10GB/s }\n\
         \x20 device: { peak: 100TFLOP/s, efficiency: 0.5 }\n\
         pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n\
         parallel: { tensor: 4 }\n",
    );
    let r = baton::simulate(&s).unwrap().report;
    for d in 0..4 {
        let sent: u64 = r.links.iter().filter(|l| l.name.starts_with(&format!("dev{d}->"))).map(|l| l.bytes).sum();
        assert_eq!(sent, 786_432, "device {d}");
    }
    assert_eq!(r.tensor_transfers, 2 * 4 * 2 * 3 * 4, "2 layers x 4 all-reduces x 2(t-1) rounds x t ranks");
}

#[test]
fn a_two_device_group_on_one_switch_by_hand() {
    // One layer (forward 1000 ns, backward 2000 ns, all-reduces of 1000 B),
    // t = 2 on one switch, device links 1 us and 1 GB/s. Each device computes
    // 1000 / 2 = 500 ns of the forward, in two halves around the all-reduces:
    // 250 ns, a ring all-reduce, 250 ns, a ring all-reduce. A ring of two on
    // 1000 B: a reduce-scatter round and an all-gather round, each 500 B
    // through the sender's and receiver's device links: 500 ns + 2 x 1 us =
    // 2500 ns, so 5000 ns an all-reduce. Forward 250 + 5000 + 250 + 5000 =
    // 10,500 ns; backward (1000 ns per device) 500 + 5000 + 500 + 5000 =
    // 11,000 ns; step 21,500 ns.
    let s = scenario(
        "model:\n  layers:\n    - { name: block, forward: 1000ns, backward: 2000ns, activation: 4kB, tensor_bytes: 1000B }\n\
         cluster:\n  nodes: 1\n  devices_per_node: 2\n\
         \x20 device_link: { latency: 1us, bandwidth: 1GB/s }\n  node_link: { latency: 1us, bandwidth: 1GB/s }\n\
         pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n\
         parallel: { tensor: 2 }\n",
    );
    let r = baton::simulate(&s).unwrap().report;
    assert_eq!(r.step_time_ns, 21_500);
    assert_eq!(r.devices.len(), 2);
    assert_eq!(r.devices[1].rank, 1);
    assert_eq!((r.devices[0].tensor_comm_ms * 1e6).round(), 20_000.0);
    // Activations per device: 4 kB / 2.
    assert_eq!(s.tensor_layers[0].activation_bytes, 2000);
}

#[test]
fn mfu_is_model_flops_per_second_over_devices_times_peak() {
    // Chowdhery et al., "PaLM", 2022, appendix B: model FLOPs (no
    // recomputation) per second over the devices' peak. Model FLOPs per
    // micro-batch of b sequences: 3 x (l (24 b s h^2 + 4 b s^2 h) + 2 b s h V)
    // (Narayanan et al. 2021, appendix), here l = 4, h = 512, s = 256, V =
    // 8000, b = 2, m = 4 micro-batches, d = 2 replicas; 2 stages x 2 tensor
    // x 2 replicas = 8 devices of 100 TFLOP/s.
    let s = scenario(
        "model:\n  transformer: { layers: 4, hidden: 512, heads: 8, seq_len: 256, vocab: 8000 }\n\
         cluster:\n  devices: 8\n  link: { latency: 1us, bandwidth: 50GB/s }\n\
         \x20 device: { peak: 100TFLOP/s, efficiency: 0.5 }\n\
         pipeline: { stages: 2, micro_batches: 4, schedule: 1f1b, micro_batch_size: 2 }\n\
         parallel: { tensor: 2, data: 2 }\n",
    );
    let r = baton::simulate(&s).unwrap().report;
    let (l, h, sq, v, b) = (4.0, 512.0, 256.0, 8000.0, 2.0);
    let per_micro_batch = 3.0 * (l * (24.0 * b * sq * h * h + 4.0 * b * sq * sq * h) + 2.0 * b * sq * h * v);
    let flops = per_micro_batch * 4.0 * 2.0;
    let want = flops / (r.step_time_ns as f64 / 1e9) / (8.0 * 100e12);
    let got = r.mfu.unwrap();
    assert!((got - want).abs() < 1e-12 * want, "{got} vs {want}");
    assert!(got < 0.5, "below the efficiency the layers' times assume");
}

#[test]
fn tensor_groups_inside_a_node_beat_groups_across_nodes() {
    // Qualitative (the SC 2021 paper's first takeaway, Narayanan et al.,
    // sec. 5): with fast links inside a node and slow ones between nodes, a
    // tensor group inside one node is faster than one spread over two.
    let with = |order: &str| {
        let s = scenario(&format!(
            "model:\n  transformer: {{ layers: 8, hidden: 2048, heads: 16, seq_len: 1024, vocab: 32000 }}\n\
             cluster:\n  nodes: 2\n  devices_per_node: 8\n\
             \x20 device_link: {{ latency: 2us, bandwidth: 150GB/s }}\n  node_link: {{ latency: 8us, bandwidth: 12.5GB/s }}\n\
             \x20 device: {{ peak: 300TFLOP/s, efficiency: 0.5 }}\n\
             pipeline: {{ stages: 2, micro_batches: 8, schedule: 1f1b }}\n\
             parallel: {{ tensor: 4, data: 2, order: {order} }}\n"
        ));
        let placement = s.placement.clone();
        (baton::simulate(&s).unwrap().report.step_time_ns, placement)
    };
    let (inside, p1) = with("[tensor, data, pipeline]");
    let (across, p2) = with("[pipeline, data, tensor]");
    assert_eq!(&p1[..4], &[0, 1, 2, 3], "rank-first: a group is four neighbours");
    assert_eq!(&p2[..4], &[0, 4, 8, 12], "rank-last: a group spans both nodes");
    assert!(inside < across, "{inside} vs {across}");
}

#[test]
fn bad_tensor_layouts_are_refused_naming_the_key() {
    let base = "model:\n  transformer: { layers: 2, hidden: 256, heads: 6, seq_len: 128, vocab: 1000 }\n\
                cluster:\n  devices: 8\n  link: { latency: 1us, bandwidth: 10GB/s }\n\
                \x20 device: { peak: 100TFLOP/s, efficiency: 0.5 }\n\
                pipeline: { stages: 2, micro_batches: 2, schedule: 1f1b }\n";
    for (extra, words) in [
        ("parallel: { tensor: 4 }\n", "must divide model.transformer.heads (6)"),
        ("parallel: { tensor: 3, data: 2 }\n", "need 12 devices"),
        ("parallel: { tensor: 2 }\nplacement: spread\n", "spread"),
        ("parallel: { tensor: 2, order: [tensor, tensor] }\n", "twice"),
    ] {
        let err = parse(&format!("{base}{extra}"), "s.yaml", "s", &[]).unwrap_err().to_string();
        assert!(err.contains("parallel.") || err.contains("placement"), "{extra}: {err}");
        assert!(err.contains(words), "{extra}: {err}");
    }
    // On the command line: exit 2, nothing written.
    let dir = tempfile::tempdir().unwrap();
    let json = dir.path().join("r.json");
    let out =
        baton(&["run", "scenarios/replicas.yaml", "--set", "parallel.tensor=3", "--json", json.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("parallel.tensor"), "{}", text(&out.stderr));
    assert!(!json.exists());
}

#[test]
fn gradients_are_synchronised_per_tensor_rank_and_attention_comes_first() {
    // Two replicas of one stage of two tensor ranks: the group of each
    // collective is the two devices with the same stage and rank, each
    // syncing its half of the stage's gradient.
    let s = scenario(
        "model:\n  transformer: { layers: 1, hidden: 256, heads: 4, seq_len: 128, vocab: 1000 }\n\
         cluster:\n  devices: 4\n  link: { latency: 1us, bandwidth: 10GB/s }\n\
         \x20 device: { peak: 100TFLOP/s, efficiency: 0.5 }\n\
         pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n\
         parallel: { tensor: 2, data: 2 }\n\
         gradients: { bucket: 1TB }\n",
    );
    let r = baton::simulate(&s).unwrap().report;
    let groups: Vec<Vec<u32>> = r.collectives.iter().map(|c| c.group.clone()).collect();
    assert_eq!(groups, vec![vec![0, 2], vec![1, 3]], "devices are (replica x stages + stage) x t + rank");
    // Each rank's bucket: its half of the parameters (the embedding's and
    // the layer's and the logits' halves, all on the one stage) at 2 B.
    let params: u64 = s.tensor_layers.iter().map(|l| l.params).sum();
    assert!(r.collectives.iter().all(|c| c.bytes == 2 * params));
    // The forward of a transformer layer: its attention part first, then an
    // all-reduce (Shoeybi et al. 2019, sec. 3). Attention's share of the
    // layer's FLOPs: (8 b s h^2 + 4 b s^2 h) / (24 b s h^2 + 4 b s^2 h) =
    // (67,108,864 + 16,777,216) / (201,326,592 + 16,777,216).
    let (segments, _) = baton::piece_segments(&s, 0);
    let layer_forward = s.tensor_layers[1].forward_ns;
    let attention = (layer_forward as u128 * 83_886_080 / 218_103_808) as u64;
    // The embedding does no arithmetic, so the first segment is the layer's
    // attention part.
    assert_eq!(segments[0][0], baton::executor::Segment::Compute(baton::engine::SimDuration(attention)));
    assert_eq!(segments[0][1], baton::executor::Segment::AllReduce(2 * 128 * 256));
}
