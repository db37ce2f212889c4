//! Cost sources, the memory model and `baton split`, end to end.

use std::path::Path;

use baton::scenario::{parse, parse_in, Scenario};

mod common;

use common::{baton, json, text};

/// heavy-head.yaml's layers from the README's formulas, computed here:
/// l = 22, h = 2048, a = 16, s = 2048, V = 256,000, b = 2, 300 TFLOP/s x 0.4.
/// Each entry: (forward ns, backward ns, activation bytes, stash bytes,
/// parameters, tied parameters).
fn heavy_head_layers() -> Vec<(u64, u64, u64, u64, u64, u64)> {
    let (l, h, a, s, v, b) = (22u64, 2048u64, 16u64, 2048u64, 256_000u64, 2u64);
    let speed = 300e12 * 0.4;
    let ns = |flops: f64| (flops / speed * 1e9).round() as u64;
    let layer_flops = (24 * b * s * h * h + 4 * b * s * s * h) as f64;
    let logit_flops = (2 * b * s * h * v) as f64;
    let boundary = 2 * s * b * h;
    let mut out = vec![(0, 0, boundary, 0, (v + s) * h, 0)];
    let stash = s * b * h * 34 + 5 * a * s * s * b; // s b h (34 + 5 a s / h)
    out.extend((0..l).map(|_| (ns(layer_flops), ns(2.0 * layer_flops), boundary, stash, 12 * h * h + 13 * h, 0)));
    out.push((ns(logit_flops), ns(2.0 * logit_flops), 2 * s * b * v, boundary + 2 * s * b * v, 0, v * h));
    out
}

/// Peak memory per device of a 1F1B split of `layers` over `split.len()`
/// devices with `m` micro-batches: reserve + 16 B per parameter (a device
/// other than 0 also holds its tied parameters) + min(p - d, m) x the stash.
fn one_f_one_b_memory(layers: &[(u64, u64, u64, u64, u64, u64)], split: &[usize], m: u64, reserve: u64) -> Vec<u64> {
    let p = split.len() as u64;
    let mut at = 0;
    split
        .iter()
        .enumerate()
        .map(|(d, &n)| {
            let part = &layers[at..at + n];
            at += n;
            let params: u64 = part.iter().map(|x| x.4 + if d > 0 { x.5 } else { 0 }).sum();
            let stash: u64 = part.iter().map(|x| x.3).sum();
            reserve + 16 * params + (p - d as u64).min(m) * stash
        })
        .collect()
}

/// Every split of `n` layers into 4 non-empty pieces.
fn four_way_splits(n: usize) -> Vec<[usize; 4]> {
    let mut v = Vec::new();
    for a in 1..n {
        for b in 1..n - a {
            for c in 1..n - a - b {
                v.push([a, b, c, n - a - b - c]);
            }
        }
    }
    v
}

/// Four equal layers with a 1 MiB stash each, on a flat cluster.
fn four_layers(schedule: &str, m: u32) -> Scenario {
    let t = format!(
        "model:\n  layers:\n    - {{ repeat: 4, forward: 1ms, backward: 2ms, activation: 1MiB, stash: 1MiB, params: 1M }}\n\
         cluster: {{ devices: 4, link: {{ latency: 0ns, bandwidth: 100GB/s }}, device: {{ memory: 1GiB }} }}\n\
         pipeline: {{ stages: 4, micro_batches: {m}, schedule: {schedule} }}\n"
    );
    parse(&t, "mem.yaml", "mem", &[]).unwrap()
}

#[test]
fn one_f_one_b_holds_p_micro_batches_on_the_first_device_fill_drain_m() {
    // Narayanan et al., "Memory-Efficient Pipeline-Parallel DNN Training", ICML
    // 2021, sec. 3, and Narayanan et al., SC 2021, sec. 2.2.1: under 1F1B the
    // first of p stages stashes activations for p micro-batches, under
    // fill-drain for all m.
    let (p, m) = (4u64, 8u64);
    let stash = 1u64 << 20;
    let ob = baton::simulate(&four_layers("1f1b", m as u32)).unwrap().report;
    let fd = baton::simulate(&four_layers("fill-drain", m as u32)).unwrap().report;
    assert_eq!(ob.devices[0].peak_activation_bytes, p * stash);
    assert_eq!(fd.devices[0].peak_activation_bytes, m * stash);
    let per_device: Vec<u64> = ob.devices.iter().map(|d| d.peak_activation_bytes / stash).collect();
    assert_eq!(per_device, vec![4, 3, 2, 1], "min(p - d, m) micro-batches");
    // Peak memory = state (1M params x 16 B, ZeRO sec. 3.1) + activations.
    assert_eq!(ob.devices[0].state_bytes, 16_000_000);
    assert_eq!(ob.devices[0].peak_memory_bytes, 16_000_000 + 4 * stash);
    assert!(ob.fits && ob.devices.iter().all(|d| d.memory_capacity_bytes == Some(1 << 30)));
}

