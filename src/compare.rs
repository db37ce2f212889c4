//! `baton compare`: several simulated steps side by side.

use std::fmt::Write as _;

use baton_engine::format_ns;
use baton_report::{format_bytes, Report};

/// A compared run: a short label (`A`, `B`, ...), where it came from, its report.
pub struct Entry<'a> {
    pub label: String,
    pub source: String,
    pub report: &'a Report,
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
