//! `baton layout`: the command as a user runs it, its pruning bound, its
//! fast evaluator against the full simulation, and its best layout against a
//! brute-force search over every layout and every split.

mod common;

use std::path::Path;

use baton::layout::{execute, Outcome, Request, Verify};
use baton::scenario::{parse, Document};
use baton::schedule::ScheduleKind;
use common::{baton, json, text};
use proptest::prelude::*;

const DEMO: &str = "scenarios/layout.yaml";

fn ok(out: &std::process::Output) {
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
}

#[test]
fn the_best_layout_is_reproduced_by_baton_run_to_the_nanosecond() {
    let out = baton(&["layout", DEMO, "--global-batch", "256", "--json", "-"]);
    ok(&out);
    let rows = json(&out);
    let rows = rows.as_array().unwrap();
    let best = &rows[0];
    assert_eq!(best["exact"], true, "the first row is a full simulation");
    assert_eq!(best["skipped"], "");
    // Every enumerated layout is a row: evaluated, skipped or pruned.
    assert!(rows.iter().all(|r| r["skipped"] == "" || r["step_time_ms"].is_null()));
    let set =
        |k: &str, v: &serde_json::Value| format!("{k}={}", v.as_str().map_or_else(|| v.to_string(), String::from));
    let mut args = vec!["run".to_string(), DEMO.to_string()];
    for (key, field) in [
        ("parallel.data", "data"),
        ("parallel.tensor", "tensor"),
        ("pipeline.stages", "pipeline"),
        ("pipeline.micro_batch_size", "micro_batch_size"),
        ("pipeline.micro_batches", "micro_batches"),
        ("pipeline.schedule", "schedule"),
        ("pipeline.chunks", "chunks"),
        ("pipeline.split", "split"),
    ] {
        args.push("--set".into());
        args.push(set(key, &best[field]));
    }
    args.extend(["--set".into(), "placement=packed".into(), "--json".into(), "-".into()]);
    let args: Vec<&str> = args.iter().map(String::as_str).collect();
    let run = baton(&args);
    ok(&run);
    let r = json(&run);
    assert_eq!(r["step_time_ms"], best["step_time_ms"]);
    assert_eq!(r["samples_per_s"], best["samples_per_s"]);
    // The printed command is the one just run.
    let table = baton(&["layout", DEMO, "--global-batch", "256"]);
    ok(&table);
    assert!(text(&table.stdout).contains(&format!("--set 'pipeline.split={}'", best["split"].as_str().unwrap())));
}

#[test]
fn csv_columns_are_the_pinned_ones_and_jobs_do_not_change_the_result() {
    let dir = tempfile::tempdir().unwrap();
    let mut outputs = Vec::new();
    for jobs in ["1", "2"] {
        let csv = dir.path().join(format!("l{jobs}.csv"));
        let out = baton(&[
            "layout",
            DEMO,
            "--global-batch",
            "128",
            "--micro-batch-sizes",
            "1,2",
            "--jobs",
            jobs,
            "--csv",
            csv.to_str().unwrap(),
        ]);
        ok(&out);
        outputs.push(std::fs::read_to_string(&csv).unwrap());
    }
    assert_eq!(outputs[0], outputs[1], "--jobs 1 and --jobs 2 differ");
    let header = outputs[0].lines().next().unwrap();
    assert!(header.starts_with(
        "data,pipeline,tensor,micro_batch_size,micro_batches,schedule,chunks,step_time_ms,samples_per_s,mfu,peak_memory_bytes,fits,split,skipped"
    ));
    // A split is written as --set pipeline.split takes it.
    assert!(outputs[0].lines().nth(1).unwrap().contains("\"[") || outputs[0].contains(",[50],"));
}

