//! The `baton` command line.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;
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
        baton run scenarios/interleaved.yaml --json - | jq .step_time_ms\n\n\
        baton run scenarios/heavy-head.yaml --memory-svg memory.svg --strict\n  \
        baton run scenarios/heavy-head.yaml --show-layers --layers-csv layers.csv\n\n\
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
        baton sweep scenarios/heavy-head.yaml --vary pipeline.micro_batches=8..128*2 --shard 2/4 --csv part2.csv\n\n\
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
        baton compare scenarios/unbalanced-split.yaml balanced.yaml --svg both.svg\n  \
        baton compare scenarios/interleaved.yaml --set pipeline.schedule=1f1b --set pipeline.chunks=1\n\n\
        With one scenario, --set makes the variant it is compared with; with several, --set applies to all.", outputs_note!()))]
    Compare(CompareArgs),
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
    /// What to rank by: step_time (default), throughput, bubble or memory, e.g. --rank-by throughput.
    #[arg(long, value_name = "FIELD", default_value = "step_time")]
    rank_by: String,
    /// Run only the I-th of N disjoint slices of the grid (every N-th point),
    /// e.g. --shard 3/8 for task 3 of a job array of 8; combine with baton merge.
    #[arg(long, value_name = "I/N")]
    shard: Option<String>,
    /// Rows of the ranked table to print, e.g. --top 50.
    #[arg(long, value_name = "N", default_value_t = 20)]
    top: usize,
    /// Override a value of the scenario for every point, e.g. --set cluster.devices=8.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
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
    #[arg(long, value_name = "FIELD", default_value = "step_time")]
    rank_by: String,
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
    /// Leave the communication lanes out of the chart, e.g. --no-comm-lanes.
    #[arg(long)]
    no_comm_lanes: bool,
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
    /// (device,kind,micro_batch,stage,start_ns,end_ns), e.g. --trace trace.csv.
    #[arg(long, value_name = "PATH|-")]
    trace: Option<PathBuf>,
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
    /// Write the per-layer cost table as a profile CSV that `model: { profile: PATH }`
    /// reads back exactly, e.g. --layers-csv layers.csv.
    #[arg(long, value_name = "PATH|-")]
    layers_csv: Option<PathBuf>,
    /// Exit with status 3 when any device's peak memory exceeds its capacity
    /// (outputs are still written), e.g. --strict.
    #[arg(long)]
    strict: bool,
    /// Leave out the thin lane under each device that shows its sends and
    /// receives, e.g. --svg timeline.svg --no-comm-lanes.
    #[arg(long)]
    no_comm_lanes: bool,
}

/// A failure and the exit status it deserves.
enum Failure {
    /// Bad scenario or arguments: exit 2.
    Input(anyhow::Error),
    /// Anything else: exit 1.
    Other(anyhow::Error),
    /// `--strict` and a device over its memory capacity: exit 3.
    OverCapacity(String),
}

impl From<anyhow::Error> for Failure {
    fn from(e: anyhow::Error) -> Self {
        Failure::Other(e)
    }
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() { 2 } else { 0 });
        }
    };
    let result = match cli.command {
        Command::Run(args) => run(args),
        Command::Split(args) => split(args),
        Command::Sweep(args) => sweep(args),
        Command::Merge(args) => merge(args),
        Command::Compare(args) => compare(args),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(Failure::Input(e)) => {
            eprintln!("error: {e:#}");
            ExitCode::from(2)
        }
        Err(Failure::Other(e)) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
        Err(Failure::OverCapacity(what)) => {
            eprintln!("error: {what}");
            ExitCode::from(3)
        }
    }
}

/// Resolves the requested outputs (`(option, label, path)`); refuses two on
/// standard output or on one file before any work is done.
fn open_outputs(requests: &[(&'static str, &'static str, &Option<PathBuf>)]) -> Result<Outputs, Failure> {
    Outputs::open(requests.iter().filter_map(|&(option, label, path)| path.as_deref().map(|p| (option, label, p))))
        .map_err(output_failure)
}

fn output_failure(e: OutputError) -> Failure {
    if e.is_usage() {
        Failure::Input(e.into())
    } else {
        Failure::Other(e.into())
    }
}

