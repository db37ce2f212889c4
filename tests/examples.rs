//! Every command a user is shown runs as written: the examples in each
//! `--help`, the commands in the scenario files' comments and the `$ baton`
//! commands of the README. Each runs through `sh` (so quoting, globs and
//! pipes are the shell's) in a scratch directory holding a copy of
//! `scenarios/` and `benches/scenarios/`, with `baton` first on the PATH, and must exit 0 without
//! skipping a sweep point it did not mean to.

mod common;

use common::text;
use std::path::{Path, PathBuf};
use std::process::Command;

const SUBCOMMANDS: [&str; 5] = ["run", "split", "sweep", "merge", "compare"];

/// The `baton ...` lines after `Examples:` in a help text.
fn help_examples(help: &str) -> Vec<String> {
    help.lines()
        .skip_while(|l| !l.starts_with("Examples:"))
        .skip(1)
        .take_while(|l| l.trim().is_empty() || l.starts_with("  baton "))
        .filter(|l| !l.trim().is_empty())
        .map(|l| l.trim().to_string())
        .collect()
}

/// Joins lines ending in `\` with the next, after `strip` has taken each
/// line's prefix off (a comment's `#`, a prompt's `$`).
fn joined<'a>(lines: impl Iterator<Item = &'a str>) -> Vec<String> {
    let mut out = Vec::new();
    let mut current = String::new();
    for line in lines {
        let line = line.trim();
        match line.strip_suffix('\\') {
            Some(head) => {
                current.push_str(head.trim_end());
                current.push(' ');
            }
            None => {
                current.push_str(line);
                out.push(std::mem::take(&mut current));
            }
        }
    }
    out
}

/// Commands in a scenario's leading comment: `#   baton ...` lines (with
/// continuations) and `` `baton ...` `` in the text.
fn comment_examples(yaml: &str) -> Vec<String> {
    let comment: Vec<&str> = yaml.lines().take_while(|l| l.starts_with('#')).map(|l| &l[1..]).collect();
    let mut out = Vec::new();
    let mut lines = comment.iter();
    while let Some(line) = lines.next() {
        if line.trim_start().starts_with("baton ") {
            out.push(command_from(line, &mut lines.by_ref().copied()));
        }
    }
    for quoted in comment.join(" ").split('`').skip(1).step_by(2) {
        if quoted.starts_with("baton ") {
            out.push(quoted.to_string());
        }
    }
    out
}

/// The README's commands: `$ baton ...` lines in code blocks (with
/// continuations) and the indented `baton ...` lines a block shows as the
/// command to type next.
fn readme_examples(readme: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut in_block = false;
    let mut lines = readme.lines();
    while let Some(line) = lines.next() {
        if line.starts_with("```") {
            in_block = !in_block;
            continue;
        }
        if !in_block {
            continue;
        }
        let command = if let Some(c) = line.strip_prefix("$ ") {
            c
        } else if line.starts_with("  baton ") {
            line
        } else {
            continue;
        };
        out.push(command_from(command, &mut lines));
    }
    out
}

/// The command that starts at `first`, taking continuation lines (after a
/// line ending in `\\`) from `rest`, joined into one line.
fn command_from<'a>(first: &'a str, rest: &mut impl Iterator<Item = &'a str>) -> String {
    let mut block = vec![first];
    while block.last().is_some_and(|l| l.trim_end().ends_with('\\')) {
        match rest.next() {
            Some(next) => block.push(next),
            None => break,
        }
    }
    joined(block.into_iter()).concat()
}

/// A scratch directory holding copies of the scenario directories.
fn scratch() -> tempfile::TempDir {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = tempfile::tempdir().unwrap();
    for sub in SCENARIO_DIRS {
        copy_dir(&root.join(sub), &dir.path().join(sub));
    }
    dir
}

/// Directories of scenario files, whose comments may show commands.
const SCENARIO_DIRS: [&str; 2] = ["scenarios", "benches/scenarios"];

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for entry in std::fs::read_dir(from).unwrap() {
        let entry = entry.unwrap();
        std::fs::copy(entry.path(), to.join(entry.file_name())).unwrap();
    }
}

