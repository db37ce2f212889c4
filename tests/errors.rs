//! Bad and awkward inputs: each gets exit 2 and one message in the user's
//! terms (file, line and column, key, what was typed, what is allowed),
//! and nothing is written.

mod common;

use common::{baton, text};
use std::path::Path;
use std::process::Output;

const DEMO: &str = "scenarios/unbalanced-split.yaml";

/// The demo scenario with `from` replaced by `to` (which must occur), as a
/// file in `dir`.
fn demo_with(dir: &Path, name: &str, from: &str, to: &str) -> String {
    let demo = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join(DEMO)).unwrap();
    assert!(demo.contains(from), "the demo has no `{from}`");
    let path = dir.join(name);
    std::fs::write(&path, demo.replacen(from, to, 1)).unwrap();
    path.display().to_string()
}

/// Asserts exit 2, that stderr holds every needle and holds none of the
/// `absent` texts, and that it is a single `error:` message.
fn refused(out: &Output, needles: &[&str], absent: &[&str]) -> String {
    let err = text(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    for n in needles {
        assert!(err.contains(n), "stderr lacks `{n}`:\n{err}");
    }
    for a in absent {
        assert!(!err.contains(a), "stderr has `{a}`:\n{err}");
    }
    assert_eq!(err.lines().filter(|l| l.starts_with("error:")).count(), 1, "one message:\n{err}");
    assert!(out.stdout.is_empty(), "nothing on stdout: {}", text(&out.stdout));
    err
}

fn files_in(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> =
        std::fs::read_dir(dir).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    v.sort();
    v
}

#[test]
fn a_time_too_large_for_the_clock_names_its_key_once() {
    let dir = tempfile::tempdir().unwrap();
    // 9,000,000,000 s = 9e18 ns: more than the clock's 2^63 - 1 ns once a few
    // are added; the reader caps one duration at 1,000,000 s.
    let f = demo_with(dir.path(), "big.yaml", "forward: 1.1ms", "forward: 9000000000s");
    let out = baton(&["run", &f, "--svg", &dir.path().join("t.svg").display().to_string()]);
    refused(&out, &["big.yaml:10:", "model.layers.1.forward", "`9000000000s`", "too large"], &["waits", "stuck"]);
    assert_eq!(files_in(dir.path()), ["big.yaml"]);

    // Each time within the cap, but the whole step beyond the clock: a
    // stage of 3 blocks of 500,000 s forward and 1,000,000 s backward is
    // 4.5e6 s per micro-batch, and 1,000 micro-batches make 4.5e9 s =
    // 4.5e18 ns, more than 2^60 ns (about 1.15e18).
    let f =
        demo_with(dir.path(), "long.yaml", "forward: 1.1ms, backward: 2.2ms", "forward: 500000s, backward: 1000000s");
    let out = baton(&["run", &f, "--set", "pipeline.micro_batches=1000"]);
    refused(&out, &["pipeline.micro_batches", "--set pipeline.micro_batches=1000"], &["waits", "stuck"]);
}

#[test]
fn negative_and_oversized_numbers_echo_what_was_typed() {
    let dir = tempfile::tempdir().unwrap();
    let f = demo_with(dir.path(), "neg.yaml", "forward: 1.1ms", "forward: -1ms");
    refused(&baton(&["run", &f]), &["neg.yaml:10:", "`-1ms`", "must not be negative"], &["does not start"]);

    let f = demo_with(dir.path(), "e30.yaml", "micro_batches: 8", "micro_batches: 1e30");
    refused(
        &baton(&["run", &f]),
        &["e30.yaml:18:", "pipeline.micro_batches", "found 1e30", "at most"],
        &["1000000000000000019884624838656"],
    );

    for typed in ["2^64", "18446744073709551616"] {
        let set = format!("pipeline.micro_batches={typed}");
        let err = refused(
            &baton(&["run", DEMO, "--set", &set]),
            &[&format!("(from --set {set})")],
            &["18446744073709552000"],
        );
        let found = err.rsplit("found ").next().unwrap();
        assert!(found.trim().trim_matches('`') == typed, "{err}");
    }

    let f = demo_with(dir.path(), "exp.yaml", "forward: 1.1ms", "forward: 1e-3ms");
    refused(
        &baton(&["run", &f]),
        &["model.layers.1.forward", "`1e-3ms`", "exponent", "0.001 rather than 1e-3"],
        &["unit `e-3ms`"],
    );
}

#[test]
fn yaml_library_wording_does_not_leak() {
    let dir = tempfile::tempdir().unwrap();
    // Nine levels of anchors, each a list of ten aliases of the one above:
    // 10^9 values once expanded.
    let mut yaml = String::from("a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n");
    for i in 1..9 {
        let items = vec![format!("*a{}", i - 1); 10].join(", ");
        yaml.push_str(&format!("a{i}: &a{i} [{items}]\n"));
    }
    let bomb = dir.path().join("bomb.yaml");
    std::fs::write(&bomb, yaml).unwrap();
    refused(
        &baton(&["run", bomb.to_str().unwrap()]),
        &["bomb.yaml:", "too many values", "aliases"],
        &["budget", "Nodes {", "breached"],
    );

    let dup = dir.path().join("dup.yaml");
    std::fs::write(&dup, "title: a\ntitle: b\n").unwrap();
    refused(
        &baton(&["run", dup.to_str().unwrap()]),
        &["dup.yaml:2:1", "`title` appears twice"],
        &["DuplicateKeyPolicy", "Options"],
    );

    // Byte 0xff in the middle of line 5: bytes 1-15 are `    - { name: a`.
    let bad = dir.path().join("latin1.yaml");
    std::fs::write(&bad, b"title: x\nseed: 1\nmodel:\n  layers:\n    - { name: a\xff, forward: 1ms }\n".as_slice())
        .unwrap();
    refused(&baton(&["run", bad.to_str().unwrap()]), &["latin1.yaml:5:", "byte 16 of line 5", "UTF-8"], &[]);
}

#[test]
fn profile_cells_are_read_in_the_users_terms() {
    let dir = tempfile::tempdir().unwrap();
    let scenario = demo_with(
        dir.path(),
        "p.yaml",
        "  layers:\n    - { name: embed, forward: 0.6ms, backward: 1.2ms, activation: 12MiB }\n    - { name: block, repeat: 10, forward: 1.1ms, backward: 2.2ms, activation: 12MiB }\n    - { name: head, forward: 2.4ms, backward: 4.8ms, activation: 12MiB }\n",
        "  profile: layers.csv\n",
    );
    let cases = [
        ("NaN", &["layers.csv:3: column forward_ms", "`NaN` is not a number"][..], &["NaNms"][..]),
        ("1e-3", &["layers.csv:3: column forward_ms", "`1e-3`", "exponent"], &["e-3ms", "unknown unit"]),
        ("-2", &["layers.csv:3: column forward_ms", "`-2`", "must not be negative"], &[]),
        ("2000000000", &["layers.csv:3: column forward_ms", "too large"], &[]),
    ];
    for (cell, needles, absent) in cases {
        let csv = format!("name,forward_ms,activation_bytes\na,1,8\nb,{cell},8\nc,1,8\nd,1,8\n");
        std::fs::write(dir.path().join("layers.csv"), csv).unwrap();
        refused(&baton(&["run", &scenario, "--set", "pipeline.split=[1,1,1,1]"]), needles, absent);
    }
    let mut bytes = b"name,forward_ms,activation_bytes\na,1,8\nb\xfe,1,8\n".to_vec();
    bytes.extend_from_slice(b"c,1,8\nd,1,8\n");
    std::fs::write(dir.path().join("layers.csv"), bytes).unwrap();
    refused(
        &baton(&["run", &scenario, "--set", "pipeline.split=[1,1,1,1]"]),
        &["layers.csv:3", "byte 2", "UTF-8"],
        &[],
    );
}

#[test]
fn options_are_named_as_typed() {
    // A value from --vary is reported as coming from --vary.
    let out = baton(&["sweep", DEMO, "--vary", "pipeline.micro_batches=4,0"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let table = text(&out.stdout);
    let reason =
        table.lines().find(|l| l.starts_with("  pipeline.micro_batches=0:")).unwrap_or_else(|| panic!("{table}"));
    assert!(reason.contains("(from --vary pipeline.micro_batches=0)"), "{reason}");
    assert!(!reason.contains("--set"), "{reason}");
    // split's own options are named as such.
    refused(&baton(&["split", DEMO, "--stages", "8"]), &["(from --stages 8)", "8 stages need 8 devices"], &["--set"]);
    refused(&baton(&["split", DEMO, "--chunks", "0"]), &["(from --chunks 0)"], &["--set"]);
}

#[test]
fn failed_sweeps_write_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("s.csv").display().to_string();
    let svg = dir.path().join("s.svg").display().to_string();
    let out = baton(&["sweep", DEMO, "--vary", "pipeline.micro_batches=0..0", "--csv", &csv, "--svg", &svg]);
    refused(&out, &["every point", "pipeline.micro_batches=0", "must be at least 1"], &[]);
    assert!(files_in(dir.path()).is_empty());

    // Four points shared among five shards: shard 5 holds none.
    let out = baton(&["sweep", DEMO, "--vary", "pipeline.micro_batches=1..4", "--shard", "5/5", "--csv", &csv]);
    refused(&out, &["--shard 5/5 holds no point", "4 point"], &[]);
    assert!(files_in(dir.path()).is_empty());
}

#[test]
fn merge_refuses_missing_repeated_and_foreign_parts() {
    let dir = tempfile::tempdir().unwrap();
    let part = |scenario: &str, i: u32, n: u32| {
        let path =
            dir.path().join(format!("{}-{i}of{n}.csv", Path::new(scenario).file_stem().unwrap().to_string_lossy()));
        let shard = format!("{i}/{n}");
        let out = baton(&[
            "sweep",
            scenario,
            "--vary",
            "pipeline.micro_batches=2..16*2",
            "--shard",
            &shard,
            "--csv",
            path.to_str().unwrap(),
        ]);
        assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
        path.display().to_string()
    };
    let (a1, a2, a3) = (part(DEMO, 1, 3), part(DEMO, 2, 3), part(DEMO, 3, 3));
    let other = part("scenarios/choose-m.yaml", 3, 3);
    let merged = dir.path().join("m.csv").display().to_string();
    refused(&baton(&["merge", &a1, &a2, "--csv", &merged]), &["shard 3/3 is missing"], &[]);
    refused(&baton(&["merge", &a1, &a2, &a2, "--csv", &merged]), &["shard 2/3", "appears in two parts"], &[]);
    refused(&baton(&["merge", &a1, &a2, &other, "--csv", &merged]), &["another sweep"], &[]);
    // The same scenario with another override is another sweep, too.
    let shifted = dir.path().join("shifted-3of3.csv").display().to_string();
    let out = baton(&[
        "sweep",
        DEMO,
        "--set",
        "cluster.link.latency=8us",
        "--vary",
        "pipeline.micro_batches=2..16*2",
        "--shard",
        "3/3",
        "--csv",
        &shifted,
    ]);
    assert_eq!(out.status.code(), Some(0));
    refused(&baton(&["merge", &a1, &a2, &shifted, "--csv", &merged]), &["another sweep"], &[]);
    assert!(!Path::new(&merged).exists());
    // A part that lost a line is refused too.
    let text3 = std::fs::read_to_string(&a3).unwrap();
    let short: Vec<&str> = text3.lines().collect();
    assert!(short.len() >= 2, "shard 3 holds a point");
    std::fs::write(&a3, short[..short.len() - 1].join("\n") + "\n").unwrap();
    let out = baton(&["merge", &a1, &a2, &a3, "--csv", &merged]);
    assert_eq!(out.status.code(), Some(2));
    assert!(!Path::new(&merged).exists());
    // The parts are plain CSV: one header row, the identifying columns last,
    // every row as long as the header (as a spreadsheet or pandas reads it).
    let header = std::fs::read_to_string(&a1).unwrap().lines().next().unwrap().to_string();
    assert!(header.ends_with(",point,grid,grid_points,shard"), "{header}");
    let mut reader = csv::Reader::from_path(&a1).unwrap();
    let width = reader.headers().unwrap().len();
    let rows: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    assert!(!rows.is_empty() && rows.iter().all(|r| r.len() == width));
    // 2..16*2 is 2, 4, 8, 16: four points.
    assert!(rows.iter().all(|r| &r[width - 1] == "1/3" && &r[width - 2] == "4"), "shard 1/3 of 4 points");
}

#[test]
fn applying_a_split_elsewhere_keeps_the_profile_reachable() {
    let dir = tempfile::tempdir().unwrap();
    let profiles = dir.path().join("profiles");
    std::fs::create_dir(&profiles).unwrap();
    // Export the demo's layers as a profile and point a scenario at it.
    let out = baton(&["run", DEMO, "--layers-csv", profiles.join("demo.csv").to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let scenario = demo_with(
        dir.path(),
        "profiled.yaml",
        "  layers:\n    - { name: embed, forward: 0.6ms, backward: 1.2ms, activation: 12MiB }\n    - { name: block, repeat: 10, forward: 1.1ms, backward: 2.2ms, activation: 12MiB }\n    - { name: head, forward: 2.4ms, backward: 4.8ms, activation: 12MiB }\n",
        "  profile: profiles/demo.csv\n",
    );
    let elsewhere = dir.path().join("plans").join("next");
    std::fs::create_dir_all(&elsewhere).unwrap();
    let applied = elsewhere.join("balanced.yaml");
    let out = baton(&["split", &scenario, "--apply", applied.to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let written = std::fs::read_to_string(&applied).unwrap();
    // From plans/next/ the profile is two directories up.
    assert!(written.contains("profile: ../../profiles/demo.csv"), "{written}");
    // The editor's schema comment follows the copy too (it was
    // ../docs/scenario.schema.json from scenarios/).
    let out = baton(&["split", "scenarios/heavy-head.yaml", "--apply", elsewhere.join("hh.yaml").to_str().unwrap()]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let first = std::fs::read_to_string(elsewhere.join("hh.yaml")).unwrap().lines().next().unwrap().to_string();
    let schema = first.strip_prefix("# yaml-language-server: $schema=").expect("the schema comment is kept");
    let docs = std::fs::canonicalize(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/scenario.schema.json")).unwrap();
    assert_eq!(std::fs::canonicalize(elsewhere.join(schema)).unwrap(), docs, "{first}");
    // Run from another working directory: the path is relative to the file.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_baton"))
        .args(["run", applied.to_str().unwrap()])
        .current_dir(&profiles)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
}

#[test]
fn a_run_too_large_for_memory_is_refused_before_it_starts() {
    let dir = tempfile::tempdir().unwrap();
    let svg = dir.path().join("t.svg").display().to_string();
    // 2,000,000 micro-batches on 4 stages under 1F1B: 4 x 2 x 2e6 = 1.6e7
    // operations and 3 boundaries x 2 x 2e6 = 1.2e7 transfers.
    let out = baton(&["run", DEMO, "--set", "pipeline.micro_batches=2000000", "--max-memory", "1GiB", "--svg", &svg]);
    let err = refused(
        &out,
        &["16000000 operations", "12000000 transfers", "--max-memory 1.00 GiB", "GiB"],
        &["panicked", "alloc"],
    );
    // The estimate is above the limit it was refused by: parse "about X GiB".
    let about: f64 = err.split("needs about ").nth(1).unwrap().split(' ').next().unwrap().parse().unwrap();
    assert!(about > 1.0, "{err}");
    assert!(files_in(dir.path()).is_empty());
    // A bad size is a usage error.
    assert_eq!(baton(&["run", DEMO, "--max-memory", "lots"]).status.code(), Some(2));
    // The same scenario at a size that fits runs.
    let out = baton(&["run", DEMO, "--set", "pipeline.micro_batches=16", "--max-memory", "1GiB"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    // Each command that simulates honours the limit.
    for cmd in [
        vec!["split", DEMO, "--set", "pipeline.micro_batches=2000000", "--max-memory", "1GiB"],
        vec!["compare", DEMO, DEMO, "--set", "pipeline.micro_batches=2000000", "--max-memory", "1GiB"],
    ] {
        let out = baton(&cmd);
        assert_eq!(out.status.code(), Some(2), "{cmd:?}: {}", text(&out.stderr));
        assert!(text(&out.stderr).contains("--max-memory"), "{cmd:?}");
    }
    // A sweep skips the points that would not fit, with the estimate.
    let out = baton(&["sweep", DEMO, "--vary", "pipeline.micro_batches=8,2000000", "--max-memory", "1GiB"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let table = text(&out.stdout);
    assert!(table.contains("1 skipped") && table.contains("pipeline.micro_batches=2000000: "), "{table}");
}
