//! # baton-scenario: the scenario file
//!
//! Reads a YAML scenario (a model's layers, the cluster, the pipeline layout),
//! applies `--set KEY=VALUE` overrides, and validates it into a [`Scenario`]
//! whose every number carries its unit in its name. Every refusal names the key
//! path (`pipeline.split`) and where the value was written (line and column, or
//! the `--set` argument); see [`ScenarioError`].
//!
//! Quantities are parsed exactly (see [`units`]). Defaults: `backward` is twice
//! `forward` (common practice, no source), `repeat` is 1, `split` is `even`,
//! `chunks` is 1, `seed` is 1, `cluster.jitter` is 0, `title` is the file name.
//!
//! This crate deliberately knows nothing about simulation, links or reports: it
//! turns text into checked numbers.
#![warn(missing_docs)]

pub mod edit;
pub mod keys;
pub mod node;
pub mod pieces;
pub mod profile;
pub mod units;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::Mutex;

use baton_schedule::{check_shape, ScheduleError, ScheduleKind, Shape};
use thiserror::Error;

use keys::Key;

pub use node::{Node, Origin, Value};
pub use pieces::{Piece, PieceCosts};

/// One layer of the model, after `repeat` is expanded.
pub use baton_collective::Algorithm;
pub use baton_model::LayerCost;
pub use baton_model::{Attention, Speed, Transformer};

/// Where the layer table came from.
#[derive(Clone, Debug, PartialEq)]
pub enum ModelSource {
    /// Written in `model.layers`.
    Layers,
    /// Read from the CSV profile at this path (as resolved).
    Profile(std::path::PathBuf),
    /// Derived from `model.transformer` and `cluster.device`.
    Transformer(Transformer),
}

/// One accelerator's properties (`cluster.device`).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct DeviceSpec {
    /// Peak arithmetic speed.
    pub peak_flop_per_s: Option<u64>,
    /// Fraction of the peak reached.
    pub efficiency: Option<f64>,
    /// Memory capacity; `None` means unlimited.
    pub memory_bytes: Option<u64>,
}

/// Whether activations are recomputed in the backward pass.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum Recompute {
    /// Keep every layer's stash until the backward pass.
    #[default]
    None,
    /// Keep only each piece's input; run the piece's forward again before its
    /// backward (common practice, no source).
    Full,
}

impl Recompute {
    /// The name used in scenario files and reports.
    pub fn name(self) -> &'static str {
        match self {
            Recompute::None => "none",
            Recompute::Full => "full",
        }
    }
}

/// The `training` section.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Training {
    /// Bytes of model state per parameter: 16 for mixed-precision Adam (2 + 2 +
    /// 12; Rajbhandari et al., "ZeRO", SC 2020, sec. 3.1).
    pub state_bytes_per_param: u64,
    /// Bytes every device keeps aside (framework, buffers).
    pub reserved_bytes: u64,
    /// Recomputation: `none` or `full`.
    pub recompute: Recompute,
    /// Model state split over the data-parallel replicas (ZeRO stages 1, 2).
    pub shard: Shard,
    /// Optimizer update time per device after its gradients are synchronised
    /// (as written: not yet divided by the replicas when sharded).
    pub update_ns: u64,
}

impl Default for Training {
    fn default() -> Self {
        Training {
            state_bytes_per_param: 16,
            reserved_bytes: 0,
            recompute: Recompute::None,
            shard: Shard::None,
            update_ns: 0,
        }
    }
}

/// What `training.shard` splits over the replicas (Rajbhandari et al.,
/// "ZeRO", SC 2020, sec. 5).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Shard {
    /// Every replica keeps all its model state.
    None,
    /// The optimizer state (ZeRO stage 1).
    Optimizer,
    /// The optimizer state and the gradients (ZeRO stage 2).
    Gradients,
}

impl Shard {
    /// The name scenario files use.
    pub fn name(self) -> &'static str {
        match self {
            Shard::None => "none",
            Shard::Optimizer => "optimizer",
            Shard::Gradients => "gradients",
        }
    }
}

/// An axis of the device layout.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Axis {
    /// Tensor-parallel ranks of a stage.
    Tensor,
    /// Data-parallel replicas.
    Data,
    /// Pipeline stages.
    Pipeline,
}

/// The `parallel` section.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Parallel {
    /// d: replicas of the pipeline.
    pub data: u32,
    /// t: devices sharing each layer of a stage.
    pub tensor: u32,
    /// Sequence parallelism for the activations a tensor group keeps whole.
    pub sequence: bool,
    /// How a packed placement numbers (rank, replica, stage) onto devices,
    /// fastest-varying first.
    pub order: Vec<Axis>,
}

impl Default for Parallel {
    fn default() -> Self {
        Parallel { data: 1, tensor: 1, sequence: false, order: vec![Axis::Tensor, Axis::Data, Axis::Pipeline] }
    }
}

/// Gradient compression on the wire.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum CompressionKind {
    /// `bits` per element.
    Quantize {
        /// Bits per element on the wire.
        bits: u32,
    },
    /// The `keep` fraction of elements, each with a 4-byte index.
    TopK {
        /// Fraction kept.
        keep: f64,
    },
}

/// `gradients.compression` when its kind is not `none`.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct GradientCompression {
    /// What is sent.
    pub kind: CompressionKind,
    /// Encode (and decode) speed in dense bytes per second.
    pub rate_bytes_per_s: u64,
}

/// The `gradients` section.
#[derive(Clone, Debug, PartialEq)]
pub struct Gradients {
    /// The algorithm.
    pub sync: Algorithm,
    /// Least bucket size in bytes.
    pub bucket_bytes: u64,
    /// Whether buckets start inside the last backward.
    pub overlap: bool,
    /// Gradient element size before compression.
    pub bytes_per_param: u32,
    /// Parameter servers S.
    pub servers: u32,
    /// Whether the servers have devices of their own.
    pub dedicated_servers: bool,
    /// Compression, if any.
    pub compression: Option<GradientCompression>,
}

impl Default for Gradients {
    fn default() -> Self {
        Gradients {
            sync: Algorithm::Ring,
            bucket_bytes: 25_000_000,
            overlap: true,
            bytes_per_param: 2,
            servers: 1,
            dedicated_servers: false,
            compression: None,
        }
    }
}

/// One direction of a link between two devices.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct LinkParams {
    /// Time for the first byte to cross.
    pub latency_ns: u64,
    /// Bytes per second in one direction.
    pub bytes_per_s: u64,
}

/// How devices are connected.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Fabric {
    /// `devices` + `link`: every ordered pair of devices joined directly by
    /// its own one-hop link.
    Flat {
        /// Each link's latency and bandwidth.
        link: LinkParams,
    },
    /// `nodes` x `devices_per_node`: devices reach their node's switch over
    /// `device_link`; nodes reach the fabric over `cards` copies of `node_link`.
    TwoLevel {
        /// Nodes (boxes).
        nodes: u32,
        /// Devices in each node.
        devices_per_node: u32,
        /// Each device's link to its node's switch.
        device_link: LinkParams,
        /// Each of a node's links to the fabric.
        node_link: LinkParams,
        /// Network cards per node.
        cards: u32,
    },
}

/// The `cluster` section: the devices and how they are connected.
#[derive(Clone, Debug, PartialEq)]
pub struct Cluster {
    /// All devices (`nodes x devices_per_node` for a two-level fabric).
    pub devices: u32,
    /// How they are connected.
    pub fabric: Fabric,
    /// One accelerator's speed and memory.
    pub device: DeviceSpec,
    /// Each op's compute time is scaled by a factor drawn uniformly from
    /// `[1 - jitter, 1 + jitter]` with the scenario's seed; 0 (the default)
    /// makes every op take exactly its cost.
    pub jitter: f64,
    /// Devices (numbered as in the report) whose ops always take longer,
    /// with the factor (`cluster.variability.stragglers`).
    pub stragglers: Vec<(u32, f64)>,
    /// The chance that an op is a rare slow one.
    pub slow_chance: f64,
    /// How many times longer a rare slow op takes.
    pub slow_factor: f64,
    /// Each transfer's latency and byte time are scaled by a factor drawn
    /// uniformly from `[1 - link_jitter, 1 + link_jitter]`; 0: none.
    pub link_jitter: f64,
}

/// The `pipeline` section: stages, split, micro-batches and schedule.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Pipeline {
    /// Pipeline stages (devices).
    pub stages: u32,
    /// Layers per piece (virtual stage), `stages * chunks` entries, in model order.
    pub split: Vec<u32>,
    /// Micro-batches per step.
    pub micro_batches: u32,
    /// The schedule the devices follow.
    pub schedule: ScheduleKind,
    /// Model chunks per device.
    pub chunks: u32,
    /// Samples per micro-batch.
    pub micro_batch_size: u32,
    /// A device waits for each of its sends to arrive before its next op.
    pub blocking_sends: bool,
    /// With `schedule: custom`: the order read from `pipeline.order`, and
    /// the file it came from.
    pub order: Option<(PathBuf, std::sync::Arc<baton_schedule::Plan>)>,
    /// `zb-auto`'s limit on micro-batches a device holds at once
    /// (`pipeline.max_in_flight`; `stages` when left out).
    pub max_in_flight: u32,
    /// Training steps simulated back to back (`pipeline.steps`).
    pub steps: u32,
    /// A global barrier between steps (`pipeline.flush`).
    pub flush: bool,
    /// Weight versions kept when steps run on without a flush.
    pub weight_versions: baton_schedule::steps::WeightVersions,
    /// Bytes per parameter of each extra weight version.
    pub version_bytes_per_param: u32,
}

