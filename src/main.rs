//! The `baton` command line.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use baton::commands::{self, CommandError, Done, RunRequest, SplitRequest, SweepRequest};
use baton_output::{OutputError, Outputs};
use clap::{Args, Parser, Subcommand};

/// What every subcommand's help says about output paths.
macro_rules! outputs_note {
    () => {
        "\n\nOutputs: every PATH may be `-` for standard output (at most one per command; the text\n\
         summary then goes to standard error). Files are replaced only when every output is ready;\n\
         a symbolic link is followed and its target replaced; devices and FIFOs are written in place."
    };
}

/// Simulate pipeline-parallel training steps before you spend cluster time.
#[derive(Parser)]
#[command(name = "baton", version, about, long_about = None)]
#[command(
    after_help = "Examples:\n  baton run scenarios/unbalanced-split.yaml --svg timeline.svg\n  baton run scenarios/interleaved.yaml --json - --set pipeline.micro_batches=16"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Simulate one training step of a scenario and report step time, bubbles and idle gaps.
    #[command(after_help = concat!("Examples:\n  \
        baton run scenarios/unbalanced-split.yaml\n  \
        baton run scenarios/unbalanced-split.yaml --svg timeline.svg --trace trace.csv\n  \
        baton run scenarios/interleaved.yaml --json report.json --set pipeline.micro_batches=16\n  \
        baton run scenarios/interleaved.yaml --json - | jq .step_time_ms\n  \
        baton run scenarios/heavy-head.yaml --memory-svg memory.svg --strict\n  \
        baton run scenarios/heavy-head.yaml --show-layers --layers-csv layers.csv\n  \
        baton run scenarios/replicas.yaml --svg replicas.svg --devices 0-7\n  \
        baton run scenarios/unbalanced-split.yaml --critical-path\n  \
        baton run scenarios/unbalanced-split.yaml --what-if\n  \
        baton run scenarios/unbalanced-split.yaml --what-if layers --what-if-factor 0.5\n  \
        baton run scenarios/unbalanced-split.yaml --set cluster.jitter=0.05 --trials 1000 --trials-svg trials.svg\n  \
        baton run scenarios/zero-bubble.yaml --set pipeline.schedule=zb-auto\n  \
        baton run scenarios/zero-bubble.yaml --set pipeline.schedule=custom --set pipeline.order=zero-bubble-drain.order\n\n\
        Exit status: 0 success, 2 invalid scenario or usage, 3 over memory capacity with --strict, 1 anything else.", outputs_note!()))]
    Run(RunArgs),
    /// Find the split of the layers into stages that minimises the bottleneck
    /// within each device's memory, then refine it by simulation.
    #[command(after_help = concat!("Examples:\n  \
        baton split scenarios/heavy-head.yaml\n  \
        baton split scenarios/choose-m.yaml --stages 4 --json split.json\n  \
        baton split scenarios/heavy-head.yaml --apply heavy-head-split.yaml\n  \
        baton split scenarios/interleaved.yaml --chunks 2 --set pipeline.micro_batches=16\n\n\
        Exit status: 0 a split fits, 3 no split fits in memory, 2 invalid scenario or usage, 1 anything else.", outputs_note!()))]
    Split(SplitArgs),
    /// Simulate every combination of several values of some keys, in
    /// parallel, and rank them.
    #[command(after_help = concat!("Examples:\n  \
        baton sweep scenarios/unbalanced-split.yaml --vary pipeline.micro_batches=4..64*2 --vary pipeline.schedule=fill-drain,1f1b\n  \
        baton sweep scenarios/unbalanced-split.yaml --vary 'pipeline.split=[3,3,3,3];[4,3,3,2];[4,4,2,2]' --csv splits.csv\n  \
        baton sweep scenarios/interleaved.yaml --vary pipeline.chunks=1..4 --vary pipeline.micro_batches=4..32*2 --rank-by throughput --svg sweep.svg\n  \
        baton sweep scenarios/heavy-head.yaml --vary pipeline.micro_batches=8..128*2 --shard 2/4 --csv part2.csv\n  \
        baton sweep scenarios/replicas.yaml --vary gradients.sync=ring,hierarchical,parameter-server --vary parallel.data=1,2,4\n\n\
        Values: V1,V2 (or ; between bracketed lists), a..b for every whole number from a to b,\n\
        a..b*f for a, a*f, a*f^2, ... up to b. Invalid points are skipped with their reason.\n\
        Exit status: 0 done, 2 invalid scenario, --vary or usage, 1 anything else.", outputs_note!()))]
    Sweep(SweepArgs),
    /// Combine the CSV outputs of `baton sweep --shard` runs into one ranked result.
    #[command(after_help = concat!("Examples:\n  \
        baton merge part1.csv part2.csv part3.csv part4.csv --csv sweep.csv\n  \
        baton merge part*.csv --csv sweep.csv --rank-by throughput --json sweep.json", outputs_note!()))]
    Merge(MergeArgs),
    /// Simulate several scenarios (or one and a variant of it) and show them side by side.
    #[command(after_help = concat!("Examples:\n  \
        baton split scenarios/heavy-head.yaml --apply heavy-head-split.yaml\n  \
        baton compare scenarios/heavy-head.yaml heavy-head-split.yaml --svg both.svg\n  \
        baton compare scenarios/interleaved.yaml --set pipeline.schedule=1f1b --set pipeline.chunks=1\n  \
        baton compare scenarios/replicas.yaml --set gradients.overlap=false\n\n\
        With one scenario, --set makes the variant it is compared with; with several, --set applies to all.", outputs_note!()))]
    Compare(CompareArgs),
    /// Find the best layout of the model on the cluster's devices: replicas,
    /// stages, tensor groups, micro-batch size and schedule, each split
    /// within memory and simulated.
    #[command(after_help = concat!("Examples:\n  \
        baton layout scenarios/layout.yaml --global-batch 256\n  \
        baton layout scenarios/layout.yaml --global-batch 256 --micro-batch-sizes 1,2 --csv layouts.csv\n  \
        baton layout scenarios/layout.yaml --global-batch 256 --schedules 1f1b,interleaved --chunks 1,2 --top 10\n  \
        baton layout scenarios/layout.yaml --global-batch 256 --shard 1/2 --csv layout-part1.csv\n\n\
        Every layout d x p x t = the cluster's devices (t dividing the heads, at most --max-tensor) with every\n\
        micro-batch size b such that d x b divides the global batch is a row: evaluated, skipped with its reason,\n\
        or pruned when a lower bound on its step shows it cannot beat the best simulated in full.\n\
        Exit status: 0 done, 2 invalid scenario or usage, or no layout could be simulated, 1 anything else.", outputs_note!()))]
    Layout(LayoutArgs),
    /// Write each device's order of operations for the scenario's schedule, one line per device.
    #[command(after_help = concat!("Examples:\n  \
        baton order scenarios/unbalanced-split.yaml\n  \
        baton order scenarios/unbalanced-split.yaml --set pipeline.schedule=zb-h1 --out zb-h1.order\n  \
        baton order scenarios/zero-bubble.yaml --set pipeline.schedule=zb-auto\n\n\
        Syntax: `<device>: tok tok ...`, one token per op in the order the device runs them:\n\
        F3 forward of micro-batch 3, B3 its backward (with a split backward the input gradient),\n\
        W3 its weight gradient, F3.1 with several chunks per device (chunk 1); # starts a comment.\n\
        Edit it and run it with --set pipeline.schedule=custom --set pipeline.order=PATH (relative to the\n\
        scenario file); a device's order may go on over several lines that start with its number.", outputs_note!()))]
    Order(OrderArgs),
    /// Print a JSON Schema (draft 2020-12) of the scenario format, for editors
    /// that complete and check YAML files.
    #[command(after_help = "Examples:\n  \
        baton schema > scenario.schema.json\n  \
        baton schema | jq '.properties.pipeline.properties | keys'\n\n\
        Point an editor at it with a first line in the scenario file:\n  \
        # yaml-language-server: $schema=scenario.schema.json")]
    Schema,
}

