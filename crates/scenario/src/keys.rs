//! The scenario format's keys: every section's keys with their type,
//! bounds, default and meaning, in one place.
//!
//! The reader takes each section's allowed keys, and the bounds of its whole
//! numbers, from these tables, and [`schema`] turns the same tables into a
//! JSON Schema (draft 2020-12) for editors; a quantity's pattern is built
//! from the unit tables the parser uses ([`crate::units`]). Checks that
//! depend on other keys (a split that sums to the layer count, `kv_heads`
//! dividing `heads`) are the reader's alone.

use serde_json::{json, Map, Value};

use crate::units;

/// One key of a section.
#[derive(Debug)]
pub struct Key {
    /// Its name within its section.
    pub name: &'static str,
    /// What it holds.
    pub ty: Type,
    /// Whether the section must give it (alternatives such as `model.layers`
    /// or `model.transformer` are not marked required; see [`Type::OneOf`]).
    pub required: bool,
    /// Its default, as a user would write it; `None` when there is none.
    pub default: Option<Default>,
    /// What it means, for editors and `baton schema`.
    pub doc: &'static str,
}

/// A default value.
#[derive(Debug)]
pub enum Default {
    /// A whole number.
    Whole(i64),
    /// A number.
    Number(f64),
    /// Text, or a quantity written with its unit.
    Text(&'static str),
    /// `true` or `false`.
    Bool(bool),
}

/// The kinds of quantity with units.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Unit {
    /// `ns` ... `s`.
    Duration,
    /// `B` ... `TiB`.
    Size,
    /// `B/s` ... `Tbit/s`.
    Bandwidth,
    /// `FLOP/s` ... `PFLOP/s`.
    FlopRate,
}

/// What a key holds.
#[derive(Debug)]
pub enum Type {
    /// Text (numbers are taken as their text).
    Text,
    /// A path, relative to the scenario file.
    Path,
    /// A whole number in `min..=max`.
    Whole {
        /// The least value.
        min: i64,
        /// The greatest value.
        max: i64,
    },
    /// A number with these bounds.
    Number {
        /// The least value.
        min: f64,
        /// Whether `min` itself is excluded.
        min_exclusive: bool,
        /// The greatest value.
        max: f64,
        /// Whether `max` itself is excluded.
        max_exclusive: bool,
    },
    /// A quantity with a unit, e.g. `1.2ms`.
    Quantity(Unit),
    /// A count: a whole number, or one with `k`, `M`, `B` or `T`.
    Count,
    /// `true` or `false`.
    Bool,
    /// One of these names.
    Choice(&'static [&'static str]),
    /// A mapping of these keys.
    Section(&'static [Key]),
    /// A mapping of these keys that gives exactly one of the alternatives,
    /// each a set of keys that must be given together.
    OneOf(&'static [Key], &'static [&'static [&'static str]]),
    /// A list of mappings of these keys.
    List(&'static [Key]),
    /// `pipeline.split`: `even` or a list of whole numbers >= 1.
    Split,
    /// `placement`: `packed`, `spread` or a list of device ids.
    Placement,
    /// A list of distinct names from this set.
    Names(&'static [&'static str]),
}

const MAX_DEVICES: i64 = crate::MAX_DEVICES as i64;
const MAX_LAYERS: i64 = crate::MAX_LAYERS as i64;
const MAX_STAGES: i64 = crate::MAX_STAGES as i64;

const fn key(name: &'static str, ty: Type, doc: &'static str) -> Key {
    Key { name, ty, required: false, default: None, doc }
}

const fn required(name: &'static str, ty: Type, doc: &'static str) -> Key {
    Key { name, ty, required: true, default: None, doc }
}

const fn with_default(name: &'static str, ty: Type, default: Default, doc: &'static str) -> Key {
    Key { name, ty, required: false, default: Some(default), doc }
}

const fn whole(min: i64, max: i64) -> Type {
    Type::Whole { min, max }
}

