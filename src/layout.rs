//! `baton layout`: the best way to lay a model out on the cluster's devices.
//!
//! Every layout `(d, p, t)` with `d x p x t` = the cluster's devices is
//! enumerated with every micro-batch size, schedule and chunk count asked
//! for; each gets the best memory-fitting split from the split search (run
//! once per distinct pipeline shape and cost table), a lower bound on its
//! step time ([`crate::step_lower_bound_ns`]) and, unless the bound shows it
//! cannot beat the best step simulated in full so far, an evaluation: the
//! fast evaluator ([`crate::simulate_fast`]: tensor all-reduces in closed
//! form) and, when that estimate could beat the best, the full simulation.
//! Layouts are taken in order of their bound, in batches of a fixed size, so
//! the result does not depend on the number of threads. The best `--verify`
//! layouts are simulated in full at the end; the first row is always a full
//! simulation that `baton run` reproduces.

use std::collections::HashMap;
use std::fmt::Write as _;
use std::sync::Mutex;

use baton_engine::format_ns;
use baton_report::format_bytes;
use baton_scenario::{Document, ModelSource, Override, Scenario, ScenarioError};
use baton_schedule::{check_shape, ScheduleKind, Shape};
use baton_split::Found;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};
use thiserror::Error;

/// Layouts evaluated together between two updates of the best step: fixed,
/// so pruning does not depend on the thread count.
const BATCH: usize = 16;

/// A refined layout's figures and the full simulations it took, or why it
/// failed.
type Refined = Result<(Figures, usize), String>;

/// Steps the local search may try refining one layout's split.
const REFINE_SIMULATIONS: usize = 64;

/// One way to lay the model out.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Layout {
    /// Replicas d.
    pub data: u32,
    /// Pipeline stages p.
    pub pipeline: u32,
    /// Devices per tensor group t.
    pub tensor: u32,
    /// Samples per micro-batch b.
    pub micro_batch_size: u32,
    /// Micro-batches per replica m = B / (d b).
    pub micro_batches: u32,
    /// The schedule.
    pub schedule: ScheduleKind,
    /// Chunks per device.
    pub chunks: u32,
}

impl Layout {
    /// The overrides that give a scenario this layout (the split apart).
    pub fn sets(&self) -> Vec<String> {
        vec![
            format!("parallel.data={}", self.data),
            format!("parallel.tensor={}", self.tensor),
            format!("pipeline.stages={}", self.pipeline),
            format!("pipeline.micro_batch_size={}", self.micro_batch_size),
            format!("pipeline.micro_batches={}", self.micro_batches),
            format!("pipeline.schedule={}", self.schedule.name()),
            format!("pipeline.chunks={}", self.chunks),
            "placement=packed".to_string(),
        ]
    }
}

/// A layout's figures.
#[derive(Clone, Debug, PartialEq)]
pub struct Figures {
    /// Step time.
    pub step_ns: u64,
    /// Global samples per second.
    pub samples_per_s: f64,
    /// Model FLOPs utilisation, when known.
    pub mfu: Option<f64>,
    /// The largest device peak.
    pub peak_memory_bytes: u64,
    /// Capacity of a device.
    pub capacity_bytes: Option<u64>,
    /// Whether every device fits.
    pub fits: bool,
    /// The worst device's exposed synchronisation.
    pub sync_exposed_ns: u64,
    /// Layers per piece.
    pub split: Vec<u32>,
    /// Whether the figures come from the full simulation (else the fast
    /// evaluator's estimate).
    pub exact: bool,
}

/// What became of a layout.
#[derive(Clone, Debug, PartialEq)]
pub enum Outcome {
    /// Simulated (in full or by the fast evaluator).
    Evaluated(Figures),
    /// It cannot work, for this reason.
    Skipped(String),
    /// Its lower bound cannot beat the best step simulated in full.
    Pruned {
        /// Its bound.
        bound_ns: u64,
        /// The best full step when it was pruned.
        best_ns: u64,
    },
}

/// One enumerated layout and what became of it.
#[derive(Clone, Debug, PartialEq)]
pub struct Row {
    /// Its place in the enumeration.
    pub index: usize,
    /// The layout.
    pub layout: Layout,
    /// Its lower bound on the step time, when it got that far.
    pub bound_ns: Option<u64>,
    /// What became of it.
    pub outcome: Outcome,
}

impl Row {
    fn figures(&self) -> Option<&Figures> {
        match &self.outcome {
            Outcome::Evaluated(f) => Some(f),
            _ => None,
        }
    }

    /// The `skipped` column: empty when evaluated.
    pub fn skipped(&self) -> String {
        match &self.outcome {
            Outcome::Evaluated(_) => String::new(),
            Outcome::Skipped(why) => why.clone(),
            Outcome::Pruned { bound_ns, best_ns } => format!(
                "pruned: its step is at least {} (a lower bound), no faster than the best simulated, {}",
                format_ns(*bound_ns),
                format_ns(*best_ns)
            ),
        }
    }
}