#[test]
fn recomputation_trades_memory_for_time() {
    // Full recomputation (common practice, no source): keep only the piece's
    // input, and run the forward again before the backward.
    let t = "model:\n  layers:\n    - { repeat: 4, forward: 1ms, backward: 2ms, activation: 1MiB, stash: 8MiB }\n\
             cluster: { devices: 2, link: { latency: 0ns, bandwidth: 100GB/s } }\n\
             pipeline: { stages: 2, micro_batches: 4, schedule: 1f1b }\n";
    let plain = parse(t, "r.yaml", "r", &[]).unwrap();
    let full = parse(t, "r.yaml", "r", &["training.recompute=full".into()]).unwrap();
    let (a, b) = (plain.pieces(), full.pieces());
    assert_eq!(a[1].backward_ns, 4_000_000);
    assert_eq!(b[1].backward_ns, 6_000_000, "backward + forward again");
    assert_eq!(a[1].stash_bytes, 16 << 20, "two layers' stash");
    assert_eq!(b[1].stash_bytes, 1 << 20, "the piece's input activation");
    assert_eq!(b[0].stash_bytes, 0, "the first piece's input is token ids");
    let (ra, rb) = (baton::simulate(&plain).unwrap().report, baton::simulate(&full).unwrap().report);
    // Step times from the reference model in tests/common: two stages of
    // F 2 ms, B 4 ms (6 ms with the forward again), 1 MiB over 100 GB/s.
    let step = |backward_ns: u64| {
        let stage = common::RefStage { forward_ns: 2_000_000, backward_ns, send_bytes: 1 << 20 };
        common::reference_step(&[stage, stage], 4, "1f1b", 0, 100_000_000_000).expect("no sharing").step_ns
    };
    assert_eq!((ra.step_time_ns, rb.step_time_ns), (step(4_000_000), step(6_000_000)));
    // 1F1B holds min(p - d, m) = 2 micro-batches on device 0 and 1 on device
    // 1: 2 x 16 MiB and 1 x 16 MiB plain; with recomputation device 0 stashes
    // nothing (its input is token ids) and device 1 one 1 MiB input.
    let held = |r: &baton::report::Report| r.devices.iter().map(|d| d.peak_activation_bytes).collect::<Vec<_>>();
    assert_eq!(held(&ra), vec![32 << 20, 16 << 20]);
    assert_eq!(held(&rb), vec![0, 1 << 20]);
    assert_eq!(rb.recompute, "full");
}

const TRANSFORMER: &str = "title: t\nmodel:\n  transformer: { layers: 6, hidden: 1024, heads: 16, seq_len: 1024, vocab: 32000 }\n\
    cluster:\n  devices: 4\n  link: { latency: 5us, bandwidth: 50GB/s }\n  device: { peak: 200TFLOP/s, efficiency: 0.5, memory: 16GiB }\n\
    pipeline: { stages: 4, micro_batches: 8, micro_batch_size: 2, schedule: 1f1b }\n";

#[test]
fn transformer_layers_follow_the_published_formulas() {
    let s = parse(TRANSFORMER, "t.yaml", "t", &[]).unwrap();
    assert_eq!(s.layers.len(), 8, "embedding, 6 layers, logits");
    let (h, sq, v, b, l) = (1024f64, 1024f64, 32000f64, 2f64, 6f64);
    // Narayanan et al., SC 2021, eq. 2: 12 l h^2 (1 + 13/(12h) + (V+s)/(12 l h)).
    let p_eq2 = 12.0 * l * h * h * (1.0 + 13.0 / (12.0 * h) + (v + sq) / (12.0 * l * h));
    let total: u64 = s.layers.iter().map(|x| x.params).sum();
    assert!((total as f64 - p_eq2).abs() < 1.0, "{total} vs {p_eq2}");
    // Same paper, appendix: 24 b s h^2 + 4 b s^2 h FLOPs per layer forward, at
    // 200 TFLOP/s x 0.5 = 1e14 FLOP/s.
    let flops = 24.0 * b * sq * h * h + 4.0 * b * sq * sq * h;
    assert_eq!(s.layers[1].forward_ns, (flops / 1e14 * 1e9).round() as u64);
    assert_eq!(s.layers[1].backward_ns, (2.0 * flops / 1e14 * 1e9).round() as u64);
    // Logit layer forward 2 b s h V. Eq. 3 of the same paper gives the FLOPs
    // of an iteration as 96 B s l h^2 (1 + s/(6h) + V/(16 l h)); its last term,
    // 96 B s l h^2 x V/(16 l h) = 6 B s h V, is the logit layer's share over the
    // forward and the backward pass (the appendix: 2 B s h V forward and
    // 4 B s h V backward, not recomputed), so the forward is 6 B s h V / 3.
    assert_eq!(s.layers[7].forward_ns, (2.0 * b * sq * h * v / 1e14 * 1e9).round() as u64);
    // Korthikanti et al., MLSys 2023, eq. 1: s b h (34 + 5 a s / h) per layer;
    // boundary activation 2 s b h.
    assert_eq!(s.layers[3].stash_bytes, (sq * b * h * (34.0 + 5.0 * 16.0 * sq / h)) as u64);
    assert_eq!(s.layers[3].activation_bytes, (2.0 * sq * b * h) as u64);
    let r = baton::simulate(&s).unwrap().report;
    // samples/s = micro-batches x micro-batch size / step time.
    assert!((r.samples_per_s - 16.0 / (r.step_time_ns as f64 / 1e9)).abs() < 1e-9);
}

