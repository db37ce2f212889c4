//! `baton sweep`, `baton merge` and `baton compare` as a user runs them.

mod common;

use common::{baton, text};

use std::path::Path;
use std::process::Output;

use baton::scenario::Document;
use baton::sweep::{self, Grid};

fn ok(out: &Output) {
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
}

const DEMO: &str = "scenarios/unbalanced-split.yaml";

/// Equal stages (forward 1 ms, backward 2 ms per piece), free links.
fn equal_stages(dir: &Path, p: u32, pieces: u32) -> String {
    let path = dir.join("equal.yaml");
    let f = 1_000_000 * p as u64 / pieces as u64;
    std::fs::write(
        &path,
        format!(
            "model:\n  layers:\n    - {{ repeat: {pieces}, forward: {f}ns, backward: {}ns, activation: 0B }}\n\
             cluster: {{ devices: {p}, link: {{ latency: 0ns, bandwidth: 1GB/s }} }}\n\
             pipeline: {{ stages: {p}, micro_batches: 4, schedule: 1f1b }}\n",
            2 * f
        ),
    )
    .unwrap();
    path.display().to_string()
}

#[test]
fn bubble_follows_the_published_formulas_at_every_point() {
    // Huang et al., "GPipe", NeurIPS 2019, sec. 2.3: fill-drain with equal
    // stages and free links idles (p-1)/(m+p-1) of the total; Narayanan et al.,
    // SC 2021, sec. 2.2.1: 1F1B the same.
    let dir = tempfile::tempdir().unwrap();
    let p = 4u32;
    let scen = equal_stages(dir.path(), p, p);
    let out = baton(&[
        "sweep",
        &scen,
        "--vary",
        "pipeline.micro_batches=1..24",
        "--vary",
        "pipeline.schedule=fill-drain,1f1b",
        "--json",
        "-",
    ]);
    ok(&out);
    let rows: Vec<serde_json::Value> = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(rows.len(), 48);
    for r in &rows {
        let m = r["pipeline.micro_batches"].as_u64().unwrap() as f64;
        let want = (p as f64 - 1.0) / (m + p as f64 - 1.0);
        let got = r["bubble_fraction"].as_f64().unwrap();
        assert!((got - want).abs() < 1e-12, "{r}: {got} vs {want}");
    }
    // Narayanan et al., SC 2021, sec. 2.2.2: interleaved with v chunks and m a
    // multiple of p has bubble / ideal = (p-1)/(v m); with idle / total = f,
    // bubble / ideal = f / (1 - f).
    let scen = equal_stages(dir.path(), p, p * 4);
    let out = baton(&[
        "sweep",
        &scen,
        "--vary",
        "pipeline.micro_batches=4..64*2",
        "--vary",
        "pipeline.chunks=1,2,4",
        "--set",
        "pipeline.schedule=interleaved",
        "--json",
        "-",
    ]);
    ok(&out);
    let rows: Vec<serde_json::Value> = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(rows.len(), 15);
    for r in &rows {
        let m = r["pipeline.micro_batches"].as_f64().unwrap();
        let v = r["pipeline.chunks"].as_f64().unwrap();
        let f = r["bubble_fraction"].as_f64().unwrap();
        let want = (p as f64 - 1.0) / (v * m);
        assert!((f / (1.0 - f) - want).abs() < 1e-9, "{r}: {} vs {want}", f / (1.0 - f));
    }
}

