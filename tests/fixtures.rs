//! Every number baton prints, kept: each case below runs the command and
//! compares what it writes (summary, JSON, CSV, layer table, split and sweep
//! results) byte for byte with `tests/fixtures/<case>/`, and each SVG with
//! the SHA-256 digest and length kept there (charts are large).
//!
//! A change that means to alter an output regenerates the fixtures with
//! `BATON_UPDATE_FIXTURES=1 cargo test --test fixtures` and shows the
//! difference in review; any other change must leave them as they are.

use std::path::{Path, PathBuf};
use std::process::Command;

use sha2::{Digest, Sha256};

struct Case {
    name: &'static str,
    /// Arguments; `@` is replaced by the case's output directory.
    args: &'static [&'static str],
    /// Exit status expected.
    status: i32,
}

const CASES: &[Case] = &[
    Case {
        name: "run-unbalanced",
        args: &[
            "run",
            "scenarios/unbalanced-split.yaml",
            "--show-layers",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
            "--memory-svg",
            "@/memory.svg",
            "--layers-csv",
            "@/layers.csv",
        ],
        status: 0,
    },
    Case {
        name: "run-rebalanced",
        args: &[
            "run",
            "scenarios/unbalanced-split.yaml",
            "--set",
            "pipeline.split=[4, 3, 3, 2]",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
        ],
        status: 0,
    },
    Case {
        name: "run-jitter",
        args: &[
            "run",
            "scenarios/unbalanced-split.yaml",
            "--set",
            "cluster.jitter=0.05",
            "--set",
            "seed=3",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
        ],
        status: 0,
    },
    Case {
        name: "run-interleaved",
        args: &[
            "run",
            "scenarios/interleaved.yaml",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
            "--memory-svg",
            "@/memory.svg",
        ],
        status: 0,
    },
    Case {
        name: "run-heavy-head",
        args: &[
            "run",
            "scenarios/heavy-head.yaml",
            "--show-layers",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
            "--memory-svg",
            "@/memory.svg",
            "--layers-csv",
            "@/layers.csv",
        ],
        status: 0,
    },
    Case {
        name: "run-heavy-head-recompute-over",
        args: &[
            "run",
            "scenarios/heavy-head.yaml",
            "--set",
            "training.recompute=full",
            "--set",
            "cluster.device.memory=13.6GB",
            "--strict",
            "--json",
            "@/report.json",
            "--memory-svg",
            "@/memory.svg",
        ],
        status: 3,
    },
    Case {
        name: "run-choose-m",
        args: &[
            "run",
            "scenarios/choose-m.yaml",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
            "--memory-svg",
            "@/memory.svg",
        ],
        status: 0,
    },
    Case {
        name: "run-choose-m-fill-drain",
        args: &[
            "run",
            "scenarios/choose-m.yaml",
            "--set",
            "pipeline.schedule=fill-drain",
            "--set",
            "pipeline.micro_batches=32",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
        ],
        status: 0,
    },
    Case {
        name: "run-two-boxes-packed",
        args: &[
            "run",
            "scenarios/two-boxes.yaml",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
        ],
        status: 0,
    },
    Case {
        name: "run-two-boxes-spread",
        args: &[
            "run",
            "scenarios/two-boxes.yaml",
            "--set",
            "placement=spread",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
            "--memory-svg",
            "@/memory.svg",
        ],
        status: 0,
    },
    Case {
        name: "run-two-boxes-blocking",
        args: &[
            "run",
            "scenarios/two-boxes.yaml",
            "--set",
            "placement=[7, 1, 6, 2, 5, 3, 4, 0]",
            "--set",
            "pipeline.blocking_sends=true",
            "--set",
            "cluster.node_link.count=2",
            "--json",
            "@/report.json",
            "--trace",
            "@/trace.csv",
            "--svg",
            "@/gantt.svg",
        ],
        status: 0,
    },
    Case {
        name: "split-heavy-head",
        // The copy goes to standard output (a file's relative paths would
        // be rewritten for the temporary directory), the summary to stderr.
        args: &["split", "scenarios/heavy-head.yaml", "--json", "@/split.json", "--apply", "-"],
        status: 0,
    },
    Case {
        name: "split-heavy-head-8-stages",
        args: &[
            "split",
            "scenarios/heavy-head.yaml",
            "--stages",
            "8",
            "--set",
            "cluster.devices=8",
            "--json",
            "@/split.json",
        ],
        status: 0,
    },
    Case {
        name: "split-heavy-head-no-fit",
        args: &["split", "scenarios/heavy-head.yaml", "--set", "cluster.device.memory=16GiB", "--json", "@/split.json"],
        status: 3,
    },
    Case {
        name: "split-interleaved",
        args: &["split", "scenarios/interleaved.yaml", "--json", "@/split.json"],
        status: 0,
    },
    Case {
        name: "sweep-choose-m",
        args: &[
            "sweep",
            "scenarios/choose-m.yaml",
            "--vary",
            "pipeline.micro_batches=8..128*2",
            "--vary",
            "pipeline.schedule=fill-drain,1f1b,interleaved",
            "--vary",
            "pipeline.chunks=1,2",
            "--rank-by",
            "throughput",
            "--svg",
            "@/sweep.svg",
            "--csv",
            "@/sweep.csv",
            "--json",
            "@/sweep.json",
        ],
        status: 0,
    },
    Case {
        name: "sweep-shard",
        args: &[
            "sweep",
            "scenarios/unbalanced-split.yaml",
            "--vary",
            "pipeline.split=[3,3,3,3];[4,3,3,2];[4,4,2,2]",
            "--vary",
            "pipeline.micro_batches=4..16*2",
            "--shard",
            "2/3",
            "--csv",
            "@/part.csv",
        ],
        status: 0,
    },
    Case {
        name: "compare-split",
        args: &[
            "compare",
            "scenarios/unbalanced-split.yaml",
            "--set",
            "pipeline.split=[4, 3, 3, 2]",
            "--svg",
            "@/compare.svg",
            "--json",
            "@/compare.json",
        ],
        status: 0,
    },
    Case {
        name: "compare-two",
        args: &["compare", "scenarios/interleaved.yaml", "scenarios/unbalanced-split.yaml", "--json", "@/compare.json"],
        status: 0,
    },
];

