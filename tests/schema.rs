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

/// A random scenario text drawing on every section and optional key.
fn random_scenario() -> impl proptest::strategy::Strategy<Value = String> {
    use proptest::prelude::*;
    let unit_space = prop_oneof![Just(""), Just(" ")];
    let layer = (1u32..50, proptest::option::of(0u32..100), 0u32..64, any::<bool>(), 1u32..4, unit_space.clone())
        .prop_map(|(f, b, a, named, repeat, sp)| {
            let mut l = format!("{{ forward: {f}{sp}ms, activation: {a}{sp}MiB, repeat: {repeat}");
            if let Some(b) = b {
                l += &format!(", backward: {b}.5{sp}ms");
            }
            if named {
                l += ", name: block, params: 350M, stash: 2MiB, tied_params: 12";
            }
            l + " }"
        });
    let layers =
        proptest::collection::vec(layer, 1..4).prop_map(|ls| format!("  layers:\n    - {}\n", ls.join("\n    - ")));
    let transformer = (
        1u32..6,
        prop_oneof![Just(1024u32), Just(2048)],
        proptest::option::of(prop_oneof![Just(1u32), Just(4), Just(16)]),
        any::<bool>(),
        any::<bool>(),
        any::<bool>(),
        proptest::option::of(1u32..5),
    )
        .prop_map(|(l, h, kv, gated, flash, untied, bpv)| {
            let mut t = format!("  transformer: {{ layers: {l}, hidden: {h}, heads: 16, seq_len: 512, vocab: 1000");
            if let Some(k) = kv {
                t += &format!(", kv_heads: {k}");
            }
            if gated {
                t += ", gated_ffn: true, ffn_hidden: 2816";
            }
            if flash {
                t += ", attention: flash";
            }
            if untied {
                t += ", tied_embeddings: false";
            }
            if let Some(b) = bpv {
                t += &format!(", bytes_per_value: {b}");
            }
            t + " }\n"
        });
    let model = prop_oneof![layers, transformer];
    let cluster = prop_oneof![
        (1u32..9).prop_map(|d| (d, format!("  devices: {d}\n  link: {{ latency: 5us, bandwidth: 25 GB/s }}\n"))),
        (1u32..3, 1u32..5).prop_map(|(n, d)| (
            n * d,
            format!(
                "  nodes: {n}\n  devices_per_node: {d}\n  device_link: {{ latency: 1us, bandwidth: 100GB/s }}\n  node_link: {{ latency: 3us, bandwidth: 200Gbit/s, count: 2 }}\n"
            )
        )),
    ];
    (model, cluster, 0usize..3, 1u32..9, any::<bool>(), any::<bool>(), any::<bool>(), 0usize..4).prop_map(
        |(model, (devices, cluster), k, m, device, training, spread, dp)| {
            let schedule = ["fill-drain", "1f1b", "interleaved"][k];
            let stages = devices.min(2);
            let mut text = format!("title: random\nseed: 7\nmodel:\n{model}cluster:\n{cluster}");
            if device {
                text += "  device: { peak: 300TFLOP/s, efficiency: 0.5, memory: 80GiB }\n  jitter: 0.1\n";
            } else {
                text += "  device: { peak: 300 TFLOP/s, efficiency: 1 }\n";
            }
            text += &format!(
                "pipeline:\n  stages: {stages}\n  split: even\n  micro_batches: {}\n  schedule: {schedule}\n  chunks: 1\n  micro_batch_size: 1\n  blocking_sends: {device}\n",
                m * stages
            );
            if training {
                text += "training: { state_bytes_per_param: 12, reserved: 1.5GiB, recompute: full, shard: optimizer, update: 2ms }\n";
            }
            if spread {
                text += "placement: spread\n";
            }
            let data = if devices >= 2 * stages { 2 } else { 1 };
            text += match dp {
                1 => format!("parallel: {{ data: {data}, order: [pipeline, data] }}\ngradients: {{ sync: ring, bucket: 10 MB, overlap: false }}\n"),
                2 => format!(
                    "parallel: {{ data: {data} }}\ngradients: {{ sync: direct, bytes_per_param: 4, servers: 1, server_devices: dedicated, \
                     compression: {{ kind: quantize, bits: 4, rate: 100 GB/s }} }}\n"
                ),
                3 => "parallel:\n  data: 1\ngradients:\n  sync: tree\n  compression: { kind: top-k, keep: 0.01, rate: 1TB/s }\n".to_string(),
                _ => String::new(),
            }
            .as_str();
            text
        },
    )
}

proptest::proptest! {
    #![proptest_config(proptest::prelude::ProptestConfig { cases: 200, ..Default::default() })]

    /// Whatever the reader accepts, the schema accepts: an editor never
    /// flags a scenario that runs.
    #[test]
    fn the_schema_accepts_every_scenario_the_reader_accepts(text in random_scenario()) {
        thread_local!(static VALIDATOR: jsonschema::Validator = validator());
        // (About 95% of these cases are valid; the rest have fewer layers than stages.)
        if baton::scenario::parse(&text, "r.yaml", "r", &[]).is_ok() {
            let doc = as_json(&text);
            let errs = VALIDATOR.with(|v| errors(v, &doc));
            proptest::prop_assert!(errs.is_empty(), "{text}\n{errs:?}");
        }
    }
}
