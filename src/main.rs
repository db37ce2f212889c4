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