/// One layer with every variant switched on: grouped-query attention,
/// a gated FFN of another width, flash attention, an untied output layer
/// and 4-byte activations, at 1e12 FLOP/s so that FLOPs / 1e3 = ns.
const VARIANTS: &str =
    "title: variants\nmodel:\n  transformer: { layers: 1, hidden: 1024, heads: 16, seq_len: 512, vocab: 1000,\n\
    ffn_hidden: 2048, gated_ffn: true, kv_heads: 4, attention: flash, tied_embeddings: false, bytes_per_value: 4 }\n\
    cluster:\n  devices: 1\n  link: { latency: 5us, bandwidth: 50GB/s }\n  device: { peak: 1TFLOP/s, efficiency: 1 }\n\
    pipeline: { stages: 1, micro_batches: 1, schedule: 1f1b }\n";

#[test]
fn transformer_variants_combine_as_worked_by_hand() {
    // h = 1024, a = 16, k = 4, s = 512, V = 1000, f = 2048, b = 1.
    // Key/value width w = k h / a = 256 (Ainslie et al., "GQA", EMNLP 2023).
    let s = parse(VARIANTS, "v.yaml", "v", &[]).unwrap();
    let [embedding, layer, logits] = &s.layers[..] else { panic!("three layers: {:?}", s.layers) };
    // Parameters: query and output 2 h^2 + 2 h = 2,099,200; key and value
    // 2 h w + 2 w = 524,800; gated FFN 3 h f + 2 f + h = 6,291,456 + 5,120 =
    // 6,296,576 (Shazeer 2020: three matrices); layer norms 4 h = 4,096.
    // 2,099,200 + 524,800 + 6,296,576 + 4,096 = 8,924,672.
    assert_eq!(layer.params, 8_924_672);
    // Forward FLOPs: 4 b s h^2 = 2,147,483,648; 4 b s h w = 536,870,912;
    // 6 b s h f = 6,442,450,944; 4 b s^2 h = 1,073,741,824; in all
    // 10,200,547,328 -> 10,200,547.328 ns, rounded 10,200,547.
    assert_eq!(layer.forward_ns, 10_200_547);
    // Backward: twice that, 20,401,094,656, plus the scores recomputed
    // (Dao et al., "FlashAttention", NeurIPS 2022), 2 b s^2 h = 536,870,912:
    // 20,937,965,568 -> 20,937,965.568 ns, rounded 20,937,966.
    assert_eq!(layer.backward_ns, 20_937_966);
    // Stash in units of s b at 2 bytes a value: attention 7 h + 4 w =
    // 8,192; FFN 3 h + 6 f = 15,360; layer norms 4 h = 4,096; no score term
    // with flash: 27,648 x 512 = 14,155,776, x 4/2 bytes = 28,311,552.
    assert_eq!(layer.stash_bytes, 28_311_552);
    // Sent between stages: 4 s b h = 2,097,152 bytes.
    assert_eq!((embedding.activation_bytes, layer.activation_bytes), (2_097_152, 2_097_152));
    // Embedding (V + s) h = 1,512 x 1024 = 1,548,288; untied logits V h =
    // 1,024,000 of their own, none shared.
    assert_eq!((embedding.params, embedding.tied_params), (1_548_288, 0));
    assert_eq!((logits.params, logits.tied_params), (1_024_000, 0));
    // Logits: 2 b s h V = 1,048,576,000 FLOPs -> 1,048,576 ns forward,
    // 2,097,152 ns backward; stash input + logits = 2,097,152 + 4 s b V
    // (2,048,000) = 4,145,152.
    assert_eq!((logits.forward_ns, logits.backward_ns), (1_048_576, 2_097_152));
    assert_eq!(logits.stash_bytes, 4_145_152);
    // The defaults are the original architecture: the same shape without
    // the switches gives eq. 2's 12 h^2 + 13 h and eq. 1's stash.
    let plain = VARIANTS.replace(
        "ffn_hidden: 2048, gated_ffn: true, kv_heads: 4, attention: flash, tied_embeddings: false, bytes_per_value: 4",
        "ffn_hidden: 4096",
    );
    let p = parse(&plain, "p.yaml", "p", &[]).unwrap();
    assert_eq!(p.layers[1].params, 12 * 1024 * 1024 + 13 * 1024);
    assert_eq!(p.layers[1].stash_bytes, 512 * 1024 * (34 + 5 * 16 * 512 / 1024));
    assert_eq!((p.layers[2].params, p.layers[2].tied_params), (0, 1_024_000));
}