#[derive(Args)]
struct OrderArgs {
    /// The scenario file (YAML), e.g. scenarios/unbalanced-split.yaml.
    scenario: PathBuf,
    /// Write the order to PATH instead of standard output, e.g. --out 1f1b.order.
    #[arg(long, value_name = "PATH|-")]
    out: Option<PathBuf>,
    /// Override a value of the scenario, e.g. --set pipeline.schedule=zb-h1.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
}

#[derive(Args)]
struct LayoutArgs {
    /// The scenario file (YAML): the model and the cluster, e.g. scenarios/layout.yaml.
    scenario: PathBuf,
    /// Samples per step over all replicas, B (each layout runs B / (d x b) micro-batches per
    /// replica), e.g. --global-batch 256.
    #[arg(long, value_name = "B")]
    global_batch: u64,
    /// Micro-batch sizes b to try, e.g. --micro-batch-sizes 1,2,4.
    #[arg(long, value_name = "B1,B2,...", value_delimiter = ',', default_value = "1")]
    micro_batch_sizes: Vec<u32>,
    /// Schedules to try, e.g. --schedules 1f1b,interleaved.
    #[arg(long, value_name = "S1,S2,...", value_delimiter = ',', default_value = "1f1b")]
    schedules: Vec<String>,
    /// Chunks per device to try (more than 1 only with interleaved), e.g. --chunks 1,2.
    #[arg(long, value_name = "V1,V2,...", value_delimiter = ',', default_value = "1")]
    chunks: Vec<u32>,
    /// Largest tensor group (default: the devices per node, or all devices on a flat cluster),
    /// e.g. --max-tensor 8.
    #[arg(long, value_name = "T")]
    max_tensor: Option<u32>,
    /// Simulate the best N layouts in full at the end (or `all`: every evaluated layout in
    /// full, no fast estimates), e.g. --verify 10.
    #[arg(long, value_name = "N|all", default_value = "5")]
    verify: String,
    /// Evaluate every layout, pruning none by its lower bound, e.g. --all.
    #[arg(long)]
    all: bool,
    /// Rows of the ranked table to print, e.g. --top 10.
    #[arg(long, value_name = "N", default_value_t = 20)]
    top: usize,
    /// Write every enumerated layout as CSV, e.g. --csv layouts.csv.
    #[arg(long, value_name = "PATH|-")]
    csv: Option<PathBuf>,
    /// Write every enumerated layout as a JSON array, or to standard output with `-`, e.g. --json layouts.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// Draw samples/s of every evaluated layout, best first, fitting or over memory, e.g. --svg layouts.svg.
    #[arg(long, value_name = "PATH|-")]
    svg: Option<PathBuf>,
    /// Threads to simulate with (default: all cores), e.g. --jobs 2.
    #[arg(long, value_name = "N")]
    jobs: Option<usize>,
    /// Override a value of the scenario before the layouts are applied, e.g. --set cluster.device.memory=40GiB.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
    /// Skip (with the estimate) a layout whose simulation would need more than SIZE
    /// (default 16GiB), e.g. --max-memory 4GiB.
    #[arg(long, value_name = "SIZE", default_value = "16GiB", value_parser = parse_size)]
    max_memory: u64,
    /// Search only the I-th of N slices of the layouts, for baton merge, e.g. --shard 2/4.
    #[arg(long, value_name = "I/N")]
    shard: Option<String>,
}

