//! Variability (jitter, stragglers, rare slow ops) and `--trials`: hand-worked
//! stretches, the nearest-rank percentiles, and draws that agree with the
//! single run when nothing varies.

mod common;

use baton::scenario::{parse, Scenario};
use common::{baton as run_baton, text};

/// Four stages of one layer (forward 1 us, backward 2 us), free links,
/// 1F1B with 8 micro-batches, and `variability` under `cluster`.
fn four(variability: &str) -> Scenario {
    let text = format!(
        "model:\n  layers:\n    - {{ name: l, repeat: 4, forward: 1us, backward: 2us, activation: 0B }}\n\
         cluster:\n  devices: 4\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n{variability}\
         pipeline:\n  stages: 4\n  micro_batches: 8\n  schedule: 1f1b\n"
    );
    parse(&text, "v.yaml", "v", &[]).unwrap()
}

#[test]
fn a_straggler_stretches_a_balanced_pipeline_as_worked_by_hand() {
    // Balanced 1F1B, p = 4, m = 8, F = a = 1, B = b = 2 (us): (m + p - 1)
    // (a + b) = 33 (Narayanan et al., SC 2021, sec. 2.2). With the last
    // device f = 2 times slower it is the bottleneck and never waits once
    // its first forward arrives: the first micro-batch reaches it after
    // (p - 1) a, it runs m f (a + b), and the last gradient goes back through
    // p - 1 backwards: (p - 1)(a + b) + m f (a + b) = 9 + 48 = 57.
    assert_eq!(baton::simulate(&four("")).unwrap().report.step_time_ns, 33_000);
    let slow = four("  variability: { stragglers: [{ device: 3, slowdown: 2 }] }\n");
    let r = baton::simulate(&slow).unwrap().report;
    assert_eq!(r.step_time_ns, 57_000);
    assert_eq!(r.devices[3].busy_ns, 48_000);
    assert_eq!(r.variability, "stragglers device 3 x2");
}

#[test]
fn when_every_op_is_slow_the_step_doubles() {
    // slow_chance 1: every op takes slow_factor times as long; with free
    // links the whole step scales: 2 x 33 = 66 us.
    let r = baton::simulate(&four("  variability: { slow_chance: 1, slow_factor: 2 }\n")).unwrap().report;
    assert_eq!(r.step_time_ns, 66_000);
}

#[test]
fn without_variability_every_trial_is_the_single_run() {
    let s = four("");
    let base = baton::simulate(&s).unwrap().report.step_time_ns;
    let times = baton::trials::step_times(&s, 25).unwrap();
    assert!(times.iter().all(|&t| t == base), "{times:?}");
    // With jitter the draws differ, and draw k is the run with seed + k.
    let j = four("  variability: { jitter: 0.2 }\n");
    let times = baton::trials::step_times(&j, 6).unwrap();
    let mut seeded = j.clone();
    seeded.seed += 4;
    assert_eq!(times[4], baton::simulate(&seeded).unwrap().report.step_time_ns);
    assert!(times.windows(2).any(|w| w[0] != w[1]));
}

#[test]
fn percentiles_are_by_nearest_rank() {
    // The nearest-rank definition: the p-th percentile of n sorted values
    // is the value at rank ceil(p/100 x n). The textbook list 15, 20, 35,
    // 40, 50 (from memory): p50 -> rank 3 = 35, p90 -> rank 5 = 50, p99 ->
    // 50. And 1..10: p50 -> rank 5, p90 -> rank 9, p99 -> rank 10.
    let t = baton::report::Trials::of(&[40_000_000, 15_000_000, 50_000_000, 20_000_000, 35_000_000]).unwrap();
    assert_eq!((t.p50_ms, t.p90_ms, t.p99_ms, t.max_ms), (35.0, 50.0, 50.0, 50.0));
    assert_eq!(t.mean_ms, 32.0);
    let ten: Vec<u64> = (1..=10).map(|x| x * 1_000_000).collect();
    let t = baton::report::Trials::of(&ten).unwrap();
    assert_eq!((t.p50_ms, t.p90_ms, t.p99_ms, t.count), (5.0, 9.0, 10.0, 10));
}