/// Runs `command` with `sh -c` in `dir`; panics with its output unless it
/// exits 0 and skips no sweep point.
fn runs(dir: &Path, command: &str, origin: &str) {
    let bin = PathBuf::from(env!("CARGO_BIN_EXE_baton"));
    let path = format!("{}:{}", bin.parent().unwrap().display(), std::env::var("PATH").unwrap_or_default());
    let out = Command::new("sh").arg("-c").arg(command).env("PATH", path).current_dir(dir).output().unwrap();
    let (stdout, stderr) = (text(&out.stdout), text(&out.stderr));
    assert_eq!(out.status.code(), Some(0), "{origin}: `{command}` failed:\n{stdout}\n{stderr}");
    assert!(!stderr.contains("error"), "{origin}: `{command}`:\n{stderr}");
    if command.starts_with("baton sweep") && !command.contains("pipeline.chunks=1,2") {
        // Only the README's sweep shows skipped points on purpose.
        assert!(stdout.contains("; 0 skipped"), "{origin}: `{command}` skipped points:\n{stdout}");
    }
}

/// Whether `jq` is installed (an example pipes into it).
fn have_jq() -> bool {
    Command::new("jq").arg("--version").output().is_ok_and(|o| o.status.success())
}

#[test]
fn help_examples_run_as_written() {
    let dir = scratch();
    let help = |args: &[&str]| {
        let out = Command::new(env!("CARGO_BIN_EXE_baton")).args(args).output().unwrap();
        assert_eq!(out.status.code(), Some(0));
        text(&out.stdout)
    };
    let mut all = help_examples(&help(&["--help"]));
    let mut count = all.len();
    for sub in SUBCOMMANDS {
        let examples = help_examples(&help(&[sub, "--help"]));
        assert!(!examples.is_empty(), "`baton {sub} --help` shows no example");
        count += examples.len();
        all.extend(examples);
    }
    assert!(count >= 14, "{all:#?}");
    for command in &all {
        if command.starts_with("baton merge") {
            // The parts merged are those of the sharded sweep example.
            let shard = all.iter().find(|c| c.contains("--shard 2/4")).expect("a sharded sweep example");
            for i in [1, 3, 4] {
                runs(
                    dir.path(),
                    &shard.replace("2/4", &format!("{i}/4")).replace("part2", &format!("part{i}")),
                    "setup",
                );
            }
        }
        if command.contains("| jq") && !have_jq() {
            runs(dir.path(), command.split(" | ").next().unwrap(), "--help (without jq)");
            continue;
        }
        runs(dir.path(), command, "--help");
    }
}

#[test]
fn scenario_comment_commands_run_as_written() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = scratch();
    let mut count = 0;
    let mut files: Vec<_> = SCENARIO_DIRS
        .iter()
        .flat_map(|sub| std::fs::read_dir(root.join(sub)).unwrap().map(|e| e.unwrap().path()))
        .collect();
    files.sort();
    for file in files {
        let yaml = std::fs::read_to_string(&file).unwrap();
        for command in comment_examples(&yaml) {
            count += 1;
            runs(dir.path(), &command, &file.display().to_string());
        }
    }
    assert!(count >= 4, "the scenarios' comments show {count} commands");
}

#[test]
fn readme_commands_run_as_written() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = scratch();
    let readme = std::fs::read_to_string(root.join("README.md")).unwrap();
    let commands = readme_examples(&readme);
    assert!(commands.len() >= 6, "{commands:#?}");
    for command in &commands {
        assert!(command.starts_with("baton "), "{command}");
        runs(dir.path(), command, "README");
    }
}

#[test]
fn the_extractors_find_what_a_reader_sees() {
    let help = "About\n\nExamples:\n  baton run a.yaml\n  baton run b.yaml --svg -\n\n  baton split c.yaml\n\nExit status: 0\n";
    assert_eq!(help_examples(help), ["baton run a.yaml", "baton run b.yaml --svg -", "baton split c.yaml"]);
    let yaml =
        "# Try:\n#   baton sweep s.yaml --vary a=1,2 \\\n#     --vary b=3\n# or `baton split s.yaml`.\ntitle: t\n";
    assert_eq!(comment_examples(yaml), ["baton sweep s.yaml --vary a=1,2 --vary b=3", "baton split s.yaml"]);
    let readme = "text `baton run X`\n```\n$ baton run a.yaml \\\n    --svg a.svg\nout\n  baton run b.yaml\nbaton run SCENARIO\n```\n";
    assert_eq!(readme_examples(readme), ["baton run a.yaml --svg a.svg", "baton run b.yaml"]);
}
