//! `baton schema`: the scenario format as a JSON Schema (draft 2020-12),
//! checked with a general-purpose validator against every scenario the
//! project ships, and against files the reader refuses.

mod common;

use common::{baton, text};
use std::path::{Path, PathBuf};

fn schema() -> serde_json::Value {
    let out = baton(&["schema"]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    serde_json::from_slice(&out.stdout).expect("the schema is JSON")
}

fn validator() -> jsonschema::Validator {
    let s = schema();
    assert_eq!(s["$schema"], "https://json-schema.org/draft/2020-12/schema");
    jsonschema::draft202012::new(&s).expect("the schema is a valid draft 2020-12 schema")
}

/// A YAML scenario as the JSON value an editor's validator sees.
fn as_json(yaml: &str) -> serde_json::Value {
    serde_saphyr::from_str(yaml).expect("YAML")
}

fn yaml_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        if path.is_dir() {
            yaml_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "yaml") {
            out.push(path);
        }
    }
}

fn errors(v: &jsonschema::Validator, doc: &serde_json::Value) -> Vec<String> {
    v.iter_errors(doc).map(|e| format!("{} at {}", e, e.instance_path())).collect()
}

#[test]
fn every_shipped_scenario_is_valid() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let v = validator();
    let mut files = Vec::new();
    for dir in ["scenarios", "benches/scenarios", "tests/fixtures"] {
        yaml_files(&root.join(dir), &mut files);
    }
    // The scenario `baton split --apply -` wrote in a fixture.
    files.push(root.join("tests/fixtures/split-heavy-head/stdout.txt"));
    assert!(files.len() >= 9, "{files:?}");
    for f in &files {
        let doc = as_json(&std::fs::read_to_string(f).unwrap());
        assert_eq!(errors(&v, &doc), Vec::<String>::new(), "{}", f.display());
    }
    // The README's full scenario example and the transformer variants.
    let readme = std::fs::read_to_string(root.join("README.md")).unwrap();
    let blocks: Vec<&str> = readme.split("```yaml\n").skip(1).map(|b| b.split("```").next().unwrap()).collect();
    let full: Vec<&&str> = blocks.iter().filter(|b| b.starts_with("title:")).collect();
    assert!(!full.is_empty(), "the README shows a whole scenario");
    for b in full {
        assert_eq!(errors(&v, &as_json(b)), Vec::<String>::new(), "{b}");
    }
}

/// The demo scenario with `from` replaced by `to`.
fn demo_with(from: &str, to: &str) -> serde_json::Value {
    let demo =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/unbalanced-split.yaml")).unwrap();
    assert!(demo.contains(from), "{from}");
    as_json(&demo.replacen(from, to, 1))
}

#[test]
fn mistakes_are_flagged_where_the_reader_refuses_them() {
    let v = validator();
    let cases = [
        // A misspelled key, at the top, in a section and in a layer.
        ("micro_batches: 8", "micro_batchs: 8", "micro_batchs"),
        ("title:", "titel:", "titel"),
        ("activation: 12MiB }", "activations: 12MiB }", "activations"),
        // A quantity without its unit, or with an unknown one.
        ("latency: 4us", "latency: 4", "latency"),
        ("bandwidth: 48GB/s", "bandwidth: 48 parsecs", "bandwidth"),
        // Out of range, a wrong name, both cluster forms.
        ("stages: 4", "stages: 0", "stages"),
        ("schedule: 1f1b", "schedule: 1f2b", "schedule"),
        ("devices: 4", "devices: 4\n  nodes: 2", "cluster"),
    ];
    for (from, to, needle) in cases {
        let doc = demo_with(from, to);
        let errs = errors(&v, &doc);
        assert!(!errs.is_empty(), "{to}: the schema accepts it");
        assert!(errs.iter().any(|e| e.contains(needle)), "{to}: {errs:?}");
    }
    // The reader refuses each one too.
    let demo =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/unbalanced-split.yaml")).unwrap();
    for (from, to, _) in cases {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("s.yaml");
        std::fs::write(&f, demo.replacen(from, to, 1)).unwrap();
        assert_eq!(baton(&["run", f.to_str().unwrap()]).status.code(), Some(2), "{to}");
    }
}

#[test]
fn every_key_has_a_description_and_units_have_patterns() {
    fn walk(node: &serde_json::Value, path: &str, seen: &mut Vec<String>) {
        let Some(props) = node.get("properties").and_then(|p| p.as_object()) else { return };
        for (k, p) in props {
            let here = if path.is_empty() { k.clone() } else { format!("{path}.{k}") };
            assert!(p.get("description").and_then(|d| d.as_str()).is_some_and(|d| !d.is_empty()), "{here}");
            seen.push(here.clone());
            walk(p, &here, seen);
            if let Some(items) = p.get("items") {
                walk(items, &format!("{here}[]"), seen);
            }
        }
    }
    let s = schema();
    let mut keys = Vec::new();
    walk(&s, "", &mut keys);
    for k in [
        "pipeline.micro_batches",
        "model.layers[].forward",
        "model.transformer.kv_heads",
        "cluster.node_link.count",
        "training.recompute",
        "placement",
    ] {
        assert!(keys.iter().any(|x| x == k), "{k} missing from {keys:?}");
    }
    let latency = &s["properties"]["cluster"]["properties"]["link"]["properties"]["latency"];
    assert_eq!(latency["pattern"], "^\\s*([0-9]+\\.?[0-9]*|\\.[0-9]+)\\s*(ns|us|ms|s)\\s*$");
    assert_eq!(s["properties"]["pipeline"]["properties"]["chunks"]["default"], 1);
    assert_eq!(s["properties"]["model"]["properties"]["transformer"]["properties"]["tied_embeddings"]["default"], true);
}

#[test]
fn the_committed_schema_is_current() {
    // docs/scenario.schema.json is what the scenarios' first lines point
    // editors at; regenerate it with `baton schema > docs/scenario.schema.json`.
    let committed = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/scenario.schema.json"))
        .expect("docs/scenario.schema.json");
    assert_eq!(committed, text(&baton(&["schema"]).stdout));
}
