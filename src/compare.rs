//! `baton compare`: several simulated steps side by side.

use std::fmt::Write as _;
use std::path::PathBuf;

use baton_engine::format_ns;
use baton_report::svg::gantt::{self, GanttOptions, Run};
use baton_report::svg::View;
use baton_report::{format_bytes, Report, ReportError};
use baton_scenario::{Scenario, ScenarioError};
use thiserror::Error;

use crate::{simulate, SimulateError, SimulatedStep};

/// A compared run: a short label (`A`, `B`, ...), where it came from, its report.
pub struct Entry<'a> {
    /// `A`, `B`, ...
    pub label: String,
    /// The scenario file (and the `--set` that made a variant).
    pub source: String,
    /// Its report.
    pub report: &'a Report,
}

/// Why runs could not be compared.
#[derive(Debug, Error)]
pub enum CompareError {
    /// A scenario was refused.
    #[error(transparent)]
    Scenario(#[from] ScenarioError),
    /// Fewer than two runs.
    #[error("give two or more scenarios, or one with --set to compare it with a variant, or --vary KEY=V1,V2")]
    TooFew,
    /// `--vary` is not `KEY=V1,V2,...`.
    #[error("--vary {0}: expected KEY=V1,V2,..., for example --vary pipeline.schedule=1f1b,zb-h1")]
    Vary(String),
}

/// One run to compare.
pub struct Candidate {
    /// The scenario file (and the `--set` that made a variant).
    pub source: String,
    /// The scenario, overrides applied.
    pub scenario: Scenario,
    /// What the overrides changed, for the chart's caption (`with ...`), or empty.
    pub note: String,
}

/// The runs `baton compare` compares: each scenario with `sets` applied, or
/// with a single scenario, it and its variant made by `sets`; with `vary`
/// (`KEY=V1,V2,...`), each scenario once per value, `sets` applied to all.
pub fn scenarios(paths: &[PathBuf], sets: &[String], vary: Option<&str>) -> Result<Vec<Candidate>, CompareError> {
    let mut runs = Vec::new();
    if let Some(vary) = vary {
        let (key, values) = vary.split_once('=').ok_or_else(|| CompareError::Vary(vary.to_string()))?;
        let values: Vec<&str> = values.split(',').map(str::trim).collect();
        if key.trim().is_empty() || values.iter().any(|v| v.is_empty()) {
            return Err(CompareError::Vary(vary.to_string()));
        }
        for path in paths {
            for v in &values {
                let mut these = sets.to_vec();
                these.push(format!("{}={v}", key.trim()));
                runs.push(Candidate {
                    source: format!("{} {}={v}", path.display(), key.trim()),
                    scenario: baton_scenario::load(path, &these)?,
                    note: crate::overrides_note(&these),
                });
            }
        }
        if runs.len() < 2 {
            return Err(CompareError::TooFew);
        }
        return Ok(runs);
    }
    let variant = paths.len() == 1 && !sets.is_empty();
    for (i, path) in paths.iter().enumerate() {
        let these: &[String] = if variant { &[] } else { sets };
        runs.push(Candidate {
            source: path.display().to_string(),
            scenario: baton_scenario::load(path, these)?,
            note: crate::overrides_note(these),
        });
        if variant && i == 0 {
            let desc = sets.iter().map(|x| format!("--set {x}")).collect::<Vec<_>>().join(" ");
            runs.push(Candidate {
                source: format!("{} {desc}", path.display()),
                scenario: baton_scenario::load(path, sets)?,
                note: crate::overrides_note(sets),
            });
        }
    }
    if runs.len() < 2 {
        return Err(CompareError::TooFew);
    }
    Ok(runs)
}

/// Simulated runs, side by side.
pub struct Comparison {
    sources: Vec<String>,
    notes: Vec<String>,
    devices_per_node: Vec<Option<u32>>,
    outcomes: Vec<SimulatedStep>,
}

/// The label of run `i`: `A` to `H`, then `R9`, `R10`, ...
fn label(i: usize) -> String {
    let letters = ["A", "B", "C", "D", "E", "F", "G", "H"];
    letters.get(i).map_or_else(|| format!("R{}", i + 1), |l| l.to_string())
}

impl Comparison {
    /// Simulates each `(source, scenario)`.
    pub fn run(runs: &[Candidate]) -> Result<Self, SimulateError> {
        Self::run_with(runs, false)
    }

