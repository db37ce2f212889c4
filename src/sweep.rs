//! `baton sweep` and `baton merge`: many variants of one scenario, simulated
//! in parallel and ranked.
//!
//! A grid is the cartesian product of `--vary KEY=V1,V2,...` lists (the first
//! key varies slowest). Each point is the scenario with those `KEY=VALUE`
//! overrides; the scenario file is parsed once and each point only applies its
//! overrides to the parsed tree. Points are simulated on a rayon pool and
//! collected in grid order, so results do not depend on the thread count.

use std::fmt::Write as _;

use baton_scenario::{Document, Override};
use rayon::prelude::*;
use thiserror::Error;

/// Most points a grid may have.
pub const MAX_POINTS: usize = 1_000_000;
/// Most values one range may expand to.
const MAX_RANGE: usize = 100_000;

/// Why a sweep or merge was refused.
#[derive(Debug, Error, PartialEq)]
pub enum SweepError {
    /// A malformed `--vary`.
    #[error("--vary {arg}: {message}")]
    Vary {
        /// The argument (or key).
        arg: String,
        /// What is wrong.
        message: String,
    },
    /// No `--vary`.
    #[error("give at least one --vary KEY=V1,V2,...")]
    NoVary,
    /// Too many points.
    #[error("the grid has {0} points, more than {MAX_POINTS}")]
    TooLarge(usize),
    /// A malformed `--shard`.
    #[error("--shard {0}: expected I/N with 1 <= I <= N, e.g. --shard 2/8")]
    Shard(String),
    /// An unknown `--rank-by`.
    #[error("--rank-by {0}: expected step_time, throughput, bubble or memory")]
    RankBy(String),
    /// A part that cannot be merged.
    #[error("{file}: {message}")]
    Merge {
        /// The part.
        file: String,
        /// What is wrong.
        message: String,
    },
    /// `--jobs 0`.
    #[error("--jobs must be at least 1")]
    NoJobs,
    /// A shard that holds no point of the grid.
    #[error("--shard {shard} holds no point: the grid has {points} point(s), so use at most {points} shard(s)")]
    EmptyShard {
        /// The shard, `I/N`.
        shard: String,
        /// Points in the grid.
        points: usize,
    },
    /// The thread pool could not start.
    #[error("cannot start the worker threads: {0}")]
    Threads(String),
    /// The base scenario is refused.
    #[error(transparent)]
    Scenario(#[from] baton_scenario::ScenarioError),
}

/// One `--vary` option: a key and its values, as written.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Vary {
    /// The dotted key.
    pub key: String,
    /// Its values, as written.
    pub values: Vec<String>,
}

/// Splits a value list at commas and semicolons outside brackets.
fn split_values(list: &str) -> Vec<String> {
    let (mut out, mut cur, mut depth) = (Vec::new(), String::new(), 0i32);
    for c in list.chars() {
        match c {
            '[' | '{' => depth += 1,
            ']' | '}' => depth -= 1,
            _ => {}
        }
        if (c == ',' || c == ';') && depth <= 0 {
            out.push(std::mem::take(&mut cur).trim().to_string());
        } else {
            cur.push(c);
        }
    }
    out.push(cur.trim().to_string());
    out
}

/// Expands `a..b` (every integer from a to b) and `a..b*f` (a, a*f, a*f^2, ...
/// up to b); anything else is one value.
fn expand(item: &str) -> Result<Vec<String>, String> {
    let Some((a, rest)) = item.split_once("..") else { return Ok(vec![item.to_string()]) };
    let (b, factor) = match rest.split_once('*') {
        Some((b, f)) => (b, Some(f)),
        None => (rest, None),
    };
    let num = |t: &str| t.trim().parse::<u64>().map_err(|_| format!("`{item}`: `{t}` is not a whole number"));
    let (a, b) = (num(a)?, num(b)?);
    if a > b {
        return Err(format!("`{item}`: the range is empty ({a} > {b})"));
    }
    let mut out = Vec::new();
    match factor {
        None => {
            if (b - a) as usize >= MAX_RANGE {
                return Err(format!("`{item}` has more than {MAX_RANGE} values"));
            }
            out.extend((a..=b).map(|x| x.to_string()));
        }
        Some(f) => {
            let f = num(f)?;
            if f < 2 || a == 0 {
                return Err(format!(
                    "`{item}`: a doubling range needs a start of at least 1 and a factor of at least 2"
                ));
            }
            let mut x = a;
            while x <= b {
                out.push(x.to_string());
                x = match x.checked_mul(f) {
                    Some(y) => y,
                    None => break,
                };
            }
        }
    }
    Ok(out)
}