#[derive(Args)]
struct SweepArgs {
    /// The scenario file (YAML), parsed once for the whole sweep, e.g. scenarios/choose-m.yaml.
    scenario: PathBuf,
    /// A key and the values it takes, e.g. --vary pipeline.micro_batches=8,16,32
    /// or --vary pipeline.micro_batches=4..64*2; repeatable (the grid is every combination).
    #[arg(long = "vary", value_name = "KEY=V1,V2,...")]
    vary: Vec<String>,
    /// Write one row per point as CSV, e.g. --csv sweep.csv.
    #[arg(long, value_name = "PATH|-")]
    csv: Option<PathBuf>,
    /// Write the points as a JSON array, or to standard output with `-`, e.g. --json sweep.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// Draw the ranking field against the first varied key, one line per value
    /// of the second, e.g. --svg sweep.svg.
    #[arg(long, value_name = "PATH|-")]
    svg: Option<PathBuf>,
    /// Threads to simulate with (default: all cores), e.g. --jobs 2.
    #[arg(long, value_name = "N")]
    jobs: Option<usize>,
    /// What to rank by: throughput (samples/s, the default: points with more micro-batches do more
    /// work), step_time, bubble or memory, e.g. --rank-by step_time.
    #[arg(long, value_name = "FIELD", default_value = "throughput")]
    rank_by: String,
    /// Run only the I-th of N disjoint slices of the grid (every N-th point),
    /// e.g. --shard 3/8 for task 3 of a job array of 8; combine with baton merge.
    #[arg(long, value_name = "I/N")]
    shard: Option<String>,
    /// The chart's width in pixels (400 to 20000; default 1000), e.g. --width 1600.
    #[arg(long, value_name = "PX", value_parser = baton::parse_width)]
    width: Option<u32>,
    /// Rows of the ranked table to print, e.g. --top 50.
    #[arg(long, value_name = "N", default_value_t = 20)]
    top: usize,
    /// Override a value of the scenario for every point, e.g. --set cluster.devices=8.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
    /// Refuse (exit 2) a run whose estimated memory is over SIZE (default
    /// 16GiB on every machine), e.g. --max-memory 4GiB.
    #[arg(long, value_name = "SIZE", default_value = "16GiB", value_parser = parse_size)]
    max_memory: u64,
}