#[test]
fn bad_requests_exit_2_and_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("l.csv");
    for args in [
        vec!["--global-batch", "0"],
        vec!["--global-batch", "64", "--schedules", "zigzag"],
        vec!["--global-batch", "2", "--micro-batch-sizes", "3"],
        vec!["--global-batch", "64", "--verify", "none"],
        vec!["--global-batch", "64", "--set", "parallel.tensor=0"],
    ] {
        let mut full = vec!["layout", DEMO, "--csv", csv.to_str().unwrap()];
        full.extend(args.iter());
        let out = baton(&full);
        assert_eq!(out.status.code(), Some(2), "{args:?}: {}", text(&out.stderr));
        assert!(!csv.exists(), "{args:?}");
    }
}

#[test]
fn explicit_layer_costs_scale_with_the_micro_batch_size() {
    // Costs given for the written micro-batch size (2) scale linearly with
    // another (an idealisation): 4 samples take twice the time and bytes.
    let text = |extra: &str| {
        format!(
            "model:\n  layers:\n    - {{ name: l, forward: 3ms, backward: 5ms, activation: 10MB, stash: 7MB, tensor_bytes: 1MB }}\n\
             cluster: {{ devices: 1, link: {{ latency: 1us, bandwidth: 1GB/s }} }}\n\
             pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b, micro_batch_size: 2 }}\n{extra}"
        )
    };
    let doc = Document::from_text(&text(""), "s.yaml", "s", Path::new("")).unwrap();
    let l = &doc.scenario(&["pipeline.micro_batch_size=4".into()]).unwrap().layers[0];
    assert_eq!((l.forward_ns, l.backward_ns), (6_000_000, 10_000_000));
    assert_eq!((l.activation_bytes, l.stash_bytes, l.tensor_bytes), (20_000_000, 14_000_000, 2_000_000));
    let same = &doc.scenario(&[]).unwrap().layers[0];
    assert_eq!(same.forward_ns, 3_000_000);
    // A file that writes 4 itself keeps its costs as given.
    let as_written = parse(&text("").replace("micro_batch_size: 2", "micro_batch_size: 4"), "s", "s", &[]).unwrap();
    assert_eq!(as_written.layers[0].forward_ns, 3_000_000);
}

/// A small cluster and a model of `layers` equal layers.
fn small(n: u32, dpn: u32, layers: u32, tensor_kb: u32, memory_mb: u32, card_gbps: u32) -> String {
    format!(
        "model:\n  layers:\n    - {{ name: l, repeat: {layers}, forward: 2ms, backward: 4ms, activation: 4MB, params: 50M, tensor_bytes: {tensor_kb}kB }}\n\
         cluster:\n  nodes: {}\n  devices_per_node: {dpn}\n\
         \x20 device_link: {{ latency: 2us, bandwidth: 100GB/s }}\n  node_link: {{ latency: 5us, bandwidth: {card_gbps}GB/s }}\n\
         \x20 device: {{ memory: {memory_mb}MB }}\n\
         pipeline: {{ stages: 1, micro_batches: 1, schedule: 1f1b }}\n\
         training: {{ state_bytes_per_param: 16 }}\n",
        n / dpn
    )
}

