//! Consecutive steps (`pipeline.steps`, `pipeline.flush`,
//! `pipeline.weight_versions`): flushed steps against single steps and
//! their updates, steps without a flush against the 1F1B and zero-bubble
//! counts, and PipeDream's and PipeDream-2BW's weight versions.

mod common;

use baton::scenario::{parse, Scenario};
use common::{baton as run_baton, json, text};

/// `p` stages of one layer each (forward 1 us, backward 2 us, or with
/// `weight` a split backward of 1 us B and 1 us W), free links, and the
/// pipeline keys in `extra`.
fn pipeline(p: u32, m: u32, schedule: &str, extra: &str) -> Scenario {
    let layer = if schedule.starts_with("zb") {
        "{ name: l, repeat: REPEAT, forward: 1us, backward: 2us, weight: 1us, activation: 0B, params: 1M }"
    } else {
        "{ name: l, repeat: REPEAT, forward: 1us, backward: 2us, activation: 0B, params: 1M }"
    }
    .replace("REPEAT", &p.to_string());
    let text = format!(
        "model:\n  layers:\n    - {layer}\ncluster:\n  devices: {p}\n  link: {{ latency: 0ns, bandwidth: 1GB/s }}\n\
         pipeline:\n  stages: {p}\n  micro_batches: {m}\n  schedule: {schedule}\n{extra}"
    );
    parse(&text, "s.yaml", "s", &[]).unwrap()
}

/// Device `d`'s updates: (step, start ns, end ns).
fn updates_on(trace: &baton::executor::Trace, d: usize) -> Vec<(u32, u64, u64)> {
    trace.ops[d]
        .iter()
        .filter(|r| r.op.kind == baton::schedule::OpKind::Update)
        .map(|r| (r.op.micro_batch, r.start.as_ns(), r.end.as_ns()))
        .collect()
}

fn steps_of(s: &Scenario) -> baton::report::Steps {
    baton::simulate(s).unwrap().report.steps.expect("a steps section")
}

#[test]
fn flushed_steps_are_single_steps_plus_their_updates() {
    // Balanced 1F1B, p = 4, m = 8, F = 1, B = 2 (us): one step is
    // (m + p - 1)(F + B) = 33 us (Narayanan et al., "Efficient Large-Scale
    // Language Model Training on GPU Clusters Using Megatron-LM", SC 2021,
    // sec. 2.2). Device 0 ends last; its 5 us update follows: 38 us. With a
    // barrier, 3 steps take 3 x 38 = 114 us.
    let mut s = pipeline(4, 8, "1f1b", "  steps: 3\n");
    s.training.update_ns = 5_000;
    let run = baton::simulate(&s).unwrap();
    let st = run.report.steps.clone().unwrap();
    assert_eq!(st.step_ns, vec![38_000; 3]);
    assert_eq!(run.report.step_time_ns, 114_000);
    assert_eq!((st.mean_ms, st.steady_ms, st.total_ms), (0.038, 0.038, 0.114));
    assert!(st.flush);
    // No op of step k + 1 starts before step k's last update ends.
    for recs in &run.trace.ops {
        for r in recs.iter().filter(|r| !r.op.kind.is_device_work()) {
            let k = r.op.micro_batch / 8;
            assert!(r.start.as_ns() >= 38_000 * k as u64, "{r:?}");
        }
    }
    // And one flushed step of the same scenario is the 38 us.
    let mut one = s.clone();
    one.pipeline.steps = 1;
    assert_eq!(baton::simulate(&one).unwrap().report.step_time_ns, 38_000);
    // Each step's update is numbered by its step.
    assert_eq!(updates_on(&run.trace, 0), vec![(0, 33_000, 38_000), (1, 71_000, 76_000), (2, 109_000, 114_000)]);
    assert_eq!(run.report.micro_batches, 8);
    assert_eq!(run.report.ops, 3 * (2 * 8 * 4 + 4));
}