/// The whole file.
pub const TOP: &[Key] = &[
    key("title", Type::Text, "Free text shown on charts and in reports; the file name when left out."),
    with_default("seed", whole(0, i64::MAX), Default::Whole(1), "Seed of the one random generator (ChaCha8); printed in every report."),
    required("model", Type::OneOf(MODEL, &[&["layers"], &["profile"], &["transformer"]]), "The model: give exactly one of layers, profile or transformer."),
    required("cluster", Type::OneOf(CLUSTER, &[&["devices", "link"], &["nodes", "devices_per_node", "device_link", "node_link"]]), "The accelerators and how they are connected: devices and link, or nodes, devices_per_node, device_link and node_link."),
    required("pipeline", Type::Section(PIPELINE), "How the model is cut into stages and scheduled."),
    key("training", Type::Section(TRAINING), "Memory accounting of training."),
    key("parallel", Type::Section(PARALLEL), "Data parallelism: replicas of the pipeline and how they are numbered onto devices."),
    key("gradients", Type::Section(GRADIENTS), "How the replicas' gradients are summed at the end of the step."),
    with_default("placement", Type::Placement, Default::Text("packed"), "Where each stage runs: packed (numbered by parallel.order), spread (stages dealt out over the nodes in turn; one replica only) or a list naming a distinct device for each stage of each replica, replica 0's stages first."),
];

/// `parallel`.
pub const PARALLEL: &[Key] = &[
    with_default("data", whole(1, MAX_DEVICES), Default::Whole(1), "d: replicas of the pipeline, each running its own micro-batches; their gradients are summed every step."),
    with_default("tensor", whole(1, MAX_DEVICES), Default::Whole(1), "t: devices that share each layer of a stage, in lock-step (tensor parallelism)."),
    with_default("sequence", Type::Bool, Default::Bool(false), "true: sequence parallelism for the activations a tensor group keeps whole otherwise."),
    key(
        "order",
        Type::Names(&["tensor", "data", "pipeline"]),
        "How tensor ranks, replicas and stages are numbered onto devices with placement: packed, fastest-varying first; [tensor, data, pipeline] is the default, and a list without tensor puts it first.",
    ),
];

/// `gradients`.
pub const GRADIENTS: &[Key] = &[
    with_default(
        "sync",
        Type::Choice(&["ring", "halving-doubling", "tree", "hierarchical", "parameter-server", "direct"]),
        Default::Text("ring"),
        "The algorithm that sums a bucket's gradient over the replicas holding it.",
    ),
    with_default("bucket", Type::Quantity(Unit::Size), Default::Text("25MB"), "Gradients are synchronised in buckets of at least this size, last layer first."),
    with_default("overlap", Type::Bool, Default::Bool(true), "true: a bucket starts as soon as the last backward has produced it; false: after the device's last backward."),
    with_default("bytes_per_param", whole(1, 64), Default::Whole(2), "Gradient element size on the wire before compression."),
    with_default("servers", whole(1, MAX_DEVICES), Default::Whole(1), "parameter-server only: the number of servers S."),
    with_default(
        "server_devices",
        Type::Choice(&["colocated", "dedicated"]),
        Default::Text("colocated"),
        "colocated: server k is replica k's device (S at most parallel.data); dedicated: S devices of their own, the lowest-numbered devices no replica uses.",
    ),
    key("compression", Type::Section(COMPRESSION), "Gradient compression on the wire (changes convergence, which is not modelled)."),
];

/// `gradients.compression`.
pub const COMPRESSION: &[Key] = &[
    with_default("kind", Type::Choice(&["none", "quantize", "top-k"]), Default::Text("none"), "none, quantize (bits per element) or top-k (a fraction of elements kept, each with a 4-byte index, exchanged as an all-gather)."),
    with_default("bits", whole(1, 64), Default::Whole(8), "quantize: bits per element on the wire."),
    with_default(
        "keep",
        Type::Number { min: 0.0, min_exclusive: true, max: 1.0, max_exclusive: false },
        Default::Number(0.001),
        "top-k: fraction of elements kept.",
    ),
    key("rate", Type::Quantity(Unit::Bandwidth), "Encode and decode speed in dense gradient bytes per second; each occupies the device (required with quantize or top-k)."),
];

/// `model`.
pub const MODEL: &[Key] = &[
    key("layers", Type::List(LAYER), "The layers in model order, each with its costs per micro-batch."),
    key("profile", Type::Path, "A CSV profile of the layers (name,forward_ms,backward_ms,activation_bytes,stash_bytes,params,tied_params[,tensor_bytes]), relative to the scenario file."),
    key("transformer", Type::Section(TRANSFORMER), "Derive the layers from a transformer's shape; needs cluster.device.peak and efficiency."),
];