/// A validated scenario.
#[derive(Clone, Debug, PartialEq)]
pub struct Scenario {
    /// The scenario's title.
    pub title: String,
    /// Seed of the random generator.
    pub seed: u64,
    /// Where the layer table came from.
    pub source: ModelSource,
    /// The layers, in model order, `repeat` expanded.
    pub layers: Vec<LayerCost>,
    /// What one device of a tensor group holds and does for each layer
    /// (`layers` itself when `parallel.tensor` is 1): times, activations,
    /// stash and parameters divided by `t` (a transformer's stash by
    /// Korthikanti et al.'s eq. 2 or 3).
    pub tensor_layers: Vec<LayerCost>,
    /// The devices and their connections.
    pub cluster: Cluster,
    /// Stages, split, micro-batches and schedule.
    pub pipeline: Pipeline,
    /// Model state, reserve and recomputation.
    pub training: Training,
    /// The device each pipeline stage of each replica runs on
    /// (`placement`): entry `r * stages + s` is replica r's stage s.
    pub placement: Vec<u32>,
    /// Data-parallel replicas and their numbering.
    pub parallel: Parallel,
    /// How the replicas' gradients are synchronised.
    pub gradients: Gradients,
    /// Devices of the dedicated parameter servers (empty unless
    /// `server_devices: dedicated` with the parameter-server algorithm and
    /// more than one replica).
    pub server_devices: Vec<u32>,
}

impl Scenario {
    /// The pipeline's shape for the schedule crate (the backward split when
    /// the schedule runs W apart).
    pub fn shape(&self) -> Shape {
        if let Some((_, plan)) = &self.pipeline.order {
            return plan.shape;
        }
        Shape {
            split_backward: self.pipeline.schedule.splits_backward(),
            ..Shape::new(self.pipeline.stages, self.pipeline.micro_batches, self.pipeline.chunks)
        }
    }

    /// The pieces the split cuts the model into, in order (virtual stages).
    pub fn pieces(&self) -> Vec<Piece> {
        self.pieces_of(&self.pipeline.split)
    }

    /// The prices of any piece of this scenario's model ([`PieceCosts`]),
    /// on one device of a tensor group.
    pub fn piece_costs(&self) -> PieceCosts {
        PieceCosts::new(&self.tensor_layers, self.pipeline.stages, self.training.recompute)
    }

    /// The pieces another `split` would cut the model into (it must cover the
    /// layers exactly).
    pub fn pieces_of(&self, split: &[u32]) -> Vec<Piece> {
        self.piece_costs().pieces_of(split)
    }

    /// Samples per step over all replicas: replicas x micro-batches x
    /// micro-batch size.
    pub fn samples_per_step(&self) -> u64 {
        self.parallel.data as u64 * self.pipeline.micro_batches as u64 * self.pipeline.micro_batch_size as u64
    }

    /// Devices the replicas' stages use (all ranks of every tensor group).
    pub fn workers(&self) -> u32 {
        self.parallel.data * self.pipeline.stages * self.parallel.tensor
    }

    /// The node a cluster device sits in (0 for a flat cluster).
    pub fn node_of(&self, device: u32) -> u32 {
        match self.cluster.fabric {
            Fabric::TwoLevel { devices_per_node, .. } => device / devices_per_node.max(1),
            Fabric::Flat { .. } => 0,
        }
    }
}

/// Why a scenario was refused.
#[derive(Debug, Error, PartialEq)]
pub enum ScenarioError {
    /// A file could not be read.
    #[error("cannot read {file}: {message}")]
    Read {
        /// The file.
        file: String,
        /// Why.
        message: String,
    },
    /// The text is not YAML.
    #[error("{file}:{line}:{column}: YAML syntax error: {message}")]
    Syntax {
        /// The file.
        file: String,
        /// Line (1-based).
        line: u32,
        /// Column (1-based).
        column: u32,
        /// What the parser said.
        message: String,
    },
    /// A custom order file is refused (`pipeline.order`).
    #[error("{file}:{line}:{col}: pipeline.order: {message}")]
    Order {
        /// The order file.
        file: String,
        /// Line (1-based).
        line: usize,
        /// Column (1-based).
        col: usize,
        /// What is wrong, in the order's terms.
        message: String,
    },
    /// A key's value is refused.
    #[error("{}", invalid_text(.file, .key, .origin, .message))]
    Invalid {
        /// The file.
        file: String,
        /// The dotted key path.
        key: String,
        /// Where the value was written.
        origin: Origin,
        /// What is wrong, in the user's terms.
        message: String,
    },
    /// An override is malformed.
    #[error("{typed}: {message}")]
    Override {
        /// The option as the user typed it, e.g. `--set pipeline.stages=8`.
        typed: String,
        /// What is wrong.
        message: String,
    },
    /// A profile row is refused.
    #[error("{file}:{line}: column {column}: {message}")]
    Profile {
        /// The profile file.
        file: String,
        /// Line (1-based).
        line: u64,
        /// The column's name.
        column: String,
        /// What is wrong.
        message: String,
    },
}

fn invalid_text(file: &str, key: &str, origin: &Origin, message: &str) -> String {
    match origin {
        Origin::File { line, column } => format!("{file}:{line}:{column}: {key}: {message}"),
        Origin::Set(typed) => format!("{key} (from {typed}): {message}"),
        Origin::Default => format!("{file}: {key}: {message}"),
    }
}

impl ScenarioError {
    /// The key path the error is about, if it is about one.
    pub fn key(&self) -> Option<&str> {
        match self {
            ScenarioError::Invalid { key, .. } => Some(key),
            _ => None,
        }
    }
}

/// Most layers a scenario may expand to (after `repeat`).
pub const MAX_LAYERS: u64 = 1_000_000;
/// Most devices a cluster may have.
pub const MAX_DEVICES: i128 = 65_536;
/// Most pipeline stages: every ordered pair of stages' devices has its own
/// link, so the link count grows with the square of this.
pub const MAX_STAGES: u32 = 512;

/// Longest single duration a scenario may give or derive (one op, one
/// latency): 10^6 s, about 11.6 days.
pub const MAX_DURATION_NS: u64 = 1_000_000_000_000_000;

/// Longest step the simulation's clock is sure to hold: 2^60 ns, about 36
/// years, well inside its 64-bit nanoseconds.
pub const MAX_STEP_NS: u128 = 1 << 60;

/// Reads, overrides (`--set KEY=VALUE`) and validates a scenario file.
pub fn load(path: &Path, overrides: &[String]) -> Result<Scenario, ScenarioError> {
    Document::load(path)?.scenario(overrides)
}

/// [`load`] with overrides that name the options they came from.
pub fn load_with(path: &Path, overrides: &[Override]) -> Result<Scenario, ScenarioError> {
    Document::load(path)?.scenario_with(overrides)
}

/// A scenario file read and parsed once, from which any number of variants
/// (the file with some overrides) are validated; profiles it names are read
/// once too.
#[derive(Debug)]
pub struct Document {
    tree: Node,
    file: String,
    default_title: String,
    base_dir: PathBuf,
    profiles: Mutex<HashMap<PathBuf, Vec<LayerCost>>>,
}

impl Document {
    /// Reads and parses a scenario file.
    pub fn load(path: &Path) -> Result<Self, ScenarioError> {
        let file = path.display().to_string();
        let bytes =
            std::fs::read(path).map_err(|e| ScenarioError::Read { file: file.clone(), message: e.to_string() })?;
        let text = node::utf8_text(&bytes).map_err(|(line, byte)| ScenarioError::Syntax {
            file: file.clone(),
            line,
            column: byte as u32,
            message: format!("byte {byte} of line {line} is not UTF-8 text; save the file as UTF-8"),
        })?;
        let default_title = path.file_stem().map(|s| s.to_string_lossy().into_owned()).unwrap_or_default();
        Self::from_text(text, &file, &default_title, path.parent().unwrap_or(Path::new("")))
    }

    /// Parses scenario text; relative paths resolve against `base_dir`.
    pub fn from_text(text: &str, file: &str, default_title: &str, base_dir: &Path) -> Result<Self, ScenarioError> {
        Ok(Document {
            tree: node::parse_document(text, file)?,
            file: file.to_string(),
            default_title: default_title.to_string(),
            base_dir: base_dir.to_path_buf(),
            profiles: Mutex::new(HashMap::new()),
        })
    }

    /// The file name errors are labelled with.
    pub fn file(&self) -> &str {
        &self.file
    }

    /// The scenario with `overrides` (`KEY=VALUE`, given with `--set`)
    /// applied, validated.
    pub fn scenario(&self, overrides: &[String]) -> Result<Scenario, ScenarioError> {
        let typed: Vec<Override> = overrides.iter().map(|a| Override::set(a)).collect();
        self.scenario_with(&typed)
    }

    /// The scenario with `overrides` applied, validated; messages name each
    /// override as the user typed it.
    pub fn scenario_with(&self, overrides: &[Override]) -> Result<Scenario, ScenarioError> {
        let written = written_micro_batch_size(&self.tree);
        if overrides.is_empty() {
            return from_tree(
                &self.tree,
                &self.file,
                &self.default_title,
                &self.base_dir,
                Some(&self.profiles),
                written,
            );
        }
        let mut tree = self.tree.clone();
        for o in overrides {
            node::apply_override_as(&mut tree, &o.assignment, &o.typed)?;
        }
        from_tree(&tree, &self.file, &self.default_title, &self.base_dir, Some(&self.profiles), written)
    }
}

/// A `KEY=VALUE` override and the command-line option it came from, which
/// messages name (`--set pipeline.stages=8`, `--vary pipeline.stages=8`,
/// `--stages 8`).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Override {
    /// `KEY=VALUE`.
    pub assignment: String,
    /// The option as the user typed it.
    pub typed: String,
}

impl Override {
    /// An override given as `--set KEY=VALUE`.
    pub fn set(assignment: &str) -> Self {
        Override { assignment: assignment.to_string(), typed: format!("--set {assignment}") }
    }

    /// An override the user typed as `typed`.
    pub fn typed(assignment: impl Into<String>, typed: impl Into<String>) -> Self {
        Override { assignment: assignment.into(), typed: typed.into() }
    }
}

