//! `baton run --trials N`: the step time over N independent draws of the
//! scenario's variability (jitter, rare slow ops), seeds `seed` to
//! `seed + N - 1`, simulated on the rayon pool and collected in seed order,
//! so the figures never depend on the thread count.

use baton_report::Trials;
use baton_scenario::Scenario;
use rayon::prelude::*;

use crate::{simulate, SimulateError};

/// Most draws `--trials` takes.
pub const MAX_TRIALS: u32 = 1_000_000;

/// Each draw's step time in ns, in seed order.
pub fn step_times(s: &Scenario, n: u32) -> Result<Vec<u64>, SimulateError> {
    (0..n)
        .into_par_iter()
        .map(|k| {
            let mut v = s.clone();
            v.seed = s.seed.wrapping_add(k as u64);
            Ok(simulate(&v)?.report.step_time_ns)
        })
        .collect()
}

/// The figures of `n` draws.
pub fn run(s: &Scenario, n: u32) -> Result<(Trials, Vec<u64>), SimulateError> {
    let times = step_times(s, n)?;
    let t = Trials::of(&times).unwrap_or(Trials {
        count: 0,
        p50_ms: 0.0,
        p90_ms: 0.0,
        p99_ms: 0.0,
        max_ms: 0.0,
        mean_ms: 0.0,
    });
    Ok((t, times))
}

/// The summary `baton run --trials` prints.
pub fn render_text(t: &Trials, seed: u64) -> String {
    let ns = |ms: f64| baton_engine::format_ns((ms * 1e6).round() as u64);
    format!(
        "trials: {} draws (seeds {} to {}): p50 {}, p90 {}, p99 {}, max {}, mean {} (percentiles by nearest rank)\n",
        t.count,
        seed,
        seed.wrapping_add(t.count.saturating_sub(1) as u64),
        ns(t.p50_ms),
        ns(t.p90_ms),
        ns(t.p99_ms),
        ns(t.max_ms),
        ns(t.mean_ms)
    )
}

/// The histogram `--trials-svg` draws.
pub fn chart(s: &Scenario, t: &Trials, times: &[u64]) -> baton_report::svg::histogram::Histogram {
    baton_report::svg::histogram::Histogram {
        title: format!("{}: step time over {} draws", s.title, t.count),
        x_label: "step time (ms)".into(),
        values: times.iter().map(|&x| x as f64 / 1e6).collect(),
        marks: vec![("p50".into(), t.p50_ms), ("p90".into(), t.p90_ms), ("p99".into(), t.p99_ms)],
        note: format!(
            "seeds {} to {}; mean {:.3} ms, max {:.3} ms",
            s.seed,
            s.seed.wrapping_add(t.count.saturating_sub(1) as u64),
            t.mean_ms,
            t.max_ms
        ),
    }
}
