//! What each `baton` subcommand does, as library functions: each takes what
//! the command line asked for and the outputs it opened
//! ([`baton_output::Outputs`]), does the work, fills the outputs and returns
//! the text to print. The binary only parses flags, opens the outputs, calls
//! one of these, commits and prints, and maps a [`CommandError`] to its exit
//! status.

use std::path::{Path, PathBuf};

use baton_output::{OutputError, Outputs};
use baton_report::svg::{gantt, memory, View};
use baton_report::ReportError;
use baton_scenario::{Override, ScenarioError};
use thiserror::Error;

use crate::compare::{CompareError, Comparison};
use crate::planner::PlanError;
use crate::sweep::{self as sw, Grid, RankBy, Request, SweepError};
use crate::{Making, SimulateError};

/// Why a command failed, and so its exit status.
#[derive(Debug, Error)]
pub enum CommandError {
    /// The scenario was refused (exit 2).
    #[error(transparent)]
    Scenario(#[from] ScenarioError),
    /// The step could not be simulated.
    #[error(transparent)]
    Simulate(#[from] SimulateError),
    /// The split could not be planned.
    #[error(transparent)]
    Plan(#[from] PlanError),
    /// The sweep was refused or failed.
    #[error(transparent)]
    Sweep(#[from] SweepError),
    /// The layout search could not run.
    #[error(transparent)]
    Layout(#[from] crate::layout::LayoutError),
    /// The runs could not be compared (exit 2).
    #[error(transparent)]
    Compare(#[from] CompareError),
    /// An output could not be written.
    #[error(transparent)]
    Output(#[from] OutputError),
    /// An output could not be made (exit 1).
    #[error("cannot {what}: {source}")]
    Render {
        /// What was being made, e.g. `draw the chart`.
        what: &'static str,
        /// Why it failed.
        source: ReportError,
    },
    /// JSON could not be encoded (exit 1).
    #[error("cannot encode the {what}: {source}")]
    Encode {
        /// What was being encoded.
        what: &'static str,
        /// Why it failed.
        source: serde_json::Error,
    },
    /// An input file could not be read (exit 2).
    #[error("cannot read {path}: {message}")]
    Read {
        /// The file.
        path: String,
        /// The system's reason.
        message: String,
    },
    /// The run would need more memory than `--max-memory` allows (exit 2).
    #[error(
        "this run needs about {} ({ops} operations and {transfers} transfers at about {per} B each, with its outputs), \
         more than --max-memory {} allows; simulate fewer micro-batches, stages or replicas, or raise --max-memory",
        baton_report::format_bytes(*.estimate),
        baton_report::format_bytes(*.limit)
    )]
    TooMuchMemory {
        /// The estimate in bytes.
        estimate: u64,
        /// The limit in bytes.
        limit: u64,
        /// Operations in one step.
        ops: u64,
        /// Transfers in one step.
        transfers: u64,
        /// The per-element figure used.
        per: u64,
    },
    /// Memory over capacity where the command was asked to fail on it (exit 3).
    #[error("{0}")]
    OverCapacity(String),
    /// Every point of a sweep was skipped (exit 2); carries the table of reasons.
    #[error("every point of the sweep was skipped, so nothing is written:\n{0}")]
    AllSkipped(String),
    /// A chart option that cannot apply (exit 2).
    #[error("{0}")]
    Chart(String),
}

impl CommandError {
    /// The exit status: 2 for invalid input or usage, 3 for memory over
    /// capacity, 1 for anything else.
    pub fn exit_status(&self) -> u8 {
        match self {
            CommandError::Scenario(_) | CommandError::Compare(_) | CommandError::Read { .. } => 2,
            CommandError::AllSkipped(_) | CommandError::TooMuchMemory { .. } | CommandError::Chart(_) => 2,
            CommandError::Simulate(e) | CommandError::Plan(PlanError::Simulate(e)) => {
                if e.is_internal() {
                    1
                } else {
                    2
                }
            }
            CommandError::Plan(PlanError::Split(_)) => 2,
            CommandError::Plan(PlanError::Apply(_)) => 1,
            CommandError::Sweep(SweepError::Threads(_)) => 1,
            CommandError::Sweep(_) => 2,
            CommandError::Layout(crate::layout::LayoutError::Threads(_)) => 1,
            CommandError::Layout(_) => 2,
            CommandError::Output(e) => {
                if e.is_usage() {
                    2
                } else {
                    1
                }
            }
            CommandError::Render { .. } | CommandError::Encode { .. } => 1,
            CommandError::OverCapacity(_) => 3,
        }
    }
}

/// A command's result: the text to print and, when the command must still
/// fail after its outputs are written (`--strict`, no split fits, every
/// sweep point skipped), the error to end with.
#[derive(Debug)]
pub struct Done {
    /// The summary to print.
    pub text: String,
    /// The error to report after the outputs are committed.
    pub then: Option<CommandError>,
}

/// Refuses a run whose memory estimate is over `limit`; `copies` steps are
/// held at once.
fn check_memory(s: &baton_scenario::Scenario, making: Making, copies: u64, limit: u64) -> Result<(), CommandError> {
    let estimate = crate::memory_estimate_bytes(s, making).saturating_mul(copies);
    if estimate > limit {
        let (ops, transfers) = crate::step_elements(s);
        return Err(CommandError::TooMuchMemory { estimate, limit, ops, transfers, per: crate::BYTES_PER_ELEMENT });
    }
    Ok(())
}

/// Refuses `--width`/`--window` without a chart to shape, and a window that
/// starts after the (longest) step ends.
fn check_view(view: &View, charts: &[&str], outputs: &Outputs, step_ns: Option<u64>) -> Result<(), CommandError> {
    if view != &View::default() && !charts.iter().any(|c| outputs.wants(c)) {
        return Err(CommandError::Chart(format!(
            "--width and --window shape a chart; add {}",
            charts.iter().map(|c| format!("{c} PATH")).collect::<Vec<_>>().join(" or ")
        )));
    }
    if let (Some(w), Some(step)) = (view.window, step_ns) {
        if w.start_ns >= step {
            return Err(CommandError::Chart(format!(
                "--window starts at {}, after the step ends ({}); choose a start before it",
                baton_engine::format_ns(w.start_ns),
                baton_engine::format_ns(step)
            )));
        }
    }
    Ok(())
}

fn render(what: &'static str) -> impl FnOnce(ReportError) -> CommandError {
    move |source| CommandError::Render { what, source }
}

/// What `baton run` was asked.
pub struct RunRequest<'a> {
    /// The scenario file.
    pub scenario: &'a Path,
    /// `--set` overrides.
    pub sets: &'a [String],
    /// Print the layer table first.
    pub show_layers: bool,
    /// Draw communication lanes in the chart.
    pub comm_lanes: bool,
    /// Fail (exit 3) when a device is over its memory capacity.
    pub strict: bool,
    /// Refuse (exit 2) a run whose estimated memory is over this.
    pub max_memory: u64,
    /// The charts' width and time window.
    pub view: View,
    /// The devices the Gantt chart shows (`None`: its default).
    pub devices: Option<Vec<u32>>,
    /// Print the critical path after the summary.
    pub critical_path: bool,
    /// Re-simulate with each stage (and layer) and link faster.
    pub what_if: Option<crate::whatif::Scope>,
    /// The factor `--what-if` multiplies a target's time by.
    pub what_if_factor: f64,
    /// Independent draws of the variability to summarise (`--trials`).
    pub trials: Option<u32>,
}

/// `baton run`: outputs `--svg`, `--memory-svg`, `--layers-csv`, `--trace`, `--events`, `--json`.
pub fn run(r: &RunRequest<'_>, outputs: &mut Outputs) -> Result<Done, CommandError> {
    let scenario = baton_scenario::load(r.scenario, r.sets)?;
    let making = Making {
        json: outputs.wants("--json"),
        trace: outputs.wants("--trace"),
        chart: outputs.wants("--svg") || outputs.wants("--memory-svg"),
    };
    check_memory(&scenario, making, 1, r.max_memory)?;
    check_view(&r.view, &["--svg", "--memory-svg"], outputs, None)?;
    if let Some(list) = &r.devices {
        if !outputs.wants("--svg") {
            return Err(CommandError::Chart("--devices picks the Gantt chart's devices; add --svg PATH".into()));
        }
        let n = scenario.workers();
        if let Some(&d) = list.iter().find(|&&d| d >= n) {
            return Err(CommandError::Chart(format!(
                "--devices names device {d}, but the step has {n} devices (0 to {})",
                n - 1
            )));
        }
    }
    if !(r.what_if_factor > 0.0 && r.what_if_factor < 1.0) {
        return Err(CommandError::Chart(format!(
            "--what-if-factor must be between 0 and 1 (0.9: each part 10% faster), found {}",
            r.what_if_factor
        )));
    }
    let mut outcome = crate::simulate(&scenario)?;
    if let Some(scope) = r.what_if {
        outcome.report.what_if = crate::whatif::analyse(&scenario, &outcome, r.what_if_factor, scope)?;
    }
    if outputs.wants("--trials-svg") && r.trials.is_none() {
        return Err(CommandError::Chart("--trials-svg draws the draws of --trials N; add --trials".into()));
    }
    let mut trial_times = Vec::new();
    if let Some(n) = r.trials {
        if n == 0 || n > crate::trials::MAX_TRIALS {
            return Err(CommandError::Chart(format!(
                "--trials takes 1 to {} draws, found {n}",
                crate::trials::MAX_TRIALS
            )));
        }
        let (t, times) = crate::trials::run(&scenario, n)?;
        outcome.report.trials = Some(t);
        trial_times = times;
    }
    // The critical path costs about a simulation again: only when shown.
    if r.critical_path || outputs.wants("--json") || outputs.wants("--svg") || outputs.wants("--events") {
        outcome.add_critical_path();
    }
    let (trace, report) = (&outcome.trace, &outcome.report);
    check_view(&r.view, &["--svg", "--memory-svg"], outputs, Some(report.step_time_ns))?;
    if outputs.wants("--svg") {
        let options =
            gantt::GanttOptions { comm_lanes: r.comm_lanes, title: None, view: r.view, devices: r.devices.clone() };
        let run = gantt::Run {
            trace,
            report,
            label: String::new(),
            note: crate::overrides_note(r.sets),
            devices_per_node: crate::devices_per_node(&scenario),
        };
        outputs.write("--svg", gantt::render(&[run], &options).map_err(render("draw the chart"))?.as_bytes())?;
    }
    if outputs.wants("--memory-svg") {
        let memory_inputs = crate::memory_inputs(&scenario);
        let run = memory::MemoryRun { trace, report, memory: &memory_inputs };
        let options = memory::MemoryOptions { view: r.view, note: crate::overrides_note(r.sets), ..Default::default() };
        let svg = memory::render(&run, &options).map_err(render("draw the memory chart"))?;
        outputs.write("--memory-svg", svg.as_bytes())?;
    }
    outputs.write_with("--layers-csv", |w| {
        baton_scenario::profile::write(&scenario.layers, w).map_err(std::io::Error::other)
    })?;
    outputs.write_with("--trace", |w| baton_report::csv::write(trace, w).map_err(std::io::Error::other))?;
    if let Some(t) = &report.trials {
        if outputs.wants("--trials-svg") {
            let chart = crate::trials::chart(&scenario, t, &trial_times);
            let svg = baton_report::svg::histogram::render(&chart).map_err(render("draw the histogram"))?;
            outputs.write("--trials-svg", svg.as_bytes())?;
        }
    }
    outputs.write_with("--events", |w| baton_report::events::write(trace, report, w).map_err(std::io::Error::other))?;
    if outputs.wants("--json") {
        let json = baton_report::json::render(report, &Default::default()).map_err(render("encode the report"))?;
        outputs.write("--json", json.as_bytes())?;
    }
    let mut text = String::new();
    if r.show_layers {
        text.push_str(&crate::layer_table(&scenario));
        text.push('\n');
    }
    text.push_str(&baton_report::text::render(report, &Default::default()));
    if r.critical_path {
        text.push('\n');
        text.push_str(&baton_report::critical::render_text(trace, &report.critical_path));
    }
    if r.what_if.is_some() {
        text.push('\n');
        text.push_str(&crate::whatif::render_text(&report.what_if, report.step_time_ns));
    }
    if let Some(t) = &report.trials {
        text.push('\n');
        text.push_str(&crate::trials::render_text(t, scenario.seed));
    }
    let over = report.over_capacity();
    let then = (r.strict && !over.is_empty()).then(|| {
        let list: Vec<String> = over.iter().map(u32::to_string).collect();
        CommandError::OverCapacity(format!("--strict: device(s) {} exceed their memory capacity", list.join(", ")))
    });
    Ok(Done { text, then })
}

/// What `baton split` was asked.
pub struct SplitRequest<'a> {
    /// The scenario file.
    pub scenario: &'a Path,
    /// `--set` overrides.
    pub sets: &'a [String],
    /// Split for this many stages instead.
    pub stages: Option<u32>,
    /// Split for this many chunks per device instead.
    pub chunks: Option<u32>,
    /// Refuse (exit 2) when the simulations it holds at once would need more.
    pub max_memory: u64,
}

/// `baton split`: outputs `--apply` (the rewritten scenario) and `--json`.
pub fn split(r: &SplitRequest<'_>, outputs: &mut Outputs) -> Result<Done, CommandError> {
    let mut sets: Vec<Override> = r.sets.iter().map(|a| Override::set(a)).collect();
    sets.extend(r.stages.map(|n| Override::typed(format!("pipeline.stages={n}"), format!("--stages {n}"))));
    sets.extend(r.chunks.map(|v| Override::typed(format!("pipeline.chunks={v}"), format!("--chunks {v}"))));
    if let Some(typed) = r.stages.map(|n| format!("--stages {n}")).or(r.chunks.map(|v| format!("--chunks {v}"))) {
        sets.push(Override::typed("pipeline.split=even", typed));
    }
    let scenario = baton_scenario::load_with(r.scenario, &sets)?;
    // The search keeps the scenario's, the proxy's, the best and a candidate step.
    check_memory(&scenario, Making::default(), 4, r.max_memory)?;
    let plan = crate::planner::plan(&scenario)?;
    let report = crate::planner::report(&scenario, &plan)?;
    if let Some(dest) = outputs.path("--apply") {
        if !report.fits {
            return Err(CommandError::OverCapacity(format!("no split fits in memory; {} not written", dest.display())));
        }
        let dest = dest.display().to_string();
        let text =
            crate::planner::applied_text(r.scenario, &dest, &scenario, &report.split, r.stages, r.chunks, r.sets)?;
        outputs.write("--apply", text.as_bytes())?;
    }
    let json =
        serde_json::to_string_pretty(&report).map_err(|source| CommandError::Encode { what: "result", source })?;
    outputs.write("--json", format!("{json}\n").as_bytes())?;
    let then = (!report.fits).then(|| CommandError::OverCapacity("no split fits in memory".into()));
    Ok(Done { text: report.text().to_string(), then })
}

/// What `baton sweep` was asked.
pub struct SweepRequest<'a> {
    /// The scenario file.
    pub scenario: &'a Path,
    /// `--set` overrides for every point.
    pub sets: &'a [String],
    /// `--vary` arguments.
    pub vary: &'a [String],
    /// `--rank-by`.
    pub rank_by: &'a str,
    /// `--shard I/N`.
    pub shard: Option<&'a str>,
    /// `--jobs`.
    pub jobs: Option<usize>,
    /// Rows of the table to print.
    pub top: usize,
    /// Skip a point whose estimated memory is over this.
    pub max_memory: u64,
    /// The chart's width in pixels (`None`: the default).
    pub width: Option<u32>,
}

/// `baton sweep`: outputs `--csv`, `--svg`, `--json`.
pub fn sweep(r: &SweepRequest<'_>, outputs: &mut Outputs) -> Result<Done, CommandError> {
    if r.width.is_some() && !outputs.wants("--svg") {
        return Err(CommandError::Chart("--width shapes the chart; add --svg PATH".into()));
    }
    let by: RankBy = r.rank_by.parse()?;
    let axes = r.vary.iter().map(|v| sw::parse_vary(v)).collect::<Result<Vec<_>, _>>()?;
    let grid = Grid::new(axes)?;
    let shard = r.shard.map(sw::parse_shard).transpose()?;
    let doc = baton_scenario::Document::load(r.scenario)?;
    let scenario_text = std::fs::read(r.scenario)
        .map_err(|e| CommandError::Read { path: r.scenario.display().to_string(), message: e.to_string() })?;
    let request = Request {
        doc: &doc,
        sets: r.sets,
        grid: &grid,
        shard,
        jobs: r.jobs,
        by,
        scenario_text: &scenario_text,
        max_memory: r.max_memory,
    };
    let done = sw::execute(&request)?;
    let (keys, points, tag) = (grid.keys(), &done.points, &done.tag);
    let mut text = String::new();
    if let Some((i, n)) = shard {
        text.push_str(&format!("shard {i}/{n}: {} of the grid's {} points\n", done.covered, grid.len()));
    }
    let scenario_path = r.scenario.display().to_string();
    text.push_str(&sw::table(&keys, points, by, r.top, Some(&scenario_path), r.sets));
    if shard.is_none() && points.iter().all(|p| p.result.is_err()) {
        // Nothing to write: say why every point was skipped.
        return Err(CommandError::AllSkipped(sw::skip_reasons(&keys, points, 10)));
    }
    outputs.write_with("--csv", |w| sw::write_csv(&keys, points, tag, w).map_err(std::io::Error::other))?;
    if outputs.wants("--svg") {
        let title = doc.scenario(r.sets).map(|s| s.title).unwrap_or_default();
        let svg = sw::chart(&title, r.sets, &grid, points, by, r.width)
            .map_err(|e| CommandError::Render { what: "draw the chart", source: ReportError::Draw(e) })?;
        outputs.write("--svg", svg.as_bytes())?;
    }
    outputs.write("--json", sw::to_json(&keys, points, tag).as_bytes())?;
    text.push_str(&format!("simulated {} points in {:.2} s\n", points.len(), done.elapsed.as_secs_f64()));
    Ok(Done { text, then: None })
}

/// `baton merge`: outputs `--csv`, `--json`.
pub fn merge(parts: &[PathBuf], rank_by: &str, top: usize, outputs: &mut Outputs) -> Result<Done, CommandError> {
    let by: RankBy = rank_by.parse()?;
    let mut texts = Vec::new();
    for p in parts {
        let text = std::fs::read_to_string(p)
            .map_err(|e| CommandError::Read { path: p.display().to_string(), message: e.to_string() })?;
        texts.push((p.display().to_string(), text));
    }
    if texts.first().is_some_and(|(_, t)| crate::layout::is_layout_csv(t)) {
        let records = crate::layout::merge(&texts)
            .map_err(|m| CommandError::Layout(crate::layout::LayoutError::Option(format!("merge: {m}"))))?;
        outputs.write_with("--csv", |w| {
            let bytes = crate::layout::csv(&records).map_err(std::io::Error::other)?;
            w.write_all(&bytes)
        })?;
        if outputs.wants("--json") {
            let mut json = serde_json::to_string_pretty(&records)
                .map_err(|e| CommandError::Encode { what: "layouts", source: e })?;
            json.push('\n');
            outputs.write("--json", json.as_bytes())?;
        }
        return Ok(Done { text: crate::layout::merged_table(&records, top), then: None });
    }
    let (keys, points, tag) = sw::merge(&texts, by)?;
    outputs.write_with("--csv", |w| sw::write_csv(&keys, &points, &tag, w).map_err(std::io::Error::other))?;
    outputs.write("--json", sw::to_json(&keys, &points, &tag).as_bytes())?;
    Ok(Done { text: sw::table(&keys, &points, by, top, None, &[]), then: None })
}

/// `baton compare`: outputs `--svg`, `--json`.
#[allow(clippy::too_many_arguments)]
pub fn compare(
    scenarios: &[PathBuf],
    sets: &[String],
    vary: Option<&str>,
    comm_lanes: bool,
    max_memory: u64,
    view: View,
    outputs: &mut Outputs,
) -> Result<Done, CommandError> {
    let runs = crate::compare::scenarios(scenarios, sets, vary)?;
    let making = Making { json: outputs.wants("--json"), trace: false, chart: outputs.wants("--svg") };
    let total: u64 = runs.iter().map(|c| crate::memory_estimate_bytes(&c.scenario, making)).sum();
    if let Some(largest) = runs.iter().max_by_key(|c| crate::memory_estimate_bytes(&c.scenario, making)) {
        if total > max_memory {
            let (ops, transfers) = crate::step_elements(&largest.scenario);
            return Err(CommandError::TooMuchMemory {
                estimate: total,
                limit: max_memory,
                ops,
                transfers,
                per: crate::BYTES_PER_ELEMENT,
            });
        }
    }
    check_view(&view, &["--svg"], outputs, None)?;
    let comparison = Comparison::run_with(&runs, outputs.wants("--svg") || outputs.wants("--json"))?;
    check_view(&view, &["--svg"], outputs, comparison.longest_step_ns())?;
    if outputs.wants("--svg") {
        outputs.write("--svg", comparison.chart(comm_lanes, view).map_err(render("draw the chart"))?.as_bytes())?;
    }
    if outputs.wants("--json") {
        let json = comparison.json().map_err(|source| CommandError::Encode { what: "reports", source })?;
        outputs.write("--json", json.as_bytes())?;
    }
    Ok(Done { text: comparison.table(), then: None })
}

/// The scenario format's JSON Schema, pretty-printed.
pub fn schema() -> String {
    serde_json::to_string_pretty(&baton_scenario::keys::schema()).unwrap_or_default()
}

/// What `baton layout` was asked.
pub struct LayoutRequest<'a> {
    /// The scenario file.
    pub scenario: &'a Path,
    /// `--set` overrides.
    pub sets: &'a [String],
    /// `--global-batch`.
    pub global_batch: u64,
    /// `--micro-batch-sizes`.
    pub micro_batch_sizes: &'a [u32],
    /// `--schedules`.
    pub schedules: &'a [String],
    /// `--chunks`.
    pub chunks: &'a [u32],
    /// `--max-tensor`.
    pub max_tensor: Option<u32>,
    /// `--verify`: a number or `all`.
    pub verify: &'a str,
    /// `--all`: no pruning.
    pub all: bool,
    /// `--top`.
    pub top: usize,
    /// `--jobs`.
    pub jobs: Option<usize>,
    /// `--max-memory`.
    pub max_memory: u64,
    /// `--shard I/N`.
    pub shard: Option<&'a str>,
}

/// `baton layout`: outputs `--csv`, `--json`, `--svg`.
pub fn layout(r: &LayoutRequest<'_>, outputs: &mut Outputs) -> Result<Done, CommandError> {
    use crate::layout as ly;
    use std::io::IsTerminal;
    let bad = |m: String| CommandError::Layout(ly::LayoutError::Option(m));
    let schedules = r
        .schedules
        .iter()
        .map(|x| {
            match x.parse::<baton_schedule::ScheduleKind>() {
                Ok(baton_schedule::ScheduleKind::Custom) => Err(bad(
                    "--schedules: custom needs an order file written for one layout; give it in the scenario and use baton run".into(),
                )),
                Ok(k) => Ok(k),
                Err(_) => Err(bad(format!(
                    "--schedules: unknown schedule `{x}`; expected fill-drain, 1f1b, interleaved, zb-h1, zb-h2 or zb-auto"
                ))),
            }
        })
        .collect::<Result<Vec<_>, _>>()?;
    if r.micro_batch_sizes.contains(&0) || r.chunks.contains(&0) {
        return Err(bad("--micro-batch-sizes and --chunks take whole numbers of at least 1".into()));
    }
    if r.max_tensor == Some(0) {
        return Err(bad("--max-tensor must be at least 1".into()));
    }
    let verify = match r.verify {
        "all" => ly::Verify::All,
        n => ly::Verify::Best(
            n.parse::<usize>()
                .ok()
                .filter(|&n| n >= 1)
                .ok_or_else(|| bad(format!("--verify takes a number of layouts (at least 1) or all, found `{n}`")))?,
        ),
    };
    let shard = r.shard.map(sw::parse_shard).transpose()?;
    let doc = baton_scenario::Document::load(r.scenario)?;
    let scenario_text = std::fs::read(r.scenario)
        .map_err(|e| CommandError::Read { path: r.scenario.display().to_string(), message: e.to_string() })?;
    let request = ly::Request {
        shard,
        doc: &doc,
        sets: r.sets,
        global_batch: r.global_batch,
        micro_batch_sizes: r.micro_batch_sizes,
        schedules: &schedules,
        chunks: r.chunks,
        max_tensor: r.max_tensor,
        verify,
        all: r.all,
        jobs: r.jobs,
        max_memory: r.max_memory,
    };
    let bar = indicatif::ProgressBar::with_draw_target(None, indicatif::ProgressDrawTarget::hidden());
    bar.set_style(
        indicatif::ProgressStyle::with_template("{spinner} {pos} layouts done, {elapsed}")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_spinner()),
    );
    if std::io::stderr().is_terminal() {
        bar.set_draw_target(indicatif::ProgressDrawTarget::stderr());
    }
    let started = std::time::Instant::now();
    let done = ly::execute(&request, &|| bar.inc(1))?;
    bar.finish_and_clear();
    if !done.rows.first().is_some_and(|row| matches!(row.outcome, ly::Outcome::Evaluated(_))) {
        let reasons: Vec<String> = done.rows.iter().take(10).map(ly::Row::skipped).collect();
        return Err(CommandError::AllSkipped(format!("no layout could be simulated:\n  {}", reasons.join("\n  "))));
    }
    let scenario_path = r.scenario.display().to_string();
    let mut text = String::new();
    if let Some((i, n)) = shard {
        text.push_str(&format!("shard {i}/{n}: {} of the {} layouts\n", done.rows.len(), done.enumerated));
    }
    text.push_str(&ly::table(&done, r.top, &scenario_path, r.sets));
    text.push_str(&format!("searched in {:.2} s\n", started.elapsed().as_secs_f64()));
    let records = ly::records(&done, &ly::grid_id(&scenario_text, &request), shard.unwrap_or((1, 1)));
    outputs.write_with("--csv", |w| {
        let bytes = ly::csv(&records).map_err(std::io::Error::other)?;
        w.write_all(&bytes)
    })?;
    if outputs.wants("--svg") {
        let title = doc.scenario(r.sets).map(|s| s.title).unwrap_or_default();
        let svg = ly::chart(&done, &title).map_err(render("draw the chart"))?;
        outputs.write("--svg", svg.as_bytes())?;
    }
    if outputs.wants("--json") {
        let mut json =
            serde_json::to_string_pretty(&records).map_err(|e| CommandError::Encode { what: "layouts", source: e })?;
        json.push('\n');
        outputs.write("--json", json.as_bytes())?;
    }
    Ok(Done { text, then: None })
}