#[test]
fn flushed_steps_draw_their_own_variability() {
    // Step 0 draws as a single step with the same seed; every later step
    // from streams of its own, so the steps differ, and differ from the
    // --trials draws (seed + k), which a repeated seed would make equal.
    let mut s = pipeline(4, 8, "1f1b", "  steps: 4\n");
    s.cluster.jitter = 0.2;
    let st = steps_of(&s);
    let mut one = s.clone();
    one.pipeline.steps = 1;
    assert_eq!(st.step_ns[0], baton::simulate(&one).unwrap().report.step_time_ns);
    let trials = baton::trials::step_times(&one, 4).unwrap();
    assert_eq!(trials[0], st.step_ns[0]);
    for (k, (step, trial)) in st.step_ns.iter().zip(&trials).enumerate().skip(1) {
        assert_ne!(step, trial, "step {k}");
    }
    assert!(st.step_ns.windows(2).any(|w| w[0] != w[1]), "{:?}", st.step_ns);
    // The same seed gives the same steps.
    assert_eq!(steps_of(&s).step_ns, st.step_ns);
}

#[test]
fn without_a_flush_one_f_one_b_runs_on_as_one_long_pipeline() {
    // With weight stashing the next step's forwards fill the drain: N steps
    // are 1F1B over N m micro-batches, (N m + p - 1)(F + B) (SC 2021,
    // sec. 2.2, with N m micro-batches): (3 x 8 + 3) x 3 = 81 us, of which
    // the first step takes (m + p - 1)(F + B) = 33 and every later one
    // m (F + B) = 24: no bubble in the steady state (Narayanan et al.,
    // "PipeDream", SOSP 2019, sec. 3.2).
    for mode in ["stash", "double"] {
        let s = pipeline(4, 8, "1f1b", &format!("  steps: 3\n  flush: false\n  weight_versions: {mode}\n"));
        let run = baton::simulate(&s).unwrap();
        let st = run.report.steps.clone().unwrap();
        assert_eq!(run.report.step_time_ns, 81_000, "{mode}");
        assert_eq!(st.step_ns, vec![33_000, 24_000, 24_000], "{mode}");
        assert_eq!(st.steady_ms, 0.024);
    }
    // With one weight version each device waits for its own update, and
    // 1F1B's own drain stays: three times 33.
    let s = pipeline(4, 8, "1f1b", "  steps: 3\n  flush: false\n  weight_versions: one\n");
    assert_eq!(steps_of(&s).step_ns, vec![33_000; 3]);
    // A 5 us update after each device's last op of a step: device 0 ends
    // last at 33, updates until 38 and only then starts the next step; every
    // other device has updated by then, so each step takes 38.
    let mut s = s;
    s.training.update_ns = 5_000;
    let run = baton::simulate(&s).unwrap();
    assert_eq!(run.report.steps.unwrap().step_ns, vec![38_000; 3]);
    assert_eq!(updates_on(&run.trace, 0), vec![(0, 33_000, 38_000), (1, 71_000, 76_000), (2, 109_000, 114_000)]);
}

#[test]
fn zb_h2_without_a_flush_reaches_its_steady_state() {
    // ZB-H2 at p = 4 with F = B = W = 1 and m = 12: one step takes
    // 3m + 3 = 39; without a global barrier, each device going on after its
    // own update, the next step takes 3m = 36: no bubble in the steady state
    // (Qi et al., "Zero Bubble Pipeline Parallelism", ICLR 2024, sec. 3.2).
    let s = pipeline(4, 12, "zb-h2", "  steps: 2\n  flush: false\n");
    assert_eq!(steps_of(&s).step_ns, vec![39_000, 36_000]);
    // With the flush both steps take 39.
    let s = pipeline(4, 12, "zb-h2", "  steps: 2\n");
    assert_eq!(steps_of(&s).step_ns, vec![39_000, 39_000]);
}

