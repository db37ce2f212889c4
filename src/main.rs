//! The `baton` command line.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{Context, Result};
use clap::{Args, Parser, Subcommand};

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
    #[command(after_help = "Examples:\n  \
        baton run scenarios/unbalanced-split.yaml\n  \
        baton run scenarios/unbalanced-split.yaml --svg timeline.svg --trace trace.csv\n  \
        baton run scenarios/interleaved.yaml --json report.json --set pipeline.micro_batches=16\n  \
        baton run scenarios/interleaved.yaml --json - | jq .step_time_ms\n\n\
        baton run scenarios/heavy-head.yaml --memory-svg memory.svg --strict\n  \
        baton run scenarios/heavy-head.yaml --show-layers --layers-csv layers.csv\n\n\
        Exit status: 0 success, 2 invalid scenario or usage, 3 over memory capacity with --strict, 1 anything else.")]
    Run(RunArgs),
    /// Find the split of the layers into stages that minimises the bottleneck
    /// within each device's memory, then refine it by simulation.
    #[command(after_help = "Examples:\n  \
        baton split scenarios/heavy-head.yaml\n  \
        baton split scenarios/heavy-head.yaml --stages 8 --json split.json\n  \
        baton split scenarios/heavy-head.yaml --apply heavy-head-split.yaml\n  \
        baton split scenarios/interleaved.yaml --chunks 2 --set pipeline.micro_batches=16\n\n\
        Exit status: 0 a split fits, 3 no split fits in memory, 2 invalid scenario or usage, 1 anything else.")]
    Split(SplitArgs),
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
    #[arg(long, value_name = "PATH")]
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
    #[arg(long, value_name = "PATH")]
    svg: Option<PathBuf>,
    /// Write the report as JSON to PATH, or to standard output with `-`
    /// (the summary then goes to standard error), e.g. --json report.json.
    #[arg(long, value_name = "PATH|-")]
    json: Option<PathBuf>,
    /// Write every operation and transfer as CSV to PATH
    /// (device,kind,micro_batch,stage,start_ns,end_ns), e.g. --trace trace.csv.
    #[arg(long, value_name = "PATH")]
    trace: Option<PathBuf>,
    /// Override a value of the scenario by its dotted key path before it is
    /// checked; repeatable, e.g. --set pipeline.micro_batches=16 --set pipeline.schedule=fill-drain.
    #[arg(long = "set", value_name = "KEY=VALUE")]
    sets: Vec<String>,
    /// Write each device's memory over the step (model state, activations,
    /// capacity) as SVG to PATH, e.g. --memory-svg memory.svg.
    #[arg(long, value_name = "PATH")]
    memory_svg: Option<PathBuf>,
    /// Print the per-layer cost table the simulation used (from the layers,
    /// the profile or the transformer formulas), e.g. --show-layers.
    #[arg(long)]
    show_layers: bool,
    /// Write the per-layer cost table as a profile CSV that `model: { profile: PATH }`
    /// reads back exactly, e.g. --layers-csv layers.csv.
    #[arg(long, value_name = "PATH")]
    layers_csv: Option<PathBuf>,
    /// Exit with status 3 when any device's peak memory exceeds its capacity
    /// (outputs are still written), e.g. --strict.
    #[arg(long)]
    strict: bool,
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

/// An output file being prepared next to its destination; it only replaces
/// the destination on [`Pending::commit`], so no half-written file is left.
struct Pending {
    tmp: tempfile::NamedTempFile,
    dest: PathBuf,
}

fn prepare(dest: &Path) -> Result<Pending> {
    let dir = match dest.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let tmp = tempfile::Builder::new()
        .prefix(".baton-")
        .tempfile_in(&dir)
        .with_context(|| format!("cannot write {}: cannot create a file in {}", dest.display(), dir.display()))?;
    Ok(Pending { tmp, dest: dest.to_path_buf() })
}

impl Pending {
    fn write_all(&mut self, bytes: &[u8]) -> Result<()> {
        self.tmp.write_all(bytes).with_context(|| format!("cannot write {}", self.dest.display()))
    }

    fn commit(self) -> Result<()> {
        let dest = self.dest;
        self.tmp.as_file().sync_all().with_context(|| format!("cannot write {}", dest.display()))?;
        // Temporary files are private; a report is an ordinary file.
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let _ = self.tmp.as_file().set_permissions(std::fs::Permissions::from_mode(0o644));
        }
        self.tmp.persist(&dest).map_err(|e| e.error).with_context(|| format!("cannot write {}", dest.display()))?;
        Ok(())
    }
}

fn is_stdout(p: &Path) -> bool {
    p.as_os_str() == "-"
}