#[derive(Args)]
struct MergeArgs {
    /// CSV files written by `baton sweep --shard I/N --csv PATH`, e.g. part1.csv part2.csv.
    #[arg(required = true)]
    parts: Vec<PathBuf>,
    /// Write the combined, ranked CSV, e.g. --csv sweep.csv.
    #[arg(long, value_name = "PATH|-")]
    csv: Option<PathBuf>,
    /// Write the combined points as JSON, e.g. --json sweep.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// What to rank by (as in baton sweep), e.g. --rank-by memory.
    #[arg(long, value_name = "FIELD", default_value = "throughput")]
    rank_by: String,
    /// The chart's width in pixels (400 to 20000; default 1000), e.g. --width 1600.
    #[arg(long, value_name = "PX", value_parser = baton::parse_width)]
    width: Option<u32>,
    /// Rows of the ranked table to print, e.g. --top 50.
    #[arg(long, value_name = "N", default_value_t = 20)]
    top: usize,
}

#[derive(Args)]
struct CompareArgs {
    /// Scenario files (YAML), e.g. a.yaml b.yaml.
    #[arg(required = true)]
    scenarios: Vec<PathBuf>,
    /// Draw the runs' Gantt charts stacked on one time axis, e.g. --svg compare.svg.
    #[arg(long, value_name = "PATH|-")]
    svg: Option<PathBuf>,
    /// Write the reports as a JSON array, or to standard output with `-`, e.g. --json compare.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// With one scenario: the variant to compare it with; with several: applied
    /// to all. E.g. --set pipeline.schedule=interleaved --set pipeline.chunks=2.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
    /// One run per value of a key, the rest of the scenario (and any --set)
    /// alike, e.g. --vary pipeline.schedule=1f1b,zb-h1,zb-h2,zb-auto.
    #[arg(long, value_name = "KEY=V1,V2,...")]
    vary: Option<String>,
    /// Leave the communication lanes out of the chart, e.g. --no-comm-lanes.
    #[arg(long)]
    no_comm_lanes: bool,
    /// Refuse (exit 2) a run whose estimated memory is over SIZE (default
    /// 16GiB on every machine), e.g. --max-memory 4GiB.
    #[arg(long, value_name = "SIZE", default_value = "16GiB", value_parser = parse_size)]
    max_memory: u64,
    #[command(flatten)]
    chart: ChartArgs,
}

/// How a timeline chart is framed.
#[derive(Args)]
struct ChartArgs {
    /// The chart's width in pixels (400 to 20000; default: one that suits the
    /// chart, at most 1800), e.g. --width 2400.
    #[arg(long, value_name = "PX", value_parser = baton::parse_width)]
    width: Option<u32>,
    /// Show only this time window, measured from the step's start, e.g.
    /// --window 20ms..60ms.
    #[arg(long, value_name = "START..END", value_parser = baton::parse_window)]
    window: Option<baton::Window>,
}