#[test]
fn pipedream_keeps_a_version_per_micro_batch_in_flight() {
    // PipeDream (SOSP 2019, sec. 3.3): an update per micro-batch (m = 1),
    // 1F1B; stage s of p holds p - s micro-batches in flight, stashes that
    // many weight versions, and its gradient is computed with weights
    // p - 1 - s updates old. Each extra version is params x
    // version_bytes_per_param = 1M x 2 bytes on top of the model state.
    let s = pipeline(4, 1, "1f1b", "  steps: 8\n  flush: false\n  weight_versions: stash\n");
    let run = baton::simulate(&s).unwrap();
    let st = run.report.steps.clone().unwrap();
    let versions: Vec<u32> = st.stages.iter().map(|g| g.weight_versions).collect();
    let stale: Vec<u32> = st.stages.iter().map(|g| g.staleness_steps).collect();
    let extra: Vec<u64> = st.stages.iter().map(|g| g.extra_bytes).collect();
    assert_eq!(versions, vec![4, 3, 2, 1]);
    assert_eq!(stale, vec![3, 2, 1, 0]);
    // One micro-batch per step: every one in flight reads a version of its own.
    assert!(st.stages.iter().all(|g| g.distinct_versions == g.weight_versions));
    assert_eq!(extra, vec![3 * 2_000_000, 2 * 2_000_000, 2_000_000, 0]);
    // The memory model adds them: state 16 bytes x 1M plus the extra.
    let flushed = baton::simulate(&pipeline(4, 1, "1f1b", "  steps: 8\n")).unwrap().report;
    for (d, e) in extra.iter().enumerate() {
        assert_eq!(run.report.devices[d].state_bytes, 16_000_000 + e);
        assert_eq!(flushed.devices[d].state_bytes, 16_000_000);
    }
}

#[test]
fn pipedream_2bw_keeps_two_versions_one_step_stale() {
    // PipeDream-2BW (Narayanan et al., "Memory-Efficient Pipeline-Parallel
    // DNN Training", ICML 2021, sec. 3.1): W(t+1) = W(t) - lr grad f(W(t-1)),
    // a delay of one step on every stage, two versions, with m >= p.
    let s = pipeline(4, 4, "1f1b", "  steps: 5\n  flush: false\n  weight_versions: double\n");
    let st = steps_of(&s);
    assert!(st.stages.iter().all(|g| g.staleness_steps == 1 && g.weight_versions == 2 && g.extra_bytes == 2_000_000));
    // Fewer micro-batches than stages: the first device would start step
    // k + 2 before its update of step k.
    let short = pipeline(4, 2, "1f1b", "  steps: 5\n  flush: false\n  weight_versions: double\n");
    let e = baton::simulate(&short).unwrap_err().to_string();
    assert!(e.contains("double weight versions: device 0 starts step 2 before its update of step 0"), "{e}");
    // Stash on the same pipeline: the first stage's later micro-batches
    // read the newest weights, its first p - 1 of a step the previous ones.
    let s = pipeline(4, 4, "1f1b", "  steps: 5\n  flush: false\n  weight_versions: stash\n");
    let st = steps_of(&s);
    let stale: Vec<u32> = st.stages.iter().map(|g| g.staleness_steps).collect();
    assert_eq!(stale, vec![1, 1, 1, 0]);
    // PipeDream's copy per micro-batch in flight (p - s) is priced, though
    // the micro-batches of a step share a version: at most the previous
    // step's and the newest are read at once (the last stage: the newest).
    let versions: Vec<(u32, u32)> = st.stages.iter().map(|g| (g.weight_versions, g.distinct_versions)).collect();
    assert_eq!(versions, vec![(4, 2), (3, 2), (2, 2), (1, 1)]);
}