fn fixture_dir(case: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures").join(case)
}

/// The outputs of one case, as (file name, bytes), in name order: the files
/// it wrote, its standard output (`stdout.txt`, with the sweep's timing line
/// removed) and its standard error when it fails or writes any.
fn outputs(case: &Case) -> Vec<(String, Vec<u8>)> {
    let dir = tempfile::tempdir().unwrap();
    let out_dir = dir.path().to_str().unwrap().to_string();
    let args: Vec<String> = case.args.iter().map(|a| a.replace('@', &out_dir)).collect();
    let out =
        Command::new(env!("CARGO_BIN_EXE_baton")).args(&args).current_dir(env!("CARGO_MANIFEST_DIR")).output().unwrap();
    assert_eq!(out.status.code(), Some(case.status), "{}: {}", case.name, String::from_utf8_lossy(&out.stderr));
    // Paths of the temporary directory never reach a kept output.
    let scrub = |b: &[u8]| String::from_utf8_lossy(b).replace(&out_dir, "@");
    let mut files: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| {
            let e = e.unwrap();
            (e.file_name().to_string_lossy().into_owned(), std::fs::read(e.path()).unwrap())
        })
        .collect();
    let stdout: String = scrub(&out.stdout)
        .lines()
        .filter(|l| !l.starts_with("simulated ") || !l.ends_with(" s"))
        .map(|l| format!("{l}\n"))
        .collect();
    files.push(("stdout.txt".into(), stdout.into_bytes()));
    if case.status != 0 || !out.stderr.is_empty() {
        files.push(("stderr.txt".into(), scrub(&out.stderr).into_bytes()));
    }
    files.sort();
    files
}

/// What is kept of an output: the bytes, or for an SVG its digest and length.
fn kept(name: &str, bytes: &[u8]) -> (String, Vec<u8>) {
    if name.ends_with(".svg") {
        let digest: String = Sha256::digest(bytes).iter().map(|b| format!("{b:02x}")).collect();
        (format!("{name}.sha256"), format!("{digest}  {} bytes\n", bytes.len()).into_bytes())
    } else {
        (name.to_string(), bytes.to_vec())
    }
}

#[test]
fn every_output_matches_its_fixture() {
    let update = std::env::var_os("BATON_UPDATE_FIXTURES").is_some();
    let mut failures = Vec::new();
    for case in CASES {
        let dir = fixture_dir(case.name);
        let got: Vec<(String, Vec<u8>)> = outputs(case).iter().map(|(n, b)| kept(n, b)).collect();
        if update {
            let _ = std::fs::remove_dir_all(&dir);
            std::fs::create_dir_all(&dir).unwrap();
            for (name, bytes) in &got {
                std::fs::write(dir.join(name), bytes).unwrap();
            }
            continue;
        }
        let mut want: Vec<String> = std::fs::read_dir(&dir)
            .unwrap_or_else(|e| panic!("{}: {e}; run with BATON_UPDATE_FIXTURES=1 once", dir.display()))
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        want.sort();
        let names: Vec<String> = got.iter().map(|(n, _)| n.clone()).collect();
        if names != want {
            failures.push(format!("{}: files {names:?}, kept {want:?}", case.name));
            continue;
        }
        for (name, bytes) in &got {
            if std::fs::read(dir.join(name)).unwrap() != *bytes {
                failures.push(format!("{}/{name} differs", case.name));
            }
        }
    }
    assert!(failures.is_empty(), "outputs changed:\n{}", failures.join("\n"));
}
