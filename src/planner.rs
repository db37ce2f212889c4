//! `baton split`: the exact split for a scenario, checked and refined by
//! simulation.
//!
//! 1. The exact search ([`baton_split::solve`]) minimises the largest piece's
//!    forward + backward time per micro-batch under each device's memory,
//!    given how many micro-batches the schedule keeps in flight on each piece.
//! 2. That proxy ignores links and the schedule's order, so a local search
//!    then moves one boundary by one layer at a time, keeping the move that
//!    shortens the simulated step the most, while the step time drops and
//!    every device still fits its memory.

use std::fmt::Write as _;
use std::path::Path;

use baton_engine::format_ns;
use baton_report::format_bytes;
use baton_scenario::{PieceCosts, Scenario};
use baton_split::{Found, Memory, Pieces, Problem, Solution};
use serde::Serialize;

pub use baton_split::{evaluate, Solution as SplitSolution};

use crate::{simulate, SimulateError, SimulatedStep};

/// Upper bound on the simulations the local search runs.
pub const MAX_SEARCH_SIMULATIONS: usize = 2_000;

/// A scenario's pieces as the split search prices them: time from the
/// scenario's piece rule, memory = model state + the most the schedule holds
/// at once on the piece: stashes of micro-batches between F and B plus, with
/// a split backward, weight stashes between B and W
/// ([`crate::memory_holds`]).
#[derive(Clone, Debug)]
pub struct ScenarioPieces {
    costs: PieceCosts,
    holds: Vec<Vec<(u64, u64)>>,
    state: crate::StatePrice,
}

impl Pieces for ScenarioPieces {
    fn layers(&self) -> usize {
        self.costs.layers()
    }
    fn time_ns(&self, a: usize, b: usize) -> u128 {
        self.costs.time_ns(a, b)
    }
    fn bytes(&self, k: usize, a: usize, b: usize) -> u128 {
        let state = self.state.bytes(self.costs.params(k, a, b));
        state
            + baton_schedule::held_bytes(
                &self.holds[k],
                self.costs.stash_bytes(a, b),
                self.costs.weight_stash_bytes(a, b),
            )
    }
    fn position_independent(&self) -> bool {
        self.costs.position_independent() && self.holds.windows(2).all(|w| w[0] == w[1])
    }
}

/// Everything the split search needs of a scenario.
#[derive(Clone, Debug)]
pub struct SplitInputs {
    pieces: ScenarioPieces,
    devices: usize,
    chunks: usize,
    memory: Option<Memory>,
}

impl SplitInputs {
    /// The split problem, borrowing these inputs.
    pub fn problem(&self) -> Problem<'_> {
        Problem { pieces: &self.pieces, devices: self.devices, chunks: self.chunks, memory: self.memory }
    }
}

/// The split problem a scenario poses.
pub fn inputs(s: &Scenario) -> Result<SplitInputs, SimulateError> {
    Ok(SplitInputs {
        pieces: ScenarioPieces {
            costs: s.piece_costs(),
            holds: crate::memory_holds(s)?,
            state: crate::StatePrice::of(s),
        },
        devices: s.pipeline.stages as usize,
        chunks: s.pipeline.chunks as usize,
        memory: s
            .cluster
            .device
            .memory_bytes
            .map(|capacity_bytes| Memory { capacity_bytes, reserved_bytes: s.training.reserved_bytes }),
    })
}

/// A split and its simulated step.
#[derive(Clone, Debug)]
pub struct Candidate {
    /// Layers per piece.
    pub split: Vec<u32>,
    /// Its simulated step.
    pub outcome: SimulatedStep,
}

impl Candidate {
    fn step_ns(&self) -> u64 {
        self.outcome.report.step_time_ns
    }
}

/// Where the winning local search started.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Start {
    /// The exact proxy's split.
    Proxy,
    /// The scenario's own split.
    Scenario,
}