/// Parses `KEY=V1,V2,...` (with `a..b` and `a..b*f` ranges; lists such as
/// `[4,4,4,4];[2,6,6,2]` are kept whole).
pub fn parse_vary(arg: &str) -> Result<Vary, SweepError> {
    let bad = |message: String| SweepError::Vary { arg: arg.to_string(), message };
    let (key, list) =
        arg.split_once('=').ok_or_else(|| bad("expected KEY=V1,V2,..., e.g. pipeline.micro_batches=8,16,32".into()))?;
    let key = key.trim();
    if key.is_empty() || key.split('.').any(|p| p.trim().is_empty()) {
        return Err(bad(format!("`{key}` is not a dotted key path such as pipeline.micro_batches")));
    }
    let mut values = Vec::new();
    for item in split_values(list) {
        if item.is_empty() {
            return Err(bad("a value is empty (check for stray commas)".into()));
        }
        values.extend(expand(&item).map_err(bad)?);
    }
    let mut seen = std::collections::HashSet::new();
    if let Some(dup) = values.iter().find(|v| !seen.insert(v.as_str())) {
        return Err(bad(format!("`{dup}` is listed twice")));
    }
    Ok(Vary { key: key.to_string(), values })
}

/// The cartesian product of several `--vary` lists.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Grid {
    /// The varied keys, the last varying fastest.
    pub axes: Vec<Vary>,
}

impl Grid {
    /// The grid of `axes`; refuses none, a key twice, or too many points.
    pub fn new(axes: Vec<Vary>) -> Result<Self, SweepError> {
        if axes.is_empty() {
            return Err(SweepError::NoVary);
        }
        let mut keys = std::collections::HashSet::new();
        for a in &axes {
            if !keys.insert(a.key.as_str()) {
                return Err(SweepError::Vary { arg: a.key.clone(), message: "the key is varied twice".into() });
            }
        }
        let mut n: usize = 1;
        for a in &axes {
            n = n.checked_mul(a.values.len()).filter(|&n| n <= MAX_POINTS).ok_or(SweepError::TooLarge(usize::MAX))?;
        }
        Ok(Grid { axes })
    }

    /// Points in the grid.
    pub fn len(&self) -> usize {
        self.axes.iter().map(|a| a.values.len()).product()
    }

    /// Whether it has no point.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The varied keys, in order.
    pub fn keys(&self) -> Vec<String> {
        self.axes.iter().map(|a| a.key.clone()).collect()
    }

    /// The value index on each axis of point `i` (the last axis varies fastest).
    pub fn coords(&self, mut i: usize) -> Vec<usize> {
        let mut c = vec![0; self.axes.len()];
        for (k, a) in self.axes.iter().enumerate().rev() {
            c[k] = i % a.values.len();
            i /= a.values.len();
        }
        c
    }

    /// The values of point `i`.
    pub fn values(&self, i: usize) -> Vec<String> {
        self.coords(i).iter().zip(&self.axes).map(|(&c, a)| a.values[c].clone()).collect()
    }
}

/// What a sweep records of a simulated point.
#[derive(Clone, Debug, PartialEq)]
pub struct Summary {
    /// Step time.
    pub step_time_ms: f64,
    /// Overall bubble fraction.
    pub bubble_fraction: f64,
    /// Throughput.
    pub samples_per_s: f64,
    /// The largest peak memory of any device.
    pub peak_memory_bytes: u64,
    /// Whether every device fits its memory.
    pub fits: bool,
}

/// One grid point and its result (or why it was skipped).
#[derive(Clone, Debug, PartialEq)]
pub struct Point {
    /// Its index in the grid.
    pub index: usize,
    /// Its value of each varied key.
    pub values: Vec<String>,
    /// What it gave, or why it was skipped.
    pub result: Result<Summary, String>,
}

/// What a sweep ranks by.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RankBy {
    /// Shortest step first.
    StepTime,
    /// Most samples per second first.
    Throughput,
    /// Smallest bubble first.
    Bubble,
    /// Smallest largest peak memory first.
    Memory,
}

impl std::str::FromStr for RankBy {
    type Err = SweepError;
    fn from_str(s: &str) -> Result<Self, SweepError> {
        match s {
            "step_time" | "step_time_ms" | "step-time" => Ok(RankBy::StepTime),
            "throughput" | "samples_per_s" => Ok(RankBy::Throughput),
            "bubble" | "bubble_fraction" => Ok(RankBy::Bubble),
            "memory" | "peak_memory_bytes" => Ok(RankBy::Memory),
            other => Err(SweepError::RankBy(other.to_string())),
        }
    }
}

impl RankBy {
    /// The field's value, oriented so that smaller is better.
    fn key(self, s: &Summary) -> f64 {
        match self {
            RankBy::StepTime => s.step_time_ms,
            RankBy::Throughput => -s.samples_per_s,
            RankBy::Bubble => s.bubble_fraction,
            RankBy::Memory => s.peak_memory_bytes as f64,
        }
    }

    /// The field's value as charted, and the axis label with its unit.
    pub fn value(self, s: &Summary) -> f64 {
        match self {
            RankBy::StepTime => s.step_time_ms,
            RankBy::Throughput => s.samples_per_s,
            RankBy::Bubble => s.bubble_fraction * 100.0,
            RankBy::Memory => s.peak_memory_bytes as f64 / (1u64 << 30) as f64,
        }
    }