/// How many of the best layouts to simulate in full at the end.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Verify {
    /// The best N.
    Best(usize),
    /// Every evaluated layout.
    All,
}

/// What `baton layout` was asked.
pub struct Request<'a> {
    /// The scenario, read once.
    pub doc: &'a Document,
    /// `--set` overrides, applied before each layout's.
    pub sets: &'a [String],
    /// B: samples per step over all replicas.
    pub global_batch: u64,
    /// Micro-batch sizes to try.
    pub micro_batch_sizes: &'a [u32],
    /// Schedules to try.
    pub schedules: &'a [ScheduleKind],
    /// Chunk counts to try.
    pub chunks: &'a [u32],
    /// Largest tensor group (`None`: the devices per node, or all devices on
    /// a flat cluster).
    pub max_tensor: Option<u32>,
    /// Layouts simulated in full at the end.
    pub verify: Verify,
    /// Evaluate every layout: no pruning by the bound.
    pub all: bool,
    /// Worker threads (`None`: all cores).
    pub jobs: Option<usize>,
    /// A layout whose estimated memory is over this is skipped.
    pub max_memory: u64,
    /// Search only the I-th of N slices of the layouts (every N-th, from
    /// the I-th), for `baton merge` to combine.
    pub shard: Option<(usize, usize)>,
}

/// The fingerprint of a layout search: 16 hex digits of SHA-256 over the
/// scenario's bytes, the overrides and every option that changes the rows.
pub fn grid_id(scenario_text: &[u8], r: &Request<'_>) -> String {
    use sha2::{Digest, Sha256};
    let mut h = Sha256::new();
    h.update(scenario_text);
    for s in r.sets {
        h.update(b"\0set\0");
        h.update(s.as_bytes());
    }
    let options = format!(
        "\0layout\0{} {:?} {:?} {:?} {:?} {:?} {}",
        r.global_batch,
        r.micro_batch_sizes,
        r.schedules.iter().map(|k| k.name()).collect::<Vec<_>>(),
        r.chunks,
        r.max_tensor,
        r.verify,
        r.all
    );
    h.update(options.as_bytes());
    h.finalize().iter().take(8).map(|b| format!("{b:02x}")).collect()
}

