//! Charts that survive being pasted into a wiki: what a picture shows
//! without tooltips (idle causes, overrides, node groups), its width and
//! time window, titles that fit, and sweep lines that stay apart.

mod common;

use common::{baton, json, text};
use std::collections::BTreeSet;

const DEMO: &str = "scenarios/unbalanced-split.yaml";

/// The chart a command writes to standard output (`--svg -`).
fn chart(args: &[&str]) -> String {
    let out = baton(args);
    assert_eq!(out.status.code(), Some(0), "{args:?}: {}", text(&out.stderr));
    let svg = text(&out.stdout);
    assert!(svg.starts_with("<svg"), "{args:?}");
    svg
}

/// The root element's `width` attribute.
fn root_width(svg: &str) -> u32 {
    let head = &svg[..svg.find('>').unwrap()];
    let w = head.split(" width=\"").nth(1).unwrap();
    w[..w.find('"').unwrap()].parse().unwrap()
}

/// Every `<text>` content, trimmed (plotters puts it on its own line).
fn texts(svg: &str) -> Vec<String> {
    let mut out = Vec::new();
    for piece in svg.split("<text").skip(1) {
        let body = &piece[piece.find('>').unwrap() + 1..];
        out.push(body[..body.find("</text>").unwrap()].trim().to_string());
    }
    out
}

/// (start, end) in nanoseconds of every op bar, read back from its tooltip
/// (`... : 1.200 ms to 3.400 ms`).
fn op_spans(svg: &str) -> Vec<(f64, f64)> {
    let to_ms = |t: &str| -> f64 {
        let (v, unit) = t.trim().split_once(' ').unwrap();
        let v: f64 = v.parse().unwrap();
        match unit {
            "ns" => v / 1e6,
            "us" => v / 1e3,
            "ms" => v,
            "s" => v * 1e3,
            other => panic!("{other}"),
        }
    };
    svg.split("<g><title>")
        .skip(1)
        .map(|t| {
            let t = &t[..t.find("</title>").unwrap()];
            let times = t.rsplit(": ").next().unwrap();
            let (a, b) = times.split_once(" to ").unwrap();
            (to_ms(a), to_ms(b))
        })
        .collect()
}

#[test]
fn width_is_what_was_asked_and_bounded_by_default() {
    assert_eq!(root_width(&chart(&["run", DEMO, "--svg", "-", "--width", "1234"])), 1234);
    let default = root_width(&chart(&["run", DEMO, "--svg", "-"]));
    assert!((900..=1800).contains(&default), "{default}");
    // Many ops per device no longer widen the chart without bound.
    let big = chart(&[
        "run",
        "scenarios/interleaved.yaml",
        "--set",
        "pipeline.chunks=3",
        "--set",
        "pipeline.micro_batches=64",
        "--svg",
        "-",
    ]);
    assert_eq!(root_width(&big), 1800);
    // Every chart-writing command takes --width.
    assert_eq!(root_width(&chart(&["run", DEMO, "--memory-svg", "-", "--width", "777"])), 777);
    let cmp = chart(&["compare", DEMO, "--set", "pipeline.micro_batches=4", "--svg", "-", "--width", "640"]);
    assert_eq!(root_width(&cmp), 640);
    let sweep = chart(&["sweep", DEMO, "--vary", "pipeline.micro_batches=4,8", "--svg", "-", "--width", "700"]);
    assert_eq!(root_width(&sweep), 700);
    // Two-digit micro-batch numbers are written when the bars are wide enough.
    let wide = chart(&["run", DEMO, "--set", "pipeline.micro_batches=16", "--svg", "-", "--width", "4000"]);
    assert!(wide.contains(">15</text>"), "micro-batch 15 is labelled at 4000 px");
    // Out-of-range widths are usage errors.
    for w in ["10", "99999", "wide"] {
        assert_eq!(baton(&["run", DEMO, "--svg", "-", "--width", w]).status.code(), Some(2), "{w}");
    }
}