fn run(args: RunArgs) -> Result<(), Failure> {
    let scenario = baton::scenario::load(&args.scenario, &args.sets).map_err(|e| Failure::Input(e.into()))?;
    let outcome = baton::simulate(&scenario).map_err(|e| Failure::Input(e.into()))?;
    let report = &outcome.report;

    // Prepare every file first; replace the destinations only when all are ready.
    let mut pending = Vec::new();
    if let Some(path) = &args.svg {
        let svg = baton::report::gantt::render(&outcome.trace, report).context("cannot draw the chart")?;
        let mut p = prepare(path)?;
        p.write_all(svg.as_bytes())?;
        pending.push(p);
    }
    if let Some(path) = &args.memory_svg {
        let memory = baton::memory_inputs(&scenario);
        let svg = baton::report::memory_chart::render(&outcome.trace, report, &memory)
            .context("cannot draw the memory chart")?;
        let mut p = prepare(path)?;
        p.write_all(svg.as_bytes())?;
        pending.push(p);
    }
    if let Some(path) = &args.layers_csv {
        let mut p = prepare(path)?;
        baton::scenario::profile::write(&scenario.layers, p.tmp.as_file_mut())
            .with_context(|| format!("cannot write {}", path.display()))?;
        pending.push(p);
    }
    if let Some(path) = &args.trace {
        let mut p = prepare(path)?;
        let mut buf = std::io::BufWriter::new(p.tmp.as_file_mut());
        baton::report::write_trace_csv(&outcome.trace, &mut buf)
            .with_context(|| format!("cannot write {}", path.display()))?;
        buf.flush().with_context(|| format!("cannot write {}", path.display()))?;
        drop(buf);
        pending.push(p);
    }
    let json = match &args.json {
        Some(_) => Some(baton::report::to_json(report).context("cannot encode the report")?),
        None => None,
    };
    let mut json_to_stdout = false;
    if let (Some(path), Some(text)) = (&args.json, &json) {
        if is_stdout(path) {
            json_to_stdout = true;
        } else {
            let mut p = prepare(path)?;
            p.write_all(text.as_bytes())?;
            pending.push(p);
        }
    }
    for p in pending {
        p.commit()?;
    }

    let mut summary = String::new();
    if args.show_layers {
        summary.push_str(&baton::layer_table(&scenario));
        summary.push('\n');
    }
    summary.push_str(&baton::report::summary(report));
    if json_to_stdout {
        eprint!("{summary}");
        let mut out = std::io::stdout().lock();
        out.write_all(json.unwrap_or_default().as_bytes()).context("cannot write to standard output")?;
    } else {
        let mut out = std::io::stdout().lock();
        out.write_all(summary.as_bytes()).context("cannot write to standard output")?;
        let outputs = [
            ("chart", &args.svg),
            ("memory chart", &args.memory_svg),
            ("layer table", &args.layers_csv),
            ("trace", &args.trace),
            ("report", &args.json),
        ];
        for (label, path) in outputs {
            if let Some(p) = path {
                writeln!(out, "{label} written to {}", p.display()).context("cannot write to standard output")?;
            }
        }
    }
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
    let gain_ns = proxy.step_time_ns.saturating_sub(best.step_time_ns);
    let _ = writeln!(
        out,
        "exact proxy split {} (bottleneck {}); local search on the simulated step: {} move(s) in {} simulations, {} ({:.2}%) faster",
        list(&plan.proxy.split),
        format_ns(plan.proxy.device_ns.iter().copied().max().unwrap_or(0)),
        plan.moves,
        plan.simulations,
        format_ns(gain_ns),
        if proxy.step_time_ns > 0 { gain_ns as f64 * 100.0 / proxy.step_time_ns as f64 } else { 0.0 }
    );
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
    let _ = writeln!(out, "{:<14} {:<28} {:<28}", "", "scenario split", label);
    for (name, a, b) in rows {
        let _ = writeln!(out, "{name:<14} {a:<28} {b:<28}");
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
        "proxy_bottleneck_ms": ms(plan.proxy.device_ns.iter().copied().max().unwrap_or(0)),
        "proxy_step_time_ms": proxy.step_time_ms,
        "local_search_moves": plan.moves,
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

    let mut pending = Vec::new();
    let mut json_to_stdout = false;
    if let Some(path) = &args.json {
        if is_stdout(path) {
            json_to_stdout = true;
        } else {
            let mut f = prepare(path)?;
            f.write_all(json_text.as_bytes())?;
            pending.push(f);
        }
    }
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
        let mut f = prepare(path)?;
        f.write_all(new_text.as_bytes())?;
        pending.push(f);
    }
    for f in pending {
        f.commit()?;
    }
    if json_to_stdout {
        eprint!("{out}");
        std::io::stdout().lock().write_all(json_text.as_bytes()).context("cannot write to standard output")?;
    } else {
        let mut o = std::io::stdout().lock();
        o.write_all(out.as_bytes()).context("cannot write to standard output")?;
        if let Some(p) = &args.json {
            writeln!(o, "result written to {}", p.display()).context("cannot write to standard output")?;
        }
        if let Some(p) = &args.apply {
            writeln!(o, "scenario with the proposed split written to {}", p.display())
                .context("cannot write to standard output")?;
        }
    }
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