    /// The field's name with its unit, for tables and charts.
    pub fn label(self) -> &'static str {
        match self {
            RankBy::StepTime => "step time (ms)",
            RankBy::Throughput => "throughput (samples/s)",
            RankBy::Bubble => "bubble (% of devices x step time)",
            RankBy::Memory => "peak memory of any device (GiB)",
        }
    }
}

/// The overrides of point `i`: the base ones (`--set`), then its grid
/// values (each named as the `--vary` it came from).
pub fn overrides(base: &[String], grid: &Grid, i: usize) -> Vec<Override> {
    let mut sets: Vec<Override> = base.iter().map(|a| Override::set(a)).collect();
    sets.extend(grid.axes.iter().zip(grid.values(i)).map(|(a, v)| {
        let assignment = format!("{}={v}", a.key);
        Override::typed(assignment.clone(), format!("--vary {assignment}"))
    }));
    sets
}

/// Refuses keys the scenario does not have (rather than skipping every point).
pub fn check_keys(doc: &Document, base: &[String], grid: &Grid) -> Result<(), SweepError> {
    for a in &grid.axes {
        let mut sets: Vec<Override> = base.iter().map(|b| Override::set(b)).collect();
        let assignment = format!("{}={}", a.key, a.values[0]);
        sets.push(Override::typed(assignment.clone(), format!("--vary {assignment}")));
        match doc.scenario_with(&sets) {
            Err(baton_scenario::ScenarioError::Override { message, .. }) => {
                return Err(SweepError::Vary { arg: a.key.clone(), message });
            }
            Err(e) if e.to_string().contains("unknown key") && e.key().is_some_and(|k| a.key.starts_with(k)) => {
                return Err(SweepError::Vary { arg: a.key.clone(), message: format!("unknown key: {e}") });
            }
            _ => {}
        }
    }
    Ok(())
}

/// Simulates one point.
pub fn evaluate(doc: &Document, base: &[String], grid: &Grid, i: usize, max_memory: u64) -> Point {
    let result = doc.scenario_with(&overrides(base, grid, i)).map_err(|e| e.to_string()).and_then(|s| {
        let estimate = crate::memory_estimate_bytes(&s, crate::Making::default());
        if estimate > max_memory {
            return Err(format!(
                "needs about {} of memory, more than --max-memory {} allows",
                baton_report::format_bytes(estimate),
                baton_report::format_bytes(max_memory)
            ));
        }
        crate::simulate(&s).map_err(|e| e.to_string()).map(|o| {
            let r = o.report;
            Summary {
                step_time_ms: r.step_time_ms,
                bubble_fraction: r.bubble_fraction,
                samples_per_s: r.samples_per_s,
                peak_memory_bytes: r.devices.iter().map(|d| d.peak_memory_bytes).max().unwrap_or(0),
                fits: r.fits,
            }
        })
    });
    Point { index: i, values: grid.values(i), result }
}

/// Simulates the given points in parallel (in the current rayon pool),
/// calling `tick` after each; returns them in the order given.
pub fn run(
    doc: &Document,
    base: &[String],
    grid: &Grid,
    indices: &[usize],
    max_memory: u64,
    tick: &(dyn Fn() + Sync),
) -> Vec<Point> {
    indices
        .par_iter()
        .map(|&i| {
            let p = evaluate(doc, base, grid, i, max_memory);
            tick();
            p
        })
        .collect()
}

/// The points of shard `shard` (1-based) of `of`: every `of`-th point.
pub fn shard_indices(len: usize, shard: usize, of: usize) -> Vec<usize> {
    (0..len).filter(|i| i % of == shard - 1).collect()
}

/// Parses `I/N`.
pub fn parse_shard(text: &str) -> Result<(usize, usize), SweepError> {
    let bad = || SweepError::Shard(text.to_string());
    let (i, n) = text.split_once('/').ok_or_else(bad)?;
    let (i, n): (usize, usize) = (i.trim().parse().map_err(|_| bad())?, n.trim().parse().map_err(|_| bad())?);
    if i == 0 || n == 0 || i > n {
        return Err(bad());
    }
    Ok((i, n))
}

/// Orders points best first by `by` (ties by grid index): first the points
/// that fit in memory, then those over capacity, then the skipped ones.
pub fn rank(points: &mut [Point], by: RankBy) {
    points.sort_by(|a, b| match (&a.result, &b.result) {
        (Ok(x), Ok(y)) => (!x.fits).cmp(&!y.fits).then(by.key(x).total_cmp(&by.key(y))).then(a.index.cmp(&b.index)),
        (Ok(_), Err(_)) => std::cmp::Ordering::Less,
        (Err(_), Ok(_)) => std::cmp::Ordering::Greater,
        (Err(_), Err(_)) => a.index.cmp(&b.index),
    });
}

/// The fields of the CSV and JSON, after the varied keys: the results, the
/// point's index in the grid, and what identifies the sweep it belongs to
/// (its grid, the grid's size, and the shard `I/N` that ran it).
pub const FIELDS: [&str; 10] = [
    "step_time_ms",
    "bubble_fraction",
    "samples_per_s",
    "peak_memory_bytes",
    "fits",
    "skipped",
    "point",
    "grid",
    "grid_points",
    "shard",
];