#[test]
fn steps_on_the_command_line() {
    let dir = tempfile::tempdir().unwrap();
    let out_json = dir.path().join("r.json");
    let out = run_baton(&[
        "run",
        "scenarios/zero-bubble.yaml",
        "--steps",
        "3",
        "--set",
        "pipeline.flush=false",
        "--set",
        "pipeline.weight_versions=stash",
        "--json",
        out_json.to_str().unwrap(),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    assert!(stdout.contains("steps            no flush, weight versions stash: "), "{stdout}");
    assert!(stdout.contains("staleness (steps)"), "{stdout}");
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(&out_json).unwrap()).unwrap();
    let st = &v["steps"];
    assert_eq!(st["count"], 3);
    assert_eq!(st["flush"], false);
    assert_eq!(st["weight_versions"], "stash");
    assert_eq!(st["step_ms"].as_array().unwrap().len(), 3);
    assert_eq!(st["stages"].as_array().unwrap().len(), 4);
    let total: f64 = st["step_ms"].as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).sum();
    assert!((total - v["step_time_ms"].as_f64().unwrap()).abs() < 1e-9);
    // One flushed step has no steps section.
    let out = run_baton(&["run", "scenarios/zero-bubble.yaml", "--json", "-"]);
    assert!(json(&out).get("steps").is_none());
}