#[test]
fn transformer_variant_keys_are_checked() {
    let bad = |from: &str, to: &str| {
        let text = VARIANTS.replace(from, to);
        assert_ne!(text, VARIANTS, "{from}");
        parse(&text, "v.yaml", "v", &[]).unwrap_err()
    };
    let e = bad("kv_heads: 4", "kv_heads: 5");
    assert_eq!(e.key(), Some("model.transformer.kv_heads"));
    assert!(e.to_string().contains("must divide model.transformer.heads (16)"), "{e}");
    let e = bad("kv_heads: 4", "kv_heads: 32");
    assert!(e.to_string().contains("at most 16"), "{e}");
    let e = bad("attention: flash", "attention: sparse");
    assert!(e.to_string().contains("expected standard or flash"), "{e}");
    let e = bad("gated_ffn: true", "gated_ffn: yes please");
    assert!(e.to_string().contains("expected true or false"), "{e}");
    let e = bad("bytes_per_value: 4", "bytes_per_value: 0");
    assert_eq!(e.key(), Some("model.transformer.bytes_per_value"));
    // 4 x 1010 / 16 = 252.5.
    let e = bad("hidden: 1024, heads: 16", "hidden: 1010, heads: 16");
    assert!(e.to_string().contains("make hidden a multiple of heads"), "{e}");
    let e = bad("ffn_hidden: 2048", "ffn_width: 2048");
    assert!(e.to_string().contains("unknown key `ffn_width`"), "{e}");
}

#[test]
fn transformer_needs_the_device_speed() {
    let t = TRANSFORMER.replace("peak: 200TFLOP/s, ", "");
    let e = parse(&t, "t.yaml", "t", &[]).unwrap_err();
    assert_eq!(e.key(), Some("cluster.device.peak"));
    let e = parse(TRANSFORMER, "t.yaml", "t", &["model.profile=x.csv".into()]).unwrap_err();
    assert!(e.to_string().contains("exactly one of layers, profile or transformer"), "{e}");
    let e = parse(TRANSFORMER, "t.yaml", "t", &["cluster.device.efficiency=1.5".into()]).unwrap_err();
    assert_eq!(e.key(), Some("cluster.device.efficiency"));
}