/// Commits every output, then prints `text` and a line per file written: on
/// standard output, or on standard error when an output took standard output.
fn finish(outputs: Outputs, text: &str) -> Result<(), Failure> {
    let to_stdout = outputs.to_stdout();
    let written = outputs.commit().map_err(output_failure)?;
    let mut lines = text.to_string();
    for w in written.iter().filter(|w| !w.to_stdout) {
        lines.push_str(&format!("{} written to {}\n", w.label, w.path.display()));
    }
    if to_stdout {
        eprint!("{lines}");
    } else {
        std::io::stdout().lock().write_all(lines.as_bytes()).context("cannot write to standard output")?;
    }
    Ok(())
}

fn run(args: RunArgs) -> Result<(), Failure> {
    let mut outputs = open_outputs(&[
        ("--svg", "chart", &args.svg),
        ("--memory-svg", "memory chart", &args.memory_svg),
        ("--layers-csv", "layer table", &args.layers_csv),
        ("--trace", "trace", &args.trace),
        ("--json", "report", &args.json),
    ])?;
    let scenario = baton::scenario::load(&args.scenario, &args.sets).map_err(|e| Failure::Input(e.into()))?;
    let outcome = baton::simulate(&scenario).map_err(|e| Failure::Input(e.into()))?;
    let report = &outcome.report;

    if outputs.wants("--svg") {
        let options = baton::report::gantt::ChartOptions { comm_lanes: !args.no_comm_lanes };
        let svg =
            baton::report::gantt::render_with(&outcome.trace, report, options).context("cannot draw the chart")?;
        outputs.write("--svg", svg.as_bytes()).map_err(output_failure)?;
    }
    if outputs.wants("--memory-svg") {
        let memory = baton::memory_inputs(&scenario);
        let svg = baton::report::memory_chart::render(&outcome.trace, report, &memory)
            .context("cannot draw the memory chart")?;
        outputs.write("--memory-svg", svg.as_bytes()).map_err(output_failure)?;
    }
    outputs
        .write_with("--layers-csv", |w| {
            baton::scenario::profile::write(&scenario.layers, w).map_err(std::io::Error::other)
        })
        .map_err(output_failure)?;
    outputs
        .write_with("--trace", |w| baton::report::write_trace_csv(&outcome.trace, w).map_err(std::io::Error::other))
        .map_err(output_failure)?;
    if outputs.wants("--json") {
        let json = baton::report::to_json(report).context("cannot encode the report")?;
        outputs.write("--json", json.as_bytes()).map_err(output_failure)?;
    }

    let mut summary = String::new();
    if args.show_layers {
        summary.push_str(&baton::layer_table(&scenario));
        summary.push('\n');
    }
    summary.push_str(&baton::report::summary(report));
    finish(outputs, &summary)?;
    if args.strict && !report.fits {
        let over: Vec<String> = report.devices.iter().filter(|d| !d.fits).map(|d| d.device.to_string()).collect();
        return Err(Failure::OverCapacity(format!(
            "--strict: device(s) {} exceed their memory capacity",
            over.join(", ")
        )));
    }
    Ok(())
}

fn list(split: &[u32]) -> String {
    format!("[{}]", split.iter().map(u32::to_string).collect::<Vec<_>>().join(", "))
}