/// Parses scenario text; `file` labels error messages; a profile path is
/// taken relative to the current directory.
pub fn parse(text: &str, file: &str, default_title: &str, overrides: &[String]) -> Result<Scenario, ScenarioError> {
    parse_in(text, file, default_title, Path::new(""), overrides)
}

/// Parses scenario text whose relative paths resolve against `base_dir`.
pub fn parse_in(
    text: &str,
    file: &str,
    default_title: &str,
    base_dir: &Path,
    overrides: &[String],
) -> Result<Scenario, ScenarioError> {
    Document::from_text(text, file, default_title, base_dir)?.scenario(overrides)
}

/// A value being read, with its key path.
#[derive(Clone, Copy)]
struct Field<'a> {
    cx: &'a Reading<'a>,
    path: &'a str,
    node: &'a Node,
    /// The key's definition, when it is a key of a section.
    def: Option<&'static Key>,
}

struct Reading<'a> {
    file: &'a str,
    base_dir: &'a Path,
    profiles: Option<&'a ProfileCache>,
}

type ProfileCache = Mutex<HashMap<PathBuf, Vec<LayerCost>>>;

impl Reading<'_> {
    fn err(&self, key: &str, origin: &Origin, message: impl Into<String>) -> ScenarioError {
        ScenarioError::Invalid {
            file: self.file.to_string(),
            key: key.to_string(),
            origin: origin.clone(),
            message: message.into(),
        }
    }
}

/// A mapping being read: each key may be taken once; leftovers are unknown keys.
struct Section<'a> {
    cx: &'a Reading<'a>,
    path: &'a str,
    origin: &'a Origin,
    entries: &'a [(String, Origin, Node)],
    /// The section's keys (see [`keys`]).
    keys: &'static [Key],
}

fn join(path: &str, key: &str) -> String {
    if path.is_empty() {
        key.to_string()
    } else {
        format!("{path}.{key}")
    }
}

impl<'a> Field<'a> {
    fn err(&self, message: impl Into<String>) -> ScenarioError {
        self.cx.err(self.path, &self.node.origin, message)
    }

    fn map(&self, keys: &'static [Key]) -> Result<Section<'a>, ScenarioError> {
        let allowed = keys::names(keys);
        let Value::Map(entries) = &self.node.value else {
            return Err(self.err(format!(
                "expected a mapping with keys {}, found {}",
                allowed.join(", "),
                self.node.value.kind()
            )));
        };
        if let Some((k, origin, _)) = entries.iter().find(|(k, _, _)| !allowed.contains(&k.as_str())) {
            return Err(self.cx.err(
                &join(self.path, k),
                origin,
                format!("unknown key `{k}`; expected one of: {}", allowed.join(", ")),
            ));
        }
        Ok(Section { cx: self.cx, path: self.path, origin: &self.node.origin, entries, keys })
    }

    /// A whole number within the bounds its key's definition gives.
    fn whole(&self) -> Result<i128, ScenarioError> {
        match self.def.map(|d| &d.ty) {
            Some(keys::Type::Whole { min, max }) => self.int(*min as i128, *max as i128),
            _ => self.int(0, i64::MAX as i128),
        }
    }

    fn str(&self) -> Result<&'a str, ScenarioError> {
        match &self.node.value {
            Value::Str(s) => Ok(s),
            other => Err(self.err(format!("expected text, found {}", other.kind()))),
        }
    }

    /// Text or a number, as text (for names and titles).
    fn text(&self) -> Result<String, ScenarioError> {
        match &self.node.value {
            Value::Str(s) => Ok(s.clone()),
            Value::Int(i) => Ok(i.to_string()),
            Value::Float(f) => Ok(f.to_string()),
            Value::Bool(b) => Ok(b.to_string()),
            other => Err(self.err(format!("expected text, found {}", other.kind()))),
        }
    }

    fn int(&self, min: i128, max: i128) -> Result<i128, ScenarioError> {
        let v = match &self.node.value {
            Value::Int(i) => *i,
            // A whole number too large for the reader's integers (YAML then
            // reads it as a float): say it is out of range, not "not whole".
            Value::Float(f) if f.is_finite() && f.fract() == 0.0 && (*f > max as f64 || *f < min as f64) => {
                let bound = if *f > 0.0 { format!("at most {max}") } else { format!("at least {min}") };
                return Err(self.err(format!("must be {bound}, found {}", self.node.shown())));
            }
            _ => return Err(self.err(format!("expected a whole number, found {}", self.node.shown()))),
        };
        if v < min {
            return Err(self.err(format!("must be at least {min}, found {}", self.node.shown())));
        }
        if v > max {
            return Err(self.err(format!("must be at most {max}, found {}", self.node.shown())));
        }
        Ok(v)
    }

    /// `true` or `false`.
    fn boolean(&self) -> Result<bool, ScenarioError> {
        match &self.node.value {
            Value::Bool(b) => Ok(*b),
            _ => Err(self.err(format!("expected true or false, found {}", self.node.shown()))),
        }
    }

    /// Any number.
    fn number(&self) -> Result<f64, ScenarioError> {
        match &self.node.value {
            Value::Int(i) => Ok(*i as f64),
            Value::Float(f) if f.is_finite() => Ok(*f),
            _ => Err(self.err(format!("expected a number, found {}", self.node.shown()))),
        }
    }

    /// A count: a whole number, or text such as `350M` or `1.2B`.
    fn count(&self) -> Result<u64, ScenarioError> {
        match &self.node.value {
            Value::Int(i) if *i >= 0 && *i <= u64::MAX as i128 => Ok(*i as u64),
            Value::Int(i) if *i < 0 => Err(self.err(format!("must not be negative, found {}", self.node.shown()))),
            Value::Str(s) => units::parse_count(s).map_err(|m| self.err(m)),
            _ => Err(self.err(format!("expected a count such as 350M or 1.2B, found {}", self.node.shown()))),
        }
    }

    /// A number in `[0, 1)`.
    fn fraction(&self) -> Result<f64, ScenarioError> {
        let v = match &self.node.value {
            Value::Int(i) => *i as f64,
            Value::Float(f) => *f,
            other => {
                return Err(
                    self.err(format!("expected a number from 0 up to (not including) 1, found {}", other.kind()))
                )
            }
        };
        if !(0.0..1.0).contains(&v) {
            return Err(self.err(format!("must be at least 0 and below 1, found {}", self.node.shown())));
        }
        Ok(v)
    }

    fn u32(&self, min: u32) -> Result<u32, ScenarioError> {
        self.int(min as i128, u32::MAX as i128).map(|v| v as u32)
    }

    fn quantity(&self, parse: fn(&str) -> Result<u64, String>, accepted: &str) -> Result<u64, ScenarioError> {
        match &self.node.value {
            Value::Str(s) => parse(s).map_err(|m| self.err(m)),
            Value::Int(_) | Value::Float(_) => {
                Err(self.err(format!("{} is a bare number; it needs a unit, one of: {accepted}", self.node.shown())))
            }
            other => Err(self.err(format!("expected a quantity with a unit ({accepted}), found {}", other.kind()))),
        }
    }

    fn duration_ns(&self) -> Result<u64, ScenarioError> {
        let v = self.quantity(units::parse_duration_ns, units::DURATION_UNITS)?;
        if v > MAX_DURATION_NS {
            return Err(self.err(format!(
                "{} is too large: a duration may be at most {} s",
                self.node.shown(),
                MAX_DURATION_NS / 1_000_000_000
            )));
        }
        Ok(v)
    }

    fn bytes(&self) -> Result<u64, ScenarioError> {
        self.quantity(units::parse_bytes, units::SIZE_UNITS)
    }

    fn bytes_per_s(&self) -> Result<u64, ScenarioError> {
        self.quantity(units::parse_bytes_per_s, units::BANDWIDTH_UNITS)
    }
}

