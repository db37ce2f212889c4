//! Where outputs go: symbolic links are followed, devices and FIFOs are
//! written in place (never replaced), `-` is standard output for every
//! output option and at most one may use it, and a failure leaves every
//! regular file as it was. Every case runs in a temporary directory.

mod common;

use common::{baton, text};

use std::io::Read;
use std::os::unix::fs::FileTypeExt;
use std::path::Path;
use std::process::{Command, Stdio};

const DEMO: &str = "scenarios/unbalanced-split.yaml";

fn names_in(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> =
        std::fs::read_dir(dir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    v.sort();
    v
}

/// A character device made with `mknod` in `dir` (major 1: `null` is minor 3,
/// `full` minor 7), when this process may; `None` otherwise.
fn device(dir: &Path, name: &str, minor: u32) -> Option<std::path::PathBuf> {
    let path = dir.join(name);
    let ok = Command::new("mknod")
        .arg(&path)
        .args(["c", "1", &minor.to_string()])
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    ok.then_some(path)
}

fn fifo(dir: &Path, name: &str) -> std::path::PathBuf {
    let path = dir.join(name);
    assert!(Command::new("mkfifo").arg(&path).status().unwrap().success());
    path
}

/// Releases a reader still blocked opening `fifo` (when the command failed
/// before opening it), so a failing test does not hang. Non-blocking, so it
/// does nothing when no reader waits.
fn release(fifo: &Path) {
    use std::os::unix::fs::OpenOptionsExt;
    const O_NONBLOCK: i32 = 0o4000; // Linux
    let _ = std::fs::OpenOptions::new().write(true).custom_flags(O_NONBLOCK).open(fifo);
}

fn is_char_device(p: &Path) -> bool {
    std::fs::symlink_metadata(p).unwrap().file_type().is_char_device()
}

#[test]
fn a_symbolic_link_is_followed_and_its_target_replaced() {
    let dir = tempfile::tempdir().unwrap();
    let target = dir.path().join("report.json");
    let link = dir.path().join("latest.json");
    std::fs::write(&target, "old").unwrap();
    std::os::unix::fs::symlink("report.json", &link).unwrap();
    let out = baton(&["run", DEMO, "--json", link.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(std::fs::symlink_metadata(&link).unwrap().file_type().is_symlink(), "the link is still a link");
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(&target).unwrap()).unwrap();
    assert_eq!(v["micro_batches"], 8);
    assert_eq!(names_in(dir.path()), vec!["latest.json", "report.json"], "no staging file left");
    // A dangling link names the file to create.
    let dangling = dir.path().join("next.svg");
    std::os::unix::fs::symlink("charts-next.svg", &dangling).unwrap();
    let out = baton(&["run", DEMO, "--svg", dangling.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(std::fs::read_to_string(dir.path().join("charts-next.svg")).unwrap().starts_with("<svg"));
    assert!(std::fs::symlink_metadata(&dangling).unwrap().file_type().is_symlink());
}

#[test]
fn a_device_is_written_in_place_never_replaced() {
    let dir = tempfile::tempdir().unwrap();
    let Some(null) = device(dir.path(), "null", 3) else {
        // Without the privilege to make device nodes the FIFO tests below
        // cover writing in place.
        return;
    };
    let out = baton(&["run", DEMO, "--json", null.to_str().unwrap(), "--trace", null.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(2), "two outputs on one file is a usage error");
    let out = baton(&["run", DEMO, "--json", null.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(is_char_device(&null), "the device node is still a device");

    // A device that refuses the bytes: exit 1 with the system's message; the
    // regular outputs of the same command keep their old content.
    let full = device(dir.path(), "full", 7).unwrap();
    let svg = dir.path().join("t.svg");
    std::fs::write(&svg, "old chart").unwrap();
    let out = baton(&["run", DEMO, "--svg", svg.to_str().unwrap(), "--json", full.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr);
    assert!(err.contains("full") && err.contains("No space left on device"), "{err}");
    assert_eq!(err.matches("error:").count(), 1, "{err}");
    assert!(is_char_device(&full));
    assert_eq!(std::fs::read_to_string(&svg).unwrap(), "old chart");
    assert_eq!(names_in(dir.path()), vec!["full", "null", "t.svg"], "no staging file left");
}

/// Reads `fifo` on another thread through a second name for it (a hard
/// link), so the reader can always be released (see [`release`]) even if the
/// command replaced the first name instead of writing through it.
fn read_fifo(fifo: &Path, keep: &Path, stop_after: Option<usize>) -> std::thread::JoinHandle<Vec<u8>> {
    std::fs::hard_link(fifo, keep).unwrap();
    let keep = keep.to_path_buf();
    std::thread::spawn(move || {
        let mut f = std::fs::File::open(&keep).unwrap();
        let mut got = Vec::new();
        match stop_after {
            None => {
                f.read_to_end(&mut got).unwrap();
            }
            Some(n) => {
                got.resize(n, 0);
                let k = f.read(&mut got).unwrap_or(0);
                got.truncate(k);
            }
        }
        got
    })
}

#[test]
fn a_fifo_is_written_in_place() {
    let dir = tempfile::tempdir().unwrap();
    let (pipe, keep) = (fifo(dir.path(), "report.pipe"), dir.path().join("keep.pipe"));
    let reader = read_fifo(&pipe, &keep, None);
    let svg = dir.path().join("t.svg");
    let out = baton(&["run", DEMO, "--json", pipe.to_str().unwrap(), "--svg", svg.to_str().unwrap()]);
    release(&keep);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let got = reader.join().unwrap();
    let v: serde_json::Value = serde_json::from_slice(&got).expect("the reader got the JSON report");
    assert_eq!(v["stages"], 4);
    assert!(std::fs::symlink_metadata(&pipe).unwrap().file_type().is_fifo(), "the FIFO is still a FIFO");
    assert!(std::fs::read_to_string(&svg).unwrap().starts_with("<svg"));
    std::fs::remove_file(&keep).unwrap();

    // A reader that goes away: the write fails (exit 1), and the command's
    // regular outputs are not replaced. The trace of 4,000 micro-batches
    // (about 2 MB) is far more than a pipe holds, so the write is still
    // going when the reader closes.
    let layers = dir.path().join("layers.csv");
    std::fs::write(&layers, "old table").unwrap();
    let reader = read_fifo(&pipe, &keep, Some(10));
    let out = baton(&[
        "run",
        DEMO,
        "--set",
        "pipeline.micro_batches=4000",
        "--trace",
        pipe.to_str().unwrap(),
        "--layers-csv",
        layers.to_str().unwrap(),
    ]);
    release(&keep);
    reader.join().unwrap();
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    assert!(text(&out.stderr).contains("report.pipe"), "{}", text(&out.stderr));
    assert_eq!(std::fs::read_to_string(&layers).unwrap(), "old table");
    assert_eq!(names_in(dir.path()), vec!["keep.pipe", "layers.csv", "report.pipe", "t.svg"]);
}

#[test]
fn dash_is_standard_output_for_every_output_option() {
    // run: each output option with `-` puts exactly that output on standard
    // output and the summary on standard error.
    let starts: &[(&str, &str)] = &[
        ("--json", "{"),
        ("--svg", "<svg"),
        ("--trace", "device,kind,micro_batch,stage,start_ns,end_ns,slack_ns"),
        ("--memory-svg", "<svg"),
        ("--layers-csv", "name,forward_ms"),
    ];
    for (option, start) in starts {
        let out = baton(&["run", DEMO, option, "-"]);
        assert_eq!(out.status.code(), Some(0), "{option}: {}", text(&out.stderr));
        assert!(text(&out.stdout).starts_with(start), "{option}: {}", &text(&out.stdout)[..40]);
        assert!(text(&out.stderr).contains("step time"), "{option}: the summary goes to standard error");
        assert!(!text(&out.stdout).contains("step time  "), "{option}: no summary on standard output");
    }
    // sweep, merge, compare and split: the same.
    let dir = tempfile::tempdir().unwrap();
    let part = dir.path().join("part.csv");
    let sweep = ["sweep", DEMO, "--vary", "pipeline.micro_batches=4,8"];
    let out = baton(&[&sweep[..], &["--csv", "-"]].concat());
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stdout).starts_with("pipeline.micro_batches,step_time_ms"), "{}", text(&out.stdout));
    assert!(text(&out.stderr).contains("points ranked"));
    std::fs::write(&part, &out.stdout).unwrap();
    let out = baton(&[&sweep[..], &["--svg", "-"]].concat());
    assert!(text(&out.stdout).starts_with("<svg"));
    let out = baton(&["merge", part.to_str().unwrap(), "--csv", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert_eq!(out.stdout, std::fs::read(&part).unwrap(), "merging one whole part gives it back");
    let out = baton(&["compare", DEMO, "--set", "pipeline.split=[4, 3, 3, 2]", "--svg", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(text(&out.stdout).starts_with("<svg") && text(&out.stderr).contains("step time"));
    let out = baton(&["split", "scenarios/heavy-head.yaml", "--apply", "-"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    assert!(
        text(&out.stdout)
            .starts_with("# yaml-language-server: $schema=../docs/scenario.schema.json\n# An invented chat model"),
        "the rewritten scenario"
    );
    assert!(text(&out.stderr).contains("proposed split"));
}

#[test]
fn at_most_one_output_may_use_standard_output() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("t.csv");
    let cases: &[&[&str]] = &[
        &["run", DEMO, "--json", "-", "--svg", "-"],
        &["run", DEMO, "--trace", "-", "--json", "/dev/fd/1", "--svg", csv.to_str().unwrap()],
        &["sweep", DEMO, "--vary", "pipeline.micro_batches=4,8", "--csv", "-", "--json", "-"],
        &["compare", DEMO, DEMO, "--svg", "-", "--json", "-"],
        &["split", DEMO, "--apply", "-", "--json", "-"],
    ];
    for args in cases {
        let out = baton(args);
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        assert!(text(&out.stderr).contains("at most one output may use it"), "{args:?}: {}", text(&out.stderr));
        assert!(out.stdout.is_empty(), "{args:?}");
    }
    assert!(names_in(dir.path()).is_empty(), "nothing written");
}

#[test]
fn dev_stdout_is_standard_output() {
    // /dev/fd/1 (like /dev/stdout, a name the kernel resolves to the
    // process's own standard output) is standard output, whatever it is
    // connected to (here a pipe), and is never replaced. The test uses
    // /dev/fd/1 rather than /dev/stdout so that a regression could not
    // replace a system file: nothing can be created in /dev/fd.
    let out = baton(&["run", DEMO, "--json", "/dev/fd/1"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("standard output is the JSON alone");
    assert_eq!(v["stages"], 4);
    assert!(text(&out.stderr).contains("step time"));
    // Redirected to a file, the file receives the JSON.
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("out.json");
    let status = Command::new(env!("CARGO_BIN_EXE_baton"))
        .args(["run", DEMO, "--json", "/dev/fd/1"])
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .stdout(std::fs::File::create(&file).unwrap())
        .stderr(Stdio::null())
        .status()
        .unwrap();
    assert!(status.success());
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(&file).unwrap()).unwrap();
    assert_eq!(v["micro_batches"], 8);
}

#[test]
fn trace_events_carry_the_formats_required_fields() {
    // The Trace Event Format (the JSON trace format documented for
    // Chromium's tracing; its fields here from memory of that document): an
    // object whose `traceEvents` array holds events with `ph`, `pid`, `tid`
    // and `name`; complete events (`ph: "X"`) add `ts` and `dur` in
    // microseconds (and a `cat`); metadata events (`ph: "M"`) name
    // processes and threads in `args.name`.
    let out = baton(&["run", "scenarios/replicas.yaml", "--events", "-", "--json", "/dev/null"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let events = v["traceEvents"].as_array().unwrap();
    let report = baton::simulate(&baton::scenario::load(std::path::Path::new("scenarios/replicas.yaml"), &[]).unwrap())
        .unwrap()
        .with_critical_path()
        .report;
    let mut named_threads = std::collections::HashSet::new();
    let mut counts: std::collections::HashMap<String, usize> = Default::default();
    let mut critical = 0;
    for e in events {
        let ph = e["ph"].as_str().unwrap();
        assert!(e["name"].is_string() && e["pid"].is_u64() && e["tid"].is_u64(), "{e}");
        match ph {
            "M" => {
                let name = e["name"].as_str().unwrap();
                assert!(
                    ["process_name", "process_sort_index", "thread_name", "thread_sort_index"].contains(&name),
                    "{e}"
                );
                if name == "thread_name" {
                    assert!(e["args"]["name"].is_string());
                    named_threads.insert((e["pid"].as_u64().unwrap(), e["tid"].as_u64().unwrap()));
                }
            }
            "X" => {
                assert!(e["ts"].as_f64().unwrap() >= 0.0 && e["dur"].as_f64().unwrap() >= 0.0, "{e}");
                assert!(
                    e["cat"].is_string() && e["args"]["micro_batch"].is_u64() && e["args"]["stage"].is_u64(),
                    "{e}"
                );
                assert!(named_threads.contains(&(e["pid"].as_u64().unwrap(), e["tid"].as_u64().unwrap())), "{e}");
                *counts.entry(e["cat"].as_str().unwrap().to_string()).or_default() += 1;
                if e["args"]["critical"] == true {
                    critical += 1;
                }
            }
            other => panic!("unexpected phase {other}"),
        }
    }
    let ops: usize = ["forward", "backward", "weight", "encode", "update"]
        .iter()
        .map(|k| counts.get(*k).copied().unwrap_or(0))
        .sum();
    assert_eq!(ops, report.ops);
    assert_eq!(counts["send"], report.transfers);
    assert_eq!(counts["sync"], report.sync_transfers);
    // The critical path's ops and sends are flagged, and nothing else.
    assert_eq!(critical, report.critical_path.iter().filter(|e| e.kind != "sync").count());
    // Times: the last event ends at the step's end (microseconds).
    let end = events
        .iter()
        .filter(|e| e["ph"] == "X")
        .map(|e| e["ts"].as_f64().unwrap() + e["dur"].as_f64().unwrap())
        .fold(0.0, f64::max);
    assert!((end - report.step_time_ms * 1000.0).abs() < 1e-3, "{end}");
}