/// What identifies the sweep a set of points belongs to: a fingerprint of the
/// scenario, its `--set` overrides and its `--vary` lists; the grid's size;
/// and the shard `(I, N)` that ran them (`(1, 1)` for a whole sweep).
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct GridTag {
    /// 16 hex digits of SHA-256 over the scenario text, overrides and grid.
    pub id: String,
    /// Points in the whole grid.
    pub points: usize,
    /// `(I, N)`.
    pub shard: (usize, usize),
}

impl GridTag {
    /// The tag of a sweep of `scenario_text` with `sets` over `grid`.
    pub fn new(scenario_text: &[u8], sets: &[String], grid: &Grid, shard: (usize, usize)) -> Self {
        use sha2::{Digest, Sha256};
        let mut h = Sha256::new();
        h.update(scenario_text);
        for s in sets {
            h.update(b"\0set\0");
            h.update(s.as_bytes());
        }
        for a in &grid.axes {
            h.update(b"\0vary\0");
            h.update(a.key.as_bytes());
            for v in &a.values {
                h.update(b"\0");
                h.update(v.as_bytes());
            }
        }
        let id = h.finalize().iter().take(8).map(|b| format!("{b:02x}")).collect();
        GridTag { id, points: grid.len(), shard }
    }

    fn shard_text(&self) -> String {
        format!("{}/{}", self.shard.0, self.shard.1)
    }
}

/// Writes points as CSV: a column per varied key, then [`FIELDS`].
pub fn write_csv<W: std::io::Write>(
    keys: &[String],
    points: &[Point],
    tag: &GridTag,
    out: W,
) -> Result<(), csv::Error> {
    let mut w = csv::Writer::from_writer(out);
    w.write_record(keys.iter().map(String::as_str).chain(FIELDS))?;
    for p in points {
        let mut rec: Vec<String> = p.values.clone();
        match &p.result {
            Ok(s) => rec.extend([
                s.step_time_ms.to_string(),
                s.bubble_fraction.to_string(),
                s.samples_per_s.to_string(),
                s.peak_memory_bytes.to_string(),
                s.fits.to_string(),
                String::new(),
            ]),
            Err(reason) => {
                rec.extend(std::iter::repeat_n(String::new(), 5));
                rec.push(reason.clone());
            }
        }
        rec.push(p.index.to_string());
        rec.extend([tag.id.clone(), tag.points.to_string(), tag.shard_text()]);
        w.write_record(&rec)?;
    }
    w.flush()?;
    Ok(())
}

/// The points as a JSON array of objects with the CSV's names (values that
/// read as numbers are numbers).
pub fn to_json(keys: &[String], points: &[Point], tag: &GridTag) -> String {
    use serde_json::{json, Map, Value};
    let as_value = |v: &str| {
        v.parse::<i64>()
            .map(Value::from)
            .or_else(|_| {
                v.parse::<f64>()
                    .map_err(|_| ())
                    .and_then(|f| serde_json::Number::from_f64(f).map(Value::Number).ok_or(()))
            })
            .unwrap_or_else(|_| Value::String(v.to_string()))
    };
    let rows: Vec<Value> = points
        .iter()
        .map(|p| {
            let mut m = Map::new();
            for (k, v) in keys.iter().zip(&p.values) {
                m.insert(k.clone(), as_value(v));
            }
            match &p.result {
                Ok(s) => {
                    m.insert("step_time_ms".into(), json!(s.step_time_ms));
                    m.insert("bubble_fraction".into(), json!(s.bubble_fraction));
                    m.insert("samples_per_s".into(), json!(s.samples_per_s));
                    m.insert("peak_memory_bytes".into(), json!(s.peak_memory_bytes));
                    m.insert("fits".into(), json!(s.fits));
                    m.insert("skipped".into(), Value::Null);
                }
                Err(reason) => {
                    for f in &FIELDS[..5] {
                        m.insert((*f).into(), Value::Null);
                    }
                    m.insert("skipped".into(), json!(reason));
                }
            }
            m.insert("point".into(), json!(p.index));
            m.insert("grid".into(), json!(tag.id));
            m.insert("grid_points".into(), json!(tag.points));
            m.insert("shard".into(), json!(tag.shard_text()));
            Value::Object(m)
        })
        .collect();
    let mut s = serde_json::to_string_pretty(&rows).unwrap_or_else(|_| "[]".into());
    s.push('\n');
    s
}