impl<'a> Section<'a> {
    /// The definition of `key`, which the section must declare.
    fn def(&self, key: &str) -> Option<&'static Key> {
        let def = self.keys.iter().find(|k| k.name == key);
        debug_assert!(def.is_some(), "{key} is read but not declared in its section's keys");
        def
    }

    fn get(&self, key: &str) -> Option<(String, &'a Node)> {
        self.entries
            .iter()
            .find(|(k, _, _)| k == key)
            .map(|(_, _, n)| (join(self.path, key), n))
            .filter(|(_, n)| n.value != Value::Null)
    }

    /// Reads an optional key with `f`.
    fn opt<T>(
        &self,
        key: &str,
        f: impl FnOnce(Field<'_>) -> Result<T, ScenarioError>,
    ) -> Result<Option<T>, ScenarioError> {
        match self.get(key) {
            Some((path, node)) => f(Field { cx: self.cx, path: &path, node, def: self.def(key) }).map(Some),
            None => Ok(None),
        }
    }

    /// Reads a required key with `f`.
    fn req<T>(&self, key: &str, f: impl FnOnce(Field<'_>) -> Result<T, ScenarioError>) -> Result<T, ScenarioError> {
        self.opt(key, f)?
            .ok_or_else(|| self.cx.err(&join(self.path, key), self.origin, format!("missing required key `{key}`")))
    }
}

/// `pipeline.micro_batch_size` as the file writes it (1 when it does not, or
/// writes something the reader will refuse anyway): the size a model's
/// explicit layer costs are for.
fn written_micro_batch_size(tree: &Node) -> u32 {
    let get = |n: &Node, key: &str| match &n.value {
        Value::Map(e) => e.iter().find(|(k, _, _)| k == key).map(|(_, _, v)| v.clone()),
        _ => None,
    };
    get(tree, "pipeline")
        .and_then(|p| get(&p, "micro_batch_size"))
        .and_then(|v| match v.value {
            Value::Int(i) if i >= 1 && i <= u32::MAX as i128 => Some(i as u32),
            _ => None,
        })
        .unwrap_or(1)
}

/// Layers given for micro-batches of `from` samples, scaled to `to`: times,
/// activations, stashes and all-reduce sizes in proportion, rounded to the
/// nearest nanosecond or byte (an idealisation: real costs do not scale
/// exactly linearly with the micro-batch).
fn scale_layers(layers: &mut [LayerCost], from: u32, to: u32) {
    let scale = |x: u64| ((x as u128 * to as u128 + from as u128 / 2) / from as u128).min(u64::MAX as u128) as u64;
    for l in layers {
        l.forward_ns = scale(l.forward_ns);
        l.backward_ns = scale(l.backward_ns);
        l.activation_bytes = scale(l.activation_bytes);
        l.stash_bytes = scale(l.stash_bytes);
        l.weight_stash_bytes = scale(l.weight_stash_bytes);
        l.tensor_bytes = scale(l.tensor_bytes);
        l.weight_ns = scale(l.weight_ns).min(l.backward_ns);
    }
}

fn from_tree(
    doc: &Node,
    file: &str,
    default_title: &str,
    base_dir: &Path,
    profiles: Option<&ProfileCache>,
    written_micro_batch_size: u32,
) -> Result<Scenario, ScenarioError> {
    let cx = Reading { file, base_dir, profiles };
    let root = Field { cx: &cx, path: "", node: doc, def: None };
    let top = root.map(keys::TOP)?;
    let title = top.opt("title", |a| a.text())?.unwrap_or_else(|| default_title.to_string());
    let seed = top.opt("seed", |a| a.whole().map(|v| v as u64))?.unwrap_or(1);

    let cluster = top.req("cluster", read_cluster)?;
    // The micro-batch size shapes derived layer costs, so it is read first.
    let micro_batch_size = top
        .opt("pipeline", |p| p.map(keys::PIPELINE)?.opt("micro_batch_size", |a| a.whole().map(|v| v as u32)))?
        .flatten()
        .unwrap_or(1);
    let (source, mut layers) = top.req("model", |m| read_model(m, &cluster, micro_batch_size))?;
    // Layers given by their costs are for the micro-batch size the file
    // writes; another size (an override) scales them.
    if !matches!(source, ModelSource::Transformer(_)) && micro_batch_size != written_micro_batch_size {
        scale_layers(&mut layers, written_micro_batch_size.max(1), micro_batch_size);
    }
    let training = top.opt("training", read_training)?.unwrap_or_default();
    let pipeline = top.req("pipeline", |p| read_pipeline(p, &layers, &cluster, base_dir))?;
    let parallel = top.opt("parallel", |p| read_parallel(p, &cluster, &pipeline, &source))?.unwrap_or_default();
    let tensor_layers = tensor_layers(&layers, &source, &cluster, &parallel, micro_batch_size);
    let gradients = top.opt("gradients", read_gradients)?.unwrap_or_default();
    let placement = match top.get("placement") {
        None => packed(&parallel, pipeline.stages),
        Some((path, node)) => read_placement(
            Field { cx: &cx, path: &path, node, def: top.def("placement") },
            &cluster,
            pipeline.stages,
            &parallel,
        )?,
    };
    let mut scenario = Scenario {
        title,
        seed,
        source,
        layers,
        tensor_layers,
        cluster,
        pipeline,
        training,
        placement,
        parallel,
        gradients,
        server_devices: Vec::new(),
    };
    check_sync(&top, &mut scenario)?;
    let used = scenario.workers() + scenario.server_devices.len() as u32;
    if let Some(&(d, _)) = scenario.cluster.stragglers.iter().find(|&&(d, _)| d >= used) {
        let origin = top.get("cluster").map(|(_, n)| n.origin.clone()).unwrap_or(Origin::Default);
        return Err(cx.err(
            "cluster.variability.stragglers",
            &origin,
            format!(
                "device {d} is not in the step: it uses {used} devices, numbered 0 to {} as in the report",
                used - 1
            ),
        ));
    }
    if let Some(bound) = step_bound_ns(&scenario).filter(|&b| b > MAX_STEP_NS) {
        let several = scenario.pipeline.steps > 1;
        let key = if several { "steps" } else { "micro_batches" };
        let origin = top
            .get("pipeline")
            .and_then(|(_, p)| match &p.value {
                Value::Map(e) => e.iter().find(|(k, _, _)| k == key).map(|(_, _, n)| n.origin.clone()),
                _ => None,
            })
            .unwrap_or(Origin::Default);
        return Err(cx.err(
            &format!("pipeline.{key}"),
            &origin,
            format!(
                "the {} would last up to {} years of simulated time, more than the simulation's clock holds \
                 ({} years); use fewer {}, shorter times or larger bandwidths",
                if several { "steps" } else { "step" },
                bound / 31_557_600_000_000_000,
                MAX_STEP_NS / 31_557_600_000_000_000,
                if several { "steps or micro-batches" } else { "micro-batches" },
            ),
        ));
    }
    Ok(scenario)
}

/// An upper bound on the steps' length: every op of every micro-batch run one
/// after another, plus two transfers per boundary and micro-batch, each the
/// largest activation over the slowest link with the longest route's latency,
/// and the update, times `pipeline.steps`.
/// `None` when the scenario has no layers.
fn step_bound_ns(s: &Scenario) -> Option<u128> {
    let m = s.pipeline.micro_batches as u128;
    let recompute = s.training.recompute == Recompute::Full;
    let work: u128 =
        s.layers.iter().map(|l| l.forward_ns as u128 * if recompute { 2 } else { 1 } + l.backward_ns as u128).sum();
    let (latency, bandwidth) = match s.cluster.fabric {
        Fabric::Flat { link } => (link.latency_ns as u128, link.bytes_per_s),
        Fabric::TwoLevel { device_link, node_link, .. } => (
            2 * (device_link.latency_ns as u128 + node_link.latency_ns as u128),
            device_link.bytes_per_s.min(node_link.bytes_per_s),
        ),
    };
    let largest = s.layers.iter().map(|l| l.activation_bytes).max()? as u128;
    let transfer = latency + (largest * 1_000_000_000).div_ceil(bandwidth.max(1) as u128);
    let boundaries = s.pipeline.split.len().saturating_sub(1) as u128;
    let steps = s.pipeline.steps.max(1) as u128;
    Some(steps * (m * (work + 2 * boundaries * transfer) + s.training.update_ns as u128))
}

/// `packed` puts stage s on device s; `spread` deals stages out over the
/// nodes in turn (stage s on node s mod nodes, in that node's next free
/// slot); a list names a distinct device for each stage.
fn read_placement(
    a: Field<'_>,
    cluster: &Cluster,
    stages: u32,
    parallel: &Parallel,
) -> Result<Vec<u32>, ScenarioError> {
    let (d, t) = (parallel.data, parallel.tensor);
    let workers = stages * d * t;
    match &a.node.value {
        Value::Str(s) if s == "packed" => Ok(packed(parallel, stages)),
        Value::Str(s) if s == "spread" && d * t > 1 => Err(a.err(format!(
            "spread places one pipeline of one device per stage; with {} use packed (numbered by parallel.order) or a list of {workers} device ids",
            if t > 1 { format!("parallel.tensor = {t}") } else { format!("parallel.data = {d}") }
        ))),
        Value::Str(s) if s == "spread" => {
            let (nodes, dpn) = match cluster.fabric {
                Fabric::TwoLevel { nodes, devices_per_node, .. } => (nodes, devices_per_node),
                Fabric::Flat { .. } => (1, cluster.devices),
            };
            Ok((0..stages).map(|s| (s % nodes) * dpn + s / nodes).collect())
        }
        Value::Seq(items) => {
            if items.len() as u32 != workers && d * t > 1 {
                return Err(a.err(format!(
                    "names {} devices, but {d} replicas x {stages} stages x {t} devices per tensor group need {workers} (replica 0's stage 0's devices first)",
                    items.len()
                )));
            }
            if items.len() as u32 != stages {
                return Err(
                    a.err(format!("names {} devices, but there are {stages} stages (one device each)", items.len()))
                );
            }
            let mut out = Vec::with_capacity(items.len());
            for (i, item) in items.iter().enumerate() {
                let path = format!("{}.{i}", a.path);
                let at = Field { cx: a.cx, path: &path, node: item, def: None };
                let d = at.int(0, cluster.devices as i128 - 1).map_err(|_| {
                    at.err(format!("must name a device from 0 to {}, found {}", cluster.devices - 1, item.shown()))
                })? as u32;
                if let Some(j) = out.iter().position(|&x| x == d) {
                    let whose = if t > 1 {
                        let g = j as u32 / t;
                        format!("replica {}'s stage {} (tensor rank {})", g / stages, g % stages, j as u32 % t)
                    } else if workers > stages {
                        format!("replica {}'s stage {}", j as u32 / stages, j as u32 % stages)
                    } else {
                        format!("stage {j}")
                    };
                    return Err(at.err(format!("device {d} is already given to {whose}")));
                }
                out.push(d);
            }
            Ok(out)
        }
        _ => Err(a.err(format!("expected packed, spread or a list of device ids, found {}", a.node.shown()))),
    }
}

/// `packed`: rank k of replica r's stage s on the device numbered by
/// `parallel.order`, fastest-varying axis first; listed in the order
/// `(r * stages + s) * t + k`.
fn packed(parallel: &Parallel, stages: u32) -> Vec<u32> {
    let (d, t) = (parallel.data, parallel.tensor);
    let size = |a: Axis| match a {
        Axis::Tensor => t,
        Axis::Data => d,
        Axis::Pipeline => stages,
    };
    let mut stride = [0u32; 3];
    let mut next = 1u32;
    for &a in &parallel.order {
        stride[a as usize] = next;
        next *= size(a);
    }
    let [st, sd, sp] = stride;
    let mut out = Vec::with_capacity((d * stages * t) as usize);
    for r in 0..d {
        for s in 0..stages {
            for k in 0..t {
                out.push(k * st + r * sd + s * sp);
            }
        }
    }
    out
}

/// The per-device layer costs of a tensor group of `parallel.tensor`.
fn tensor_layers(
    layers: &[LayerCost],
    source: &ModelSource,
    cluster: &Cluster,
    parallel: &Parallel,
    micro_batch_size: u32,
) -> Vec<LayerCost> {
    let t = parallel.tensor as u64;
    if t <= 1 {
        return layers.to_vec();
    }
    match (source, cluster.device.peak_flop_per_s, cluster.device.efficiency) {
        (ModelSource::Transformer(shape), Some(peak), Some(efficiency)) => shape.layer_table_tensor(
            micro_batch_size as u64,
            Speed { peak_flop_per_s: peak as f64, efficiency },
            t,
            parallel.sequence,
        ),
        _ => layers.iter().map(|l| l.per_tensor_rank(t)).collect(),
    }
}

fn read_parallel(
    p: Field<'_>,
    cluster: &Cluster,
    pipeline: &Pipeline,
    source: &ModelSource,
) -> Result<Parallel, ScenarioError> {
    let stages = pipeline.stages;
    let m = p.map(keys::PARALLEL)?;
    let tensor = m
        .opt("tensor", |a| {
            let t = a.whole()? as u32;
            if let ModelSource::Transformer(shape) = source {
                if shape.heads % t as u64 != 0 || shape.kv_heads % t as u64 != 0 {
                    return Err(a.err(format!(
                        "{t} devices per tensor group must divide model.transformer.heads ({}) and kv_heads ({}), so that each device holds whole heads",
                        shape.heads, shape.kv_heads
                    )));
                }
            }
            let need = t as u64 * stages as u64;
            if need > cluster.devices as u64 {
                return Err(a.err(format!(
                    "{t} devices per tensor group x {stages} stages need {need} devices, but the cluster has {}",
                    cluster.devices
                )));
            }
            Ok(t)
        })?
        .unwrap_or(1);
    let sequence = m.opt("sequence", |a| a.boolean())?.unwrap_or(false);
    let data = m
        .opt("data", |a| {
            let d = a.whole()? as u32;
            let need = d as u64 * stages as u64 * tensor as u64;
            if need > cluster.devices as u64 {
                let shape = if tensor > 1 {
                    format!("{d} replicas x {stages} stages x {tensor} devices per tensor group")
                } else {
                    format!("{d} replicas x {stages} stages")
                };
                return Err(a.err(format!("{shape} need {need} devices, but the cluster has {}", cluster.devices)));
            }
            if d > 1 && !pipeline.flush {
                return Err(a.err(format!(
                    "{d} replicas synchronise their gradients every step, which baton simulates with pipeline.flush: true only (steps without a flush: one replica)"
                )));
            }
            Ok(d)
        })?
        .unwrap_or(1);
    let order = m
        .opt("order", |a| {
            let Value::Seq(items) = &a.node.value else {
                return Err(a.err(format!("expected a list such as [data, pipeline], found {}", a.node.shown())));
            };
            let mut out = Vec::new();
            for (i, item) in items.iter().enumerate() {
                let path = format!("{}.{i}", a.path);
                let at = Field { cx: a.cx, path: &path, node: item, def: None };
                let axis = match at.str()? {
                    "tensor" => Axis::Tensor,
                    "data" => Axis::Data,
                    "pipeline" => Axis::Pipeline,
                    other => return Err(at.err(format!("unknown axis `{other}`; expected tensor, data or pipeline"))),
                };
                if out.contains(&axis) {
                    return Err(at.err(format!("names {} twice", at.str()?)));
                }
                out.push(axis);
            }
            // A list without tensor puts it first; a missing data or
            // pipeline axis goes after the ones named.
            if !out.contains(&Axis::Tensor) {
                out.insert(0, Axis::Tensor);
            }
            for axis in [Axis::Data, Axis::Pipeline] {
                if !out.contains(&axis) {
                    out.push(axis);
                }
            }
            Ok(out)
        })?
        .unwrap_or_else(|| Parallel::default().order);
    Ok(Parallel { data, tensor, sequence, order })
}

fn read_gradients(g: Field<'_>) -> Result<Gradients, ScenarioError> {
    let m = g.map(keys::GRADIENTS)?;
    let d = Gradients::default();
    let sync = m
        .opt("sync", |a| {
            let name = a.str()?;
            Algorithm::from_name(name).ok_or_else(|| {
                let names: Vec<&str> = Algorithm::ALL.iter().map(|a| a.name()).collect();
                a.err(format!("unknown algorithm `{name}`; expected one of {}", names.join(", ")))
            })
        })?
        .unwrap_or(d.sync);
    let bucket_bytes = m.opt("bucket", |a| positive(&a, a.bytes()?))?.unwrap_or(d.bucket_bytes);
    let overlap = m.opt("overlap", |a| a.boolean())?.unwrap_or(d.overlap);
    let bytes_per_param = m.opt("bytes_per_param", |a| a.whole().map(|v| v as u32))?.unwrap_or(d.bytes_per_param);
    let servers = m.opt("servers", |a| a.whole().map(|v| v as u32))?.unwrap_or(d.servers);
    let dedicated_servers = m
        .opt("server_devices", |a| match a.str()? {
            "colocated" => Ok(false),
            "dedicated" => Ok(true),
            other => Err(a.err(format!("unknown server_devices `{other}`; expected colocated or dedicated"))),
        })?
        .unwrap_or(d.dedicated_servers);
    let compression = m
        .opt("compression", |c| {
            let c_at = c;
            let c = c.map(keys::COMPRESSION)?;
            let kind = c.opt("kind", |a| Ok(a.str()?.to_string()))?.unwrap_or_else(|| "none".into());
            let kind = match kind.as_str() {
                "none" => return Ok(None),
                "quantize" => {
                    CompressionKind::Quantize { bits: c.opt("bits", |a| a.whole().map(|v| v as u32))?.unwrap_or(8) }
                }
                "top-k" => CompressionKind::TopK {
                    keep: c
                        .opt("keep", |a| {
                            let v = a.number()?;
                            if v > 0.0 && v <= 1.0 {
                                Ok(v)
                            } else {
                                Err(a.err(format!("must be more than 0 and at most 1, found {v}")))
                            }
                        })?
                        .unwrap_or(0.001),
                },
                other => {
                    return Err(c.cx.err(
                        &join(c.path, "kind"),
                        &c.get("kind").map(|(_, n)| n.origin.clone()).unwrap_or_else(|| c.origin.clone()),
                        format!("unknown compression `{other}`; expected none, quantize or top-k"),
                    ))
                }
            };
            let rate_bytes_per_s = c.opt("rate", |a| positive(&a, a.bytes_per_s()?))?.ok_or_else(|| {
                c_at.err("needs rate: the encode and decode speed in dense bytes per second, e.g. rate: 200GB/s")
            })?;
            Ok(Some(GradientCompression { kind, rate_bytes_per_s }))
        })?
        .flatten();
    Ok(Gradients { sync, bucket_bytes, overlap, bytes_per_param, servers, dedicated_servers, compression })
}

/// Checks of the synchronisation settings against the layout, naming the key
/// they concern; picks the dedicated servers' devices.
fn check_sync(top: &Section<'_>, s: &mut Scenario) -> Result<(), ScenarioError> {
    let key_err = |section: &str, key: &str, message: String| -> ScenarioError {
        let origin = top
            .get(section)
            .and_then(|(_, n)| match &n.value {
                Value::Map(e) => e.iter().find(|(k, _, _)| k == key).map(|(_, _, n)| n.origin.clone()),
                _ => None,
            })
            .or_else(|| top.get(section).map(|(_, n)| n.origin.clone()))
            .unwrap_or(Origin::Default);
        top.cx.err(&format!("{section}.{key}"), &origin, message)
    };
    let d = s.parallel.data;
    let g = &s.gradients;
    let shard = s.training.shard;
    if shard != Shard::None {
        let need = 2 + g.bytes_per_param as u64;
        if s.training.state_bytes_per_param < need {
            return Err(key_err(
                "training",
                "state_bytes_per_param",
                format!(
                    "is {}, but sharding splits it into weights (2 B), gradients (gradients.bytes_per_param = {}) and optimizer state, at least {need} in all",
                    s.training.state_bytes_per_param, g.bytes_per_param
                ),
            ));
        }
        if !g.sync.has_halves() {
            return Err(key_err(
                "training",
                "shard",
                format!(
                    "{} has no reduce-scatter and all-gather halves for sharded state; use ring, halving-doubling, hierarchical or direct",
                    g.sync.name()
                ),
            ));
        }
        if matches!(g.compression, Some(GradientCompression { kind: CompressionKind::TopK { .. }, .. })) {
            return Err(key_err(
                "training",
                "shard",
                "sharded state is reduce-scattered, which top-k gradients (exchanged as an all-gather) cannot be; use quantize or none".into(),
            ));
        }
    }
    if d <= 1 {
        return Ok(());
    }
    match g.sync {
        Algorithm::HalvingDoubling if !d.is_power_of_two() => {
            return Err(key_err(
                "gradients",
                "sync",
                format!("halving-doubling pairs replicas by powers of two, but parallel.data is {d}"),
            ))
        }
        Algorithm::ParameterServer if !g.dedicated_servers && g.servers > d => {
            return Err(key_err(
                "gradients",
                "servers",
                format!("{} colocated servers need as many replicas, but parallel.data is {d}; use server_devices: dedicated or fewer servers", g.servers),
            ))
        }
        Algorithm::Hierarchical => {
            let (p, t) = (s.pipeline.stages, s.parallel.tensor);
            for (stage, k) in (0..p).flat_map(|stage| (0..t).map(move |k| (stage, k))) {
                let mut counts: Vec<(u32, u32)> = Vec::new();
                for r in 0..d {
                    let node = s.node_of(s.placement[((r * p + stage) * t + k) as usize]);
                    match counts.iter_mut().find(|(n, _)| *n == node) {
                        Some(c) => c.1 += 1,
                        None => counts.push((node, 1)),
                    }
                }
                if let Some(&(node, n)) = counts.iter().find(|c| c.1 != counts[0].1) {
                    return Err(key_err(
                        "gradients",
                        "sync",
                        format!(
                            "hierarchical needs the same number of stage {stage}'s replicas{} on every node, but node {} holds {} and node {node} holds {n}",
                            if t > 1 { format!(" (tensor rank {k})") } else { String::new() },
                            counts[0].0,
                            counts[0].1
                        ),
                    ));
                }
            }
        }
        _ => {}
    }
    if g.sync == Algorithm::ParameterServer && g.dedicated_servers {
        let used = &s.placement;
        let free: Vec<u32> = (0..s.cluster.devices).filter(|x| !used.contains(x)).take(g.servers as usize).collect();
        if (free.len() as u32) < g.servers {
            return Err(key_err(
                "gradients",
                "servers",
                format!(
                    "{} dedicated servers need devices no replica uses, but only {} of the cluster's {} are free",
                    g.servers,
                    free.len(),
                    s.cluster.devices
                ),
            ));
        }
        s.server_devices = free;
    }
    Ok(())
}

fn positive<T: PartialOrd + Default>(a: &Field<'_>, v: T) -> Result<T, ScenarioError> {
    if v > T::default() {
        Ok(v)
    } else {
        Err(a.err("must be more than zero"))
    }
}

fn read_link(l: Field<'_>, with_count: bool) -> Result<(LinkParams, u32), ScenarioError> {
    let l = l.map(if with_count { keys::NODE_LINK } else { keys::LINK })?;
    let latency_ns = l.req("latency", |a| a.duration_ns())?;
    let bytes_per_s = l.req("bandwidth", |a| positive(&a, a.bytes_per_s()?))?;
    let count = if with_count { l.opt("count", |a| a.whole().map(|v| v as u32))?.unwrap_or(1) } else { 1 };
    Ok((LinkParams { latency_ns, bytes_per_s }, count))
}

fn read_cluster(c: Field<'_>) -> Result<Cluster, ScenarioError> {
    let c_at = c;
    let c = c.map(keys::CLUSTER)?;
    let flat = ["devices", "link"].iter().any(|k| c.get(k).is_some());
    let boxes = ["nodes", "devices_per_node", "device_link", "node_link"].iter().any(|k| c.get(k).is_some());
    let (devices, fabric) = if flat && boxes {
        return Err(c_at.err(
            "give either devices and link (every device pair joined directly) or nodes, devices_per_node, device_link and node_link, not both",
        ));
    } else if boxes {
        let nodes = c.req("nodes", |a| a.whole().map(|v| v as u32))?;
        let dpn = c.req("devices_per_node", |a| a.whole().map(|v| v as u32))?;
        let (device_link, _) = c.req("device_link", |l| read_link(l, false))?;
        let (node_link, cards) = c.req("node_link", |l| read_link(l, true))?;
        let total = nodes as i128 * dpn as i128;
        if total > MAX_DEVICES {
            return Err(c.cx.err(
                &join(c.path, "nodes"),
                c.origin,
                format!("nodes x devices_per_node = {total} devices, more than {MAX_DEVICES}"),
            ));
        }
        (total as u32, Fabric::TwoLevel { nodes, devices_per_node: dpn, device_link, node_link, cards })
    } else {
        let devices = c.req("devices", |a| a.whole().map(|v| v as u32))?;
        let (link, _) = c.req("link", |l| read_link(l, false))?;
        (devices, Fabric::Flat { link })
    };
    let mut jitter = c.opt("jitter", |a| a.fraction())?.unwrap_or(0.0);
    let (mut stragglers, mut slow_chance, mut slow_factor, mut link_jitter) = (Vec::new(), 0.0, 2.0, 0.0);
    if let Some(v) = c.opt("variability", |v| {
        let v_at = v;
        let v = v.map(keys::VARIABILITY)?;
        let j = v.opt("jitter", |a| a.fraction())?;
        if j.is_some() && c.get("jitter").is_some() {
            return Err(v_at.err("give jitter once: cluster.jitter or cluster.variability.jitter, not both"));
        }
        let number = |a: Field<'_>, lo: f64, hi: f64| -> Result<f64, ScenarioError> {
            let x = a.number()?;
            if (lo..=hi).contains(&x) {
                Ok(x)
            } else {
                Err(a.err(format!("must be from {lo} to {hi}, found {x}")))
            }
        };
        let chance = v.opt("slow_chance", |a| number(a, 0.0, 1.0))?;
        let factor = v.opt("slow_factor", |a| number(a, 1.0, 1000.0))?;
        let list = v.opt("stragglers", |list| {
            let Value::Seq(items) = &list.node.value else {
                return Err(
                    list.err(format!("expected a list of {{ device, slowdown }}, found {}", list.node.value.kind()))
                );
            };
            let mut out: Vec<(u32, f64)> = Vec::new();
            for (i, item) in items.iter().enumerate() {
                let path = format!("{}.{i}", list.path);
                let at = Field { cx: list.cx, path: &path, node: item, def: None };
                let m = at.map(keys::STRAGGLER)?;
                let device = m.req("device", |a| a.whole().map(|x| x as u32))?;
                let slowdown = m.req("slowdown", |a| number(a, 1.0, 1000.0))?;
                if out.iter().any(|&(d, _)| d == device) {
                    return Err(at.err(format!("device {device} is listed twice")));
                }
                out.push((device, slowdown));
            }
            Ok(out)
        })?;
        let links = v.opt("link_jitter", |a| a.fraction())?;
        Ok((j, list.unwrap_or_default(), chance, factor, links))
    })? {
        if let Some(j) = v.0 {
            jitter = j;
        }
        stragglers = v.1;
        slow_chance = v.2.unwrap_or(0.0);
        slow_factor = v.3.unwrap_or(2.0);
        link_jitter = v.4.unwrap_or(0.0);
    }
    let device = c
        .opt("device", |d| {
            let d = d.map(keys::DEVICE)?;
            Ok(DeviceSpec {
                peak_flop_per_s: d
                    .opt("peak", |a| positive(&a, a.quantity(units::parse_flop_per_s, units::FLOP_RATE_UNITS)?))?,
                efficiency: d.opt("efficiency", |a| {
                    let v = a.number()?;
                    if v > 0.0 && v <= 1.0 {
                        Ok(v)
                    } else {
                        Err(a.err(format!("must be more than 0 and at most 1, found {v}")))
                    }
                })?,
                memory_bytes: d.opt("memory", |a| positive(&a, a.bytes()?))?,
            })
        })?
        .unwrap_or_default();
    Ok(Cluster { devices, fabric, jitter, device, stragglers, slow_chance, slow_factor, link_jitter })
}