/// `model.layers[]`.
pub const LAYER: &[Key] = &[
    key("name", Type::Text, "The layer's name; repeated layers are named name.0, name.1, ...; layer<i> when left out."),
    with_default("repeat", whole(1, MAX_LAYERS), Default::Whole(1), "How many identical layers this entry stands for."),
    required("forward", Type::Quantity(Unit::Duration), "Forward time of one micro-batch through the layer (more than 0)."),
    key("backward", Type::Quantity(Unit::Duration), "Backward time of one micro-batch; twice forward when left out (common practice)."),
    required("activation", Type::Quantity(Unit::Size), "Bytes the layer sends on per micro-batch; the gradient coming back across the same boundary has the same size."),
    key("stash", Type::Quantity(Unit::Size), "Bytes kept per micro-batch from the forward until the backward; activation when left out."),
    with_default("params", Type::Count, Default::Whole(0), "Parameters of the layer, e.g. 350M or 1.2B."),
    with_default("tied_params", Type::Count, Default::Whole(0), "Parameters the layer shares with the first layer (tied weights); a device other than device 0 that runs it keeps its own copy."),
    with_default("tensor_bytes", Type::Quantity(Unit::Size), Default::Text("0B"), "With parallel.tensor > 1: bytes of each of the layer's two all-reduces per pass (forward and backward)."),
    key("weight", Type::Quantity(Unit::Duration), "The weight-gradient part (W) of backward, run apart by the zero-bubble schedules; half of backward when left out (the zero-bubble paper's working assumption)."),
    key("weight_stash", Type::Quantity(Unit::Size), "With a split backward: bytes kept per micro-batch from the end of B until the end of W (the weight products' inputs and output gradients); the whole stash when left out (the cautious choice)."),
];

/// `model.transformer`.
pub const TRANSFORMER: &[Key] = &[
    required("layers", whole(1, MAX_LAYERS - 2), "l: transformer layers."),
    required("hidden", whole(1, 1 << 24), "h: hidden size."),
    required("heads", whole(1, 1 << 16), "a: attention (query) heads."),
    required("seq_len", whole(1, 1 << 24), "s: sequence length."),
    required("vocab", whole(1, 1 << 26), "V: vocabulary size."),
    key("ffn_hidden", whole(1, 1 << 26), "f: the feed-forward block's inner width; 4 x hidden when left out."),
    with_default(
        "gated_ffn",
        Type::Bool,
        Default::Bool(false),
        "Three h x f projections (gate, up, down) instead of two, as in the GLU variants.",
    ),
    key(
        "kv_heads",
        whole(1, 1 << 16),
        "Key and value heads (grouped-query attention); must divide heads; heads when left out.",
    ),
    with_default(
        "attention",
        Type::Choice(&["standard", "flash"]),
        Default::Text("standard"),
        "flash: the s x s score matrices are recomputed in the backward pass, not stored.",
    ),
    with_default(
        "tied_embeddings",
        Type::Bool,
        Default::Bool(true),
        "Whether the output layer shares the token embedding's V x h matrix.",
    ),
    with_default(
        "bytes_per_value",
        whole(1, 8),
        Default::Whole(2),
        "Bytes per activation value; stash and sent bytes scale by bytes_per_value / 2.",
    ),
];

/// `cluster`.
pub const CLUSTER: &[Key] = &[
    key("devices", whole(1, MAX_DEVICES), "Accelerators, every ordered pair joined by its own link (with link)."),
    key("link", Type::Section(LINK), "The link between every ordered pair of devices (with devices)."),
    key("nodes", whole(1, 4_096), "Boxes of devices (with devices_per_node, device_link, node_link)."),
    key("devices_per_node", whole(1, 4_096), "Devices in each box, numbered node-major."),
    key("device_link", Type::Section(LINK), "Each device's full-duplex link to its node's switch."),
    key("node_link", Type::Section(NODE_LINK), "Each node's full-duplex cards to the fabric."),
    with_default(
        "jitter",
        Type::Number { min: 0.0, min_exclusive: false, max: 1.0, max_exclusive: true },
        Default::Number(0.0),
        "Each op's compute time is multiplied by a factor drawn uniformly from [1 - jitter, 1 + jitter].",
    ),
    key("device", Type::Section(DEVICE), "One accelerator's speed and memory."),
    key(
        "variability",
        Type::Section(VARIABILITY),
        "How compute times vary: jitter, slower devices, rare slow ops (with --trials, many draws).",
    ),
];