/// Why a layout search could not run.
#[derive(Debug, Error)]
pub enum LayoutError {
    /// The scenario is invalid.
    #[error(transparent)]
    Scenario(#[from] ScenarioError),
    /// An option is out of range.
    #[error("{0}")]
    Option(String),
    /// The worker threads could not start.
    #[error("cannot start the worker threads: {0}")]
    Threads(String),
}

/// The search's result.
pub struct Finished {
    /// Every enumerated layout, ranked: evaluated ones first (fitting first,
    /// then by samples per second), then skipped and pruned ones in
    /// enumeration order.
    pub rows: Vec<Row>,
    /// Full simulations run.
    pub full_simulations: usize,
    /// Fast evaluations run.
    pub fast_evaluations: usize,
    /// Layouts enumerated in all (over every shard).
    pub enumerated: usize,
}

fn divisors(n: u32) -> Vec<u32> {
    (1..=n).filter(|k| n % k == 0).collect()
}

/// Every layout of the request, each with a reason when it cannot work.
pub fn enumerate(r: &Request<'_>, base: &Scenario) -> Result<Vec<(Layout, Option<String>)>, LayoutError> {
    let n = base.cluster.devices;
    let layers = base.layers.len() as u32;
    let max_tensor = r.max_tensor.unwrap_or_else(|| crate::devices_per_node(base).unwrap_or(n));
    let heads = match &base.source {
        ModelSource::Transformer(t) => Some((t.heads, t.kv_heads)),
        _ => None,
    };
    let mut out = Vec::new();
    for t in divisors(n).into_iter().filter(|&t| t <= max_tensor) {
        let tensor_problem = heads.and_then(|(a, k)| {
            (a % t as u64 != 0 || k % t as u64 != 0).then(|| {
                format!("{t} devices per tensor group do not divide the {a} heads (and {k} key and value heads)")
            })
        });
        for p in divisors(n / t).into_iter().filter(|&p| p <= layers) {
            let d = n / (t * p);
            for &b in r.micro_batch_sizes {
                let per_step = d as u64 * b as u64;
                if r.global_batch % per_step != 0 {
                    continue;
                }
                let m = r.global_batch / per_step;
                let Ok(m) = u32::try_from(m) else { continue };
                for &schedule in r.schedules {
                    for &v in r.chunks {
                        if p * v > layers || check_shape(schedule, Shape::new(p, m, v)).is_err() {
                            continue;
                        }
                        let layout = Layout {
                            data: d,
                            pipeline: p,
                            tensor: t,
                            micro_batch_size: b,
                            micro_batches: m,
                            schedule,
                            chunks: v,
                        };
                        out.push((layout, tensor_problem.clone()));
                    }
                }
            }
        }
    }
    Ok(out)
}

/// A layout made ready to evaluate: its scenario with the best fitting split,
/// and its bound.
struct Ready {
    scenario: Scenario,
    bound_ns: u64,
}

type SplitKey = (u32, u32, u32, u32, &'static str, Vec<Vec<(u64, u64)>>, u32);

fn prepare(
    r: &Request<'_>,
    layout: &Layout,
    splits: &Mutex<HashMap<SplitKey, Result<Vec<u32>, String>>>,
) -> Result<Ready, String> {
    let mut sets: Vec<Override> = r.sets.iter().map(|x| Override::set(x)).collect();
    sets.extend(layout.sets().into_iter().map(|x| Override::typed(x.clone(), format!("layout {x}"))));
    sets.push(Override::typed("pipeline.split=even", "layout pipeline.split=even"));
    let s = r.doc.scenario_with(&sets).map_err(|e| e.to_string())?;
    let inputs = crate::planner::inputs(&s).map_err(|e| e.to_string())?;
    // The split depends on the cost table (t, b), the pipeline shape and the
    // stashes in flight (schedule, m), and with sharded state on d.
    let holds = crate::memory_holds(&s).map_err(|e| e.to_string())?;
    let shard_d = if s.training.shard == baton_scenario::Shard::None { 0 } else { layout.data };
    let key: SplitKey = (
        layout.tensor,
        layout.micro_batch_size,
        layout.pipeline,
        layout.chunks,
        layout.schedule.name(),
        holds,
        shard_d,
    );
    let cached = splits.lock().map_err(|_| "a split search failed".to_string())?.get(&key).cloned();
    let split = match cached {
        Some(x) => x,
        None => {
            let found = match baton_split::solve(&inputs.problem()) {
                Ok(Found::Fits(sol)) => Ok(sol.split),
                Ok(Found::NoFit { shortfall_bytes, device, .. }) => Err(format!(
                    "no split fits in memory: device {device} needs {} more in the closest split",
                    format_bytes(shortfall_bytes)
                )),
                Err(e) => Err(e.to_string()),
            };
            splits.lock().map_err(|_| "a split search failed".to_string())?.insert(key, found.clone());
            found
        }
    }?;
    let mut s = s;
    s.pipeline.split = split;
    let estimate = crate::memory_estimate_bytes(&s, crate::Making::default());
    if estimate > r.max_memory {
        return Err(format!(
            "simulating it needs about {}, more than --max-memory {}",
            format_bytes(estimate),
            format_bytes(r.max_memory)
        ));
    }
    Ok(Ready { bound_ns: crate::layout_lower_bound_ns(&s), scenario: s })
}

fn figures(step: &crate::SimulatedStep, split: &[u32], exact: bool) -> Figures {
    let rep = &step.report;
    Figures {
        step_ns: rep.step_time_ns,
        samples_per_s: rep.samples_per_s,
        mfu: rep.mfu,
        peak_memory_bytes: rep.devices.iter().map(|d| d.peak_memory_bytes).max().unwrap_or(0),
        capacity_bytes: rep.devices.first().and_then(|d| d.memory_capacity_bytes),
        fits: rep.fits,
        sync_exposed_ns: (rep.sync_exposed_ms * 1e6).round() as u64,
        split: split.to_vec(),
        exact,
    }
}

fn evaluate(s: &Scenario, full: bool) -> Result<Figures, String> {
    let exact = full || (s.parallel.tensor <= 1 && !crate::replicas_look_alike(s));
    let step = if exact { crate::simulate(s) } else { crate::simulate_fast(s) };
    step.map(|st| figures(&st, &s.pipeline.split, exact)).map_err(|e| e.to_string())
}

/// Ranking order: evaluated first (fitting first, then the shortest step,
/// then enumeration order), then the rest in enumeration order.
fn rank_key(row: &Row) -> (u8, u8, u64, usize) {
    match row.figures() {
        Some(f) => (0, u8::from(!f.fits), f.step_ns, row.index),
        None => (1, 0, 0, row.index),
    }
}

/// Runs the search.
pub fn execute(r: &Request<'_>, tick: &(dyn Fn() + Sync)) -> Result<Finished, LayoutError> {
    if r.jobs == Some(0) {
        return Err(LayoutError::Option("--jobs must be at least 1".into()));
    }
    if r.global_batch == 0 {
        return Err(LayoutError::Option("--global-batch must be at least 1".into()));
    }
    let base = r.doc.scenario(r.sets)?;
    let layouts = enumerate(r, &base)?;
    if layouts.is_empty() {
        return Err(LayoutError::Option(format!(
            "no layout of {} devices takes a global batch of {} with micro-batch sizes {:?}: B must be a multiple of d x b for some layout",
            base.cluster.devices, r.global_batch, r.micro_batch_sizes
        )));
    }
    let enumerated = layouts.len();
    let (shard, of) = r.shard.unwrap_or((1, 1));
    if shard == 0 || of == 0 || shard > of {
        return Err(LayoutError::Option(format!("--shard {shard}/{of}: write I/N with 1 <= I <= N")));
    }
    let mine: Vec<(usize, (Layout, Option<String>))> =
        layouts.into_iter().enumerate().filter(|(i, _)| i % of == shard - 1).collect();
    if mine.is_empty() {
        return Err(LayoutError::Option(format!(
            "shard {shard}/{of} holds no layout: there are only {enumerated}; use fewer shards"
        )));
    }
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(r.jobs.unwrap_or(0))
        .build()
        .map_err(|e| LayoutError::Threads(e.to_string()))?;
    let splits = Mutex::new(HashMap::new());
    // Prepare every layout (split search, bound), in parallel, collected in
    // enumeration order.
    let prepared: Vec<(usize, Layout, Result<Ready, String>)> = pool.install(|| {
        mine.into_par_iter()
            .map(|(index, (layout, problem))| {
                let ready = match problem {
                    Some(why) => Err(why),
                    None => prepare(r, &layout, &splits),
                };
                (index, layout, ready)
            })
            .collect()
    });
    // Rows are kept in shard order; `slot` finds a layout's row.
    let mut rows: Vec<Row> = Vec::with_capacity(prepared.len());
    let mut ready: Vec<(usize, Ready)> = Vec::new();
    for (slot, (index, layout, result)) in prepared.into_iter().enumerate() {
        match result {
            Ok(x) => {
                rows.push(Row { index, layout, bound_ns: Some(x.bound_ns), outcome: Outcome::Skipped(String::new()) });
                ready.push((slot, x));
            }
            Err(why) => {
                tick();
                rows.push(Row { index, layout, bound_ns: None, outcome: Outcome::Skipped(why) })
            }
        }
    }
    // Smallest bound first.
    ready.sort_by_key(|(i, x)| (x.bound_ns, *i));
    let mut best_full: Option<u64> = None;
    let (mut full_runs, mut fast_runs) = (0usize, 0usize);
    let full_everything = r.verify == Verify::All;
    for batch in ready.chunks(BATCH) {
        let todo: Vec<&(usize, Ready)> = batch
            .iter()
            .filter(|(i, x)| {
                let pruned = !r.all && best_full.is_some_and(|b| x.bound_ns >= b);
                if pruned {
                    rows[*i].outcome =
                        Outcome::Pruned { bound_ns: x.bound_ns, best_ns: best_full.unwrap_or(x.bound_ns) };
                    tick();
                }
                !pruned
            })
            .collect();
        let results: Vec<(usize, Result<Figures, String>)> =
            pool.install(|| todo.par_iter().map(|(i, x)| (*i, evaluate(&x.scenario, full_everything))).collect());
        fast_runs += results.iter().filter(|(_, f)| f.as_ref().is_ok_and(|f| !f.exact)).count();
        full_runs += results.iter().filter(|(_, f)| f.as_ref().is_ok_and(|f| f.exact)).count();
        // An estimate that could beat the best full step is simulated in
        // full: the best estimate of the batch first, then, against the best
        // full step that leaves, the others that could still beat it.
        let scenario_of = |i: usize| &batch.iter().find(|(j, _)| *j == i).expect("in the batch").1.scenario;
        let full_exact = |f: &Result<Figures, String>| f.as_ref().ok().filter(|f| f.exact && f.fits).map(|f| f.step_ns);
        for (_, f) in &results {
            if let Some(step) = full_exact(f) {
                best_full = Some(best_full.map_or(step, |b| b.min(step)));
            }
        }
        let mut candidates: Vec<(u64, usize)> = results
            .iter()
            .filter_map(|(i, f)| match f {
                Ok(f) if !f.exact && f.fits => Some((f.step_ns, *i)),
                _ => None,
            })
            .collect();
        candidates.sort_unstable();
        let mut results: HashMap<usize, Result<Figures, String>> = results.into_iter().collect();
        if let Some(&(estimate, first)) = candidates.first() {
            if best_full.is_none_or(|b| estimate < b) {
                let f = evaluate(scenario_of(first), true);
                full_runs += 1;
                if let Some(step) = full_exact(&f) {
                    best_full = Some(best_full.map_or(step, |b| b.min(step)));
                }
                results.insert(first, f);
            }
            let again: Vec<usize> = candidates[1..]
                .iter()
                .filter(|(estimate, _)| best_full.is_none_or(|b| *estimate < b))
                .map(|&(_, i)| i)
                .collect();
            let redone: Vec<(usize, Result<Figures, String>)> =
                pool.install(|| again.par_iter().map(|&i| (i, evaluate(scenario_of(i), true))).collect());
            full_runs += redone.len();
            results.extend(redone);
        }
        for (i, f) in results {
            tick();
            rows[i].outcome = match f {
                Ok(f) => {
                    if f.exact && f.fits {
                        best_full = Some(best_full.map_or(f.step_ns, |b| b.min(f.step_ns)));
                    }
                    Outcome::Evaluated(f)
                }
                Err(why) => Outcome::Skipped(why),
            };
        }
    }
    // Verify the best estimates in full until the best N are exact (rows
    // are re-sorted: find scenarios by enumeration index).
    let slots: Vec<usize> = rows.iter().map(|r| r.index).collect();
    let verify = match r.verify {
        Verify::Best(n) => n.max(1),
        Verify::All => usize::MAX,
    };
    loop {
        rows.sort_by_key(rank_key);
        let pending: Vec<usize> = rows
            .iter()
            .enumerate()
            .take_while(|(_, row)| row.figures().is_some())
            .take(verify)
            .filter(|(_, row)| row.figures().is_some_and(|f| !f.exact))
            .map(|(k, _)| k)
            .collect();
        if pending.is_empty() {
            break;
        }
        let by_index: HashMap<usize, &Scenario> = ready.iter().map(|(slot, x)| (slots[*slot], &x.scenario)).collect();
        let redone: Vec<(usize, Result<Figures, String>)> =
            pool.install(|| pending.par_iter().map(|&k| (k, evaluate(by_index[&rows[k].index], true))).collect());
        full_runs += redone.len();
        for (k, f) in redone {
            rows[k].outcome = match f {
                Ok(f) => Outcome::Evaluated(f),
                Err(why) => Outcome::Skipped(why),
            };
        }
    }
    // Refine the best layouts' splits by the local search on the full
    // simulation (the split search prices compute alone; links and tensor
    // groups that straddle nodes can make another split faster), until the
    // best `verify` are refined.
    let mut refined: std::collections::HashSet<usize> = Default::default();
    loop {
        rows.sort_by_key(rank_key);
        let pending: Vec<usize> = rows
            .iter()
            .enumerate()
            .take_while(|(_, row)| row.figures().is_some())
            .take(verify)
            .filter(|(_, row)| !refined.contains(&row.index))
            .map(|(k, _)| k)
            .collect();
        if pending.is_empty() {
            break;
        }
        let by_index: HashMap<usize, &Scenario> = ready.iter().map(|(slot, x)| (slots[*slot], &x.scenario)).collect();
        let results: Vec<(usize, Refined)> = pool.install(|| {
            pending
                .par_iter()
                .map(|&k| {
                    let mut s = by_index[&rows[k].index].clone();
                    // The row's figures may already be for another split
                    // (an earlier refinement); start from them.
                    if let Some(f) = rows[k].figures() {
                        s.pipeline.split = f.split.clone();
                    }
                    let unchanged = rows[k].figures().filter(|f| f.exact).cloned();
                    // Searched with the fast evaluator (every step in full
                    // with --verify all), the split found simulated in full.
                    let sim: crate::planner::Simulator =
                        if full_everything { crate::simulate } else { crate::simulate_fast };
                    let result = crate::planner::refine(&s, REFINE_SIMULATIONS, sim)
                        .and_then(|c| {
                            // No better split: the figures in hand stand.
                            if let Some(f) = unchanged.clone().filter(|f| f.split == c.split) {
                                return Ok((f, 0));
                            }
                            s.pipeline.split = c.split.clone();
                            let exact = if full_everything { c.outcome } else { crate::simulate(&s)? };
                            Ok((figures(&exact, &c.split, true), 1))
                        })
                        .map_err(|e| e.to_string());
                    (k, result)
                })
                .collect()
        });
        for (k, f) in results {
            refined.insert(rows[k].index);
            if let Ok((f, runs)) = f {
                full_runs += runs;
                // Keep the split already simulated in full if the refined
                // one (searched on estimates) turns out no faster.
                let keep = rows[k].figures().is_some_and(|old| old.exact && old.fits && old.step_ns <= f.step_ns);
                if !keep {
                    rows[k].outcome = Outcome::Evaluated(f);
                }
            }
        }
    }
    rows.sort_by_key(rank_key);
    Ok(Finished { rows, full_simulations: full_runs, fast_evaluations: fast_runs, enumerated })
}

/// The command that reproduces `row` with `baton run`.
pub fn reproduce(scenario: &str, sets: &[String], row: &Row) -> String {
    let mut cmd = format!("baton run {scenario}");
    let split = row.figures().map(|f| split_text(&f.split));
    for s in sets.iter().cloned().chain(row.layout.sets()).chain(split.map(|x| format!("pipeline.split={x}"))) {
        if s.contains(' ') || s.contains('[') {
            let _ = write!(cmd, " --set '{s}'");
        } else {
            let _ = write!(cmd, " --set {s}");
        }
    }
    cmd
}

/// A split as `--set pipeline.split=...` takes it: `[12, 12, 11, 11]`.
pub fn split_text(split: &[u32]) -> String {
    format!("[{}]", split.iter().map(u32::to_string).collect::<Vec<_>>().join(", "))
}

/// The ranked table: at most `limit` evaluated rows, then a count of the rest.
pub fn table(f: &Finished, limit: usize, scenario: &str, sets: &[String]) -> String {
    let mut s = String::new();
    let evaluated = f.rows.iter().filter(|r| r.figures().is_some()).count();
    let pruned = f.rows.iter().filter(|r| matches!(r.outcome, Outcome::Pruned { .. })).count();
    let skipped = f.rows.len() - evaluated - pruned;
    let _ = writeln!(
        s,
        "{} layouts: {} evaluated ({} simulations in full, {} fast estimates), {} pruned by their lower bound, {} skipped",
        f.rows.len(),
        evaluated,
        f.full_simulations,
        f.fast_evaluations,
        pruned,
        skipped
    );
    let _ = writeln!(
        s,
        "{:>5}  {:>4} {:>4} {:>4} {:>4} {:>6}  {:<11} {:>6}  {:>12}  {:>11}  {:>7}  {:>21}  {:>12}  split",
        "rank",
        "d",
        "p",
        "t",
        "b",
        "m",
        "schedule",
        "chunks",
        "step time",
        "samples/s",
        "MFU",
        "peak mem / capacity",
        "sync exposed"
    );
    for (k, row) in f.rows.iter().filter(|r| r.figures().is_some()).take(limit).enumerate() {
        let Some(x) = row.figures() else { continue };
        let l = &row.layout;
        let capacity = x.capacity_bytes.map_or_else(|| "unlimited".into(), format_bytes);
        let _ = writeln!(
            s,
            "{:>5}  {:>4} {:>4} {:>4} {:>4} {:>6}  {:<11} {:>6}  {:>12}  {:>11.2}  {:>7}  {:>21}  {:>12}  {}{}{}",
            if k == 0 { "best".to_string() } else { (k + 1).to_string() },
            l.data,
            l.pipeline,
            l.tensor,
            l.micro_batch_size,
            l.micro_batches,
            l.schedule.name(),
            l.chunks,
            format_ns(x.step_ns),
            x.samples_per_s,
            x.mfu.map_or_else(|| "-".into(), |m| format!("{:.1}%", m * 100.0)),
            format!("{} / {}", format_bytes(x.peak_memory_bytes), capacity),
            format_ns(x.sync_exposed_ns),
            split_text(&x.split),
            if x.exact { "" } else { "  (estimate)" },
            if x.fits { "" } else { "  OVER MEMORY" }
        );
    }
    if let Some(best) = f.rows.first().filter(|r| r.figures().is_some()) {
        let _ = writeln!(s);
        let _ = writeln!(s, "best layout, to reproduce and chart it:");
        let _ = writeln!(s, "  {} --svg best.svg", reproduce(scenario, sets, best));
    }
    let reasons: Vec<String> =
        f.rows.iter().filter(|r| matches!(r.outcome, Outcome::Skipped(_))).map(Row::skipped).collect();
    if !reasons.is_empty() {
        let mut counts: Vec<(String, usize)> = Vec::new();
        for why in reasons {
            let short = why.split(':').next().unwrap_or("").to_string();
            match counts.iter_mut().find(|(w, _)| *w == short) {
                Some(c) => c.1 += 1,
                None => counts.push((short, 1)),
            }
        }
        let _ = writeln!(s);
        let _ = writeln!(s, "skipped:");
        for (why, n) in counts {
            let _ = writeln!(s, "  {n} x {why}");
        }
    }
    s
}

/// One row of the CSV and JSON outputs (column names pinned).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Record {
    /// Replicas.
    pub data: u32,
    /// Pipeline stages.
    pub pipeline: u32,
    /// Devices per tensor group.
    pub tensor: u32,
    /// Samples per micro-batch.
    pub micro_batch_size: u32,
    /// Micro-batches per replica.
    pub micro_batches: u32,
    /// The schedule.
    pub schedule: String,
    /// Chunks per device.
    pub chunks: u32,
    /// Step time in milliseconds (shortest round-trip decimal).
    pub step_time_ms: Option<f64>,
    /// Global samples per second.
    pub samples_per_s: Option<f64>,
    /// Model FLOPs utilisation.
    pub mfu: Option<f64>,
    /// The largest device peak.
    pub peak_memory_bytes: Option<u64>,
    /// Whether every device fits.
    pub fits: Option<bool>,
    /// Layers per piece, as `--set pipeline.split=...` takes it.
    pub split: String,
    /// Why it was not evaluated (empty when it was).
    pub skipped: String,
    /// Whether its figures come from the full simulation.
    pub exact: Option<bool>,
    /// The worst device's exposed synchronisation, in milliseconds.
    pub sync_exposed_ms: Option<f64>,
    /// Its lower bound on the step time, in milliseconds.
    pub bound_ms: Option<f64>,
    /// Its place in the enumeration.
    pub index: usize,
    /// The search's fingerprint ([`grid_id`]).
    pub grid: String,
    /// Layouts enumerated in all.
    pub grid_points: usize,
    /// `I/N`: the shard that evaluated it.
    pub shard: String,
}

/// The rows as records, tagged with the search's fingerprint and shard.
pub fn records(f: &Finished, grid: &str, shard: (usize, usize)) -> Vec<Record> {
    f.rows
        .iter()
        .map(|row| {
            let x = row.figures();
            let l = &row.layout;
            Record {
                data: l.data,
                pipeline: l.pipeline,
                tensor: l.tensor,
                micro_batch_size: l.micro_batch_size,
                micro_batches: l.micro_batches,
                schedule: l.schedule.name().to_string(),
                chunks: l.chunks,
                step_time_ms: x.map(|x| x.step_ns as f64 / 1e6),
                samples_per_s: x.map(|x| x.samples_per_s),
                mfu: x.and_then(|x| x.mfu),
                peak_memory_bytes: x.map(|x| x.peak_memory_bytes),
                fits: x.map(|x| x.fits),
                split: x.map(|x| split_text(&x.split)).unwrap_or_default(),
                skipped: row.skipped(),
                exact: x.map(|x| x.exact),
                sync_exposed_ms: x.map(|x| x.sync_exposed_ns as f64 / 1e6),
                bound_ms: row.bound_ns.map(|b| b as f64 / 1e6),
                index: row.index,
                grid: grid.to_string(),
                grid_points: f.enumerated,
                shard: format!("{}/{}", shard.0, shard.1),
            }
        })
        .collect()
}

/// The CSV of `records`.
pub fn csv(records: &[Record]) -> Result<Vec<u8>, csv::Error> {
    let mut w = csv::Writer::from_writer(Vec::new());
    for rec in records {
        w.serialize(rec)?;
    }
    w.into_inner().map_err(|e| csv::Error::from(e.into_error()))
}

/// Whether a CSV header is a layout search's (not a sweep's).
pub fn is_layout_csv(text: &str) -> bool {
    text.lines().next().is_some_and(|h| h.starts_with("data,pipeline,tensor,micro_batch_size,"))
}

/// Combines the CSV parts of a sharded search (`(file, text)` each) into
/// one ranked list: refuses parts of another search, repeated or missing
/// shards and parts without exactly their shard's layouts.
pub fn merge(parts: &[(String, String)]) -> Result<Vec<Record>, String> {
    let mut all: Vec<Record> = Vec::new();
    let mut first: Option<(String, usize, usize, String)> = None;
    let mut seen: std::collections::BTreeMap<usize, String> = Default::default();
    for (file, text) in parts {
        let mut rdr = csv::Reader::from_reader(text.as_bytes());
        let rows: Vec<Record> = rdr
            .deserialize()
            .collect::<Result<_, _>>()
            .map_err(|e| format!("{file}: not a layout search's CSV: {e}"))?;
        let Some(head) = rows.first() else { return Err(format!("{file}: holds no layout")) };
        let (i, n) = head
            .shard
            .split_once('/')
            .and_then(|(i, n)| Some((i.parse::<usize>().ok()?, n.parse::<usize>().ok()?)))
            .ok_or_else(|| format!("{file}: shard `{}` is not I/N", head.shard))?;
        match &first {
            None => first = Some((head.grid.clone(), head.grid_points, n, file.clone())),
            Some((grid, points, of, f0)) => {
                if *grid != head.grid || *points != head.grid_points {
                    return Err(format!("{file}: is a part of another layout search than {f0}"));
                }
                if *of != n {
                    return Err(format!("{file}: is shard {i}/{n} but {f0} is one of {of} shards"));
                }
            }
        }
        if let Some(other) = seen.insert(i, file.clone()) {
            return Err(format!("{file}: is shard {i}/{n}, which {other} already is"));
        }
        let mut got: Vec<usize> = rows.iter().map(|r| r.index).collect();
        got.sort_unstable();
        let want: Vec<usize> = (0..head.grid_points).filter(|k| k % n == i - 1).collect();
        if got != want {
            return Err(format!("{file}: does not hold exactly the layouts of shard {i}/{n}"));
        }
        all.extend(rows);
    }
    let Some((_, _, of, _)) = first else { return Err("no part to merge".into()) };
    let missing: Vec<String> = (1..=of).filter(|i| !seen.contains_key(i)).map(|i| format!("{i}/{of}")).collect();
    if !missing.is_empty() {
        return Err(format!(
            "shard {} is missing (the parts must be all {of} shards of one search)",
            missing.join(", ")
        ));
    }
    let key = |r: &Record| match (r.step_time_ms, r.fits) {
        (Some(ms), Some(fits)) => (0u8, u8::from(!fits), ms, r.index),
        _ => (1, 0, 0.0, r.index),
    };
    all.sort_by(|a, b| key(a).partial_cmp(&key(b)).unwrap_or(std::cmp::Ordering::Equal));
    for r in &mut all {
        r.shard = "1/1".into();
    }
    Ok(all)
}

/// The merged table: the best `limit` evaluated layouts.
pub fn merged_table(records: &[Record], limit: usize) -> String {
    let mut s = String::new();
    let evaluated: Vec<&Record> = records.iter().filter(|r| r.step_time_ms.is_some()).collect();
    let _ = writeln!(
        s,
        "{} layouts merged: {} evaluated, {} skipped or pruned",
        records.len(),
        evaluated.len(),
        records.len() - evaluated.len()
    );
    let _ = writeln!(
        s,
        "{:>5}  {:>4} {:>4} {:>4} {:>4} {:>6}  {:<11} {:>6}  {:>14}  {:>11}  fits  split",
        "rank", "d", "p", "t", "b", "m", "schedule", "chunks", "step time (ms)", "samples/s"
    );
    for (k, r) in evaluated.iter().take(limit).enumerate() {
        let _ = writeln!(
            s,
            "{:>5}  {:>4} {:>4} {:>4} {:>4} {:>6}  {:<11} {:>6}  {:>14}  {:>11.2}  {:<4}  {}{}",
            if k == 0 { "best".to_string() } else { (k + 1).to_string() },
            r.data,
            r.pipeline,
            r.tensor,
            r.micro_batch_size,
            r.micro_batches,
            r.schedule,
            r.chunks,
            r.step_time_ms.unwrap_or(0.0),
            r.samples_per_s.unwrap_or(0.0),
            if r.fits == Some(true) { "yes" } else { "no" },
            r.split,
            if r.exact == Some(false) { "  (estimate)" } else { "" }
        );
    }
    s
}

/// The chart `--svg` draws: global samples per second of every evaluated
/// layout, best first, fitting layouts and those over memory in two series.
pub fn chart(f: &Finished, title: &str) -> Result<String, baton_report::ReportError> {
    use baton_report::svg::line::{self, LineChart, LineOptions, Series};
    let rows: Vec<(&Row, &Figures)> = f.rows.iter().filter_map(|r| r.figures().map(|x| (r, x))).collect();
    let categories = (1..=rows.len()).map(|k| k.to_string()).collect();
    let name = |r: &Row, x: &Figures| {
        let l = &r.layout;
        let chunks = if l.chunks > 1 { format!(" v{}", l.chunks) } else { String::new() };
        let schedule =
            if l.schedule == ScheduleKind::OneFOneB { String::new() } else { format!(" {}", l.schedule.name()) };
        let estimate = if x.exact { "" } else { " (est.)" };
        format!("d{} p{} t{} b{}{schedule}{chunks}{estimate}", l.data, l.pipeline, l.tensor, l.micro_batch_size)
    };
    let series = |fits: bool, label: &str| Series {
        name: label.to_string(),
        values: rows.iter().map(|(_, x)| (x.fits == fits).then_some(x.samples_per_s)).collect(),
        flagged: rows.iter().map(|(_, x)| !x.fits && !fits).collect(),
        labels: rows.iter().map(|(r, x)| (x.fits == fits).then(|| name(r, x))).collect(),
    };
    let chart = LineChart {
        title: format!("{title}: layouts by throughput"),
        x_label: "rank (each point: d replicas, p stages, t devices per stage, b samples per micro-batch)".into(),
        y_label: "samples/s".into(),
        categories,
        series: vec![series(true, "fits in memory"), series(false, "over memory capacity")],
        flag_meaning: "over memory capacity".into(),
        note: format!(
            "{} layouts evaluated of {}; the rest were skipped or pruned (see the CSV).",
            rows.len(),
            f.rows.len()
        ),
    };
    line::render(&chart, &LineOptions::default())
}