    /// [`Comparison::run`], with each run's critical path when `critical`
    /// (for the chart's outline and the JSON).
    pub fn run_with(runs: &[Candidate], critical: bool) -> Result<Self, SimulateError> {
        let outcomes = runs
            .iter()
            .map(|c| simulate(&c.scenario).map(|o| if critical { o.with_critical_path() } else { o }))
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Comparison {
            sources: runs.iter().map(|c| c.source.clone()).collect(),
            notes: runs.iter().map(|c| c.note.clone()).collect(),
            devices_per_node: runs.iter().map(|c| crate::devices_per_node(&c.scenario)).collect(),
            outcomes,
        })
    }

    fn entries(&self) -> Vec<Entry<'_>> {
        self.outcomes
            .iter()
            .enumerate()
            .map(|(i, o)| Entry { label: label(i), source: self.sources[i].clone(), report: &o.report })
            .collect()
    }

    /// The longest of the runs' steps, in nanoseconds.
    pub fn longest_step_ns(&self) -> Option<u64> {
        self.outcomes.iter().map(|o| o.report.step_time_ns).max()
    }

    /// The side-by-side table.
    pub fn table(&self) -> String {
        table(&self.entries())
    }

    /// The runs' Gantt charts stacked on one time axis.
    pub fn chart(&self, comm_lanes: bool, view: View) -> Result<String, ReportError> {
        let runs: Vec<Run<'_>> = self
            .outcomes
            .iter()
            .enumerate()
            .map(|(i, o)| Run {
                trace: &o.trace,
                report: &o.report,
                label: label(i),
                note: self.notes[i].clone(),
                devices_per_node: self.devices_per_node[i],
            })
            .collect();
        let entries = self.entries();
        let labels: Vec<&str> = entries.iter().map(|e| e.label.as_str()).collect();
        let first = entries.first().map(|e| e.report.title.as_str()).unwrap_or_default();
        // One title for a file and its variants; each run's own otherwise.
        let title = if entries.iter().all(|e| e.report.title == first) {
            format!("{first}: {} compared", labels.join(", "))
        } else {
            format!(
                "Comparison: {}",
                entries.iter().map(|e| format!("{} {}", e.label, e.report.title)).collect::<Vec<_>>().join(" / ")
            )
        };
        gantt::render(&runs, &GanttOptions { comm_lanes, title: Some(title), view, devices: None })
    }

    /// The reports as a JSON array.
    pub fn json(&self) -> Result<String, serde_json::Error> {
        let reports: Vec<&Report> = self.outcomes.iter().map(|o| &o.report).collect();
        Ok(format!("{}\n", serde_json::to_string_pretty(&reports)?))
    }
}

fn ratio(a: f64, b: f64) -> String {
    if a == 0.0 {
        "-".into()
    } else {
        format!("x{:.3}", b / a)
    }
}

fn signed_ns(d: i128) -> String {
    let s = format_ns(d.unsigned_abs().min(u64::MAX as u128) as u64);
    if d < 0 {
        format!("-{s}")
    } else {
        format!("+{s}")
    }
}

fn signed_bytes(d: i128) -> String {
    let s = format_bytes(d.unsigned_abs().min(u64::MAX as u128) as u64);
    if d < 0 {
        format!("-{s}")
    } else {
        format!("+{s}")
    }
}