/// Every split of `layers` into `pieces` contiguous non-empty parts.
fn splits(layers: u32, pieces: u32) -> Vec<Vec<u32>> {
    if pieces == 1 {
        return vec![vec![layers]];
    }
    (1..=layers - (pieces - 1))
        .flat_map(|first| {
            splits(layers - first, pieces - 1).into_iter().map(move |mut rest| {
                rest.insert(0, first);
                rest
            })
        })
        .collect()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 8, ..ProptestConfig::default() })]

    /// With every layout simulated in full (`--all --verify all`), the best
    /// layout equals the best over every layout and every split, each
    /// simulated in full (a brute force), on clusters of 8 and 12 devices.
    #[test]
    fn the_best_layout_is_the_brute_force_best(
        twelve in any::<bool>(),
        tensor_kb in 0u32..4000,
        memory_mb in 3_000u32..20_000,
        card_gbps in 1u32..50,
        batch_k in 1u32..3,
    ) {
        let (n, dpn, layers) = if twelve { (12, 6, 6) } else { (8, 4, 8) };
        let global_batch = (n * batch_k) as u64;
        let text = small(n, dpn, layers, tensor_kb, memory_mb, card_gbps);
        let doc = Document::from_text(&text, "s.yaml", "s", Path::new("")).unwrap();
        let request = Request {
            doc: &doc,
            sets: &[],
            global_batch,
            micro_batch_sizes: &[1, 2],
            schedules: &[ScheduleKind::OneFOneB, ScheduleKind::FillDrain],
            chunks: &[1],
            max_tensor: None,
            verify: Verify::All,
            all: true,
            jobs: Some(1),
            max_memory: 16 << 30,
            shard: None,
        };
        let done = execute(&request, &|| {}).unwrap();
        // The brute force: every enumerated layout, every split.
        let mut best: Option<(u64, String)> = None;
        for row in &done.rows {
            let l = &row.layout;
            if !matches!(row.outcome, Outcome::Evaluated(_) | Outcome::Skipped(_)) {
                prop_assert!(false, "nothing is pruned with --all");
            }
            for split in splits(layers, l.pipeline) {
                let mut sets = l.sets();
                sets.push(format!("pipeline.split={}", baton::layout::split_text(&split)));
                let Ok(s) = doc.scenario(&sets) else { continue };
                let r = baton::simulate(&s).unwrap().report;
                if r.fits && best.as_ref().is_none_or(|b| r.step_time_ns < b.0) {
                    best = Some((r.step_time_ns, format!("{sets:?}")));
                }
            }
        }
        let first = done.rows.first().unwrap();
        match (&first.outcome, best) {
            (Outcome::Evaluated(f), Some((step, which))) if f.fits => {
                prop_assert!(f.exact);
                prop_assert_eq!(f.step_ns, step, "brute force found {}", which);
            }
            (Outcome::Evaluated(f), None) => prop_assert!(!f.fits),
            (other, best) => prop_assert!(best.is_none(), "{:?} but the brute force found {:?}", other, best),
        }
    }

}

proptest! {
    #![proptest_config(ProptestConfig { cases: 32, ..ProptestConfig::default() })]

    /// The pruning bound never exceeds the simulated step, and the fast
    /// evaluator stays close to the full simulation (README: measured
    /// figure) on small clusters with tensor groups.
    #[test]
    fn the_bound_holds_and_the_fast_evaluator_is_close(
        tensor_kb in 100u32..8000,
        card_gbps in 1u32..50,
        b in 1u32..3,
        m in 1u32..9,
        shape in 0usize..6,
    ) {
        // (p, t) with p x t dividing 8.
        let (p, t) = [(1u32, 2u32), (1, 4), (2, 2), (2, 4), (4, 2), (2, 1)][shape];
        let d = 8 / (p * t);
        let text = small(8, 4, 8, tensor_kb, 100_000, card_gbps);
        let sets: Vec<String> = vec![
            format!("parallel.data={d}"),
            format!("parallel.tensor={t}"),
            format!("pipeline.stages={p}"),
            format!("pipeline.micro_batch_size={b}"),
            format!("pipeline.micro_batches={m}"),
        ];
        let s = parse(&text, "s.yaml", "s", &sets).unwrap();
        let full = baton::simulate(&s).unwrap().report.step_time_ns;
        let fast = baton::simulate_fast(&s).unwrap().report.step_time_ns;
        let bound = baton::step_lower_bound_ns(&s);
        prop_assert!(bound <= full, "bound {} > step {}", bound, full);
        // The bound the layout search prunes with holds for every split, so
        // for this one too.
        let any_split = baton::layout_lower_bound_ns(&s);
        prop_assert!(any_split <= full, "layout bound {} > step {}", any_split, full);
        let gap = (fast as f64 - full as f64).abs() / full as f64;
        prop_assert!(gap < 0.05, "fast {} vs full {}: {:.2}%", fast, full, gap * 100.0);
    }
}