fn read_training(t: Field<'_>) -> Result<Training, ScenarioError> {
    let t = t.map(keys::TRAINING)?;
    let d = Training::default();
    Ok(Training {
        state_bytes_per_param: t
            .opt("state_bytes_per_param", |a| a.whole().map(|v| v as u64))?
            .unwrap_or(d.state_bytes_per_param),
        reserved_bytes: t.opt("reserved", |a| a.bytes())?.unwrap_or(d.reserved_bytes),
        recompute: t
            .opt("recompute", |a| match a.str()? {
                "none" => Ok(Recompute::None),
                "full" => Ok(Recompute::Full),
                other => Err(a.err(format!("unknown recompute `{other}`; expected none or full"))),
            })?
            .unwrap_or(d.recompute),
        shard: t
            .opt("shard", |a| match a.str()? {
                "none" => Ok(Shard::None),
                "optimizer" => Ok(Shard::Optimizer),
                "gradients" => Ok(Shard::Gradients),
                other => Err(a.err(format!("unknown shard `{other}`; expected none, optimizer or gradients"))),
            })?
            .unwrap_or(d.shard),
        update_ns: t.opt("update", |a| a.duration_ns())?.unwrap_or(d.update_ns),
    })
}

fn read_model(
    model: Field<'_>,
    cluster: &Cluster,
    micro_batch_size: u32,
) -> Result<(ModelSource, Vec<LayerCost>), ScenarioError> {
    let m = model.map(keys::MODEL)?;
    let given: Vec<&str> = keys::names(keys::MODEL).into_iter().filter(|k| m.get(k).is_some()).collect();
    if given.len() != 1 {
        return Err(model.err(format!(
            "give exactly one of layers, profile or transformer{}",
            if given.is_empty() { String::new() } else { format!(", not {}", given.join(" and ")) }
        )));
    }
    match given[0] {
        "layers" => Ok((ModelSource::Layers, m.req("layers", read_layers)?)),
        "profile" => m.req("profile", |a| {
            let rel = a.str()?;
            let path = model.cx.base_dir.join(rel);
            let cached = model.cx.profiles.and_then(|c| c.lock().ok().and_then(|m| m.get(&path).cloned()));
            let layers = match cached {
                Some(layers) => layers,
                None => {
                    let bytes =
                        std::fs::read(&path).map_err(|e| a.err(format!("cannot read {}: {e}", path.display())))?;
                    let text = node::utf8_text(&bytes).map_err(|(line, byte)| ScenarioError::Profile {
                        file: path.display().to_string(),
                        line: line as u64,
                        column: format!("byte {byte}"),
                        message: "is not UTF-8 text; save the profile as UTF-8".into(),
                    })?;
                    let layers = profile::read(text, &path.display().to_string())?;
                    if let Some(mut m) = model.cx.profiles.and_then(|c| c.lock().ok()) {
                        m.insert(path.clone(), layers.clone());
                    }
                    layers
                }
            };
            Ok((ModelSource::Profile(path), layers))
        }),
        _ => m.req("transformer", |a| {
            let t = a.map(keys::TRANSFORMER)?;
            let n = |k: &str| t.req(k, |a| a.whole().map(|v| v as u64));
            let mut shape = Transformer::new(n("layers")?, n("hidden")?, n("heads")?, n("seq_len")?, n("vocab")?);
            let (hidden, heads) = (shape.hidden, shape.heads);
            if let Some(f) = t.opt("ffn_hidden", |a| a.whole().map(|v| v as u64))? {
                shape.ffn_hidden = f;
            }
            if let Some(g) = t.opt("gated_ffn", |a| a.boolean())? {
                shape.gated_ffn = g;
            }
            if let Some(k) = t.opt("kv_heads", |a| {
                let k = a.int(1, heads as i128)? as u64;
                if heads % k != 0 {
                    return Err(a.err(format!(
                        "must divide model.transformer.heads ({heads}) so that each key and value head \
                         serves a whole group of query heads; found {k}"
                    )));
                }
                if (k * hidden) % heads != 0 {
                    return Err(a.err(format!(
                        "gives key and value projections of kv_heads x hidden / heads = {k} x {hidden} / {heads}, \
                         not a whole number; make hidden a multiple of heads"
                    )));
                }
                Ok(k)
            })? {
                shape.kv_heads = k;
            }
            if let Some(at) = t.opt("attention", |a| match a.str()? {
                "standard" => Ok(Attention::Standard),
                "flash" => Ok(Attention::Flash),
                other => Err(a.err(format!("unknown attention `{other}`; expected standard or flash"))),
            })? {
                shape.attention = at;
            }
            if let Some(tied) = t.opt("tied_embeddings", |a| a.boolean())? {
                shape.tied_embeddings = tied;
            }
            if let Some(bytes) = t.opt("bytes_per_value", |a| a.whole().map(|v| v as u64))? {
                shape.bytes_per_value = bytes;
            }
            let need = |key: &str| {
                model.cx.err(
                    &format!("cluster.device.{key}"),
                    &Origin::Default,
                    "is needed to derive layer times from model.transformer",
                )
            };
            let speed = Speed {
                peak_flop_per_s: cluster.device.peak_flop_per_s.ok_or_else(|| need("peak"))? as f64,
                efficiency: cluster.device.efficiency.ok_or_else(|| need("efficiency"))?,
            };
            let table = shape.layer_table(micro_batch_size as u64, speed);
            if table.iter().any(|l| l.forward_ns > MAX_DURATION_NS || l.backward_ns > MAX_DURATION_NS) {
                return Err(model.cx.err(
                    "cluster.device.peak",
                    &Origin::Default,
                    format!(
                        "derives layer times longer than {} s from model.transformer; check peak and efficiency",
                        MAX_DURATION_NS / 1_000_000_000
                    ),
                ));
            }
            Ok((ModelSource::Transformer(shape), table))
        }),
    }
}