fn split(args: SplitArgs) -> Result<(), Failure> {
    use baton::engine::format_ns;
    use baton::report::format_bytes;
    use std::fmt::Write as _;

    let mut outputs = open_outputs(&[
        ("--apply", "scenario with the proposed split", &args.apply),
        ("--json", "result", &args.json),
    ])?;
    let mut sets = args.sets.clone();
    if let Some(n) = args.stages {
        sets.push(format!("pipeline.stages={n}"));
    }
    if let Some(v) = args.chunks {
        sets.push(format!("pipeline.chunks={v}"));
    }
    if args.stages.is_some() || args.chunks.is_some() {
        sets.push("pipeline.split=even".into());
    }
    let scenario = baton::scenario::load(&args.scenario, &sets).map_err(|e| Failure::Input(e.into()))?;
    let plan = baton::planner::plan(&scenario).map_err(|e| Failure::Input(e.into()))?;
    let problem = baton::planner::problem(&scenario).map_err(|e| Failure::Input(e.into()))?;
    let eval = baton_split_eval(&problem, &plan.best.split)?;
    let best = &plan.best.outcome.report;
    let base = &plan.baseline.outcome.report;
    let proxy = &plan.proxy_run.outcome.report;
    let p = scenario.pipeline.stages as usize;
    let mean = eval.device_ns.iter().sum::<u64>() as f64 / p as f64;
    let bottleneck_ns = eval.device_ns.iter().copied().max().unwrap_or(0);
    let imbalance = if mean > 0.0 { bottleneck_ns as f64 / mean } else { 1.0 };
    let fits = plan.no_fit.is_none() && best.fits;

    let mut out = String::new();
    let _ = writeln!(
        out,
        "{}: {} layers into {} pieces ({} stages x {} chunk{}), schedule {}, {} micro-batches",
        scenario.title,
        scenario.layers.len(),
        plan.best.split.len(),
        scenario.pipeline.stages,
        scenario.pipeline.chunks,
        if scenario.pipeline.chunks == 1 { "" } else { "s" },
        scenario.pipeline.schedule,
        scenario.pipeline.micro_batches
    );
    let _ = writeln!(out);
    if let Some((short, device)) = plan.no_fit {
        let cap = scenario.cluster.device.memory_bytes.map_or_else(|| "unlimited".into(), format_bytes);
        let _ = writeln!(
            out,
            "NO SPLIT FITS in {cap} per device: the closest split, {}, leaves device {device} short by {} ({short} bytes).",
            list(&plan.proxy.split),
            format_bytes(short)
        );
        let _ = writeln!(out, "Use more stages, fewer micro-batches in flight, recomputation or a larger device.");
        let _ = writeln!(out);
    }
    let label = if plan.no_fit.is_some() { "closest split" } else { "proposed split" };
    let _ = writeln!(out, "{label} {}", list(&plan.best.split));
    let _ = writeln!(
        out,
        "{:>6}  {:>6}  {:>14}  {:>14}  {:>25}",
        "piece", "device", "layers", "time / mb", "peak mem / capacity"
    );
    let mut first = 0usize;
    for (k, &n) in plan.best.split.iter().enumerate() {
        let d = k % p;
        let dev = &best.devices[d];
        let cap = dev.memory_capacity_bytes.map_or_else(|| "unlimited".into(), format_bytes);
        let layers = format!("{}..{} ({n})", first, first + n as usize - 1);
        let piece_ns: u64 = scenario.layers[first..first + n as usize]
            .iter()
            .map(|l| {
                l.forward_ns
                    + l.backward_ns
                    + if scenario.training.recompute == baton::scenario::Recompute::Full { l.forward_ns } else { 0 }
            })
            .sum();
        let _ = writeln!(
            out,
            "{:>6}  {:>6}  {:>14}  {:>14}  {:>25}{}",
            k,
            d,
            layers,
            format_ns(piece_ns),
            format!("{} / {}", format_bytes(dev.peak_memory_bytes), cap),
            if dev.fits { "" } else { "  OVER" }
        );
        first += n as usize;
    }
    let _ = writeln!(
        out,
        "bottleneck {} per micro-batch (device {}), imbalance {:.3} (max / mean device time)",
        format_ns(bottleneck_ns),
        eval.device_ns.iter().position(|&x| x == bottleneck_ns).unwrap_or(0),
        imbalance
    );
    let _ = writeln!(out);
    let start_report = match plan.start {
        baton::planner::Start::Proxy => proxy,
        baton::planner::Start::Scenario => base,
    };
    let gain_ns = start_report.step_time_ns.saturating_sub(best.step_time_ns);
    let proxy_name = if plan.proxy.exact { "exact" } else { "best-found (search budget reached)" };
    let _ = writeln!(
        out,
        "{proxy_name} split {} (bottleneck {}): simulated step {}",
        list(&plan.proxy.split),
        format_ns(plan.proxy.device_ns.iter().copied().max().unwrap_or(0)),
        format_ns(proxy.step_time_ns),
    );
    if plan.no_fit.is_none() {
        let searched_baseline = base.fits && plan.baseline.split != plan.proxy.split;
        let _ = writeln!(
            out,
            "local search on the simulated step from the {}{}: {} move(s) from the {} split, {} ({:.2}%) faster than it; {} simulations",
            if plan.proxy.exact { "exact split" } else { "proxy's split" },
            if searched_baseline { " and from the scenario's split" } else { "" },
            plan.moves,
            if plan.start == baton::planner::Start::Scenario { "scenario's" } else { proxy_name.split(' ').next().unwrap_or("exact") },
            format_ns(gain_ns),
            if start_report.step_time_ns > 0 { gain_ns as f64 * 100.0 / start_report.step_time_ns as f64 } else { 0.0 },
            plan.simulations,
        );
        if plan.baseline_is_best {
            let _ = writeln!(
                out,
                "the scenario's split {} is already the best found: no change proposed",
                list(&plan.baseline.split)
            );
        }
    }
    let _ = writeln!(out);
    let fits_text = |r: &baton::report::Report| {
        if r.fits {
            "yes".to_string()
        } else {
            let over: Vec<String> = r.devices.iter().filter(|d| !d.fits).map(|d| d.device.to_string()).collect();
            format!("no (device {})", over.join(", "))
        }
    };
    let rows: [(&str, String, String); 5] = [
        ("split", list(&plan.baseline.split), list(&plan.best.split)),
        ("step time", format_ns(base.step_time_ns), format_ns(best.step_time_ns)),
        ("bubble", format!("{:.2}%", base.bubble_fraction * 100.0), format!("{:.2}%", best.bubble_fraction * 100.0)),
        ("samples/s", format!("{:.2}", base.samples_per_s), format!("{:.2}", best.samples_per_s)),
        ("fits memory", fits_text(base), fits_text(best)),
    ];
    let width = rows.iter().map(|r| r.1.len() + 2).max().unwrap_or(0).max(28);
    let _ = writeln!(out, "{:<14} {:<width$} {}", "", "scenario split", label);
    for (name, a, b) in rows {
        let _ = writeln!(out, "{name:<14} {a:<width$} {b}");
    }

    let ms = |ns: u64| ns as f64 / 1e6;
    let json = serde_json::json!({
        "title": scenario.title,
        "stages": scenario.pipeline.stages,
        "chunks": scenario.pipeline.chunks,
        "schedule": scenario.pipeline.schedule.name(),
        "micro_batches": scenario.pipeline.micro_batches,
        "split": plan.best.split,
        "bottleneck_ms": ms(bottleneck_ns),
        "imbalance": imbalance,
        "fits": fits,
        "step_time_ms": best.step_time_ms,
        "bubble_fraction": best.bubble_fraction,
        "samples_per_s": best.samples_per_s,
        "baseline_split": plan.baseline.split,
        "baseline_step_time_ms": base.step_time_ms,
        "baseline_bubble_fraction": base.bubble_fraction,
        "baseline_fits": base.fits,
        "proxy_split": plan.proxy.split,
        "proxy_exact": plan.proxy.exact,
        "proxy_bottleneck_ms": ms(plan.proxy.device_ns.iter().copied().max().unwrap_or(0)),
        "proxy_step_time_ms": proxy.step_time_ms,
        "local_search_start": plan.start.name(),
        "local_search_moves": plan.moves,
        "local_search_simulations": plan.simulations,
        "baseline_is_best": plan.baseline_is_best,
        "local_search_gain_ms": ms(gain_ns),
        "shortfall_bytes": plan.no_fit.map(|x| x.0),
        "short_device": plan.no_fit.map(|x| x.1),
        "devices": best.devices.iter().map(|d| serde_json::json!({
            "device": d.device,
            "time_per_micro_batch_ms": ms(eval.device_ns[d.device as usize]),
            "peak_memory_bytes": d.peak_memory_bytes,
            "memory_capacity_bytes": d.memory_capacity_bytes,
            "fits": d.fits,
        })).collect::<Vec<_>>(),
    });
    let json_text = format!("{}\n", serde_json::to_string_pretty(&json).context("cannot encode the result")?);

    if let Some(path) = &args.apply {
        if !fits {
            return Err(Failure::OverCapacity(format!("no split fits in memory; {} not written", path.display())));
        }
        let text = std::fs::read_to_string(&args.scenario)
            .with_context(|| format!("cannot read {}", args.scenario.display()))?;
        let mut edits = vec![("pipeline.split", list(&plan.best.split))];
        if let Some(n) = args.stages {
            edits.push(("pipeline.stages", n.to_string()));
        }
        if let Some(v) = args.chunks {
            edits.push(("pipeline.chunks", v.to_string()));
        }
        let file = args.scenario.display().to_string();
        let new_text = baton::scenario::edit::set_values(&text, &file, &edits).map_err(|e| Failure::Other(e.into()))?;
        // The copy must read back as the same scenario with the new split.
        let check = baton::scenario::parse_in(
            &new_text,
            &path.display().to_string(),
            &scenario.title,
            args.scenario.parent().unwrap_or(Path::new("")),
            &args.sets,
        )
        .map_err(|e| Failure::Other(anyhow::anyhow!("the rewritten scenario does not read back: {e}")))?;
        if check.pipeline.split != plan.best.split {
            return Err(Failure::Other(anyhow::anyhow!(
                "the rewritten scenario reads back with split {} instead of {}",
                list(&check.pipeline.split),
                list(&plan.best.split)
            )));
        }
        outputs.write("--apply", new_text.as_bytes()).map_err(output_failure)?;
    }
    outputs.write("--json", json_text.as_bytes()).map_err(output_failure)?;
    finish(outputs, &out)?;
    if !fits {
        return Err(Failure::OverCapacity("no split fits in memory".into()));
    }
    Ok(())
}