/// `cluster.variability`.
pub const VARIABILITY: &[Key] = &[
    key(
        "jitter",
        Type::Number { min: 0.0, min_exclusive: false, max: 1.0, max_exclusive: true },
        "Each op's compute time is multiplied by a factor drawn uniformly from [1 - jitter, 1 + jitter] (instead of cluster.jitter).",
    ),
    key("stragglers", Type::List(STRAGGLER), "Devices that are always slower, each with its slowdown."),
    key(
        "slow_chance",
        Type::Number { min: 0.0, min_exclusive: false, max: 1.0, max_exclusive: false },
        "Chance that an op is a rare slow one (0 when left out).",
    ),
    key(
        "slow_factor",
        Type::Number { min: 1.0, min_exclusive: false, max: 1000.0, max_exclusive: false },
        "How many times longer a rare slow op takes (2 when left out).",
    ),
    key(
        "link_jitter",
        Type::Number { min: 0.0, min_exclusive: false, max: 1.0, max_exclusive: true },
        "Each transfer's latency and the time its bytes take are multiplied by a factor drawn uniformly from [1 - link_jitter, 1 + link_jitter] (0 when left out).",
    ),
];

/// `cluster.variability.stragglers[]`.
pub const STRAGGLER: &[Key] = &[
    required("device", whole(0, MAX_DEVICES - 1), "The device, numbered as in the report (devices[].device)."),
    required(
        "slowdown",
        Type::Number { min: 1.0, min_exclusive: false, max: 1000.0, max_exclusive: false },
        "How many times longer each of its ops takes.",
    ),
];

/// `cluster.link` and `cluster.device_link`.
pub const LINK: &[Key] = &[
    required("latency", Type::Quantity(Unit::Duration), "Time for the first byte to cross the link."),
    required(
        "bandwidth",
        Type::Quantity(Unit::Bandwidth),
        "Bytes per second of one direction of the link (more than 0).",
    ),
];

/// `cluster.node_link`.
pub const NODE_LINK: &[Key] = &[
    required("latency", Type::Quantity(Unit::Duration), "Time for the first byte to cross the card's link."),
    required(
        "bandwidth",
        Type::Quantity(Unit::Bandwidth),
        "Bytes per second of one direction of one card (more than 0).",
    ),
    with_default("count", whole(1, 64), Default::Whole(1), "Cards per node."),
];

/// `cluster.device`.
pub const DEVICE: &[Key] = &[
    key("peak", Type::Quantity(Unit::FlopRate), "Peak arithmetic speed of one device (for model.transformer)."),
    key(
        "efficiency",
        Type::Number { min: 0.0, min_exclusive: true, max: 1.0, max_exclusive: false },
        "Fraction of the peak reached (for model.transformer).",
    ),
    key("memory", Type::Quantity(Unit::Size), "Memory capacity of one device; unlimited when left out."),
];

/// `pipeline`.
pub const PIPELINE: &[Key] = &[
    required("stages", whole(1, MAX_STAGES), "p: pipeline stages, one device each, at most cluster devices."),
    with_default(
        "split",
        Type::Split,
        Default::Text("even"),
        "Layers per piece, in model order (stages x chunks whole numbers summing to the layer count), or even.",
    ),
    required("micro_batches", whole(1, u32::MAX as i64), "m: micro-batches per step."),
    required(
        "schedule",
        Type::Choice(&["fill-drain", "1f1b", "interleaved", "zb-h1", "zb-h2", "zb-auto", "custom"]),
        "The pipeline schedule; custom reads each device's order from pipeline.order.",
    ),
    with_default(
        "chunks",
        whole(1, u32::MAX as i64),
        Default::Whole(1),
        "v: model chunks per device; more than 1 only with interleaved.",
    ),
    with_default(
        "micro_batch_size",
        whole(1, u32::MAX as i64),
        Default::Whole(1),
        "Samples per micro-batch (b in the transformer formulas).",
    ),
    with_default(
        "blocking_sends",
        Type::Bool,
        Default::Bool(false),
        "A device that sends waits until the data has arrived before its next operation.",
    ),
    key(
        "order",
        Type::Path,
        "With schedule custom: a text file of each device's order, one line per device (`0: F0 F1 B0 ...`; see baton order), relative to the scenario file.",
    ),
    key(
        "max_in_flight",
        whole(1, u32::MAX as i64),
        "zb-auto: most micro-batches a device holds at once (from a forward's start to the end of its last backward op); stages (1F1B's peak) when left out.",
    ),
    with_default("steps", whole(1, 1 << 20), Default::Whole(1), "Training steps simulated back to back (each of micro_batches micro-batches)."),
    with_default(
        "flush",
        Type::Bool,
        Default::Bool(true),
        "true: a global barrier between steps (no op of a step starts before every device has finished the previous step, its synchronisation and its update); false: each device goes on as soon as its own order and weights allow (one replica only).",
    ),
    with_default(
        "weight_versions",
        Type::Choice(&["one", "stash", "double"]),
        Default::Text("one"),
        "With flush false: one (each step waits for its device's previous update), stash (PipeDream: a version per micro-batch in flight, the next step's forwards fill the drain) or double (PipeDream-2BW: two versions).",
    ),
    with_default(
        "version_bytes_per_param",
        whole(1, 64),
        Default::Whole(2),
        "Bytes per parameter of each weight version kept beside the model state by stash or double.",
    ),
];