/// The side-by-side table: one column per run, and for every run after the
/// first its difference from the first and the ratio to it.
pub fn table(entries: &[Entry<'_>]) -> String {
    let mut s = String::new();
    for e in entries {
        let _ = writeln!(s, "{}: {} ({})", e.label, e.report.title, e.source);
    }
    let _ = writeln!(s);
    let Some(first) = entries.first() else { return s };
    let mut header = format!("{:<22}", "");
    for e in entries {
        let _ = write!(header, " {:>14}", e.label);
    }
    for e in &entries[1..] {
        let _ = write!(
            header,
            " {:>14} {:>8}",
            format!("{} - {}", e.label, first.label),
            format!("{}/{}", e.label, first.label)
        );
    }
    let _ = writeln!(s, "{header}");

    // (name, value per run as text, value per run as a number, kind)
    enum Kind {
        Ns,
        Bytes,
        Percent,
        Plain,
    }
    let mut rows: Vec<(String, Vec<Option<f64>>, Kind)> = vec![
        ("step time".into(), entries.iter().map(|e| Some(e.report.step_time_ns as f64)).collect(), Kind::Ns),
        ("bubble".into(), entries.iter().map(|e| Some(e.report.bubble_fraction)).collect(), Kind::Percent),
        ("samples/s".into(), entries.iter().map(|e| Some(e.report.samples_per_s)).collect(), Kind::Plain),
    ];
    let devices = entries.iter().map(|e| e.report.devices.len()).max().unwrap_or(0);
    for d in 0..devices {
        let busy = entries.iter().map(|e| e.report.devices.get(d).map(|x| x.busy_ns as f64)).collect();
        rows.push((format!("device {d} busy"), busy, Kind::Ns));
    }
    for d in 0..devices {
        let mem = entries.iter().map(|e| e.report.devices.get(d).map(|x| x.peak_memory_bytes as f64)).collect();
        rows.push((format!("device {d} peak memory"), mem, Kind::Bytes));
    }
    let show = |v: Option<f64>, k: &Kind| match v {
        None => "-".to_string(),
        Some(x) => match k {
            Kind::Ns => format_ns(x as u64),
            Kind::Bytes => format_bytes(x as u64),
            Kind::Percent => format!("{:.2}%", x * 100.0),
            Kind::Plain => format!("{x:.2}"),
        },
    };
    for (name, vals, kind) in &rows {
        let mut line = format!("{name:<22}");
        for v in vals {
            let _ = write!(line, " {:>14}", show(*v, kind));
        }
        for v in &vals[1..] {
            let (diff, rat) = match (vals[0], *v) {
                (Some(a), Some(b)) => (
                    match kind {
                        Kind::Ns => signed_ns(b as i128 - a as i128),
                        Kind::Bytes => signed_bytes(b as i128 - a as i128),
                        Kind::Percent => format!("{:+.2} pp", (b - a) * 100.0),
                        Kind::Plain => format!("{:+.2}", b - a),
                    },
                    ratio(a, b),
                ),
                _ => ("-".into(), "-".into()),
            };
            let _ = write!(line, " {diff:>14} {rat:>8}");
        }
        let _ = writeln!(s, "{line}");
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn differences_and_ratios_against_the_first() {
        let s = baton_scenario::load(
            std::path::Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/scenarios/unbalanced-split.yaml")),
            &[],
        )
        .unwrap();
        let a = crate::simulate(&s).unwrap().report;
        let mut t = s.clone();
        t.pipeline.split = vec![4, 3, 3, 2];
        let b = crate::simulate(&t).unwrap().report;
        let text = table(&[
            Entry { label: "A".into(), source: "a.yaml".into(), report: &a },
            Entry { label: "B".into(), source: "b.yaml".into(), report: &b },
        ]);
        let step = text.lines().find(|l| l.starts_with("step time")).unwrap();
        // The table shows each step time, B - A and B / A, from the two
        // reports it is given (their step times are checked against an
        // independent model in tests/sweep.rs: 140.197 and 122.294 ms).
        let (a_ms, b_ms) = (a.step_time_ns as f64 / 1e6, b.step_time_ns as f64 / 1e6);
        for want in [
            format!("{a_ms:.3} ms"),
            format!("{b_ms:.3} ms"),
            format!("{:.3} ms", b_ms - a_ms),
            format!("x{:.3}", b_ms / a_ms),
        ] {
            assert!(step.contains(&want), "{step} lacks {want}");
        }
        assert!(text.contains("device 3 peak memory"));
    }
}