fn baton_split_eval(
    problem: &baton::planner::SplitProblem,
    split: &[u32],
) -> Result<baton::planner::SplitSolution, Failure> {
    baton::planner::evaluate(problem, split).map_err(|e| Failure::Other(e.into()))
}

fn input<E: Into<anyhow::Error>>(e: E) -> Failure {
    Failure::Input(e.into())
}

fn sweep(args: SweepArgs) -> Result<(), Failure> {
    use baton::sweep::{self as sw, Grid, RankBy};
    use std::io::IsTerminal;
    use std::time::{Duration, Instant};

    let mut outputs =
        open_outputs(&[("--csv", "CSV", &args.csv), ("--svg", "chart", &args.svg), ("--json", "JSON", &args.json)])?;
    let by: RankBy = args.rank_by.parse().map_err(input)?;
    let axes = args.vary.iter().map(|v| sw::parse_vary(v)).collect::<Result<Vec<_>, _>>().map_err(input)?;
    let grid = Grid::new(axes).map_err(input)?;
    let shard = args.shard.as_deref().map(sw::parse_shard).transpose().map_err(input)?;
    if args.jobs == Some(0) {
        return Err(input(anyhow::anyhow!("--jobs must be at least 1")));
    }
    let doc = baton::scenario::Document::load(&args.scenario).map_err(input)?;
    // The base scenario and every varied key must make sense before the sweep starts.
    doc.scenario(&args.sets).map_err(input)?;
    sw::check_keys(&doc, &args.sets, &grid).map_err(input)?;
    let indices: Vec<usize> = match shard {
        Some((i, n)) => sw::shard_indices(grid.len(), i, n),
        None => (0..grid.len()).collect(),
    };

    // A progress bar on a terminal, shown once the sweep has run for a second.
    let bar =
        indicatif::ProgressBar::with_draw_target(Some(indices.len() as u64), indicatif::ProgressDrawTarget::hidden());
    bar.set_style(
        indicatif::ProgressStyle::with_template("{bar:40} {pos}/{len} points, {eta} left")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let started = Instant::now();
    let shown = std::sync::atomic::AtomicBool::new(false);
    let tty = std::io::stderr().is_terminal();
    let tick = || {
        bar.inc(1);
        if tty && started.elapsed() > Duration::from_secs(1) && !shown.swap(true, std::sync::atomic::Ordering::Relaxed)
        {
            bar.set_draw_target(indicatif::ProgressDrawTarget::stderr());
        }
    };
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(args.jobs.unwrap_or(0))
        .build()
        .context("cannot start the worker threads")?;
    let mut points = pool.install(|| sw::run(&doc, &args.sets, &grid, &indices, &tick));
    bar.finish_and_clear();
    sw::rank(&mut points, by);
    let keys = grid.keys();

    outputs
        .write_with("--csv", |w| sw::write_csv(&keys, &points, w).map_err(std::io::Error::other))
        .map_err(output_failure)?;
    if outputs.wants("--svg") {
        let title = doc.scenario(&args.sets).map(|s| s.title).unwrap_or_default();
        let svg = sw::chart(&title, &grid, &points, by).map_err(|e| Failure::Other(anyhow::anyhow!(e)))?;
        outputs.write("--svg", svg.as_bytes()).map_err(output_failure)?;
    }
    outputs.write("--json", sw::to_json(&keys, &points).as_bytes()).map_err(output_failure)?;
    let mut text = String::new();
    if let Some((i, n)) = shard {
        text.push_str(&format!("shard {i}/{n}: {} of the grid's {} points\n", indices.len(), grid.len()));
    }
    let scenario_path = args.scenario.display().to_string();
    text.push_str(&sw::table(&keys, &points, by, args.top, Some(&scenario_path), &args.sets));
    text.push_str(&format!("simulated {} points in {:.2} s\n", points.len(), started.elapsed().as_secs_f64()));
    finish(outputs, &text)?;
    if shard.is_none() && !points.is_empty() && points.iter().all(|p| p.result.is_err()) {
        return Err(input(anyhow::anyhow!("every point was skipped; see the reasons above")));
    }
    Ok(())
}

fn merge(args: MergeArgs) -> Result<(), Failure> {
    use baton::sweep as sw;
    let mut outputs = open_outputs(&[("--csv", "CSV", &args.csv), ("--json", "JSON", &args.json)])?;
    let by: sw::RankBy = args.rank_by.parse().map_err(input)?;
    let mut parts = Vec::new();
    for p in &args.parts {
        let text =
            std::fs::read_to_string(p).map_err(|e| input(anyhow::anyhow!("cannot read {}: {e}", p.display())))?;
        parts.push((p.display().to_string(), text));
    }
    let (keys, points) = sw::merge(&parts, by).map_err(input)?;
    outputs
        .write_with("--csv", |w| sw::write_csv(&keys, &points, w).map_err(std::io::Error::other))
        .map_err(output_failure)?;
    outputs.write("--json", sw::to_json(&keys, &points).as_bytes()).map_err(output_failure)?;
    finish(outputs, &sw::table(&keys, &points, by, args.top, None, &[]))
}

fn compare(args: CompareArgs) -> Result<(), Failure> {
    let mut outputs = open_outputs(&[("--svg", "chart", &args.svg), ("--json", "JSON", &args.json)])?;
    let mut runs = Vec::new();
    let variant = args.scenarios.len() == 1 && !args.sets.is_empty();
    for (i, path) in args.scenarios.iter().enumerate() {
        let sets: &[String] = if variant { &[] } else { &args.sets };
        let s = baton::scenario::load(path, sets).map_err(input)?;
        runs.push((path.display().to_string(), s));
        if variant && i == 0 {
            let v = baton::scenario::load(path, &args.sets).map_err(input)?;
            let desc = args.sets.iter().map(|x| format!("--set {x}")).collect::<Vec<_>>().join(" ");
            runs.push((format!("{} {desc}", path.display()), v));
        }
    }
    if runs.len() < 2 {
        return Err(input(anyhow::anyhow!(
            "give two or more scenarios, or one with --set to compare it with a variant"
        )));
    }
    let outcomes = runs.iter().map(|(_, s)| baton::simulate(s)).collect::<Result<Vec<_>, _>>().map_err(input)?;
    let label = |i: usize| {
        let letters = ["A", "B", "C", "D", "E", "F", "G", "H"];
        letters.get(i).map_or_else(|| format!("R{}", i + 1), |l| l.to_string())
    };
    let entries: Vec<baton::compare::Entry> = outcomes
        .iter()
        .enumerate()
        .map(|(i, o)| baton::compare::Entry { label: label(i), source: runs[i].0.clone(), report: &o.report })
        .collect();
    let text = baton::compare::table(&entries);
    if outputs.wants("--svg") {
        let chart_runs: Vec<baton::report::gantt::Run> = outcomes
            .iter()
            .enumerate()
            .map(|(i, o)| baton::report::gantt::Run { trace: &o.trace, report: &o.report, label: label(i) })
            .collect();
        let title = format!(
            "Comparison: {}",
            entries.iter().map(|e| format!("{} {}", e.label, e.report.title)).collect::<Vec<_>>().join(" / ")
        );
        let options = baton::report::gantt::ChartOptions { comm_lanes: !args.no_comm_lanes };
        let svg =
            baton::report::gantt::render_runs_with(&chart_runs, &title, options).context("cannot draw the chart")?;
        outputs.write("--svg", svg.as_bytes()).map_err(output_failure)?;
    }
    if outputs.wants("--json") {
        let reports: Vec<&baton::report::Report> = outcomes.iter().map(|o| &o.report).collect();
        let json = format!("{}\n", serde_json::to_string_pretty(&reports).context("cannot encode the reports")?);
        outputs.write("--json", json.as_bytes()).map_err(output_failure)?;
    }
    finish(outputs, &text)
}