#[test]
fn a_window_shows_only_that_time() {
    let whole = chart(&["run", DEMO, "--svg", "-"]);
    let window = chart(&["run", DEMO, "--svg", "-", "--window", "20ms..60ms"]);
    let (all, shown) = (op_spans(&whole), op_spans(&window));
    // The demo's 64 ops; those drawn in the window overlap 20..60 ms, and
    // every op that overlaps it is drawn.
    assert_eq!(all.len(), 64);
    let overlapping = all.iter().filter(|(a, b)| *b > 20.0 && *a < 60.0).count();
    assert!(shown.iter().all(|(a, b)| *b > 20.0 && *a < 60.0), "{shown:?}");
    assert_eq!(shown.len(), overlapping);
    assert!(overlapping < 64);
    assert!(texts(&window).iter().any(|t| t.starts_with("Showing 20.000 ms to 60.000 ms")));
    // The axis starts at the window: its first tick label is 20 ms.
    // (Tick labels have a decimal point; micro-batch numbers on bars do not.)
    let ticks: Vec<f64> =
        texts(&window).iter().filter(|t| t.contains('.')).filter_map(|t| t.parse::<f64>().ok()).collect();
    assert!(!ticks.is_empty());
    assert!(ticks.iter().all(|&t| (20.0..=60.0).contains(&t)), "{ticks:?}");
    // The memory chart takes the window too, and compare's chart.
    chart(&["run", DEMO, "--memory-svg", "-", "--window", "0..30ms"]);
    chart(&["compare", DEMO, "--set", "pipeline.micro_batches=4", "--svg", "-", "--window", "5ms..50ms"]);
    // A window past the step, one without a chart, or backwards: exit 2.
    for args in [
        &["run", DEMO, "--svg", "-", "--window", "1s..2s"][..],
        &["run", DEMO, "--window", "1ms..2ms"],
        &["run", DEMO, "--svg", "-", "--window", "9ms..2ms"],
        &["run", DEMO, "--svg", "-", "--window", "20..60"],
    ] {
        let out = baton(args);
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        assert!(out.stdout.is_empty());
    }
}

#[test]
fn each_idle_cause_has_a_legend_swatch_like_its_bars() {
    for args in [
        &["run", DEMO, "--svg", "-"][..],
        &["run", "scenarios/two-boxes.yaml", "--set", "placement=spread", "--svg", "-"],
        &["run", "scenarios/two-boxes.yaml", "--set", "pipeline.blocking_sends=true", "--svg", "-"],
    ] {
        let svg = chart(args);
        let mut json_args = args.to_vec();
        json_args.truncate(json_args.len() - 2);
        json_args.extend(["--json", "-"]);
        let report = json(&baton(&json_args));
        let causes: BTreeSet<String> =
            report["gaps"].as_array().unwrap().iter().map(|g| g["cause"].as_str().unwrap().to_string()).collect();
        assert!(!causes.is_empty());
        let (_, rest) = svg.split_once("<g id=\"idle\">").unwrap();
        let (idle, _) = rest.split_once("</g>").unwrap();
        let legend = svg.split("<g id=\"legend\"").nth(1).unwrap();
        for c in &causes {
            let fill = format!("fill=\"url(#idle-{c})\"");
            assert!(idle.contains(&fill), "{args:?}: bars of cause {c}");
            assert!(legend.contains(&fill), "{args:?}: a legend swatch for {c}");
            assert!(svg.contains(&format!("<pattern id=\"idle-{c}\"")), "{c}");
        }
        // No swatch for a cause the chart does not show.
        for c in ["fill", "drain", "activation", "gradient", "link", "send"] {
            let fill = format!("fill=\"url(#idle-{c})\"");
            assert_eq!(legend.split("</g>").next().unwrap().contains(&fill), causes.contains(c), "{args:?}: {c}");
        }
    }
}

#[test]
fn overrides_and_placement_are_visible_in_the_picture() {
    let svg = chart(&["run", "scenarios/two-boxes.yaml", "--set", "placement=spread", "--svg", "-"]);
    let t = texts(&svg);
    assert!(t.iter().any(|l| l.contains("with placement=spread")), "the caption names the override");
    // Rows grouped by node (spread: stages 0, 2, 4, 6 on node 0) and labelled
    // by stage and cluster device.
    for label in ["node 0", "node 1", "stage 0 · dev 0", "stage 2 · dev 1", "stage 1 · dev 4", "stage 7 · dev 7"] {
        assert!(t.iter().any(|l| l == label), "{label} in {t:?}");
    }
    // Top to bottom, by each row label's y.
    let lanes = svg.split("<g id=\"lanes\"").nth(1).unwrap().split("</g>").next().unwrap();
    let mut rows: Vec<(f64, String)> = lanes
        .split("<text ")
        .skip(1)
        .filter(|e| e.contains("text-anchor=\"end\""))
        .map(|e| {
            let y: f64 = e.split("y=\"").nth(1).unwrap().split('"').next().unwrap().parse().unwrap();
            let label = e[e.find('>').unwrap() + 1..e.find("</text>").unwrap()].to_string();
            (y, label)
        })
        .collect();
    rows.sort_by(|a, b| a.0.total_cmp(&b.0));
    let order: Vec<&str> = rows.iter().map(|(_, l)| l.split(" · ").next().unwrap()).collect();
    assert_eq!(order, ["stage 0", "stage 2", "stage 4", "stage 6", "stage 1", "stage 3", "stage 5", "stage 7"]);
    // The memory chart says so too.
    let mem = chart(&["run", "scenarios/two-boxes.yaml", "--set", "placement=spread", "--memory-svg", "-"]);
    assert!(texts(&mem).iter().any(|l| l.contains("with placement=spread")));
    // A flat cluster keeps "device d".
    assert!(texts(&chart(&["run", DEMO, "--svg", "-"])).iter().any(|l| l == "device 3"));
}