impl Start {
    /// `proxy` or `scenario`, as the JSON says.
    pub fn name(self) -> &'static str {
        match self {
            Start::Proxy => "proxy",
            Start::Scenario => "scenario",
        }
    }
}

/// What `baton split` found.
#[derive(Debug)]
pub struct SplitPlan {
    /// The scenario's own split, simulated.
    pub baseline: Candidate,
    /// The exact proxy's answer, and its simulation.
    pub proxy: Solution,
    /// The proxy's split, simulated.
    pub proxy_run: Candidate,
    /// The best split found: never slower than the scenario's own when that
    /// fits, and the scenario's own when nothing found is faster.
    pub best: Candidate,
    /// Where the local search that found `best` started.
    pub start: Start,
    /// Boundary moves that search kept (0 when `best` is its start).
    pub moves: usize,
    /// Simulations run in all (the two starts and every move tried).
    pub simulations: usize,
    /// The scenario's own split fits and no split found is faster.
    pub baseline_is_best: bool,
    /// When no split fits: the smallest shortfall in bytes and the device.
    pub no_fit: Option<(u64, usize)>,
}

fn with_split(s: &Scenario, split: &[u32]) -> Scenario {
    let mut t = s.clone();
    t.pipeline.split = split.to_vec();
    t
}

fn run(s: &Scenario, split: &[u32]) -> Result<Candidate, SimulateError> {
    run_with(s, split, simulate)
}

/// A step simulator: [`simulate`] or the fast evaluator.
pub type Simulator = fn(&Scenario) -> Result<SimulatedStep, SimulateError>;

fn run_with(s: &Scenario, split: &[u32], sim: Simulator) -> Result<Candidate, SimulateError> {
    Ok(Candidate { split: split.to_vec(), outcome: sim(&with_split(s, split))? })
}

/// Moves one boundary by one layer at a time from `from`, keeping the move
/// that most shortens the simulated step while every device fits, until no
/// move helps or `budget` simulations have run. Returns the split reached and
/// the moves kept.
fn local_search(s: &Scenario, from: Candidate, budget: &mut usize) -> Result<(Candidate, usize), SimulateError> {
    local_search_with(s, from, budget, simulate)
}

fn local_search_with(
    s: &Scenario,
    from: Candidate,
    budget: &mut usize,
    sim: Simulator,
) -> Result<(Candidate, usize), SimulateError> {
    let mut best = from;
    let mut moves = 0;
    loop {
        let mut improved: Option<Candidate> = None;
        'moves: for b in 0..best.split.len().saturating_sub(1) {
            for towards_left in [true, false] {
                let mut split = best.split.clone();
                let (from, to) = if towards_left { (b + 1, b) } else { (b, b + 1) };
                if split[from] <= 1 {
                    continue;
                }
                split[from] -= 1;
                split[to] += 1;
                if *budget == 0 {
                    break 'moves;
                }
                *budget -= 1;
                let c = run_with(s, &split, sim)?;
                if c.outcome.report.fits && c.step_ns() < improved.as_ref().unwrap_or(&best).step_ns() {
                    improved = Some(c);
                }
            }
        }
        match improved {
            Some(c) => {
                best = c;
                moves += 1;
            }
            None => return Ok((best, moves)),
        }
    }
}

/// Every split of `layers` into `pieces` non-empty runs, when there are at
/// most `cap` of them.
fn all_splits(layers: u32, pieces: u32, cap: usize) -> Option<Vec<Vec<u32>>> {
    // C(layers - 1, pieces - 1), stopping as soon as it passes the cap.
    let (n, k) = (layers.checked_sub(1)? as u128, pieces.checked_sub(1)? as u128);
    let mut count: u128 = 1;
    for i in 0..k.min(n.saturating_sub(k)) {
        count = count * (n - i) / (i + 1);
        if count > cap as u128 {
            return None;
        }
    }
    fn rec(left: u32, pieces: u32, prefix: &mut Vec<u32>, out: &mut Vec<Vec<u32>>) {
        if pieces == 1 {
            prefix.push(left);
            out.push(prefix.clone());
            prefix.pop();
            return;
        }
        for first in 1..=left - (pieces - 1) {
            prefix.push(first);
            rec(left - first, pieces - 1, prefix, out);
            prefix.pop();
        }
    }
    let mut out = Vec::new();
    rec(layers, pieces, &mut Vec::new(), &mut out);
    Some(out)
}