#[test]
fn exported_layer_table_reads_back_identically() {
    // `--show-layers` of a transformer scenario, exported with --layers-csv and
    // read back as a profile, gives the same report.
    let dir = tempfile::tempdir().unwrap();
    let scen = dir.path().join("t.yaml");
    std::fs::write(&scen, TRANSFORMER).unwrap();
    let csv = dir.path().join("layers.csv");
    let a =
        baton(&["run", scen.to_str().unwrap(), "--json", "-", "--show-layers", "--layers-csv", csv.to_str().unwrap()]);
    assert!(a.status.success(), "{}", text(&a.stderr));
    assert!(text(&a.stderr).contains("layer.5"), "the table lists the layers");
    let profiled = TRANSFORMER.replace(
        "  transformer: { layers: 6, hidden: 1024, heads: 16, seq_len: 1024, vocab: 32000 }",
        "  profile: layers.csv",
    );
    let scen2 = dir.path().join("p.yaml");
    std::fs::write(&scen2, profiled).unwrap();
    let b = baton(&["run", scen2.to_str().unwrap(), "--json", "-"]);
    assert!(b.status.success(), "{}", text(&b.stderr));
    // The same report, but for the model FLOPs utilisation, which needs the
    // model's shape (a profile gives only times).
    let (mut ja, mut jb) = (json(&a), json(&b));
    assert!(ja["mfu"].as_f64().is_some() && jb["mfu"].is_null());
    ja["mfu"] = serde_json::Value::Null;
    jb["mfu"] = serde_json::Value::Null;
    assert_eq!(ja, jb);
    // The profile path is relative to the scenario file, not the working
    // directory; every column reads back (a profile keeps no split of a
    // layer's time around its tensor-parallel all-reduces).
    let s = parse_in(&std::fs::read_to_string(&scen2).unwrap(), "p.yaml", "p", dir.path(), &[]).unwrap();
    let columns = |l: &baton::scenario::LayerCost| {
        (
            l.name.clone(),
            l.forward_ns,
            l.backward_ns,
            l.activation_bytes,
            l.stash_bytes,
            l.params,
            l.tied_params,
            l.tensor_bytes,
        )
    };
    let want: Vec<_> = parse(TRANSFORMER, "t.yaml", "t", &[]).unwrap().layers.iter().map(columns).collect();
    assert_eq!(s.layers.iter().map(columns).collect::<Vec<_>>(), want);
    assert!(parse_in(&std::fs::read_to_string(&scen2).unwrap(), "p.yaml", "p", Path::new("/nonexistent"), &[]).is_err());
}

#[test]
fn strict_fails_over_capacity_and_memory_chart_is_drawn() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("m.svg");
    let over = baton(&[
        "run",
        "scenarios/heavy-head.yaml",
        "--set",
        "cluster.device.memory=16GiB",
        "--memory-svg",
        svg.to_str().unwrap(),
        "--strict",
    ]);
    assert_eq!(over.status.code(), Some(3), "{}", text(&over.stderr));
    assert!(text(&over.stdout).contains("OVER CAPACITY"));
    let chart = std::fs::read_to_string(&svg).unwrap();
    assert!(chart.contains("memory per device") && chart.contains("device 3") && chart.contains("GiB"));
    assert!(chart.starts_with("<svg") && chart.trim_end().ends_with("</svg>"));
    let fine = baton(&["run", "scenarios/heavy-head.yaml", "--strict", "--json", "-"]);
    assert_eq!(fine.status.code(), Some(0), "{}", text(&fine.stderr));
    let v = json(&fine);
    // Even split [6, 6, 6, 6], 1F1B, m = 16, 2 GiB reserved. Device 0: state
    // 16 x (528,482,304 + 5 x 50,358,272) = 12,484,378,624; stash 4 in flight
    // x 5 x 956,301,312 = 19,126,026,240; + 2,147,483,648 = 33,757,888,512.
    let layers = heavy_head_layers();
    let memory = one_f_one_b_memory(&layers, &[6, 6, 6, 6], 16, 2 << 30);
    assert_eq!(memory[0], 33_757_888_512);
    for (d, dev) in v["devices"].as_array().unwrap().iter().enumerate() {
        assert_eq!(dev["peak_memory_bytes"].as_u64(), Some(memory[d]), "device {d}");
        assert_eq!(dev["memory_capacity_bytes"].as_u64(), Some(40 << 30));
        assert_eq!(dev["fits"], true);
    }
    // The step from the reference model (no transfer shares a link), plus
    // the tied embedding's all-reduce after device 0's last backward: 32
    // samples per step.
    let stages: Vec<(u64, u64, u64)> = layers.iter().map(|x| (x.0, x.1, x.2)).collect();
    let want = common::reference_step(&common::stages_of(&stages, &[6, 6, 6, 6]), 16, "1f1b", 5_000, 50_000_000_000)
        .expect("no sharing");
    let step_ns = want.step_ns + HEAVY_HEAD_TIED_NS;
    assert_eq!(v["step_time_ns"].as_u64(), Some(step_ns));
    assert_eq!(v["samples_per_s"].as_f64(), Some(32.0 / (step_ns as f64 / 1e9)));
}

/// The heavy-head scenario's tied embedding all-reduce between the first and
/// last devices: V h = 256,000 x 2,048 = 524,288,000 parameters x 2 B =
/// 1,048,576,000 B; a ring of two (Patarasuk & Yuan 2009) is one
/// reduce-scatter round and one all-gather round of n/2 = 524,288,000 B, each
/// 5 us + 524,288,000 B / 50 GB/s = 5,000 + 10,485,760 ns.
const HEAVY_HEAD_TIED_NS: u64 = 2 * (5_000 + 10_485_760);