impl ChartArgs {
    fn view(&self) -> baton::View {
        baton::View { width_px: self.width, window: self.window }
    }
}

#[derive(Args)]
struct SplitArgs {
    /// The scenario file (YAML), e.g. scenarios/heavy-head.yaml.
    scenario: PathBuf,
    /// Split into N stages instead of the scenario's pipeline.stages (the
    /// baseline is then an even split), e.g. --stages 8.
    #[arg(long, value_name = "N")]
    stages: Option<u32>,
    /// Model chunks per device instead of the scenario's pipeline.chunks
    /// (interleaved schedules), e.g. --chunks 2.
    #[arg(long, value_name = "V")]
    chunks: Option<u32>,
    /// Write the result as JSON to PATH, or to standard output with `-`,
    /// e.g. --json split.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// Write a copy of the scenario file with the proposed split (and any
    /// --stages/--chunks) to PATH, keeping everything else as written; --set
    /// overrides are not copied. E.g. --apply balanced.yaml.
    #[arg(long, value_name = "PATH|-")]
    apply: Option<PathBuf>,
    /// Override a value of the scenario by its dotted key path before it is
    /// checked; repeatable, e.g. --set pipeline.micro_batches=32.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
    /// Refuse (exit 2) a run whose estimated memory is over SIZE (default
    /// 16GiB on every machine), e.g. --max-memory 4GiB.
    #[arg(long, value_name = "SIZE", default_value = "16GiB", value_parser = parse_size)]
    max_memory: u64,
}

#[derive(Args)]
struct RunArgs {
    /// The scenario file (YAML), e.g. scenarios/unbalanced-split.yaml.
    scenario: PathBuf,
    /// Write the Gantt chart as SVG to PATH, e.g. --svg timeline.svg.
    #[arg(long, value_name = "PATH|-")]
    svg: Option<PathBuf>,
    /// Write the report as JSON to PATH, or to standard output with `-`
    /// (the summary then goes to standard error), e.g. --json report.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// Write every operation and transfer as CSV to PATH
    /// (device,kind,micro_batch,stage,start_ns,end_ns,slack_ns), e.g. --trace trace.csv.
    #[arg(long, value_name = "PATH|-")]
    trace: Option<PathBuf>,
    /// Write the run in the Trace Event Format (JSON) for general-purpose
    /// trace viewers, critical path flagged, e.g. --events run.json.
    #[arg(long, value_name = "PATH|-")]
    events: Option<PathBuf>,
    /// Override a value of the scenario by its dotted key path before it is
    /// checked; repeatable, e.g. --set pipeline.micro_batches=16 --set pipeline.schedule=fill-drain.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
    /// Write each device's memory over the step (model state, activations,
    /// capacity) as SVG to PATH, e.g. --memory-svg memory.svg.
    #[arg(long, value_name = "PATH|-")]
    memory_svg: Option<PathBuf>,
    /// Print the per-layer cost table the simulation used (from the layers,
    /// the profile or the transformer formulas), e.g. --show-layers.
    #[arg(long)]
    show_layers: bool,
    /// Print the chain of ops, transfers and waits that sets the step time
    /// (each device's run of ops compacted), e.g. --critical-path.
    #[arg(long)]
    critical_path: bool,
    /// Re-simulate with each stage's time (with `layers`, also each layer's)
    /// and each busy link's cut by --what-if-factor, and rank them by how
    /// much the step shortens, e.g. --what-if or --what-if layers.
    #[arg(long, value_name = "stages|layers", num_args = 0..=1, default_missing_value = "stages", value_parser = ["stages", "layers"])]
    what_if: Option<String>,
    /// The factor --what-if multiplies a part's time by (between 0 and 1),
    /// e.g. --what-if-factor 0.5.
    #[arg(long, value_name = "F", default_value_t = 0.9)]
    what_if_factor: f64,
    /// Simulate N independent draws of the variability (seeds seed to
    /// seed + N - 1, in parallel) and report the step time's p50, p90, p99,
    /// max and mean, e.g. --trials 1000.
    #[arg(long, value_name = "N")]
    trials: Option<u32>,
    /// Draw the histogram of the --trials step times as SVG to PATH, e.g.
    /// --trials-svg trials.svg.
    #[arg(long, value_name = "PATH|-")]
    trials_svg: Option<PathBuf>,
    /// Simulate N training steps back to back (the same as --set
    /// pipeline.steps=N; see pipeline.flush and pipeline.weight_versions),
    /// e.g. --steps 4.
    #[arg(long, value_name = "N")]
    steps: Option<u32>,
    /// Write the per-layer cost table as a profile CSV that `model: { profile: PATH }`
    /// reads back exactly, e.g. --layers-csv layers.csv.
    #[arg(long, value_name = "PATH|-")]
    layers_csv: Option<PathBuf>,
    /// Exit with status 3 when any device's peak memory exceeds its capacity
    /// (outputs are still written), e.g. --strict.
    #[arg(long)]
    strict: bool,
    /// Leave out the lane under each device that shows its sends and
    /// receives, e.g. --svg timeline.svg --no-comm-lanes.
    #[arg(long)]
    no_comm_lanes: bool,
    /// Chart only these devices (numbers and ranges; above 64 devices the
    /// chart shows replica 0's unless told), e.g. --svg timeline.svg --devices 0-7,12.
    #[arg(long, value_name = "LIST", value_parser = parse_device_list)]
    devices: Option<DeviceList>,
    /// Refuse (exit 2) a run whose estimated memory is over SIZE (default
    /// 16GiB on every machine), e.g. --max-memory 4GiB.
    #[arg(long, value_name = "SIZE", default_value = "16GiB", value_parser = parse_size)]
    max_memory: u64,
    #[command(flatten)]
    chart: ChartArgs,
}