/// Splits few enough that [`refine`] simulates every one.
pub const EVERY_SPLIT_UP_TO: usize = 64;

/// Improves `s`'s own split on the step `sim` gives: when the layers can be
/// cut into its pieces in at most [`EVERY_SPLIT_UP_TO`] ways, every split
/// is tried and the fastest that fits kept (ties: the first in
/// lexicographic order); otherwise the local search runs from `s`'s split
/// (at most `budget` steps tried).
pub fn refine(s: &Scenario, budget: usize, sim: Simulator) -> Result<Candidate, SimulateError> {
    let start = run_with(s, &s.pipeline.split, sim)?;
    let pieces = s.pipeline.split.len() as u32;
    if let Some(splits) = all_splits(s.layers.len() as u32, pieces, EVERY_SPLIT_UP_TO) {
        let mut best = start;
        for split in splits {
            let c = run_with(s, &split, sim)?;
            let better = c.outcome.report.fits
                && (!best.outcome.report.fits
                    || c.step_ns() < best.step_ns()
                    || (c.step_ns() == best.step_ns() && c.split < best.split));
            if better {
                best = c;
            }
        }
        return Ok(best);
    }
    let mut budget = budget;
    let (best, _) = local_search_with(s, start, &mut budget, sim)?;
    Ok(best)
}

/// Finds the best split for `s` (its stages, chunks and schedule).
///
/// The local search runs from the proxy's split and, when it fits and
/// differs, from the scenario's own; the faster result wins, ties going to
/// the scenario's split (no change for no gain). So the proposal is never
/// slower than a scenario split that fits.
pub fn plan(s: &Scenario) -> Result<SplitPlan, PlanError> {
    let inputs = inputs(s)?;
    let baseline = run(s, &s.pipeline.split)?;
    let (proxy, mut no_fit) = match baton_split::solve(&inputs.problem())? {
        Found::Fits(sol) => (sol, None),
        Found::NoFit { shortfall_bytes, device, closest } => (closest, Some((shortfall_bytes, device))),
    };
    // The proxy's memory bound is conservative with several chunks per
    // device; a scenario split that fits in the simulation is a split that fits.
    if baseline.outcome.report.fits {
        no_fit = None;
    }
    let proxy_run = run(s, &proxy.split)?;
    let simulations = 2;
    if no_fit.is_some() {
        let best = proxy_run.clone();
        return Ok(SplitPlan {
            baseline,
            proxy,
            proxy_run,
            best,
            start: Start::Proxy,
            moves: 0,
            simulations,
            baseline_is_best: false,
            no_fit,
        });
    }
    let mut budget = MAX_SEARCH_SIMULATIONS.saturating_sub(simulations);
    let mut results: Vec<(Candidate, usize, Start)> = Vec::new();
    if proxy_run.outcome.report.fits || !baseline.outcome.report.fits {
        let (c, moves) = local_search(s, proxy_run.clone(), &mut budget)?;
        results.push((c, moves, Start::Proxy));
    }
    if baseline.outcome.report.fits && baseline.split != proxy.split {
        let (c, moves) = local_search(s, baseline.clone(), &mut budget)?;
        results.push((c, moves, Start::Scenario));
    }
    let simulations = MAX_SEARCH_SIMULATIONS - budget;
    // Fastest first; on a tie the scenario's own split, then the scenario's start.
    let key =
        |(c, _, start): &(Candidate, usize, Start)| (c.step_ns(), c.split != baseline.split, *start != Start::Scenario);
    results.sort_by_key(key);
    let (best, moves, start) = results.into_iter().next().unwrap_or_else(|| (proxy_run.clone(), 0, Start::Proxy));
    let baseline_is_best = baseline.outcome.report.fits && best.split == baseline.split;
    Ok(SplitPlan { baseline, proxy, proxy_run, best, start, moves, simulations, baseline_is_best, no_fit })
}