/// Reads a CSV written by [`write_csv`] (one shard of a sweep) back into
/// its keys, points and tag; refuses rows whose tags disagree.
pub fn read_csv(text: &str, file: &str) -> Result<(Vec<String>, Vec<Point>, GridTag), SweepError> {
    let bad = |message: String| SweepError::Merge { file: file.to_string(), message };
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let header: Vec<String> = r.headers().map_err(|e| bad(e.to_string()))?.iter().map(String::from).collect();
    let n_keys =
        header.len().checked_sub(FIELDS.len()).ok_or_else(|| bad("not a sweep CSV: too few columns".into()))?;
    if header[n_keys..] != FIELDS || n_keys == 0 {
        return Err(bad(format!("not a sweep CSV: the last columns must be {}", FIELDS.join(","))));
    }
    let mut points = Vec::new();
    let mut tag: Option<GridTag> = None;
    for rec in r.records() {
        let rec = rec.map_err(|e| bad(e.to_string()))?;
        let line = rec.position().map_or(0, |p| p.line());
        let f = |i: usize| rec.get(n_keys + i).unwrap_or("");
        let num =
            |i: usize| f(i).parse::<f64>().map_err(|_| bad(format!("line {line}: {} is not a number", FIELDS[i])));
        let index: usize = f(6).parse().map_err(|_| bad(format!("line {line}: point is not a whole number")))?;
        let grid_points: usize =
            f(8).parse().map_err(|_| bad(format!("line {line}: grid_points is not a whole number")))?;
        let shard = parse_shard(f(9)).map_err(|_| bad(format!("line {line}: shard `{}` is not I/N", f(9))))?;
        let row_tag = GridTag { id: f(7).to_string(), points: grid_points, shard };
        match &tag {
            None => tag = Some(row_tag),
            Some(t) if *t != row_tag => {
                return Err(bad(format!("line {line}: belongs to another sweep or shard than the lines above it")))
            }
            _ => {}
        }
        let result = if f(5).is_empty() {
            Ok(Summary {
                step_time_ms: num(0)?,
                bubble_fraction: num(1)?,
                samples_per_s: num(2)?,
                peak_memory_bytes: f(3)
                    .parse()
                    .map_err(|_| bad(format!("line {line}: peak_memory_bytes is not a whole number")))?,
                fits: f(4).parse().map_err(|_| bad(format!("line {line}: fits is not true or false")))?,
            })
        } else {
            Err(f(5).to_string())
        };
        points.push(Point {
            index,
            values: (0..n_keys).map(|i| rec.get(i).unwrap_or("").to_string()).collect(),
            result,
        });
    }
    let tag = tag.ok_or_else(|| bad("holds no point".into()))?;
    Ok((header[..n_keys].to_vec(), points, tag))
}

/// Combines the shard CSVs of one sweep into one ranked list. Refuses parts
/// of another sweep (another scenario, overrides or grid), a shard given
/// twice, a missing shard, and a part that lacks points of its shard.
pub fn merge(parts: &[(String, String)], by: RankBy) -> Result<(Vec<String>, Vec<Point>, GridTag), SweepError> {
    let mut first: Option<(Vec<String>, GridTag, String)> = None;
    let mut all = Vec::new();
    let mut shards: std::collections::BTreeMap<usize, String> = Default::default();
    for (file, text) in parts {
        let bad = |message: String| SweepError::Merge { file: file.clone(), message };
        let (k, points, tag) = read_csv(text, file)?;
        match &first {
            None => first = Some((k.clone(), tag.clone(), file.clone())),
            Some((keys, t, f0)) => {
                if *keys != k {
                    return Err(bad(format!("varies {} but {f0} varies {}", k.join(", "), keys.join(", "))));
                }
                if t.id != tag.id || t.points != tag.points {
                    return Err(bad(format!(
                        "is a part of another sweep than {f0} (grid {} of {} points, not grid {} of {})",
                        tag.id, tag.points, t.id, t.points
                    )));
                }
                if t.shard.1 != tag.shard.1 {
                    return Err(bad(format!("is shard {} but {f0} is one of {} shards", tag.shard_text(), t.shard.1)));
                }
            }
        }
        if let Some(other) = shards.insert(tag.shard.0, file.clone()) {
            return Err(bad(format!(
                "is shard {}, which {other} already is: a shard appears in two parts",
                tag.shard_text()
            )));
        }
        let mut got: Vec<usize> = points.iter().map(|p| p.index).collect();
        got.sort_unstable();
        if got != shard_indices(tag.points, tag.shard.0, tag.shard.1) {
            return Err(bad(format!("does not hold exactly the points of shard {}", tag.shard_text())));
        }
        all.extend(points);
    }
    let Some((keys, tag, _)) = first else { return Err(SweepError::NoVary) };
    let missing: Vec<String> =
        (1..=tag.shard.1).filter(|i| !shards.contains_key(i)).map(|i| format!("{i}/{}", tag.shard.1)).collect();
    if !missing.is_empty() {
        return Err(SweepError::Merge {
            file: parts.iter().map(|(f, _)| f.as_str()).collect::<Vec<_>>().join(", "),
            message: format!(
                "shard {} is missing (the parts must be all {} shards of one sweep)",
                missing.join(", "),
                tag.shard.1
            ),
        });
    }
    rank(&mut all, by);
    Ok((keys, all, GridTag { shard: (1, 1), ..tag }))
}