/// `--devices`: device numbers (one value, so clap keeps it whole).
#[derive(Clone, Debug)]
struct DeviceList(Vec<u32>);

fn parse_device_list(text: &str) -> Result<DeviceList, String> {
    baton::parse_devices(text).map(DeviceList)
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { 2 } else { 0 });
        }
    };
    let result = match &cli.command {
        Command::Run(a) => outputs(&[
            svg(&a.svg),
            memory(&a.memory_svg),
            layers(&a.layers_csv),
            trace(&a.trace),
            ("--events", "trace events", &a.events),
            ("--trials-svg", "histogram", &a.trials_svg),
            json(&a.json, "report"),
        ])
        .and_then(|mut o| {
            let sets: Vec<String> =
                a.sets.iter().cloned().chain(a.steps.map(|n| format!("pipeline.steps={n}"))).collect();
            let r = RunRequest {
                scenario: &a.scenario,
                sets: &sets,
                show_layers: a.show_layers,
                comm_lanes: !a.no_comm_lanes,
                strict: a.strict,
                max_memory: a.max_memory,
                view: a.chart.view(),
                devices: a.devices.as_ref().map(|l| l.0.clone()),
                critical_path: a.critical_path,
                what_if: a.what_if.as_deref().map(|w| {
                    if w == "layers" {
                        baton::whatif::Scope::Layers
                    } else {
                        baton::whatif::Scope::Stages
                    }
                }),
                what_if_factor: a.what_if_factor,
                trials: a.trials,
            };
            finish(commands::run(&r, &mut o), o)
        }),
        Command::Split(a) => {
            outputs(&[("--apply", "scenario with the proposed split", &a.apply), json(&a.json, "result")]).and_then(
                |mut o| {
                    // A scenario is the user's own work: it reaches the disk
                    // before it replaces the old one.
                    o.durable("--apply");
                    let r = SplitRequest {
                        scenario: &a.scenario,
                        sets: &a.sets,
                        stages: a.stages,
                        chunks: a.chunks,
                        max_memory: a.max_memory,
                    };
                    finish(commands::split(&r, &mut o), o)
                },
            )
        }
        Command::Sweep(a) => {
            outputs(&[("--csv", "CSV", &a.csv), svg(&a.svg), json(&a.json, "JSON")]).and_then(|mut o| {
                let r = SweepRequest {
                    scenario: &a.scenario,
                    sets: &a.sets,
                    vary: &a.vary,
                    rank_by: &a.rank_by,
                    shard: a.shard.as_deref(),
                    jobs: a.jobs,
                    top: a.top,
                    max_memory: a.max_memory,
                    width: a.width,
                };
                finish(commands::sweep(&r, &mut o), o)
            })
        }
        Command::Layout(a) => {
            outputs(&[("--csv", "CSV", &a.csv), svg(&a.svg), json(&a.json, "JSON")]).and_then(|mut o| {
                let r = commands::LayoutRequest {
                    scenario: &a.scenario,
                    sets: &a.sets,
                    global_batch: a.global_batch,
                    micro_batch_sizes: &a.micro_batch_sizes,
                    schedules: &a.schedules,
                    chunks: &a.chunks,
                    max_tensor: a.max_tensor,
                    verify: &a.verify,
                    all: a.all,
                    top: a.top,
                    jobs: a.jobs,
                    max_memory: a.max_memory,
                    shard: a.shard.as_deref(),
                };
                finish(commands::layout(&r, &mut o), o)
            })
        }
        Command::Order(a) => outputs(&[("--out", "order", &a.out)])
            .and_then(|mut o| finish(commands::order(&a.scenario, &a.sets, &mut o), o)),
        Command::Merge(a) => outputs(&[("--csv", "CSV", &a.csv), json(&a.json, "JSON")])
            .and_then(|mut o| finish(commands::merge(&a.parts, &a.rank_by, a.top, &mut o), o)),
        Command::Schema => {
            let mut out = std::io::stdout().lock();
            return match writeln!(out, "{}", commands::schema()).and_then(|()| out.flush()) {
                Ok(()) => ExitCode::SUCCESS,
                Err(e) => {
                    eprintln!("error: cannot write the schema: {e}");
                    ExitCode::from(1)
                }
            };
        }
        Command::Compare(a) => outputs(&[svg(&a.svg), json(&a.json, "JSON")]).and_then(|mut o| {
            finish(
                commands::compare(
                    &a.scenarios,
                    &a.sets,
                    a.vary.as_deref(),
                    !a.no_comm_lanes,
                    a.max_memory,
                    a.chart.view(),
                    &mut o,
                ),
                o,
            )
        }),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e}");
            ExitCode::from(e.exit_status())
        }
    }
}