/// Why a split could not be planned.
#[derive(Debug, thiserror::Error)]
pub enum PlanError {
    /// A candidate could not be simulated.
    #[error(transparent)]
    Simulate(#[from] SimulateError),
    /// The split search refused the problem.
    #[error("cannot split: {0}")]
    Split(#[from] baton_split::SplitError),
    /// The scenario file could not be rewritten with the proposed split.
    #[error("{0}")]
    Apply(String),
}

/// One device of the proposed split, as the JSON lists it.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SplitDevice {
    /// Pipeline device.
    pub device: u32,
    /// Whether its simulated peak fits its capacity.
    pub fits: bool,
    /// Its capacity (`null` when unlimited).
    pub memory_capacity_bytes: Option<u64>,
    /// Its simulated peak memory.
    pub peak_memory_bytes: u64,
    /// Forward + backward time of its pieces per micro-batch, in ms.
    pub time_per_micro_batch_ms: f64,
}

/// What `baton split` reports: its JSON (fields in alphabetical order, as
/// earlier versions wrote them) and, through [`SplitReport::text`], its
/// summary.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SplitReport {
    /// The scenario's own split's bubble fraction.
    pub baseline_bubble_fraction: f64,
    /// Whether the scenario's own split fits.
    pub baseline_fits: bool,
    /// The scenario's split fits and nothing found is faster.
    pub baseline_is_best: bool,
    /// The scenario's own split.
    pub baseline_split: Vec<u32>,
    /// The scenario's own split's step time.
    pub baseline_step_time_ms: f64,
    /// The proposal's largest device time per micro-batch.
    pub bottleneck_ms: f64,
    /// The proposal's bubble fraction.
    pub bubble_fraction: f64,
    /// Chunks per device.
    pub chunks: u32,
    /// The proposal, per device.
    pub devices: Vec<SplitDevice>,
    /// Whether the proposal fits in memory.
    pub fits: bool,
    /// Largest over mean device time.
    pub imbalance: f64,
    /// How much faster the winning local search made its start.
    pub local_search_gain_ms: f64,
    /// Moves the winning local search kept.
    pub local_search_moves: usize,
    /// Simulations run in all.
    pub local_search_simulations: usize,
    /// `proxy` or `scenario`: where the winning search started.
    pub local_search_start: &'static str,
    /// Micro-batches per step.
    pub micro_batches: u32,
    /// The proxy's largest device time per micro-batch.
    pub proxy_bottleneck_ms: f64,
    /// Whether the proxy is proven optimal.
    pub proxy_exact: bool,
    /// The proxy's split.
    pub proxy_split: Vec<u32>,
    /// The proxy's simulated step time.
    pub proxy_step_time_ms: f64,
    /// The proposal's throughput.
    pub samples_per_s: f64,
    /// The schedule's name.
    pub schedule: &'static str,
    /// When nothing fits: the device short in the closest split.
    pub short_device: Option<usize>,
    /// When nothing fits: bytes more each device would need.
    pub shortfall_bytes: Option<u64>,
    /// The proposal (or the closest split when nothing fits).
    pub split: Vec<u32>,
    /// Pipeline stages.
    pub stages: u32,
    /// The proposal's step time.
    pub step_time_ms: f64,
    /// The scenario's title.
    pub title: String,
    #[serde(skip)]
    text: String,
}

fn list(split: &[u32]) -> String {
    format!("[{}]", split.iter().map(u32::to_string).collect::<Vec<_>>().join(", "))
}

fn ms(ns: u64) -> f64 {
    ns as f64 / 1e6
}

impl SplitReport {
    /// The summary `baton split` prints.
    pub fn text(&self) -> &str {
        &self.text
    }
}