/// One line per skipped point (at most `limit`, then a count of the rest):
/// its values and why it was skipped.
pub fn skip_reasons(keys: &[String], points: &[Point], limit: usize) -> String {
    let skipped: Vec<&Point> = points.iter().filter(|p| p.result.is_err()).collect();
    let mut s = String::new();
    for p in skipped.iter().take(limit) {
        let desc: Vec<String> = keys.iter().zip(&p.values).map(|(k, v)| format!("{k}={v}")).collect();
        let _ = writeln!(s, "  {}: {}", desc.join(" "), p.result.as_ref().err().map_or("", |e| e.as_str()));
    }
    if skipped.len() > limit {
        let _ = writeln!(s, "  ... {} more", skipped.len() - limit);
    }
    s
}

/// Shell-quotes a `--set` argument when it needs it.
fn quote(arg: &str) -> String {
    if arg.chars().all(|c| c.is_ascii_alphanumeric() || "._-=/:+".contains(c)) {
        arg.to_string()
    } else {
        format!("'{}'", arg.replace('\'', r"'\''"))
    }
}

/// What [`execute`] asks for.
pub struct Request<'a> {
    /// The scenario, parsed once.
    pub doc: &'a Document,
    /// `--set` overrides applied to every point.
    pub sets: &'a [String],
    /// The grid of varied values.
    pub grid: &'a Grid,
    /// Run only the I-th of N slices of the grid.
    pub shard: Option<(usize, usize)>,
    /// Worker threads (`None`: all cores).
    pub jobs: Option<usize>,
    /// How points are ranked.
    pub by: RankBy,
    /// The scenario file's bytes, for the grid's fingerprint.
    pub scenario_text: &'a [u8],
    /// A point whose estimated memory is over this is skipped.
    pub max_memory: u64,
}

/// The ranked points of a sweep and what it took.
pub struct Finished {
    /// The points simulated, ranked.
    pub points: Vec<Point>,
    /// Points of the grid this run (or shard) covered.
    pub covered: usize,
    /// Wall-clock time the points took.
    pub elapsed: std::time::Duration,
    /// What identifies the sweep and the shard.
    pub tag: GridTag,
}

/// Checks the request, simulates its points in parallel (a progress bar on
/// standard error when it is a terminal and the sweep runs for more than a
/// second) and ranks them. The results do not depend on the thread count.
pub fn execute(r: &Request<'_>) -> Result<Finished, SweepError> {
    use std::io::IsTerminal;
    use std::time::{Duration, Instant};
    if r.jobs == Some(0) {
        return Err(SweepError::NoJobs);
    }
    // The base scenario and every varied key must make sense before the sweep starts.
    r.doc.scenario(r.sets)?;
    check_keys(r.doc, r.sets, r.grid)?;
    let indices: Vec<usize> = match r.shard {
        Some((i, n)) => shard_indices(r.grid.len(), i, n),
        None => (0..r.grid.len()).collect(),
    };
    if indices.is_empty() {
        let (i, n) = r.shard.unwrap_or((1, 1));
        return Err(SweepError::EmptyShard { shard: format!("{i}/{n}"), points: r.grid.len() });
    }
    let tag = GridTag::new(r.scenario_text, r.sets, r.grid, r.shard.unwrap_or((1, 1)));
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
        .num_threads(r.jobs.unwrap_or(0))
        .build()
        .map_err(|e| SweepError::Threads(e.to_string()))?;
    let mut points = pool.install(|| run(r.doc, r.sets, r.grid, &indices, r.max_memory, &tick));
    bar.finish_and_clear();
    rank(&mut points, r.by);
    Ok(Finished { points, covered: indices.len(), elapsed: started.elapsed(), tag })
}

