//! The `baton` command as a user runs it: outputs, exit statuses, refusals.

mod common;

use common::{baton, text};

use std::path::{Path, PathBuf};

use quick_xml::events::Event;
use quick_xml::Reader;

fn tmp() -> tempfile::TempDir {
    tempfile::tempdir().unwrap()
}

fn files_in(dir: &Path) -> Vec<PathBuf> {
    std::fs::read_dir(dir).unwrap().map(|e| e.unwrap().path()).collect()
}

const DEMO: &str = "scenarios/unbalanced-split.yaml";

#[test]
fn run_writes_all_outputs() {
    let dir = tmp();
    let (svg, json, csv) = (dir.path().join("t.svg"), dir.path().join("r.json"), dir.path().join("t.csv"));
    let out = baton(&[
        "run",
        DEMO,
        "--svg",
        svg.to_str().unwrap(),
        "--json",
        json.to_str().unwrap(),
        "--trace",
        csv.to_str().unwrap(),
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    for needle in ["step time", "bubble fraction", "peak activations", "longest idle gaps", "seed 1"] {
        assert!(stdout.contains(needle), "summary lacks {needle}: {stdout}");
    }

    // The demo's step and busy times from the reference model in
    // tests/common (the README's rules; no transfer shares a link here):
    // embed F 0.6 B 1.2 ms, ten blocks F 1.1 B 2.2 ms, head F 2.4 B 4.8 ms, all
    // sending 12 MiB, split [3, 3, 3, 3], 1F1B, m = 8, 4 us and 48 GB/s.
    let mib = 1 << 20;
    let mut layers = vec![(600_000, 1_200_000, 12 * mib)];
    layers.extend([(1_100_000, 2_200_000, 12 * mib); 10]);
    layers.push((2_400_000, 4_800_000, 12 * mib));
    let want = common::reference_step(&common::stages_of(&layers, &[3, 3, 3, 3]), 8, "1f1b", 4_000, 48_000_000_000)
        .expect("no transfer shares a link");
    // Busy per device = 8 x (F + B) of its three layers: 8 x (2.8 + 5.6) ms on
    // device 0, 8 x 9.9 on devices 1 and 2, 8 x 13.8 on device 3.
    assert_eq!(want.busy_ns, vec![67_200_000, 79_200_000, 79_200_000, 110_400_000]);
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(&json).unwrap()).unwrap();
    assert_eq!(v["step_time_ns"].as_u64(), Some(want.step_ns));
    assert_eq!(v["step_time_ms"].as_f64(), Some(want.step_ns as f64 / 1e6));
    let idle: Vec<u64> = want.busy_ns.iter().map(|b| want.step_ns - b).collect();
    let bubble = idle.iter().sum::<u64>() as f64 / (4 * want.step_ns) as f64;
    assert!((v["bubble_fraction"].as_f64().unwrap() - bubble).abs() < 1e-12);
    assert_eq!(v["seed"], 1);
    let devices = v["devices"].as_array().unwrap();
    assert_eq!(devices.len(), 4);
    for (d, dev) in devices.iter().enumerate() {
        assert_eq!(dev["device"], d);
        assert_eq!(dev["busy_ms"].as_f64(), Some(want.busy_ns[d] as f64 / 1e6));
        assert_eq!(dev["idle_ms"].as_f64(), Some(idle[d] as f64 / 1e6));
        assert!((dev["bubble_fraction"].as_f64().unwrap() - idle[d] as f64 / want.step_ns as f64).abs() < 1e-12);
        // 1F1B holds min(p - d, m) micro-batches on device d (Narayanan et
        // al., SC 2021, sec. 2.2.1).
        assert_eq!(dev["peak_activations"], 4 - d);
    }
    // The gaps cover each device's idle time exactly, and each is a real interval.
    let gaps = v["gaps"].as_array().unwrap();
    for (d, idle_ns) in idle.iter().enumerate() {
        let sum: f64 = gaps
            .iter()
            .filter(|g| g["device"] == d)
            .map(|g| g["end_ms"].as_f64().unwrap() - g["start_ms"].as_f64().unwrap())
            .sum();
        assert!((sum - *idle_ns as f64 / 1e6).abs() < 1e-9, "device {d}: gaps {sum} ms, idle {idle_ns} ns");
    }
    for g in gaps {
        assert!(["fill", "drain", "activation", "gradient", "link"].contains(&g["cause"].as_str().unwrap()), "{g}");
    }

    let trace = std::fs::read_to_string(&csv).unwrap();
    let mut lines = trace.lines();
    assert_eq!(lines.next(), Some("device,kind,micro_batch,stage,start_ns,end_ns,slack_ns"));
    let rows: Vec<&str> = lines.collect();
    // 4 devices x 8 micro-batches x 2 ops, and 3 boundaries x 8 x 2 sends.
    assert_eq!(rows.len(), 64 + 48);
    assert_eq!(rows.iter().filter(|r| r.contains(",send,")).count(), 48);

    let svg_text = std::fs::read_to_string(&svg).unwrap();
    // A tooltip on every op (64), on each transfer's send and receive mark
    // (2 x 48) and on every idle gap.
    let titles = check_xml(&svg_text);
    assert_eq!(titles, 64 + 2 * 48 + gaps.len(), "every bar, mark and gap has a tooltip");
    assert!(svg_text.contains("Harbor-7") && svg_text.contains("time (ms)") && svg_text.contains("device 3"));
    assert!(svg_text.contains("step time") && svg_text.contains("bubble"));
    assert!(files_in(dir.path()).len() == 3, "no temporary files left behind");
}

/// Parses the whole document as XML; returns the number of `<title>` elements.
fn check_xml(svg: &str) -> usize {
    let mut reader = Reader::from_str(svg);
    let mut titles = 0;
    loop {
        match reader.read_event() {
            Ok(Event::Eof) => break,
            Ok(Event::Start(e)) if e.name().as_ref() == b"title" => titles += 1,
            Ok(_) => {}
            Err(e) => panic!("invalid XML at {}: {e}", reader.buffer_position()),
        }
    }
    titles
}

#[test]
fn json_to_stdout_and_overrides() {
    let out = baton(&[
        "run",
        DEMO,
        "--json",
        "-",
        "--set",
        "pipeline.micro_batches=16",
        "--set",
        "pipeline.schedule=fill-drain",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("stdout is exactly the JSON report");
    assert_eq!(v["micro_batches"], 16);
    assert_eq!(v["schedule"], "fill-drain");
    assert_eq!(v["devices"][0]["peak_activations"], 16);
    assert!(text(&out.stderr).contains("step time"), "summary goes to stderr");
}

#[test]
fn invalid_scenarios_exit_2_and_write_nothing() {
    let dir = tmp();
    let svg = dir.path().join("t.svg");
    let json = dir.path().join("r.json");
    let cases: &[(&[&str], &str)] = &[
        (&["--set", "pipeline.split=[3, 3, 3, 2]"], "pipeline.split"),
        (&["--set", "pipeline.stages=5"], "pipeline.stages"),
        (&["--set", "cluster.link.latency=5"], "cluster.link.latency"),
        (&["--set", "pipeline.colour=red"], "pipeline.colour"),
        (&["--set", "pipeline.micro_batches=-1"], "pipeline.micro_batches"),
        (&["--set", "nonsense"], "KEY=VALUE"),
    ];
    for (extra, key) in cases {
        let mut args = vec!["run", DEMO, "--svg", svg.to_str().unwrap(), "--json", json.to_str().unwrap()];
        args.extend_from_slice(extra);
        let out = baton(&args);
        assert_eq!(out.status.code(), Some(2), "{extra:?}");
        assert!(text(&out.stderr).contains(key), "{extra:?}: {}", text(&out.stderr));
        assert!(files_in(dir.path()).is_empty(), "{extra:?} left a file");
    }
}

#[test]
fn syntax_errors_give_line_and_column() {
    let dir = tmp();
    let bad = dir.path().join("bad.yaml");
    std::fs::write(&bad, "title: x\nmodel:\n  layers: [ {forward: 1ms\ncluster: {}\n").unwrap();
    let out = baton(&["run", bad.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("bad.yaml:") && err.contains("YAML syntax error"), "{err}");
    let missing = baton(&["run", "no/such/file.yaml"]);
    assert_eq!(missing.status.code(), Some(2));
    assert!(text(&missing.stderr).contains("cannot read no/such/file.yaml"));
}

#[test]
fn unwritable_output_exits_1_without_partial_files() {
    let dir = tmp();
    let json = dir.path().join("r.json");
    let out = baton(&["run", DEMO, "--json", json.to_str().unwrap(), "--svg", "/no/such/dir/t.svg"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(text(&out.stderr).contains("/no/such/dir/t.svg"));
    assert!(files_in(dir.path()).is_empty(), "nothing is written when one output fails");
}

#[test]
fn usage_errors_exit_2_and_help_has_examples() {
    assert_eq!(baton(&["run"]).status.code(), Some(2));
    assert_eq!(baton(&["frobnicate"]).status.code(), Some(2));
    let help = baton(&["run", "--help"]);
    assert_eq!(help.status.code(), Some(0));
    let h = text(&help.stdout);
    for needle in ["--svg", "--json", "--trace", "--set", "Examples", "pipeline.micro_batches=16"] {
        assert!(h.contains(needle), "run --help lacks {needle}");
    }
    assert!(text(&baton(&["--help"]).stdout).contains("Examples"));
}

#[test]
fn large_chart_drops_labels_that_do_not_fit() {
    // 8 devices x 64 micro-batches: every label drawn must fit inside its bar,
    // and bars of one lane must not overlap.
    let dir = tmp();
    let svg = dir.path().join("big.svg");
    let out = baton(&[
        "run",
        "scenarios/interleaved.yaml",
        "--svg",
        svg.to_str().unwrap(),
        "--set",
        "cluster.devices=8",
        "--set",
        "pipeline.stages=8",
        "--set",
        "pipeline.micro_batches=64",
        "--set",
        "pipeline.schedule=1f1b",
        "--set",
        "pipeline.chunks=1",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let doc = std::fs::read_to_string(&svg).unwrap();
    // 8 x 64 x 2 ops and 7 x 64 x 2 transfers (a send and a receive mark each), plus the gaps.
    assert!(check_xml(&doc) >= 8 * 128 + 2 * 7 * 128);
    let attr = |s: &str, name: &str| -> f64 {
        let key = format!(" {name}=\"");
        let i = s.find(&key).unwrap() + key.len();
        s[i..].split('"').next().unwrap().parse().unwrap()
    };
    let mut labels = 0;
    let mut expected_labels = 0;
    let mut lanes: std::collections::BTreeMap<i64, Vec<(f64, f64)>> = Default::default();
    for bar in doc.split("<g><title>").skip(1) {
        let bar = &bar[..bar.find("</g>").unwrap()];
        let rect = &bar[bar.find("<rect").unwrap()..];
        let (x, w, y) = (attr(rect, "x"), attr(rect, "width"), attr(rect, "y"));
        lanes.entry(y.round() as i64).or_default().push((x, w));
        // The chart's rule: a micro-batch number is drawn when its bar is at
        // least 0.62 em per digit (10 px font) plus 3 px wide.
        let title = &bar[..bar.find("</title>").unwrap()];
        let mb = title.split("micro-batch ").nth(1).map(|t| t.split(',').next().unwrap().len());
        if let Some(digits) = mb {
            expected_labels += usize::from(w >= digits as f64 * 6.2 + 3.0);
        }
        if let Some(t) = bar.find("<text") {
            let label = &bar[t..];
            let digits = label[label.find('>').unwrap() + 1..label.find("</text>").unwrap()].len();
            // 10 px font: a digit is at most 0.62 em wide.
            assert!(digits as f64 * 6.2 <= w, "label of {digits} digits overprints a {w:.1} px bar");
            let cx = attr(label, "x");
            assert!((cx - (x + w / 2.0)).abs() < 0.02, "label centred on its bar");
            labels += 1;
        }
    }
    assert_eq!(lanes.len(), 8);
    for bars in lanes.values_mut() {
        bars.sort_by(|a, b| a.0.partial_cmp(&b.0).unwrap());
        for w in bars.windows(2) {
            assert!(w[0].0 + w[0].1 <= w[1].0 + 0.02, "bars overlap");
        }
    }
    assert_eq!(labels, expected_labels, "exactly the labels that fit are kept");
    assert!(expected_labels > 0 && expected_labels < 8 * 128, "some labels fit and some do not");
}

#[test]
fn jitter_follows_the_seed() {
    let step = |sets: &[&str]| -> f64 {
        let mut args = vec!["run", DEMO, "--json", "-"];
        for s in sets {
            args.extend_from_slice(&["--set", s]);
        }
        let out = baton(&args);
        assert!(out.status.success(), "{}", text(&out.stderr));
        let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        v["step_time_ms"].as_f64().unwrap()
    };
    let plain = step(&[]);
    let a = step(&["cluster.jitter=0.1", "seed=11"]);
    assert_eq!(a, step(&["cluster.jitter=0.1", "seed=11"]), "same seed, same step");
    assert_ne!(a, step(&["cluster.jitter=0.1", "seed=12"]), "the seed matters");
    assert_ne!(a, plain);
    assert_eq!(plain, step(&["seed=12"]), "without jitter the seed changes nothing");
}

#[test]
fn order_writes_each_devices_ops_one_token_each() {
    // 1F1B, p = 4, m = 8: device 0 warms up with p - 1 = 3 forwards, then
    // alternates, then drains (Narayanan et al., ICML 2021, sec. 3.2).
    let out = baton(&["order", "scenarios/unbalanced-split.yaml"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let order = text(&out.stdout);
    let lines: Vec<&str> = order.lines().filter(|l| !l.starts_with('#')).collect();
    assert_eq!(lines.len(), 4);
    assert_eq!(lines[0], "0: F0 F1 F2 F3 B0 F4 B1 F5 B2 F6 B3 F7 B4 B5 B6 B7");
    assert_eq!(lines[3], "3: F0 B0 F1 B1 F2 B2 F3 B3 F4 B4 F5 B5 F6 B6 F7 B7");
    // A zero-bubble order has a W token per micro-batch; chunks carry `.c`.
    let zb = text(&baton(&["order", "scenarios/unbalanced-split.yaml", "--set", "pipeline.schedule=zb-h1"]).stdout);
    assert!(zb
        .lines()
        .filter(|l| !l.starts_with('#'))
        .all(|l| l.split(' ').filter(|t| t.starts_with('W')).count() == 8));
    let il = text(&baton(&["order", "scenarios/interleaved.yaml"]).stdout);
    assert!(il.lines().any(|l| l.contains(" F0.1 ")), "{il}");
    // --out writes the same text to a file, nothing on standard output.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("o.order");
    let out = baton(&["order", "scenarios/unbalanced-split.yaml", "--out", path.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0));
    assert_eq!(std::fs::read_to_string(&path).unwrap(), order);
    // A custom order is written back as it was read (comments aside).
    let custom = baton(&[
        "order",
        "scenarios/zero-bubble.yaml",
        "--set",
        "pipeline.schedule=custom",
        "--set",
        "pipeline.order=zero-bubble-drain.order",
    ]);
    assert_eq!(custom.status.code(), Some(0), "{}", text(&custom.stderr));
    let file = std::fs::read_to_string("scenarios/zero-bubble-drain.order").unwrap();
    let ops = |t: &str| t.lines().filter(|l| !l.starts_with('#')).map(String::from).collect::<Vec<_>>();
    assert_eq!(ops(&text(&custom.stdout)), ops(&file));
    // zb-auto's order is the one it chose, named in the header.
    let auto = text(&baton(&["order", "scenarios/zero-bubble.yaml", "--set", "pipeline.schedule=zb-auto"]).stdout);
    assert!(
        auto.starts_with("# Quill-3") && auto.lines().next().unwrap().contains("schedule zb-auto (chose "),
        "{auto}"
    );
    assert_eq!(ops(&auto).len(), 4);
}