/// The report of `plan` for scenario `s`.
pub fn report(s: &Scenario, plan: &SplitPlan) -> Result<SplitReport, PlanError> {
    let inputs = inputs(s)?;
    let eval = evaluate(&inputs.problem(), &plan.best.split)?;
    let costs = s.piece_costs();
    let best = &plan.best.outcome.report;
    let base = &plan.baseline.outcome.report;
    let proxy = &plan.proxy_run.outcome.report;
    let p = s.pipeline.stages as usize;
    let mean = eval.device_ns.iter().sum::<u64>() as f64 / p as f64;
    let bottleneck_ns = eval.device_ns.iter().copied().max().unwrap_or(0);
    let imbalance = if mean > 0.0 { bottleneck_ns as f64 / mean } else { 1.0 };
    let fits = plan.no_fit.is_none() && best.fits;

    let mut out = String::new();
    let _ = writeln!(
        out,
        "{}: {} layers into {} pieces ({} stages x {} chunk{}), schedule {}, {} micro-batches",
        s.title,
        s.layers.len(),
        plan.best.split.len(),
        s.pipeline.stages,
        s.pipeline.chunks,
        if s.pipeline.chunks == 1 { "" } else { "s" },
        s.pipeline.schedule,
        s.pipeline.micro_batches
    );
    let _ = writeln!(out);
    if let Some((short, device)) = plan.no_fit {
        let cap = s.cluster.device.memory_bytes.map_or_else(|| "unlimited".into(), format_bytes);
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
        let piece_ns = costs.time_ns(first, first + n as usize).min(u64::MAX as u128) as u64;
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
        Start::Proxy => proxy,
        Start::Scenario => base,
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
            if plan.start == Start::Scenario { "scenario's" } else { proxy_name.split(' ').next().unwrap_or("exact") },
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
    let fits_text = |r: &baton_report::Report| {
        if r.fits {
            "yes".to_string()
        } else {
            let over: Vec<String> = r.over_capacity().iter().map(u32::to_string).collect();
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

    Ok(SplitReport {
        baseline_bubble_fraction: base.bubble_fraction,
        baseline_fits: base.fits,
        baseline_is_best: plan.baseline_is_best,
        baseline_split: plan.baseline.split.clone(),
        baseline_step_time_ms: base.step_time_ms,
        bottleneck_ms: ms(bottleneck_ns),
        bubble_fraction: best.bubble_fraction,
        chunks: s.pipeline.chunks,
        // Every replica runs the same split: replica 0's devices stand for all.
        devices: best
            .devices
            .iter()
            .filter(|d| d.replica == 0)
            .map(|d| SplitDevice {
                device: d.device,
                fits: d.fits,
                memory_capacity_bytes: d.memory_capacity_bytes,
                peak_memory_bytes: d.peak_memory_bytes,
                time_per_micro_batch_ms: ms(eval.device_ns[d.stage as usize]),
            })
            .collect(),
        fits,
        imbalance,
        local_search_gain_ms: ms(gain_ns),
        local_search_moves: plan.moves,
        local_search_simulations: plan.simulations,
        local_search_start: plan.start.name(),
        micro_batches: s.pipeline.micro_batches,
        proxy_bottleneck_ms: ms(plan.proxy.device_ns.iter().copied().max().unwrap_or(0)),
        proxy_exact: plan.proxy.exact,
        proxy_split: plan.proxy.split.clone(),
        proxy_step_time_ms: proxy.step_time_ms,
        samples_per_s: best.samples_per_s,
        schedule: s.pipeline.schedule.name(),
        short_device: plan.no_fit.map(|x| x.1),
        shortfall_bytes: plan.no_fit.map(|x| x.0),
        split: plan.best.split.clone(),
        stages: s.pipeline.stages,
        step_time_ms: best.step_time_ms,
        title: s.title.clone(),
        text: out,
    })
}

/// The scenario file at `path` rewritten with `split` (and `stages`,
/// `chunks` when given), comments and layout kept; checked to read back as
/// the same scenario with that split. `dest` names the copy in messages;
/// `sets` are the overrides the scenario was loaded with.
pub fn applied_text(
    path: &Path,
    dest: &str,
    scenario: &Scenario,
    split: &[u32],
    stages: Option<u32>,
    chunks: Option<u32>,
    sets: &[String],
) -> Result<String, PlanError> {
    let text =
        std::fs::read_to_string(path).map_err(|e| PlanError::Apply(format!("cannot read {}: {e}", path.display())))?;
    let mut edits = vec![("pipeline.split", list(split))];
    if let Some(n) = stages {
        edits.push(("pipeline.stages", n.to_string()));
    }
    if let Some(v) = chunks {
        edits.push(("pipeline.chunks", v.to_string()));
    }
    // A chart of the copy must not carry a title that describes the old
    // split: name the new one in it (once, however often it is re-split).
    if let Some(title) = text_at(&text, path, &["title"]) {
        let base = match title.rfind(RESPLIT) {
            Some(i) if title.ends_with(']') => &title[..i],
            _ => title.as_str(),
        };
        edits.push(("title", quoted(&format!("{base}{RESPLIT}{}", list(split)))));
    }
    // A profile named relative to the scenario must still be found from the copy.
    if let (baton_scenario::ModelSource::Profile(profile), Some(dest_dir)) = (&scenario.source, dest_dir(dest)) {
        let written = profile_as_written(&text, path);
        if written.as_deref().is_some_and(|w| Path::new(w).is_relative()) {
            let target = std::fs::canonicalize(profile)
                .map_err(|e| PlanError::Apply(format!("cannot find the profile {}: {e}", profile.display())))?;
            let from = std::fs::canonicalize(&dest_dir)
                .map_err(|e| PlanError::Apply(format!("cannot find {}: {e}", dest_dir.display())))?;
            let rel = relative_path(&from, &target);
            edits.push(("model.profile", yaml_text(&rel.to_string_lossy())));
        }
    }
    // So must a custom order file.
    if let (Some((order, _)), Some(dest_dir)) = (&scenario.pipeline.order, dest_dir(dest)) {
        let written = text_at(&text, path, &["pipeline", "order"]);
        if written.as_deref().is_some_and(|w| Path::new(w).is_relative()) {
            let target = std::fs::canonicalize(order)
                .map_err(|e| PlanError::Apply(format!("cannot find the order {}: {e}", order.display())))?;
            let from = std::fs::canonicalize(&dest_dir)
                .map_err(|e| PlanError::Apply(format!("cannot find {}: {e}", dest_dir.display())))?;
            let rel = relative_path(&from, &target);
            edits.push(("pipeline.order", yaml_text(&rel.to_string_lossy())));
        }
    }
    let file = path.display().to_string();
    let mut new_text =
        baton_scenario::edit::set_values(&text, &file, &edits).map_err(|e| PlanError::Apply(e.to_string()))?;
    // So must an editor's schema named relative to the scenario.
    if let Some(dest_dir) = dest_dir(dest) {
        new_text = schema_line_moved(&new_text, path, &dest_dir);
    }
    // The copy must read back as the same scenario with the new split.
    let check_dir = dest_dir(dest).unwrap_or_else(|| path.parent().unwrap_or(Path::new("")).to_path_buf());
    let check = baton_scenario::parse_in(&new_text, dest, &scenario.title, &check_dir, sets)
        .map_err(|e| PlanError::Apply(format!("the rewritten scenario does not read back: {e}")))?;
    if check.pipeline.split != split {
        return Err(PlanError::Apply(format!(
            "the rewritten scenario reads back with split {} instead of {}",
            list(&check.pipeline.split),
            list(split)
        )));
    }
    Ok(new_text)
}

/// The comment line that points an editor at a JSON Schema.
const SCHEMA_COMMENT: &str = "# yaml-language-server: $schema=";

/// `text` with a relative schema path in its editor comment rewritten to
/// be relative to `dest_dir` instead of the scenario's directory; unchanged
/// when there is none, it is a URL or absolute, or it names no file.
fn schema_line_moved(text: &str, path: &Path, dest_dir: &Path) -> String {
    let mut out = String::with_capacity(text.len());
    for line in text.split_inclusive('\n') {
        let body = line.trim_end_matches(['\n', '\r']);
        let moved = body.strip_prefix(SCHEMA_COMMENT).and_then(|rel| {
            if rel.contains("://") || Path::new(rel).is_absolute() {
                return None;
            }
            let target = std::fs::canonicalize(path.parent().unwrap_or(Path::new("")).join(rel)).ok()?;
            let from = std::fs::canonicalize(dest_dir).ok()?;
            Some(format!("{SCHEMA_COMMENT}{}{}", relative_path(&from, &target).display(), &line[body.len()..]))
        });
        out.push_str(moved.as_deref().unwrap_or(line));
    }
    out
}

/// The directory a copy written to `dest` lives in (`None` for standard output).
fn dest_dir(dest: &str) -> Option<std::path::PathBuf> {
    if dest == "-" {
        return None;
    }
    let parent = Path::new(dest).parent().unwrap_or(Path::new(""));
    Some(if parent.as_os_str().is_empty() { Path::new(".").to_path_buf() } else { parent.to_path_buf() })
}

/// What `split --apply` adds to a copy's title: `, re-split [7, 8, 8, 1]`.
const RESPLIT: &str = ", re-split ";

/// A double-quoted YAML scalar.
fn quoted(s: &str) -> String {
    format!("\"{}\"", s.replace('\\', "\\\\").replace('"', "\\\""))
}

/// The `model.profile` value as written in the scenario text, if any.
fn profile_as_written(text: &str, path: &Path) -> Option<String> {
    text_at(text, path, &["model", "profile"])
}

/// The text at `keys` in the scenario text, if it is text.
fn text_at(text: &str, path: &Path, keys: &[&str]) -> Option<String> {
    let doc = baton_scenario::node::parse_document(text, &path.display().to_string()).ok()?;
    let mut node = &doc;
    for &key in keys {
        let baton_scenario::Value::Map(entries) = &node.value else { return None };
        node = &entries.iter().find(|(k, _, _)| k == key)?.2;
    }
    match &node.value {
        baton_scenario::Value::Str(s) => Some(s.clone()),
        _ => None,
    }
}

/// The path from directory `from` to `to` (both absolute): up past what they
/// do not share, then down.
fn relative_path(from: &Path, to: &Path) -> std::path::PathBuf {
    let (a, b): (Vec<_>, Vec<_>) = (from.components().collect(), to.components().collect());
    let common = a.iter().zip(&b).take_while(|(x, y)| x == y).count();
    let mut out = std::path::PathBuf::new();
    for _ in common..a.len() {
        out.push("..");
    }
    for c in &b[common..] {
        out.push(c);
    }
    out
}

/// A YAML scalar for `s`: as is when plain, otherwise double-quoted.
fn yaml_text(s: &str) -> String {
    if s.chars().all(|c| c.is_ascii_alphanumeric() || "._/-".contains(c)) && !s.is_empty() {
        s.to_string()
    } else {
        format!("\"{}\"", s.replace('\\', "\\\\").replace('"', "\\\""))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_paths_go_up_then_down() {
        let p = |s: &str| Path::new(s).to_path_buf();
        assert_eq!(relative_path(&p("/a/b/c"), &p("/a/d/x.csv")), p("../../d/x.csv"));
        assert_eq!(relative_path(&p("/a"), &p("/a/x.csv")), p("x.csv"));
        assert_eq!(yaml_text("../p/x.csv"), "../p/x.csv");
        assert_eq!(yaml_text("my profile.csv"), "\"my profile.csv\"");
    }
}