/// The ranked table (at most `limit` rows) with the best point marked, and,
/// when the scenario path is known, the command that reproduces the best point.
pub fn table(
    keys: &[String],
    points: &[Point],
    by: RankBy,
    limit: usize,
    scenario: Option<&str>,
    base: &[String],
) -> String {
    use baton_engine::format_ns;
    use baton_report::format_bytes;
    let mut s = String::new();
    let ok: Vec<&Point> = points.iter().filter(|p| p.result.is_ok()).collect();
    let skipped: Vec<&Point> = points.iter().filter(|p| p.result.is_err()).collect();
    let widths: Vec<usize> = keys
        .iter()
        .enumerate()
        .map(|(k, name)| ok.iter().map(|p| p.values[k].len()).chain([name.len()]).max().unwrap_or(4).min(40))
        .collect();
    let over = ok.iter().filter(|p| p.result.as_ref().is_ok_and(|x| !x.fits)).count();
    let _ = writeln!(
        s,
        "{} points ranked by {}, best first ({} over memory capacity, ranked last); {} skipped",
        ok.len(),
        by.label(),
        over,
        skipped.len()
    );
    let _ = write!(s, "{:>5}  ", "rank");
    for (k, name) in keys.iter().enumerate() {
        let _ = write!(s, "{:<w$}  ", name, w = widths[k]);
    }
    let _ = writeln!(s, "{:>12}  {:>8}  {:>11}  {:>11}  fits", "step time", "bubble", "samples/s", "peak mem");
    for (r, p) in ok.iter().take(limit).enumerate() {
        let Ok(x) = &p.result else { continue };
        let _ = write!(s, "{:>5}  ", if r == 0 { "best".to_string() } else { (r + 1).to_string() });
        for (k, v) in p.values.iter().enumerate() {
            let _ = write!(s, "{:<w$}  ", v, w = widths[k]);
        }
        let _ = writeln!(
            s,
            "{:>12}  {:>7.2}%  {:>11.2}  {:>11}  {}{}",
            format_ns((x.step_time_ms * 1e6).round() as u64),
            x.bubble_fraction * 100.0,
            x.samples_per_s,
            format_bytes(x.peak_memory_bytes),
            if x.fits { "yes" } else { "OVER" },
            if r == 0 { "   <== best" } else { "" }
        );
    }
    if ok.len() > limit {
        let _ = writeln!(s, "  ... {} more (see --csv or --json)", ok.len() - limit);
    }
    if !skipped.is_empty() {
        let _ = writeln!(s, "skipped:");
        s.push_str(&skip_reasons(keys, points, 5));
    }
    if let Some(best) = ok.first() {
        let mut sets: Vec<String> = base.to_vec();
        sets.extend(keys.iter().zip(&best.values).map(|(k, v)| format!("{k}={v}")));
        let args: Vec<String> = sets.iter().map(|a| format!("--set {}", quote(a))).collect();
        let _ = writeln!(s);
        match scenario {
            Some(path) => {
                let _ = writeln!(
                    s,
                    "best point, to reproduce and chart it:\n  baton run {} {} --svg best.svg",
                    quote(path),
                    args.join(" ")
                );
            }
            None => {
                let _ = writeln!(s, "best point: {}", args.join(" "));
            }
        }
    }
    s
}