/// `training`.
pub const TRAINING: &[Key] = &[
    with_default(
        "state_bytes_per_param",
        whole(0, 1 << 20),
        Default::Whole(16),
        "Bytes of weights, gradients and optimizer state per parameter (16 for mixed-precision Adam).",
    ),
    with_default("reserved", Type::Quantity(Unit::Size), Default::Text("0B"), "Memory every device keeps aside."),
    with_default(
        "recompute",
        Type::Choice(&["none", "full"]),
        Default::Text("none"),
        "full: keep only each piece's input and run its forward again before its backward.",
    ),
    with_default(
        "shard",
        Type::Choice(&["none", "optimizer", "gradients"]),
        Default::Text("none"),
        "ZeRO stages: optimizer splits the optimizer state over the replicas, gradients also the gradients; either syncs by reduce-scatter, update, all-gather.",
    ),
    with_default("update", Type::Quantity(Unit::Duration), Default::Text("0ms"), "Optimizer update time per device, after its gradients are synchronised (divided by parallel.data when sharded)."),
];

/// The names of `keys`, in order.
pub fn names(keys: &[Key]) -> Vec<&'static str> {
    keys.iter().map(|k| k.name).collect()
}

/// A regular expression for a quantity in `unit`: a non-negative decimal
/// number, optional spaces, one of the parser's units.
pub fn pattern(unit: Unit) -> String {
    let table = match unit {
        Unit::Duration => units::DURATION,
        Unit::Size => units::SIZE,
        Unit::Bandwidth => units::BANDWIDTH,
        Unit::FlopRate => units::FLOP_RATE,
    };
    let names: Vec<&str> = table.iter().map(|(u, _)| *u).collect();
    format!("^\\s*([0-9]+\\.?[0-9]*|\\.[0-9]+)\\s*({})\\s*$", names.join("|"))
}

fn count_pattern() -> String {
    let names: Vec<&str> = units::COUNT.iter().map(|(u, _)| *u).filter(|u| !u.is_empty()).collect();
    format!("^\\s*([0-9]+\\.?[0-9]*|\\.[0-9]+)\\s*({})?\\s*$", names.join("|"))
}

fn default_json(d: &Default) -> Value {
    match d {
        Default::Whole(v) => json!(v),
        Default::Number(v) => json!(v),
        Default::Text(t) => json!(t),
        Default::Bool(b) => json!(b),
    }
}