fn read_layers(list: Field<'_>) -> Result<Vec<LayerCost>, ScenarioError> {
    let Value::Seq(items) = &list.node.value else {
        return Err(list.err(format!("expected a list of layers, found {}", list.node.value.kind())));
    };
    if items.is_empty() {
        return Err(list.err("the model needs at least one layer"));
    }
    let mut layers = Vec::new();
    for (i, item) in items.iter().enumerate() {
        let path = format!("{}.{i}", list.path);
        let at = Field { cx: list.cx, path: &path, node: item, def: None };
        let m = at.map(keys::LAYER)?;
        let name = m.opt("name", |a| a.text())?.unwrap_or_else(|| format!("layer{i}"));
        let repeat = m.opt("repeat", |a| a.whole())?.unwrap_or(1) as u64;
        let forward_ns = m.req("forward", |a| positive(&a, a.duration_ns()?))?;
        let backward_ns = m.opt("backward", |a| a.duration_ns())?.unwrap_or(forward_ns.saturating_mul(2));
        let activation_bytes = m.req("activation", |a| a.bytes())?;
        let stash_bytes = m.opt("stash", |a| a.bytes())?.unwrap_or(activation_bytes);
        let weight_stash_bytes = m.opt("weight_stash", |a| a.bytes())?.unwrap_or(stash_bytes);
        let params = m.opt("params", |a| a.count())?.unwrap_or(0);
        let tied_params = m.opt("tied_params", |a| a.count())?.unwrap_or(0);
        let tensor_bytes = m.opt("tensor_bytes", |a| a.bytes())?.unwrap_or(0);
        let weight_ns = m
            .opt("weight", |a| {
                let w = a.duration_ns()?;
                if w > backward_ns {
                    return Err(a.err(format!(
                        "is part of the backward, so at most backward ({} ns), found {w} ns",
                        backward_ns
                    )));
                }
                Ok(w)
            })?
            .unwrap_or(backward_ns / 2);
        if layers.len() as u64 + repeat > MAX_LAYERS {
            return Err(at.err(format!("the model expands to more than {MAX_LAYERS} layers")));
        }
        for r in 0..repeat {
            let name = if repeat > 1 { format!("{name}.{r}") } else { name.clone() };
            layers.push(LayerCost {
                stash_bytes,
                weight_stash_bytes,
                params,
                tied_params,
                tensor_bytes,
                weight_ns,
                ..LayerCost::new(name, forward_ns, backward_ns, activation_bytes)
            });
        }
    }
    Ok(layers)
}