type Request<'a> = (&'static str, &'static str, &'a Option<PathBuf>);

/// A size such as `16GiB` for `--max-memory`.
fn parse_size(text: &str) -> Result<u64, String> {
    baton::scenario::units::parse_bytes(text)
}

fn svg(path: &Option<PathBuf>) -> Request<'_> {
    ("--svg", "chart", path)
}
fn memory(path: &Option<PathBuf>) -> Request<'_> {
    ("--memory-svg", "memory chart", path)
}
fn layers(path: &Option<PathBuf>) -> Request<'_> {
    ("--layers-csv", "layer table", path)
}
fn trace(path: &Option<PathBuf>) -> Request<'_> {
    ("--trace", "trace", path)
}
fn json<'a>(path: &'a Option<PathBuf>, label: &'static str) -> Request<'a> {
    ("--json", label, path)
}

/// Resolves the requested outputs; refuses two on standard output or on one
/// file before any work is done.
fn outputs(requests: &[Request<'_>]) -> Result<Outputs, CommandError> {
    let given = requests.iter().filter_map(|&(option, label, path)| path.as_deref().map(|p| (option, label, p)));
    Ok(Outputs::open(given)?)
}

/// Commits every output of a command that did its work, then prints its text
/// and a line per file written: on standard output, or on standard error when
/// an output took standard output. Ends with the command's late error, if any.
fn finish(done: Result<Done, CommandError>, outputs: Outputs) -> Result<(), CommandError> {
    let done = done?;
    let to_stdout = outputs.to_stdout();
    let written = outputs.commit()?;
    let mut lines = done.text;
    for w in written.iter().filter(|w| !w.to_stdout) {
        lines.push_str(&format!("{} written to {}\n", w.label, w.path.display()));
    }
    if to_stdout {
        eprint!("{lines}");
    } else if let Err(e) = std::io::stdout().lock().write_all(lines.as_bytes()) {
        let path = std::path::PathBuf::from("standard output");
        return Err(OutputError::Write { path: path.display().to_string(), message: e.to_string() }.into());
    }
    done.then.map_or(Ok(()), Err)
}