#[test]
fn shards_merge_into_the_same_best_layout() {
    let dir = tempfile::tempdir().unwrap();
    let whole = baton(&["layout", DEMO, "--global-batch", "32", "--json", "-"]);
    ok(&whole);
    let whole = json(&whole);
    let mut parts = Vec::new();
    for i in 1..=3 {
        let part = dir.path().join(format!("part{i}.csv"));
        let out = baton(&[
            "layout",
            DEMO,
            "--global-batch",
            "32",
            "--shard",
            &format!("{i}/3"),
            "--csv",
            part.to_str().unwrap(),
        ]);
        ok(&out);
        assert!(text(&out.stdout).contains(&format!("shard {i}/3")));
        parts.push(part.to_str().unwrap().to_string());
    }
    let mut args = vec!["merge".to_string()];
    args.extend(parts.iter().cloned());
    args.extend(["--json".into(), "-".into()]);
    let args: Vec<&str> = args.iter().map(String::as_str).collect();
    let merged = baton(&args);
    ok(&merged);
    let merged = json(&merged);
    let rows = merged.as_array().unwrap();
    assert_eq!(rows.len(), whole.as_array().unwrap().len(), "every layout, once");
    for field in ["data", "pipeline", "tensor", "micro_batch_size", "step_time_ms", "split", "exact"] {
        assert_eq!(rows[0][field], whole[0][field], "{field}");
    }
    // A missing shard, a repeated one and a part of another search are refused.
    let out = baton(&["merge", &parts[0], &parts[1]]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("shard 3/3 is missing"), "{}", text(&out.stderr));
    let out = baton(&["merge", &parts[0], &parts[0], &parts[1], &parts[2]]);
    assert_eq!(out.status.code(), Some(2));
    let other = dir.path().join("other.csv");
    ok(&baton(&["layout", DEMO, "--global-batch", "16", "--shard", "3/3", "--csv", other.to_str().unwrap()]));
    let out = baton(&["merge", &parts[0], &parts[1], other.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("another layout search"), "{}", text(&out.stderr));
}

#[test]
fn one_replica_stands_for_all_when_nothing_tells_them_apart() {
    // Three replicas of two stages on a flat cluster: every pair of devices
    // has its own link, so each replica's pipeline runs on links of its own
    // and the collectives' pairs are not the pipeline's: playing replica 0
    // and mirroring it gives the full simulation's step exactly.
    let text = "model:\n  layers:\n    - { name: l, repeat: 4, forward: 300us, backward: 600us, activation: 2MB, params: 20M }\n\
                cluster:\n  devices: 6\n  link: { latency: 3us, bandwidth: 20GB/s }\n\
                pipeline: { stages: 2, micro_batches: 4, schedule: 1f1b }\n\
                parallel: { data: 3 }\n\
                gradients: { bucket: 30MB }\n";
    let s = parse(text, "s.yaml", "s", &[]).unwrap();
    assert!(baton::replicas_look_alike(&s));
    let full = baton::simulate(&s).unwrap().report;
    let fast = baton::simulate_fast(&s).unwrap().report;
    assert_eq!(fast.step_time_ns, full.step_time_ns);
    assert_eq!(fast.collectives.len(), full.collectives.len());
    // With jitter the replicas differ: no mirroring.
    let jittered = parse(text, "s.yaml", "s", &["cluster.jitter=0.1".into()]).unwrap();
    assert!(!baton::replicas_look_alike(&jittered));
    // Replicas whose stages share a node's card do not look alike either.
    let boxes = parse(
        &text.replace("  devices: 6\n  link: { latency: 3us, bandwidth: 20GB/s }\n", "  nodes: 2\n  devices_per_node: 3\n  device_link: { latency: 1us, bandwidth: 100GB/s }\n  node_link: { latency: 5us, bandwidth: 10GB/s }\n"),
        "s.yaml",
        "s",
        &[],
    )
    .unwrap();
    assert!(!baton::replicas_look_alike(&boxes));
}