#[test]
fn sweep_points_equal_single_runs() {
    let doc =
        Document::load(Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/scenarios/unbalanced-split.yaml"))).unwrap();
    let grid = Grid::new(vec![
        sweep::parse_vary("pipeline.micro_batches=2,8").unwrap(),
        sweep::parse_vary("pipeline.split=[3,3,3,3];[4,3,3,2]").unwrap(),
        sweep::parse_vary("cluster.jitter=0,0.1").unwrap(),
    ])
    .unwrap();
    let base = vec!["seed=5".to_string()];
    let points =
        sweep::run(&doc, &base, &grid, &(0..grid.len()).collect::<Vec<_>>(), baton::DEFAULT_MAX_MEMORY_BYTES, &|| {});
    assert_eq!(points.len(), 8);
    for p in &points {
        let sets = sweep::overrides(&base, &grid, p.index);
        let single = baton::simulate(&baton::scenario::load_with(Path::new(DEMO), &sets).unwrap()).unwrap().report;
        let s = p.result.as_ref().unwrap();
        assert_eq!(s.step_time_ms, single.step_time_ms);
        assert_eq!(s.bubble_fraction, single.bubble_fraction);
        assert_eq!(s.samples_per_s, single.samples_per_s);
        assert_eq!(s.peak_memory_bytes, single.devices.iter().map(|d| d.peak_memory_bytes).max().unwrap());
        assert_eq!(s.fits, single.fits);
    }
    // And through the command line: a sweep row equals `baton run --json` of the same point.
    let out = baton(&["sweep", DEMO, "--vary", "pipeline.micro_batches=2,8", "--json", "-"]);
    ok(&out);
    let rows: Vec<serde_json::Value> = serde_json::from_slice(&out.stdout).unwrap();
    for r in rows {
        let m = r["pipeline.micro_batches"].to_string();
        let run = baton(&["run", DEMO, "--json", "-", "--set", &format!("pipeline.micro_batches={m}")]);
        let single: serde_json::Value = serde_json::from_slice(&run.stdout).unwrap();
        for f in ["step_time_ms", "bubble_fraction", "samples_per_s"] {
            assert_eq!(r[f], single[f], "{f} at m={m}");
        }
    }
}

#[test]
fn invalid_points_are_skipped_with_their_reason() {
    let out = baton(&[
        "sweep",
        DEMO,
        "--vary",
        "pipeline.schedule=1f1b,interleaved",
        "--vary",
        "pipeline.chunks=1,2",
        "--set",
        "pipeline.split=even",
        "--set",
        "pipeline.micro_batches=6",
        "--json",
        "-",
    ]);
    ok(&out);
    let rows: Vec<serde_json::Value> = serde_json::from_slice(&out.stdout).unwrap();
    let skipped: Vec<&serde_json::Value> = rows.iter().filter(|r| !r["skipped"].is_null()).collect();
    // 1f1b with 2 chunks is refused; interleaved with m = 6 not a multiple of 4 is refused.
    assert_eq!(skipped.len(), 3, "{rows:?}");
    assert!(skipped.iter().any(|r| r["skipped"].as_str().unwrap().contains("multiple of")));
    assert!(text(&out.stderr).contains("skipped:"));
}

#[test]
fn jobs_do_not_change_the_output() {
    let dir = tempfile::tempdir().unwrap();
    let mut outputs = Vec::new();
    for jobs in ["1", "2"] {
        let csv = dir.path().join(format!("s{jobs}.csv"));
        let json = dir.path().join(format!("s{jobs}.json"));
        let out = baton(&[
            "sweep",
            DEMO,
            "--vary",
            "pipeline.micro_batches=1..12",
            "--vary",
            "seed=1..5",
            "--set",
            "cluster.jitter=0.2",
            "--jobs",
            jobs,
            "--csv",
            csv.to_str().unwrap(),
            "--json",
            json.to_str().unwrap(),
        ]);
        ok(&out);
        outputs.push((std::fs::read(&csv).unwrap(), std::fs::read(&json).unwrap()));
    }
    assert!(outputs[0] == outputs[1], "--jobs 1 and --jobs 2 differ");
}

#[test]
fn shards_merge_into_the_unsharded_result() {
    let dir = tempfile::tempdir().unwrap();
    let vary = [
        "--vary",
        "pipeline.micro_batches=2..16*2",
        "--vary",
        "pipeline.schedule=fill-drain,1f1b,interleaved",
        "--vary",
        "pipeline.chunks=1,2",
    ];
    let whole = dir.path().join("whole.csv");
    let mut args = vec!["sweep", DEMO, "--csv", whole.to_str().unwrap(), "--rank-by", "throughput"];
    args.extend_from_slice(&vary);
    ok(&baton(&args));
    let mut parts = Vec::new();
    for i in 1..=3 {
        let part = dir.path().join(format!("part{i}.csv"));
        let shard = format!("{i}/3");
        let mut args =
            vec!["sweep", DEMO, "--shard", &shard, "--csv", part.to_str().unwrap(), "--rank-by", "throughput"];
        args.extend_from_slice(&vary);
        ok(&baton(&args));
        parts.push(part.display().to_string());
    }
    let merged = dir.path().join("merged.csv");
    let mut args = vec!["merge"];
    args.extend(parts.iter().map(String::as_str));
    args.extend_from_slice(&["--csv", merged.to_str().unwrap(), "--rank-by", "throughput"]);
    ok(&baton(&args));
    assert_eq!(std::fs::read(&merged).unwrap(), std::fs::read(&whole).unwrap(), "sharded + merged = unsharded");
    // A part given twice is refused.
    let out = baton(&["merge", &parts[0], &parts[0], "--csv", merged.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("appears in two parts"));
}

#[test]
fn bad_sweeps_are_refused() {
    let cases: &[(&[&str], &str)] = &[
        (&["--vary", "pipeline.micro_batches"], "KEY=V1,V2"),
        (&["--vary", "pipeline.micro_batches=8..4"], "empty"),
        (&["--vary", "pipeline.micro_batches=4,,8"], "empty"),
        (&["--vary", "pipeline.colour=red,blue"], "unknown key"),
        (&["--vary", "pipline.stages=1,2"], "unknown key"),
        (&["--vary", "pipeline.stages.x=1,2"], "has no key"),
        (&[], "at least one --vary"),
        (&["--vary", "pipeline.micro_batches=1,2", "--shard", "4/3"], "--shard"),
        (&["--vary", "pipeline.micro_batches=1,2", "--rank-by", "speed"], "--rank-by"),
        (&["--vary", "pipeline.micro_batches=1,2", "--vary", "pipeline.micro_batches=3"], "twice"),
        (&["--vary", "pipeline.micro_batches=1,2", "--jobs", "0"], "--jobs"),
    ];
    for (extra, needle) in cases {
        let mut args = vec!["sweep", DEMO];
        args.extend_from_slice(extra);
        let out = baton(&args);
        assert_eq!(out.status.code(), Some(2), "{extra:?}: {}", text(&out.stderr));
        assert!(text(&out.stderr).contains(needle), "{extra:?}: {}", text(&out.stderr));
    }
    // Every point invalid: refused as a whole.
    let out = baton(&["sweep", DEMO, "--vary", "pipeline.stages=5,6"]);
    assert_eq!(out.status.code(), Some(2));
}

#[test]
fn sweep_chart_and_best_command() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("s.svg");
    let out = baton(&[
        "sweep",
        DEMO,
        "--vary",
        "pipeline.micro_batches=4..32*2",
        "--vary",
        "pipeline.schedule=fill-drain,1f1b",
        "--rank-by",
        "throughput",
        "--svg",
        svg.to_str().unwrap(),
        "--json",
        "-",
    ]);
    ok(&out);
    let rows: Vec<serde_json::Value> = serde_json::from_slice(&out.stdout).unwrap();
    let stdout = text(&out.stderr);
    assert!(stdout.contains("<== best"));
    let cmd =
        stdout.lines().find(|l| l.trim_start().starts_with("baton run")).expect("best command").trim().to_string();
    // The printed command reproduces the best point's step time.
    let words: Vec<&str> = cmd.split_whitespace().skip(1).filter(|w| *w != "--svg" && *w != "best.svg").collect();
    let mut args = words.clone();
    args.extend_from_slice(&["--json", "-"]);
    let run = baton(&args);
    ok(&run);
    let single: serde_json::Value = serde_json::from_slice(&run.stdout).unwrap();
    assert_eq!(single["step_time_ms"], rows[0]["step_time_ms"]);
    assert_eq!(single["samples_per_s"], rows[0]["samples_per_s"]);
    let chart = std::fs::read_to_string(&svg).unwrap();
    assert!(
        chart.contains("throughput (samples/s)")
            && chart.contains("pipeline.micro_batches")
            && chart.contains("pipeline.schedule = 1f1b")
    );
}

#[test]
fn compare_shows_differences_and_stacks_charts() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("c.svg");
    let out = baton(&["compare", DEMO, "--set", "pipeline.split=[4, 3, 3, 2]", "--svg", svg.to_str().unwrap()]);
    ok(&out);
    let t = text(&out.stdout);
    // The two step times from the reference model in tests/common (written
    // from the README's rules; no transfer shares a link in either run), and
    // the difference and ratio from them.
    let ms = 1_000_000;
    let mib = 1 << 20;
    let mut layers = vec![(600_000, 1_200_000, 12 * mib)];
    layers.extend([(1_100_000, 2_200_000, 12 * mib); 10]);
    layers.push((2_400_000, 4_800_000, 12 * mib));
    let step_of = |split: &[usize]| {
        common::reference_step(&common::stages_of(&layers, split), 8, "1f1b", 4_000, 48_000_000_000).unwrap().step_ns
    };
    let (a, b) = (step_of(&[3, 3, 3, 3]), step_of(&[4, 3, 3, 2]));
    let (a_ms, b_ms) = (a as f64 / ms as f64, b as f64 / ms as f64);
    let expected = [
        format!("{a_ms:.3} ms"),
        format!("{b_ms:.3} ms"),
        format!("{:.3} ms", b_ms - a_ms),
        format!("x{:.3}", b as f64 / a as f64),
    ];
    assert_eq!(expected, ["140.197 ms", "122.294 ms", "-17.903 ms", "x0.872"], "the README's figures");
    let step = t.lines().find(|l| l.starts_with("step time")).unwrap();
    for e in &expected {
        assert!(step.contains(e.as_str()), "{step} lacks {e}");
    }
    let chart = std::fs::read_to_string(&svg).unwrap();
    assert!(chart.contains("A: device 3") && chart.contains("B: device 0"));
    assert!(chart.matches("<title>").count() >= 128, "both runs' bars have tooltips");
    let two = baton(&["compare", DEMO, "scenarios/interleaved.yaml", "--json", "-"]);
    ok(&two);
    let reports: Vec<serde_json::Value> = serde_json::from_slice(&two.stdout).unwrap();
    assert_eq!(reports.len(), 2);
    assert_eq!(baton(&["compare", DEMO]).status.code(), Some(2), "one scenario and no variant");
}

#[test]
fn data_parallel_sweeps_do_not_depend_on_the_thread_count() {
    // Replicas, algorithms and jitter varied: --jobs 1 and --jobs 2 give
    // byte-identical results.
    let dir = tempfile::tempdir().unwrap();
    let mut outputs = Vec::new();
    for jobs in ["1", "2"] {
        let json = dir.path().join(format!("r{jobs}.json"));
        let out = baton(&[
            "sweep",
            "scenarios/replicas.yaml",
            "--vary",
            "gradients.sync=ring,hierarchical,tree,direct",
            "--vary",
            "parallel.data=1,2,4",
            "--set",
            "cluster.jitter=0.1",
            "--jobs",
            jobs,
            "--json",
            json.to_str().unwrap(),
        ]);
        ok(&out);
        outputs.push(std::fs::read(&json).unwrap());
    }
    assert!(outputs[0] == outputs[1], "--jobs 1 and --jobs 2 differ");
}