fn read_pipeline(
    p: Field<'_>,
    layers: &[LayerCost],
    cluster: &Cluster,
    base_dir: &Path,
) -> Result<Pipeline, ScenarioError> {
    let m = p.map(keys::PIPELINE)?;
    let micro_batch_size = m.opt("micro_batch_size", |a| a.whole().map(|v| v as u32))?.unwrap_or(1);
    let blocking_sends = m.opt("blocking_sends", |a| a.boolean())?.unwrap_or(false);
    let stages = m.req("stages", |a| {
        let v = a.whole()? as u32;
        if v > cluster.devices {
            return Err(a.err(format!("{v} stages need {v} devices, but cluster.devices is {}", cluster.devices)));
        }
        Ok(v)
    })?;
    let micro_batches = m.req("micro_batches", |a| a.whole().map(|v| v as u32))?;
    let schedule = m.req("schedule", |a| a.str()?.parse::<ScheduleKind>().map_err(|e| a.err(e.to_string())))?;
    let chunks = m.opt("chunks", |a| a.whole().map(|v| v as u32))?.unwrap_or(1);
    let pieces = stages as u64 * chunks as u64;
    let n_layers = layers.len() as u64;
    let field_origin = |key: &str| m.get(key).map(|(_, n)| n.origin.clone()).unwrap_or_else(|| m.origin.clone());
    if pieces > n_layers {
        let key = if chunks > 1 { "chunks" } else { "stages" };
        return Err(p.cx.err(
            &join(p.path, key),
            &field_origin(key),
            format!("stages x chunks = {pieces} pieces, but the model has only {n_layers} layers"),
        ));
    }
    let split = match m.get("split") {
        None => even_split(n_layers, pieces),
        Some((path, node)) => {
            let at = Field { cx: p.cx, path: &path, node, def: None };
            match &node.value {
                Value::Str(s) if s == "even" => even_split(n_layers, pieces),
                Value::Seq(items) => {
                    if items.len() as u64 != pieces {
                        return Err(at.err(format!(
                            "has {} entries, but stages x chunks = {pieces} pieces need one each",
                            items.len()
                        )));
                    }
                    let mut split = Vec::with_capacity(items.len());
                    for (i, item) in items.iter().enumerate() {
                        let ip = format!("{path}.{i}");
                        split.push(Field { cx: p.cx, path: &ip, node: item, def: None }.u32(1)?);
                    }
                    let sum: u64 = split.iter().map(|&x| x as u64).sum();
                    if sum != n_layers {
                        return Err(
                            at.err(format!("the pieces hold {sum} layers in all, but the model has {n_layers}"))
                        );
                    }
                    split
                }
                other => {
                    return Err(at.err(format!("expected `even` or a list of layer counts, found {}", other.kind())))
                }
            }
        }
    };
    let shape = Shape::new(stages, micro_batches, chunks);
    check_shape(schedule, shape).map_err(|e| {
        let key = match e {
            ScheduleError::ChunksNotSupported { .. } => "chunks",
            ScheduleError::NotMultiple { .. } | ScheduleError::TooLarge(_) => "micro_batches",
            _ => "schedule",
        };
        p.cx.err(&join(p.path, key), &field_origin(key), e.to_string())
    })?;
    let max_in_flight = m.opt("max_in_flight", |a| a.whole().map(|v| v as u32))?.unwrap_or(stages);
    if m.get("max_in_flight").is_some() && schedule != ScheduleKind::ZbAuto {
        return Err(p.cx.err(
            &join(p.path, "max_in_flight"),
            &field_origin("max_in_flight"),
            format!("applies to schedule zb-auto only, but the schedule is {schedule}"),
        ));
    }
    let steps = m
        .opt("steps", |a| {
            let v = a.whole()? as u32;
            let total = baton_schedule::steps::total_micro_batches(micro_batches, v)
                .and_then(|mb| check_shape(schedule, Shape::new(stages, mb, chunks)))
                .map_err(|e| a.err(format!("{v} steps of {micro_batches} micro-batches: {e}")));
            total.map(|_| v)
        })?
        .unwrap_or(1);
    let flush = m.opt("flush", |a| a.boolean())?.unwrap_or(true);
    let weight_versions = m
        .opt("weight_versions", |a| {
            let w = a.str()?.parse::<baton_schedule::steps::WeightVersions>().map_err(|e| a.err(e))?;
            use baton_schedule::steps::WeightVersions as W;
            if w != W::One && flush {
                return Err(a.err(format!("{w} keeps weight versions for steps that run on without a flush; set pipeline.flush: false")));
            }
            if w != W::One && matches!(schedule, ScheduleKind::FillDrain | ScheduleKind::Custom) {
                return Err(a.err(format!(
                    "{w} runs the schedule on across steps, which {schedule} cannot do (fill-drain would run every step's forwards first; a custom order is one step's); use 1f1b, interleaved or a zero-bubble schedule"
                )));
            }
            Ok(w)
        })?
        .unwrap_or(baton_schedule::steps::WeightVersions::One);
    let version_bytes_per_param = m.opt("version_bytes_per_param", |a| a.whole().map(|v| v as u32))?.unwrap_or(2);
    let order =
        match (schedule, m.get("order")) {
            (ScheduleKind::Custom, None) => return Err(p.cx.err(
                &join(p.path, "schedule"),
                &field_origin("schedule"),
                "custom needs pipeline.order, a file of each device's order (`baton order` writes one to start from)",
            )),
            (ScheduleKind::Custom, Some(_)) => Some(m.req("order", |a| {
                let rel = a.str()?;
                let path = base_dir.join(rel);
                let bytes = std::fs::read(&path).map_err(|e| a.err(format!("cannot read {}: {e}", path.display())))?;
                let file = path.display().to_string();
                let text = node::utf8_text(&bytes).map_err(|(line, byte)| ScenarioError::Order {
                    file: file.clone(),
                    line: line as usize,
                    col: byte,
                    message: "is not UTF-8 text; save the order as UTF-8".into(),
                })?;
                let parsed = baton_schedule::order::parse(text, stages, micro_batches, chunks).map_err(|e| {
                    ScenarioError::Order { file: file.clone(), line: e.line, col: e.col, message: e.message }
                })?;
                Ok((path, std::sync::Arc::new(parsed.plan)))
            })?),
            (_, Some(_)) => {
                return Err(p.cx.err(
                    &join(p.path, "order"),
                    &field_origin("order"),
                    format!("applies to schedule custom only, but the schedule is {schedule}"),
                ))
            }
            (_, None) => None,
        };
    Ok(Pipeline {
        stages,
        split,
        micro_batches,
        schedule,
        chunks,
        micro_batch_size,
        blocking_sends,
        order,
        max_in_flight,
        steps,
        flush,
        weight_versions,
        version_bytes_per_param,
    })
}