#[test]
fn refusals_name_the_key() {
    let cases: [(&[&str], &str); 5] = [
        (&["--set", "pipeline.weight_versions=stash"], "pipeline.weight_versions (from --set pipeline.weight_versions=stash): stash keeps weight versions for steps that run on without a flush; set pipeline.flush: false"),
        (&["--set", "pipeline.flush=false", "--set", "pipeline.weight_versions=double", "--set", "pipeline.schedule=fill-drain"], "fill-drain would run every step's forwards first"),
        (&["--steps", "0"], "pipeline.steps (from --set pipeline.steps=0): must be at least 1, found 0"),
        (&["--steps", "1048577"], "must be at most 1048576"),
        (&["--steps", "1000000", "--set", "pipeline.micro_batches=4096"], "steps of 4096 micro-batches: the plan is too large"),
    ];
    for (args, want) in cases {
        let mut all = vec!["run", "scenarios/zero-bubble.yaml"];
        all.extend_from_slice(args);
        let out = run_baton(&all);
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        let err = text(&out.stderr);
        assert!(err.contains(want), "{args:?}: {err}");
    }
    let out = run_baton(&["run", "scenarios/replicas.yaml", "--set", "pipeline.flush=false"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(text(&out.stderr).contains("parallel.data: 4 replicas synchronise their gradients every step"));
}

mod random {
    use super::*;
    use proptest::prelude::*;

    /// (p, m, schedule, steps, layers (F us, B us, kB), jitter tenths,
    /// flush, weight-version mode, update in 7 us units)
    type Case = (u32, u32, usize, u32, Vec<(u32, u32, u32)>, u32, bool, usize, u32);

    fn case() -> impl Strategy<Value = Case> {
        (1u32..5, 1u32..4, 0usize..5, 1u32..4, 0u32..3, 0u32..3, any::<bool>(), 0usize..3).prop_flat_map(
            |(p, mult, k, steps, jitter, update, flush, mode)| {
                prop::collection::vec((1u32..200, 0u32..400, 0u32..4_000), p as usize..p as usize + 4)
                    .prop_map(move |layers| (p, p * mult, k, steps, layers, jitter, flush, mode, update))
            },
        )
    }

    fn scenario(c: &Case) -> Scenario {
        let (p, m, k, steps, layers, jitter, flush, mode, update) = c;
        let schedule = ["fill-drain", "1f1b", "interleaved", "zb-h1", "zb-h2"][*k];
        let mode = if *flush || schedule == "fill-drain" { "one" } else { ["one", "stash", "double"][*mode] };
        let mut text = String::from("model:\n  layers:\n");
        for (f, b, a) in layers {
            let w = if schedule.starts_with("zb") { format!(", weight: {}us", b / 2) } else { String::new() };
            text += &format!("    - {{ forward: {f}us, backward: {b}us{w}, activation: {a}kB, params: 1M }}\n");
        }
        text += &format!(
            "cluster: {{ devices: {p}, link: {{ latency: 3us, bandwidth: 10GB/s }}, jitter: {} }}\n\
             pipeline: {{ stages: {p}, micro_batches: {m}, schedule: {schedule}, steps: {steps}, flush: {flush}, weight_versions: {mode} }}\n\
             training: {{ update: {}us }}\n",
            *jitter as f64 / 10.0,
            update * 7
        );
        parse(&text, "r.yaml", "r", &[]).unwrap()
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

        /// Flushed steps are single steps one after another (each its own
        /// draw, the first the single run's);
        /// without a flush every op of a step runs after its device's
        /// previous ops; either way each step's time adds up to the run and
        /// the critical path runs through the joined graph to its end.
        #[test]
        fn steps_add_up(c in case()) {
            let s = scenario(&c);
            let run = match baton::simulate(&s) {
                Ok(r) => r,
                // double with too few micro-batches per step is refused.
                Err(e) => { prop_assert!(e.to_string().contains("double weight versions"), "{}", e); return Ok(()); }
            };
            let run = run.with_critical_path();
            let Some(st) = run.report.steps.clone() else {
                // One flushed step is a plain run.
                prop_assert!(s.pipeline.steps == 1 && s.pipeline.flush);
                return Ok(());
            };
            prop_assert_eq!(st.step_ns.iter().sum::<u64>(), run.report.step_time_ns);
            let path: u64 = run.report.critical_path.iter().map(|e| ((e.end_ms - e.start_ms) * 1e6).round() as u64).sum();
            prop_assert!(path.abs_diff(run.report.step_time_ns) <= run.report.critical_path.len() as u64, "{} vs {}", path, run.report.step_time_ns);
            let m = s.pipeline.micro_batches;
            if s.pipeline.flush {
                let mut one = s.clone();
                one.pipeline.steps = 1;
                let single = baton::simulate(&one).unwrap().report.step_time_ns;
                let mut start = 0u64;
                for k in 0..s.pipeline.steps {
                    // Step 0 is the single step; without jitter every step is.
                    if k == 0 || s.cluster.jitter == 0.0 {
                        prop_assert_eq!(st.step_ns[k as usize], single);
                    }
                    for r in run.trace.ops.iter().flatten().filter(|r| !r.op.kind.is_device_work() && r.op.micro_batch / m == k) {
                        prop_assert!(r.start.as_ns() >= start);
                    }
                    start += st.step_ns[k as usize];
                }
            }
            for recs in &run.trace.ops {
                for w in recs.windows(2) {
                    prop_assert!(w[1].start >= w[0].end);
                }
            }
            // The joined trace's look-ups find each op's record and each
            // producer's transfer.
            for recs in &run.trace.ops {
                for r in recs.iter().filter(|r| !r.op.kind.is_device_work()) {
                    prop_assert_eq!(run.trace.record(r.op).1, r);
                }
            }
            for t in &run.trace.transfers {
                prop_assert_eq!(run.trace.outgoing(t.producer()), Some(t));
            }
        }
    }
}

#[test]
fn order_prints_one_step_and_says_how_steps_run_it() {
    let out = run_baton(&[
        "order",
        "scenarios/zero-bubble.yaml",
        "--set",
        "pipeline.steps=3",
        "--set",
        "pipeline.flush=false",
        "--set",
        "pipeline.weight_versions=double",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let t = text(&out.stdout);
    assert!(
        t.contains("with double weight versions the devices run the schedule for all 3 x 12 = 36 micro-batches"),
        "{t}"
    );
    assert!(t.lines().any(|l| l.starts_with("0: F0 ") && l.ends_with(" B11")), "{t}");
}