/// A line chart of the ranking field against the first varied key, one line
/// per value of the second key. With more keys, each plotted point is the best
/// over the other keys' values. Skipped points leave gaps.
pub fn chart(
    title: &str,
    sets: &[String],
    grid: &Grid,
    points: &[Point],
    by: RankBy,
    width_px: Option<u32>,
) -> Result<String, String> {
    use baton_report::svg::line::{self, LineChart, LineOptions, Series};
    let xs = &grid.axes[0].values;
    let lines: Vec<String> = grid.axes.get(1).map_or_else(|| vec![String::new()], |a| a.values.clone());
    // At each (line, x): the best point that fits, and the best one over
    // memory capacity; as (sort key, value, point).
    type Best<'p> = Option<(f64, f64, &'p Point)>;
    let mut fit: Vec<Vec<Best<'_>>> = vec![vec![None; xs.len()]; lines.len()];
    let mut over: Vec<Vec<Best<'_>>> = vec![vec![None; xs.len()]; lines.len()];
    for p in points {
        let Ok(s) = &p.result else { continue };
        let c = grid.coords(p.index);
        let line = if grid.axes.len() > 1 { c[1] } else { 0 };
        let slot = if s.fits { &mut fit[line][c[0]] } else { &mut over[line][c[0]] };
        let key = by.key(s);
        if slot.is_none_or(|(k, _, _)| key < k) {
            *slot = Some((key, by.value(s), p));
        }
    }
    if fit.iter().chain(&over).flatten().all(Option::is_none) {
        return Err("no point was simulated, so there is nothing to chart".into());
    }
    // The keys the chart does not draw, by their last name.
    let undrawn: Vec<(usize, &str)> =
        grid.axes.iter().enumerate().skip(2).map(|(k, a)| (k, a.key.rsplit('.').next().unwrap_or(&a.key))).collect();
    let label_of = |p: &Point| {
        (!undrawn.is_empty())
            .then(|| undrawn.iter().map(|&(k, name)| format!("{name}={}", p.values[k])).collect::<Vec<_>>().join(" "))
    };
    let series = lines
        .iter()
        .enumerate()
        .map(|(l, name)| {
            let chosen: Vec<(Best<'_>, bool)> = (0..xs.len())
                .map(|x| fit[l][x].map_or((over[l][x], over[l][x].is_some()), |b| (Some(b), false)))
                .collect();
            Series {
                name: if grid.axes.len() > 1 {
                    format!("{} = {name}", grid.axes[1].key)
                } else {
                    by.label().to_string()
                },
                values: chosen.iter().map(|(b, _)| b.map(|(_, y, _)| y)).collect(),
                flagged: chosen.iter().map(|(_, f)| *f).collect(),
                labels: chosen.iter().map(|(b, _)| b.and_then(|(_, _, p)| label_of(p))).collect(),
            }
        })
        .collect();
    let mut notes = Vec::new();
    if !sets.is_empty() {
        notes.push(crate::overrides_note(sets));
    }
    if !undrawn.is_empty() {
        let names: Vec<&str> = grid.axes[2..].iter().map(|a| a.key.as_str()).collect();
        notes.push(format!(
            "each point is the best over {} (its value written beside it), preferring points that fit in memory",
            names.join(", ")
        ));
    }
    let chart = LineChart {
        title: format!("{title}: {} by {}", by.label(), grid.axes[0].key),
        x_label: grid.axes[0].key.clone(),
        y_label: by.label().to_string(),
        categories: xs.clone(),
        series,
        flag_meaning: "over memory capacity (no point there fits)".into(),
        note: notes.join(" · "),
    };
    let options = LineOptions { width_px: width_px.unwrap_or(LineOptions::default().width_px), ..Default::default() };
    line::render(&chart, &options).map_err(|e| e.to_string())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn vary_lists_ranges_and_bracketed_values() {
        assert_eq!(parse_vary("pipeline.micro_batches=4,8").unwrap().values, vec!["4", "8"]);
        assert_eq!(parse_vary("a=1..4").unwrap().values, vec!["1", "2", "3", "4"]);
        assert_eq!(parse_vary("a=4..64*2").unwrap().values, vec!["4", "8", "16", "32", "64"]);
        assert_eq!(parse_vary("a=3..50*3").unwrap().values, vec!["3", "9", "27"]);
        assert_eq!(parse_vary("pipeline.split=[4,4,4,4];[2,6,6,2]").unwrap().values, vec!["[4,4,4,4]", "[2,6,6,2]"]);
        assert_eq!(parse_vary("pipeline.split=[4,4],[2,6]").unwrap().values, vec!["[4,4]", "[2,6]"]);
        assert_eq!(parse_vary("s=1f1b, fill-drain").unwrap().values, vec!["1f1b", "fill-drain"]);
    }

    #[test]
    fn bad_vary_syntax_is_refused() {
        for bad in [
            "nokey",
            "=1,2",
            "a=",
            "a=1,,2",
            "a=8..4",
            "a=1..x",
            "a=4..64*1",
            "a=0..8*2",
            "a..b=1",
            "a=1,1",
            "a=0..1000000",
        ] {
            assert!(parse_vary(bad).is_err(), "{bad}");
        }
        assert_eq!(Grid::new(vec![]).unwrap_err(), SweepError::NoVary);
        let v = parse_vary("a=1,2").unwrap();
        assert!(Grid::new(vec![v.clone(), v]).is_err(), "same key twice");
    }

    #[test]
    fn grid_order_has_the_last_key_fastest() {
        let g = Grid::new(vec![parse_vary("a=1,2").unwrap(), parse_vary("b=x,y,z").unwrap()]).unwrap();
        assert_eq!(g.len(), 6);
        assert_eq!(g.values(0), vec!["1", "x"]);
        assert_eq!(g.values(4), vec!["2", "y"]);
        assert_eq!(shard_indices(6, 2, 4), vec![1, 5]);
        assert_eq!(parse_shard("2/4").unwrap(), (2, 4));
        for bad in ["0/4", "5/4", "a/b", "3", "1/0"] {
            assert!(parse_shard(bad).is_err(), "{bad}");
        }
    }

    #[test]
    fn csv_round_trips_and_ranks_skipped_last() {
        let keys = vec!["a".to_string()];
        let s = |t: f64| Summary {
            step_time_ms: t,
            bubble_fraction: 0.1,
            samples_per_s: 1.0 / t,
            peak_memory_bytes: 7,
            fits: true,
        };
        let mut pts = vec![
            Point { index: 0, values: vec!["x".into()], result: Ok(s(3.0)) },
            Point { index: 1, values: vec!["y, z".into()], result: Err("bad \"value\"".into()) },
            Point { index: 2, values: vec!["w".into()], result: Ok(s(1.0 / 3.0)) },
        ];
        rank(&mut pts, RankBy::StepTime);
        assert_eq!(pts.iter().map(|p| p.index).collect::<Vec<_>>(), vec![2, 0, 1]);
        let mut out = Vec::new();
        let tag = GridTag { id: "0123456789abcdef".into(), points: 3, shard: (1, 1) };
        write_csv(&keys, &pts, &tag, &mut out).unwrap();
        let text = String::from_utf8(out).unwrap();
        assert!(text.lines().nth(1).unwrap().ends_with(",0123456789abcdef,3,1/1"), "{text}");
        let (k2, back, tag2) = read_csv(&text, "x.csv").unwrap();
        assert_eq!((k2, back.clone(), tag2), (keys.clone(), pts.clone(), tag.clone()));
        rank(&mut pts, RankBy::Throughput);
        assert_eq!(pts[0].index, 2);
        // A point over memory capacity ranks after every point that fits.
        if let Ok(best) = &mut pts[0].result {
            best.fits = false;
        }
        rank(&mut pts, RankBy::Throughput);
        assert_eq!(pts.iter().map(|p| p.index).collect::<Vec<_>>(), vec![0, 2, 1]);
        let json = to_json(&keys, &pts, &tag);
        assert!(json.contains("\"skipped\": \"bad \\\"value\\\"\""));
        assert!(json.contains("\"grid\": \"0123456789abcdef\"") && json.contains("\"shard\": \"1/1\""));
    }
}