/// `baton order`: each device's order of operations for the scenario's
/// schedule, in the order syntax (`--out`, standard output by default).
pub fn order(scenario: &Path, sets: &[String], outputs: &mut Outputs) -> Result<Done, CommandError> {
    let full = baton_scenario::load(scenario, sets)?;
    // One step's order; a note says how several steps run it.
    let mut s = full.clone();
    s.pipeline.steps = 1;
    s.pipeline.flush = true;
    s.pipeline.weight_versions = baton_schedule::steps::WeightVersions::One;
    let steps_note = match (full.pipeline.steps, full.pipeline.flush, full.pipeline.weight_versions) {
        (1, true, _) => String::new(),
        (n, true, _) => format!("# one step's order; each of the {n} steps runs it after a flush\n"),
        (n, false, baton_schedule::steps::WeightVersions::One) => {
            format!("# one step's order; each of the {n} steps runs it on each device after that device's update\n")
        }
        (n, false, w) => format!(
            "# one step's order; with {w} weight versions the devices run the schedule for all {n} x {m} = {} micro-batches at once (--set pipeline.micro_batches={} shows it)\n",
            n as u64 * full.pipeline.micro_batches as u64,
            n as u64 * full.pipeline.micro_batches as u64,
            m = full.pipeline.micro_batches,
        ),
    };
    // zb-auto's order is the one its simulation keeps.
    let (plan, chosen) = if s.pipeline.schedule == baton_schedule::ScheduleKind::ZbAuto {
        let step = crate::simulate(&s)?;
        let chosen = step.report.schedule_choice.as_ref().map_or("", |c| c.chosen);
        (step.trace.plan, format!(" (chose {chosen})"))
    } else {
        (crate::fixed_plan(&s)?, String::new())
    };
    let shape = plan.shape;
    let mut text = format!(
        "# {}: schedule {}{chosen}, {} stages, {} micro-batches{}\n\
         # one line per device, <device>: its ops in order; F<i> forward, B<i> backward{}{}\n",
        s.title,
        s.pipeline.schedule.name(),
        shape.stages,
        shape.micro_batches,
        if shape.chunks > 1 { format!(", {} chunks per device", shape.chunks) } else { String::new() },
        if shape.split_backward { " (input gradient), W<i> weight gradient" } else { "" },
        if shape.chunks > 1 { "; .c the chunk" } else { "" }
    );
    text.push_str(&steps_note);
    text.push_str(&baton_schedule::order_text(&plan));
    if outputs.wants("--out") {
        outputs.write("--out", text.as_bytes())?;
        return Ok(Done { text: String::new(), then: None });
    }
    Ok(Done { text, then: None })
}

#[cfg(test)]
mod tests {
    use super::*;
    use baton_executor::ExecError;
    use baton_schedule::Op;

    #[test]
    fn exit_statuses() {
        // A step that stops with work left is the simulation's own fault.
        let stuck = SimulateError::Exec(ExecError::Stuck { device: 0, op: Op::forward(0, 0) });
        assert_eq!(CommandError::Simulate(stuck).exit_status(), 1);
        let bad = SimulateError::Exec(ExecError::Jitter(2.0));
        assert_eq!(CommandError::Simulate(bad).exit_status(), 2);
        assert_eq!(CommandError::OverCapacity("x".into()).exit_status(), 3);
        assert_eq!(CommandError::AllSkipped(String::new()).exit_status(), 2);
        let usage = OutputError::TwoStdout { first: "--json".into(), second: "--svg".into() };
        assert_eq!(CommandError::Output(usage).exit_status(), 2);
        let io = OutputError::Write { path: "/dev/full".into(), message: "No space left on device".into() };
        assert_eq!(CommandError::Output(io).exit_status(), 1);
    }
}
