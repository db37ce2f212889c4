//! Cost sources, the memory model and `baton split`, end to end.

use std::path::Path;
use std::process::{Command, Output};

use baton::scenario::{parse, parse_in, Scenario};

fn baton(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_baton")).args(args).current_dir(env!("CARGO_MANIFEST_DIR")).output().unwrap()
}

fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

fn json(out: &Output) -> serde_json::Value {
    assert!(out.status.code().is_some(), "killed");
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("{e}: {}", text(&out.stderr)))
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
    assert!(rb.step_time_ns > ra.step_time_ns);
    assert!(rb.devices[1].peak_activation_bytes < ra.devices[1].peak_activation_bytes);
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
    // Logit layer 2 b s h V (eq. 3's last term).
    assert_eq!(s.layers[7].forward_ns, (2.0 * b * sq * h * v / 1e14 * 1e9).round() as u64);
    // Korthikanti et al., MLSys 2023, eq. 1: s b h (34 + 5 a s / h) per layer;
    // boundary activation 2 s b h.
    assert_eq!(s.layers[3].stash_bytes, (sq * b * h * (34.0 + 5.0 * 16.0 * sq / h)) as u64);
    assert_eq!(s.layers[3].activation_bytes, (2.0 * sq * b * h) as u64);
    let r = baton::simulate(&s).unwrap().report;
    // samples/s = micro-batches x micro-batch size / step time.
    assert!((r.samples_per_s - 16.0 / (r.step_time_ns as f64 / 1e9)).abs() < 1e-9);
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
    assert_eq!(json(&a), json(&b));
    // The profile path is relative to the scenario file, not the working directory.
    let s = parse_in(&std::fs::read_to_string(&scen2).unwrap(), "p.yaml", "p", dir.path(), &[]).unwrap();
    assert_eq!(s.layers, parse(TRANSFORMER, "t.yaml", "t", &[]).unwrap().layers);
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
    for key in ["peak_memory_bytes", "memory_capacity_bytes", "fits"] {
        assert!(!v["devices"][0][key].is_null(), "devices[].{key}");
    }
    assert!(v["samples_per_s"].as_f64().unwrap() > 0.0);
}

#[test]
fn split_improves_the_heavy_head_and_applies() {
    let dir = tempfile::tempdir().unwrap();
    let applied = dir.path().join("balanced.yaml");
    let out = baton(&["split", "scenarios/heavy-head.yaml", "--json", "-", "--apply", applied.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v = json(&out);
    let split: Vec<u32> = serde_json::from_value(v["split"].clone()).unwrap();
    assert_eq!(split.iter().sum::<u32>(), 24);
    assert_eq!(v["fits"], true);
    let (step, base) = (v["step_time_ms"].as_f64().unwrap(), v["baseline_step_time_ms"].as_f64().unwrap());
    assert!(step < 0.8 * base, "the even split leaves a long idle gap: {step} vs {base}");
    assert!(v["bottleneck_ms"].as_f64().unwrap() > 0.0);
    assert!(v["local_search_gain_ms"].as_f64().unwrap() >= 0.0);
    // The applied copy keeps the comments and reads back with the new split.
    let copy = std::fs::read_to_string(&applied).unwrap();
    assert!(copy.contains("# An invented chat model"));
    let again = baton(&["run", applied.to_str().unwrap(), "--json", "-"]);
    let r = json(&again);
    assert!((r["step_time_ms"].as_f64().unwrap() - step).abs() < 1e-9);
}

#[test]
fn split_reports_the_shortfall_when_nothing_fits() {
    let out = baton(&["split", "scenarios/heavy-head.yaml", "--set", "cluster.device.memory=16GiB", "--json", "-"]);
    assert_eq!(out.status.code(), Some(3));
    let v = json(&out);
    assert_eq!(v["fits"], false);
    assert!(v["shortfall_bytes"].as_u64().unwrap() > 0);
    assert!(v["short_device"].as_u64().unwrap() < 4);
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
        let problem = baton::planner::problem(&s).unwrap();
        let eval = baton::planner::evaluate(&problem, &s.pipeline.split).unwrap();
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