fn type_json(ty: &Type) -> Map<String, Value> {
    let v = match ty {
        Type::Text => json!({ "type": ["string", "number", "boolean"] }),
        Type::Path => json!({ "type": "string" }),
        Type::Whole { min, max } => json!({ "type": "integer", "minimum": min, "maximum": max }),
        Type::Number { min, min_exclusive, max, max_exclusive } => {
            let mut m = Map::new();
            m.insert("type".into(), json!("number"));
            m.insert(if *min_exclusive { "exclusiveMinimum" } else { "minimum" }.into(), json!(min));
            m.insert(if *max_exclusive { "exclusiveMaximum" } else { "maximum" }.into(), json!(max));
            Value::Object(m)
        }
        Type::Quantity(unit) => json!({ "type": "string", "pattern": pattern(*unit) }),
        Type::Count => json!({
            "oneOf": [
                { "type": "integer", "minimum": 0 },
                { "type": "string", "pattern": count_pattern() }
            ]
        }),
        Type::Bool => json!({ "type": "boolean" }),
        Type::Choice(names) => json!({ "type": "string", "enum": names }),
        Type::Section(keys) => Value::Object(section_json(keys)),
        Type::OneOf(keys, alternatives) => {
            let mut m = section_json(keys);
            // Each alternative: its keys given, and none of the others'.
            let one: Vec<Value> = alternatives
                .iter()
                .enumerate()
                .map(|(i, a)| {
                    let others: Vec<Value> = alternatives
                        .iter()
                        .enumerate()
                        .filter(|(j, _)| *j != i)
                        .flat_map(|(_, o)| o.iter())
                        .map(|k| json!({ "required": [k] }))
                        .collect();
                    json!({ "required": a, "not": { "anyOf": others } })
                })
                .collect();
            m.insert("oneOf".into(), Value::Array(one));
            Value::Object(m)
        }
        Type::List(keys) => json!({ "type": "array", "minItems": 1, "items": Value::Object(section_json(keys)) }),
        Type::Split => json!({
            "oneOf": [
                { "const": "even" },
                { "type": "array", "minItems": 1, "items": { "type": "integer", "minimum": 1 } }
            ]
        }),
        Type::Names(names) => json!({
            "type": "array", "minItems": 1, "uniqueItems": true, "items": { "type": "string", "enum": names }
        }),
        Type::Placement => json!({
            "oneOf": [
                { "enum": ["packed", "spread"] },
                { "type": "array", "minItems": 1, "uniqueItems": true, "items": { "type": "integer", "minimum": 0 } }
            ]
        }),
    };
    match v {
        Value::Object(m) => m,
        _ => Map::new(),
    }
}

fn section_json(keys: &[Key]) -> Map<String, Value> {
    let mut props = Map::new();
    for k in keys {
        let mut p = type_json(&k.ty);
        p.insert("description".into(), json!(k.doc));
        if let Some(d) = &k.default {
            p.insert("default".into(), default_json(d));
        }
        props.insert(k.name.into(), Value::Object(p));
    }
    let required: Vec<&str> = keys.iter().filter(|k| k.required).map(|k| k.name).collect();
    let mut m = Map::new();
    m.insert("type".into(), json!("object"));
    m.insert("properties".into(), Value::Object(props));
    m.insert("required".into(), json!(required));
    m.insert("additionalProperties".into(), json!(false));
    m
}

/// The scenario format as a JSON Schema (draft 2020-12), with every key's
/// description, type, unit pattern, bounds and default.
pub fn schema() -> Value {
    let mut root = section_json(TOP);
    let mut out = Map::new();
    out.insert("$schema".into(), json!("https://json-schema.org/draft/2020-12/schema"));
    out.insert("$id".into(), json!("https://baton.invalid/scenario.schema.json"));
    out.insert("title".into(), json!("baton scenario"));
    out.insert(
        "description".into(),
        json!("A training step to simulate: the model's layers, the cluster and the pipeline layout. Quantities carry units (1.2ms, 12MiB, 25GB/s, 300TFLOP/s)."),
    );
    out.append(&mut root);
    Value::Object(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn patterns_follow_the_parser() {
        let re = pattern(Unit::Duration);
        assert_eq!(re, "^\\s*([0-9]+\\.?[0-9]*|\\.[0-9]+)\\s*(ns|us|ms|s)\\s*$");
        assert!(pattern(Unit::Bandwidth).contains("|GB/s|"));
        assert!(count_pattern().ends_with("(k|M|B|T)?\\s*$"));
    }

    #[test]
    fn every_choice_is_a_schedule_the_parser_knows() {
        let Some(Key { ty: Type::Choice(names), .. }) = PIPELINE.iter().find(|k| k.name == "schedule") else {
            panic!("pipeline.schedule is a choice")
        };
        for n in *names {
            assert!(n.parse::<baton_schedule::ScheduleKind>().is_ok(), "{n}");
        }
        assert_eq!(names.len(), baton_schedule::ScheduleKind::NAMED.len());
    }
}