#[test]
fn split_improves_the_heavy_head_and_applies() {
    let dir = tempfile::tempdir().unwrap();
    let applied = dir.path().join("balanced.yaml");
    let out = baton(&["split", "scenarios/heavy-head.yaml", "--json", "-", "--apply", applied.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v = json(&out);
    let split: Vec<usize> = serde_json::from_value(v["split"].clone()).unwrap();
    assert_eq!(v["fits"], true);
    // Held against every split of the 24 layers over 4 devices that fits in
    // 40 GiB (memory from the formulas), each simulated with the reference
    // model where it applies (no two transfers on one link at once): none is
    // faster than the proposal, whose own step the reference reproduces.
    let layers = heavy_head_layers();
    let stages: Vec<(u64, u64, u64)> = layers.iter().map(|x| (x.0, x.1, x.2)).collect();
    // Every split ends with device 0's last backward (1F1B), then the tied
    // embedding's all-reduce between devices 0 and 3.
    let step_of = |split: &[usize]| {
        common::reference_step(&common::stages_of(&stages, split), 16, "1f1b", 5_000, 50_000_000_000)
            .map(|r| r.step_ns + HEAVY_HEAD_TIED_NS)
    };
    let fitting: Vec<[usize; 4]> = four_way_splits(24)
        .into_iter()
        .filter(|s| one_f_one_b_memory(&layers, s, 16, 2 << 30).iter().all(|&b| b <= 40 << 30))
        .collect();
    let modelled: Vec<u64> = fitting.iter().filter_map(|s| step_of(s)).collect();
    assert!(modelled.len() > fitting.len() / 2, "{} of {} splits modelled", modelled.len(), fitting.len());
    let best = step_of(&split).expect("the proposal shares no link");
    assert_eq!(best, *modelled.iter().min().unwrap(), "proposed {split:?}");
    assert_eq!(v["step_time_ms"].as_f64(), Some(best as f64 / 1e6));
    assert_eq!(v["baseline_step_time_ms"].as_f64(), Some(step_of(&[6, 6, 6, 6]).unwrap() as f64 / 1e6));
    // The bottleneck is the largest device's F + B per micro-batch.
    let mut at = 0;
    let device_ns: Vec<u64> = split
        .iter()
        .map(|&n| {
            at += n;
            layers[at - n..at].iter().map(|x| x.0 + x.1).sum()
        })
        .collect();
    assert_eq!(v["bottleneck_ms"].as_f64(), Some(*device_ns.iter().max().unwrap() as f64 / 1e6));
    // The applied copy keeps the comments and reads back with the new split.
    let copy = std::fs::read_to_string(&applied).unwrap();
    assert!(copy.contains("# An invented chat model"));
    let again = baton(&["run", applied.to_str().unwrap(), "--json", "-"]);
    let r = json(&again);
    assert_eq!(r["step_time_ms"].as_f64(), Some(best as f64 / 1e6));
}

#[test]
fn split_reports_the_shortfall_when_nothing_fits() {
    let out = baton(&["split", "scenarios/heavy-head.yaml", "--set", "cluster.device.memory=16GiB", "--json", "-"]);
    assert_eq!(out.status.code(), Some(3));
    let v = json(&out);
    assert_eq!(v["fits"], false);
    // The smallest shortfall over every 4-way split, from the formulas: the
    // least "largest device memory" any split needs, minus 16 GiB.
    let layers = heavy_head_layers();
    let need = four_way_splits(24)
        .iter()
        .map(|s| *one_f_one_b_memory(&layers, s, 16, 2 << 30).iter().max().unwrap())
        .min()
        .unwrap();
    assert_eq!(v["shortfall_bytes"].as_u64(), Some(need - (16 << 30)));
    let closest: Vec<usize> = serde_json::from_value(v["split"].clone()).unwrap();
    let closest_memory = one_f_one_b_memory(&layers, &closest, 16, 2 << 30);
    assert_eq!(*closest_memory.iter().max().unwrap(), need, "the closest split needs exactly that");
    let short = v["short_device"].as_u64().unwrap() as usize;
    assert_eq!(closest_memory[short], need, "the device named is the one short by that much");
    assert!(text(&out.stderr).contains("NO SPLIT FITS"));
}

#[test]
fn split_matches_brute_force_on_a_small_scenario() {
    // Without links or memory, the step of a 1F1B pipeline with equal
    // micro-batches is set by its slowest stage; the exact split's bottleneck
    // must equal the best over all 4-way splits of these 7 layers.
    let costs = [3u64, 1, 4, 1, 5, 9, 2];
    let mut layers = String::new();
    for c in costs {
        layers += &format!("    - {{ forward: {c}ms, backward: {}ms, activation: 0B }}\n", 2 * c);
    }
    let t = format!(
        "model:\n  layers:\n{layers}cluster: {{ devices: 4, link: {{ latency: 0ns, bandwidth: 1GB/s }} }}\npipeline: {{ stages: 4, micro_batches: 8, schedule: 1f1b }}\n"
    );
    let s = parse(&t, "b.yaml", "b", &[]).unwrap();
    let plan = baton::planner::plan(&s).unwrap();
    let mut best = u64::MAX;
    for a in 1..=4 {
        for b in 1..=4 {
            for c in 1..=4 {
                if a + b + c < 7 {
                    let parts = [a, b, c, 7 - a - b - c];
                    let mut at = 0;
                    let worst = parts
                        .iter()
                        .map(|&n| {
                            let sum: u64 = costs[at..at + n].iter().map(|c| 3 * c).sum();
                            at += n;
                            sum
                        })
                        .max()
                        .unwrap();
                    best = best.min(worst);
                }
            }
        }
    }
    assert_eq!(plan.proxy.bottleneck_ns, best * 1_000_000);
    assert!(plan.best.outcome.report.step_time_ns <= plan.proxy_run.outcome.report.step_time_ns);
}

#[test]
fn split_memory_accounting_equals_the_simulated_peak() {
    // With one chunk per device the split search's memory (state + reserve +
    // in-flight x stash) must equal the simulated peak on every device.
    for schedule in ["1f1b", "fill-drain"] {
        let s = baton::scenario::load(
            Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/scenarios/heavy-head.yaml")),
            &[format!("pipeline.schedule={schedule}"), "cluster.device.memory=1TiB".into()],
        )
        .unwrap();
        let inputs = baton::planner::inputs(&s).unwrap();
        let eval = baton::planner::evaluate(&inputs.problem(), &s.pipeline.split).unwrap();
        let report = baton::simulate(&s).unwrap().report;
        let simulated: Vec<u64> = report.devices.iter().map(|d| d.peak_memory_bytes).collect();
        assert_eq!(eval.device_bytes, simulated, "{schedule}");
    }
}

#[test]
fn interleaved_split_searches_devices_exactly() {
    // With two chunks per device the device time is a sum of separated
    // pieces; the branch-and-bound must finish (exact) on the demo and the
    // proposed split must cover the layers.
    let out = baton(&["split", "scenarios/interleaved.yaml", "--json", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v = json(&out);
    assert_eq!(v["proxy_exact"], true);
    let split: Vec<u32> = serde_json::from_value(v["split"].clone()).unwrap();
    assert_eq!((split.len(), split.iter().sum::<u32>()), (8, 16));
    assert!(v["step_time_ms"].as_f64().unwrap() <= v["proxy_step_time_ms"].as_f64().unwrap());
}

#[test]
fn split_keeps_a_faster_input_split() {
    // A case where the bottleneck proxy is misled by a link (found by the
    // property test `split_is_never_slower_than_a_fitting_input`), worked by
    // hand. Two devices, fill-drain, m = 2, latency 0, 1 GB/s (1,000 B/us):
    //   L0 F 1 B 1 us, activation 0;     L1 F 1 B 1, activation 8,101 kB;
    //   L2 F 278 B 1, activation 141 kB; L3 F 1 B 3, activation 0.
    // Input [1, 3]: device 0 runs L0 (F 1, B 1), device 1 L1..L3 (F 280, B 5);
    // the boundary carries L0's 0 bytes, so transfers take no time.
    //   F0@0 0-1, F1@0 1-2; F0@1 1-281, F1@1 281-561; B0@1 561-566,
    //   B1@1 566-571; B0@0 566-567, B1@0 571-572. Step 572 us.
    // The proxy's [3, 1] (bottleneck 283 us, against 285 us for [1, 3]):
    // device 0 L0..L2 (F 280, B 3), device 1 L3 (F 1, B 3), boundary 141 kB
    // = 141 us alone. Activations 280-421 and 560-701 (alone);
    //   F0@1 421-422, F1@1 701-702, B0@1 702-705, B1@1 705-708.
    // Gradients share link 1->0: B0's alone 705-708 (3,000 B), then both at
    // 500 B/us: B0's 138,000 B left end at 708 + 276 = 984; B1 has 3,000 B
    // left, alone: 987. B0@0 984-987, B1@0 987-990. Step 990 us.
    // [2, 2] sends 8,101 kB (8.101 ms) each way: slower than both.
    let t = "model:\n  layers:\n\
             \x20   - { forward: 1us, backward: 1us, activation: 0kB }\n\
             \x20   - { forward: 1us, backward: 1us, activation: 8101kB }\n\
             \x20   - { forward: 278us, backward: 1us, activation: 141kB }\n\
             \x20   - { forward: 1us, backward: 3us, activation: 0kB }\n\
             cluster: { devices: 2, link: { latency: 0us, bandwidth: 1GB/s } }\n\
             pipeline: { stages: 2, micro_batches: 2, schedule: fill-drain, split: [1, 3] }\n";
    let s = parse(t, "keep.yaml", "keep", &[]).unwrap();
    let plan = baton::planner::plan(&s).unwrap();
    assert_eq!(plan.baseline.outcome.report.step_time_ns, 572_000);
    assert_eq!((plan.proxy.split.clone(), plan.proxy.bottleneck_ns), (vec![3, 1], 283_000));
    assert_eq!(plan.proxy_run.outcome.report.step_time_ns, 990_000);
    assert_eq!(plan.best.split, vec![1, 3]);
    assert_eq!(plan.best.outcome.report.step_time_ns, 572_000);
    assert!(plan.baseline_is_best);
    assert_eq!(plan.start, baton::planner::Start::Scenario);
    // The command says so plainly.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("keep.yaml");
    std::fs::write(&path, t).unwrap();
    let out = baton(&["split", path.to_str().unwrap(), "--json", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("the scenario's split [1, 3] is already the best found: no change proposed"));
    let v = json(&out);
    assert_eq!((v["baseline_is_best"].as_bool(), v["local_search_start"].as_str()), (Some(true), Some("scenario")));
    assert_eq!(v["step_time_ms"].as_f64(), Some(0.572));
}

#[test]
fn tied_output_weights_are_copied_onto_the_last_device() {
    // The logit layer's weights are the token embedding's (Narayanan et al.,
    // SC 2021, eq. 2 counts them once). With more than one stage the output
    // layer runs on another device than the embedding, which then keeps its
    // own V x h copy with gradients and optimizer state (16 B per parameter,
    // Rajbhandari et al., ZeRO, SC 2020, sec. 3.1); the position embedding
    // (s x h) is not copied.
    // heavy-head.yaml: l = 22, h = 2048, s = 2048, V = 256,000; even split of
    // 24 layers [6, 6, 6, 6]: device 0 holds the embedding and 5 layers,
    // device 3 holds 5 layers and the logit layer.
    let (h, s_len, v) = (2048u64, 2048u64, 256_000u64);
    let layer = 12 * h * h + 13 * h; // 50,358,272
    let embedding = (v + s_len) * h; // 528,482,304
    let copy = v * h; // 524,288,000
    let s = baton::scenario::load(Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/scenarios/heavy-head.yaml")), &[])
        .unwrap();
    let r = baton::simulate(&s).unwrap().report;
    let state: Vec<u64> = r.devices.iter().map(|d| d.state_bytes).collect();
    assert_eq!(state, vec![16 * (embedding + 5 * layer), 16 * 6 * layer, 16 * 6 * layer, 16 * (5 * layer + copy)]);
    // 16 x 524,288,000 = 8,388,608,000 B = 7.8 GiB more on device 3.
    // One stage: the embedding and the output layer share one device, no copy.
    let one = baton::scenario::load(
        Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/scenarios/heavy-head.yaml")),
        &["pipeline.stages=1".into(), "cluster.device.memory=1TiB".into()],
    )
    .unwrap();
    let r1 = baton::simulate(&one).unwrap().report;
    assert_eq!(r1.devices[0].state_bytes, 16 * (embedding + 22 * layer));
    // Interleaved, 2 devices x 2 chunks: the output layer is in piece 3, on
    // device 1, which holds the copy; device 0 holds piece 0 and piece 2.
    let two = TRANSFORMER.replace(
        "pipeline: { stages: 4, micro_batches: 8, micro_batch_size: 2, schedule: 1f1b }",
        "pipeline: { stages: 2, chunks: 2, micro_batches: 8, micro_batch_size: 2, schedule: interleaved }",
    );
    let st = parse(&two, "t.yaml", "t", &[]).unwrap();
    // l = 6, h = 1024, s = 1024, V = 32,000: 8 layers split [2, 2, 2, 2];
    // device 0: embedding, layer 0, layers 3-4; device 1: layers 1-2, 5, logits.
    let (h, s_len, v) = (1024u64, 1024u64, 32_000u64);
    let layer = 12 * h * h + 13 * h;
    let r = baton::simulate(&st).unwrap().report;
    assert_eq!(r.devices[0].state_bytes, 16 * ((v + s_len) * h + 3 * layer));
    assert_eq!(r.devices[1].state_bytes, 16 * (3 * layer + v * h));
}