#[test]
fn compare_titles_fit_and_a_shared_axis_is_said() {
    let svg = chart(&[
        "compare",
        "scenarios/heavy-head.yaml",
        "scenarios/unbalanced-split.yaml",
        "scenarios/interleaved.yaml",
        "--svg",
        "-",
        "--width",
        "600",
    ]);
    let title = svg.split("<g id=\"title\"").nth(1).unwrap().split("</g>").next().unwrap();
    let lines = texts(title);
    assert!(lines.len() >= 2, "the long title wraps: {lines:?}");
    // 20 px text at about 0.6 em per character fits in 600 px less margins.
    for l in &lines {
        assert!(l.chars().count() as f64 * 20.0 * 0.6 <= 600.0, "{l}");
    }
    // 2.887 s against 140 ms: the caption says the runs share one axis.
    assert!(texts(&svg).iter().any(|l| l.contains("share one time axis")), "{:?}", texts(&svg));
    // Close lengths need no such note: 140.197 ms against 122.294 ms.
    let close = chart(&["compare", DEMO, "--set", "pipeline.split=[4, 3, 3, 2]", "--svg", "-"]);
    assert!(!close.contains("share one time axis"));
}

#[test]
fn sweep_charts_mark_memory_stops_and_undrawn_values() {
    let svg = chart(&[
        "sweep",
        "scenarios/choose-m.yaml",
        "--vary",
        "pipeline.micro_batches=8..128*2",
        "--vary",
        "pipeline.schedule=fill-drain,1f1b,interleaved",
        "--vary",
        "pipeline.chunks=1,2",
        "--svg",
        "-",
    ]);
    let t = texts(&svg);
    // fill-drain runs out of the 80 GiB from m = 32 on.
    assert!(t.iter().any(|l| l.starts_with("hollow, dotted: over memory capacity")), "{t:?}");
    assert!(t.iter().any(|l| l == "chunks=2") && t.iter().any(|l| l == "chunks=1"));
    assert!(t.iter().any(|l| l.starts_with("each point is the best over pipeline.chunks")));
}

#[test]
fn a_dense_chart_draws_runs_too_narrow_to_tell_apart_as_one() {
    // 16 stages, 1,024 micro-batches: 32,768 ops and as many transfers on a
    // chart of at most 1,800 px. Runs of ops narrower than a pixel become
    // one bar whose tooltip counts them; every op is in exactly one bar.
    let set = ["--set", "pipeline.micro_batches=1024"];
    let svg = chart(&[
        "run",
        "benches/scenarios/p32-interleaved.yaml",
        "--set",
        "pipeline.stages=16",
        "--set",
        "cluster.devices=16",
        "--set",
        "pipeline.chunks=1",
        "--set",
        "pipeline.schedule=1f1b",
        "--set",
        "model.layers.0.repeat=16",
        set[0],
        set[1],
        "--svg",
        "-",
    ]);
    assert!(svg.len() < 2_000_000, "{} bytes", svg.len());
    assert!(svg.contains("too narrow to draw one by one at this width"));
    let ops_group = &svg[svg.find("<g id=\"ops\"").unwrap()..];
    let ops_group = &ops_group[..ops_group.find("\n</g>").unwrap()];
    let mut drawn = 0usize;
    for t in ops_group.split("<g><title>").skip(1) {
        let t = &t[..t.find("</title>").unwrap()];
        drawn += match t.split_once(" ops on device ") {
            Some((n, _)) => n.parse::<usize>().unwrap(),
            None => 1,
        };
    }
    assert_eq!(drawn, 16 * 2 * 1024);
    assert!(texts(&svg).iter().any(|t| t.starts_with("Runs of ops and of transfers too narrow")));
    // The demo is not dense: one bar per op, as always.
    let demo = chart(&["run", DEMO, "--svg", "-"]);
    assert!(!demo.contains("too narrow to draw one by one"));
    assert_eq!(op_spans(&demo).len(), 4 * 2 * 8);
}