/// `layers` split into `pieces` contiguous runs whose sizes differ by at most
/// one; the earlier pieces take the extra layers.
pub fn even_split(layers: u64, pieces: u64) -> Vec<u32> {
    let base = layers / pieces;
    let extra = layers % pieces;
    (0..pieces).map(|i| (base + (i < extra) as u64) as u32).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    const EXAMPLE: &str = r#"
title: "Four stages on one box"
model:
  layers:
    - { name: embed, forward: 1.2ms, backward: 2.4ms, activation: 8MiB }
    - { name: block, repeat: 6, forward: 1ms, backward: 2ms, activation: 8MiB }
    - { name: head,  forward: 0.8ms, backward: 1.6ms, activation: 8MiB }
cluster:
  devices: 4
  link: { latency: 5us, bandwidth: 64GB/s }
pipeline:
  stages: 4
  split: [2, 2, 2, 2]
  micro_batches: 8
  schedule: 1f1b
  chunks: 1
"#;

    fn parse_with(text: &str, sets: &[&str]) -> Result<Scenario, ScenarioError> {
        let sets: Vec<String> = sets.iter().map(|s| s.to_string()).collect();
        parse(text, "t.yaml", "t", &sets)
    }

    #[test]
    fn reads_the_reference_example() {
        let s = parse_with(EXAMPLE, &[]).unwrap();
        assert_eq!(s.title, "Four stages on one box");
        assert_eq!(s.layers.len(), 8);
        assert_eq!(s.layers[0].forward_ns, 1_200_000);
        assert_eq!(s.layers[3].name, "block.2");
        assert_eq!(
            s.cluster.fabric,
            Fabric::Flat { link: LinkParams { latency_ns: 5_000, bytes_per_s: 64_000_000_000 } }
        );
        assert_eq!(s.pipeline.schedule, ScheduleKind::OneFOneB);
        let pieces = s.pieces();
        assert_eq!(pieces[0].forward_ns, 2_200_000);
        assert_eq!(pieces[3].backward_ns, 3_600_000);
        assert_eq!(pieces[3].send_bytes, 8 << 20);
    }

    #[test]
    fn defaults_apply() {
        let text = "model:\n  layers:\n    - {forward: 1ms, activation: 0B, repeat: 5}\ncluster: {devices: 2, link: {latency: 0ns, bandwidth: 1GB/s}}\npipeline: {stages: 2, micro_batches: 4, schedule: fill-drain}\n";
        let s = parse_with(text, &[]).unwrap();
        assert_eq!(s.title, "t");
        assert_eq!(s.seed, 1);
        assert_eq!(s.layers[0].backward_ns, 2_000_000, "backward defaults to 2 x forward");
        assert_eq!(s.pipeline.split, vec![3, 2]);
        assert_eq!(s.pipeline.chunks, 1);
    }

    #[test]
    fn overrides_apply_before_validation() {
        let s = parse_with(EXAMPLE, &["pipeline.micro_batches=16", "pipeline.split=even"]).unwrap();
        assert_eq!(s.pipeline.micro_batches, 16);
        let e = parse_with(EXAMPLE, &["pipeline.micro_batches=0"]).unwrap_err();
        assert_eq!(e.key(), Some("pipeline.micro_batches"));
        assert!(e.to_string().contains("--set pipeline.micro_batches=0"), "{e}");
    }

    fn refusal(sets: &[&str]) -> (String, String) {
        let e = parse_with(EXAMPLE, sets).unwrap_err();
        (e.key().unwrap_or("").to_string(), e.to_string())
    }

    #[test]
    fn refusals_name_the_key() {
        let cases: &[(&[&str], &str, &str)] = &[
            (&["pipeline.split=[2, 2, 2, 1]"], "pipeline.split", "7 layers in all"),
            (&["pipeline.split=[2, 2, 4]"], "pipeline.split", "3 entries"),
            (&["pipeline.split=[0, 4, 2, 2]"], "pipeline.split.0", "at least 1"),
            (&["pipeline.stages=5"], "pipeline.stages", "cluster.devices is 4"),
            (&["cluster.devices=16", "pipeline.stages=9"], "pipeline.stages", "only 8 layers"),
            (&["pipeline.schedule=zigzag"], "pipeline.schedule", "expected one of"),
            (
                &[
                    "pipeline.schedule=interleaved",
                    "pipeline.chunks=2",
                    "pipeline.split=even",
                    "pipeline.micro_batches=6",
                ],
                "pipeline.micro_batches",
                "multiple of",
            ),
            (&["pipeline.chunks=2", "pipeline.split=even"], "pipeline.chunks", "interleaved"),
            (&["cluster.link.bandwidth=0GB/s"], "cluster.link.bandwidth", "more than zero"),
            (&["cluster.link.latency=5"], "cluster.link.latency", "needs a unit"),
            (&["cluster.link.latency=-5us"], "cluster.link.latency", "must not be negative"),
            (&["model.layers.0.forward=0ms"], "model.layers.0.forward", "more than zero"),
            (&["model.layers.0.speed=fast"], "model.layers.0.speed", "unknown key"),
            (&["pipeline.micro_batches=2.5"], "pipeline.micro_batches", "whole number"),
            (&["model.layers=[]"], "model.layers", "at least one layer"),
            (&["cluster.devices=0"], "cluster.devices", "at least 1"),
            (&["cluster.jitter=1.5"], "cluster.jitter", "below 1"),
            (&["cluster.jitter=lots"], "cluster.jitter", "expected a number"),
        ];
        for (sets, key, text) in cases {
            let (k, msg) = refusal(sets);
            assert_eq!(&k, key, "{sets:?}: {msg}");
            assert!(msg.contains(text), "{sets:?}: {msg}");
        }
    }

    #[test]
    fn missing_and_unknown_keys_carry_line_and_column() {
        let text = EXAMPLE.replace("  micro_batches: 8\n", "");
        let e = parse_with(&text, &[]).unwrap_err();
        assert_eq!(e.key(), Some("pipeline.micro_batches"));
        assert!(e.to_string().starts_with("t.yaml:12:3: pipeline.micro_batches: missing"), "{e}");
        let text = EXAMPLE.replace("  chunks: 1\n", "  chunk: 1\n");
        let e = parse_with(&text, &[]).unwrap_err();
        assert_eq!(e.to_string(), "t.yaml:16:3: pipeline.chunk: unknown key `chunk`; expected one of: stages, split, micro_batches, schedule, chunks, micro_batch_size, blocking_sends, order, max_in_flight, steps, flush, weight_versions, version_bytes_per_param");
        let e = parse_with(&EXAMPLE.replace("cluster:", "klaster:"), &[]).unwrap_err();
        assert_eq!(e.key(), Some("klaster"));
    }

    use proptest::prelude::*;

    proptest! {
        #![proptest_config(ProptestConfig { cases: 300, ..ProptestConfig::default() })]

        /// Any text is either a scenario or a clear refusal: never a panic.
        #[test]
        fn arbitrary_text_never_panics(text in "\\PC{0,200}") {
            let _ = parse(&text, "fuzz.yaml", "fuzz", &[]);
        }

        /// The example with one line replaced by noise, or one character
        /// dropped: refused with a message, or accepted, never a panic.
        #[test]
        fn damaged_examples_never_panic(line in 0usize..17, noise in "[ -~]{0,30}", cut in 0usize..600) {
            let mut lines: Vec<String> = EXAMPLE.lines().map(String::from).collect();
            if line < lines.len() {
                lines[line] = noise.clone();
            }
            let damaged = lines.join("\n");
            if let Err(e) = parse(&damaged, "fuzz.yaml", "fuzz", &[]) {
                prop_assert!(!e.to_string().is_empty());
            }
            let mut chars: Vec<char> = EXAMPLE.chars().collect();
            if cut < chars.len() {
                chars.remove(cut);
            }
            let _ = parse(&chars.into_iter().collect::<String>(), "fuzz.yaml", "fuzz", &[]);
            let _ = parse(EXAMPLE, "fuzz.yaml", "fuzz", &[format!("pipeline.{noise}")]);
        }
    }

    #[test]
    fn even_split_spreads_the_remainder_first() {
        assert_eq!(even_split(8, 4), vec![2, 2, 2, 2]);
        assert_eq!(even_split(10, 4), vec![3, 3, 2, 2]);
        assert_eq!(even_split(3, 3), vec![1, 1, 1]);
    }
}