#[test]
fn trials_on_the_command_line() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("t.svg");
    let out = run_baton(&[
        "run",
        "scenarios/unbalanced-split.yaml",
        "--set",
        "cluster.jitter=0.05",
        "--trials",
        "40",
        "--trials-svg",
        svg.to_str().unwrap(),
        "--json",
        "-",
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let t = &v["trials"];
    assert_eq!(t["count"], 40);
    let (p50, p90, p99, max) = (
        t["p50_ms"].as_f64().unwrap(),
        t["p90_ms"].as_f64().unwrap(),
        t["p99_ms"].as_f64().unwrap(),
        t["max_ms"].as_f64().unwrap(),
    );
    assert!(p50 <= p90 && p90 <= p99 && p99 <= max);
    assert!(std::fs::read_to_string(&svg).unwrap().starts_with("<svg"));
    // Refusals: no draws, a chart without draws, a straggler off the step,
    // jitter given twice.
    let refused = |args: &[&str], needle: &str| {
        let out = run_baton(args);
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(err.contains(needle), "stderr lacks `{needle}`:\n{err}");
    };
    refused(&["run", "scenarios/unbalanced-split.yaml", "--trials", "0"], "--trials takes 1 to");
    refused(&["run", "scenarios/unbalanced-split.yaml", "--trials-svg", "x.svg"], "add --trials");
    refused(
        &[
            "run",
            "scenarios/unbalanced-split.yaml",
            "--set",
            "cluster.variability={ stragglers: [{ device: 9, slowdown: 2 }] }",
        ],
        "device 9 is not in the step: it uses 4 devices",
    );
    refused(
        &[
            "run",
            "scenarios/unbalanced-split.yaml",
            "--set",
            "cluster.jitter=0.1",
            "--set",
            "cluster.variability={ jitter: 0.1 }",
        ],
        "give jitter once",
    );
}

#[test]
fn link_jitter_scales_each_transfer_within_its_range() {
    // Two stages, one micro-batch, forward 100 ns, backward 200 ns, 1000 B
    // over a 1 GB/s link with 500 ns latency: each transfer alone takes
    // 500 + 1000 = 1500 ns. With link_jitter 0.4 each takes 1500 x f,
    // f in [0.6, 1.4] (latency and bytes scaled alike, rounded to whole
    // ns), and the step is 100 + t1 + 100 + 200 + t2 + 200.
    let yaml = |v: &str| {
        format!(
            "model:\n  layers:\n    - {{ name: l, repeat: 2, forward: 100ns, backward: 200ns, activation: 1000B }}\n\
             cluster:\n  devices: 2\n  link: {{ latency: 500ns, bandwidth: 1GB/s }}\n{v}\
             pipeline:\n  stages: 2\n  micro_batches: 1\n  schedule: 1f1b\n"
        )
    };
    let plain = baton::simulate(&parse(&yaml(""), "l.yaml", "l", &[]).unwrap()).unwrap();
    assert_eq!(plain.report.step_time_ns, 100 + 1500 + 300 + 1500 + 200);
    let mut seen = Vec::new();
    for seed in 1..20u64 {
        let mut s = parse(&yaml("  variability: { link_jitter: 0.4 }\n"), "l.yaml", "l", &[]).unwrap();
        s.seed = seed;
        let run = baton::simulate(&s).unwrap();
        let t: Vec<u64> = run.trace.transfers.iter().map(|r| r.end.as_ns() - r.start.as_ns()).collect();
        assert_eq!(t.len(), 2);
        for &x in &t {
            assert!((900..=2100).contains(&x), "seed {seed}: {x}");
        }
        assert_eq!(run.report.step_time_ns, 100 + t[0] + 300 + t[1] + 200);
        // Compute is untouched.
        for r in run.trace.ops.iter().flatten() {
            assert_eq!(
                r.end.as_ns() - r.start.as_ns(),
                if r.op.kind == baton::schedule::OpKind::Forward { 100 } else { 200 }
            );
        }
        seen.extend(t);
    }
    seen.sort_unstable();
    seen.dedup();
    assert!(seen.len() > 20, "the draws vary: {seen:?}");
}

#[test]
fn link_jitter_leaves_the_compute_draws_as_they_were() {
    // Link factors come from their own stream of the seeded generator, so
    // adding link jitter does not move a single op's jittered time.
    let j = four("  variability: { jitter: 0.2 }\n");
    let both = four("  variability: { jitter: 0.2, link_jitter: 0.3 }\n");
    let a = baton::simulate(&j).unwrap().trace;
    let b = baton::simulate(&both).unwrap().trace;
    for (x, y) in a.ops.iter().flatten().zip(b.ops.iter().flatten()) {
        assert_eq!((x.op, x.end.as_ns() - x.start.as_ns()), (y.op, y.end.as_ns() - y.start.as_ns()));
    }
    assert_eq!(baton::simulate(&both).unwrap().report.variability, "link jitter +-30%");
}
