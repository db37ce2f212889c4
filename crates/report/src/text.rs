//! The readable text summary of a report.

use std::fmt::Write as _;

use baton_engine::format_ns;

use crate::{busiest_link, longest_gaps, Report};

/// Bytes with a binary unit: `512 B`, `1.50 KiB`, `80.00 GiB`.
pub fn format_bytes(b: u64) -> String {
    const UNITS: [&str; 5] = ["KiB", "MiB", "GiB", "TiB", "PiB"];
    if b < 1024 {
        return format!("{b} B");
    }
    let mut v = b as f64 / 1024.0;
    let mut i = 0;
    while v >= 1024.0 && i + 1 < UNITS.len() {
        v /= 1024.0;
        i += 1;
    }
    format!("{v:.2} {}", UNITS[i])
}

/// What the summary shows beyond the report.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct TextOptions {
    /// How many of the longest idle gaps to list.
    pub longest_gaps: usize,
}

impl Default for TextOptions {
    fn default() -> Self {
        TextOptions { longest_gaps: 5 }
    }
}

/// The readable summary printed by `baton run`.
pub fn render(report: &Report, options: &TextOptions) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{}", report.title);
    let _ = writeln!(
        s,
        "schedule {}, {} stages, {} micro-batches{}, seed {}{}",
        report.schedule,
        report.stages,
        report.micro_batches,
        if report.chunks > 1 { format!(", {} chunks per device", report.chunks) } else { String::new() },
        report.seed,
        if report.jitter > 0.0 { format!(", compute jitter +-{}%", report.jitter * 100.0) } else { String::new() }
    );
    if !report.variability.is_empty() {
        let _ = writeln!(s, "variability: {}", report.variability);
    }
    if let Some(c) = &report.schedule_choice {
        let tried: Vec<String> =
            c.tried.iter().map(|t| format!("{} {}", t.order, format_ns((t.step_ms * 1e6).round() as u64))).collect();
        let _ = writeln!(
            s,
            "zb-auto chose {} (at most {} micro-batches in flight per device; tried {})",
            c.chosen,
            c.max_in_flight,
            tried.join(", ")
        );
        let _ = writeln!(
            s,
            "  the step is {} ({:.1}%) above the busiest device's total work, {}",
            format_ns((c.above_work_ms * 1e6).round() as u64),
            c.above_work_pct,
            format_ns((c.busiest_work_ms * 1e6).round() as u64)
        );
    }
    let replicas = report.parallel.data;
    let tensor = report.parallel.tensor;
    if replicas > 1 || tensor > 1 {
        let sync = report.collectives.iter().find(|c| c.phase != "tied all-reduce").map(|c| c.algorithm);
        let _ = writeln!(
            s,
            "layout {} replica{} x {} stages x {} tensor = {} devices{}{}",
            replicas,
            if replicas == 1 { "" } else { "s" },
            report.parallel.pipeline,
            tensor,
            report.parallel.devices_used,
            sync.map_or(String::new(), |a| format!(", gradients by {a}")),
            if report.parallel.sequence { ", sequence parallel" } else { "" }
        );
    }
    let _ = writeln!(s);
    match &report.steps {
        Some(st) => {
            let _ = writeln!(
                s,
                "step time        {} mean, {} after the first step ({} step{} in {})",
                format_ns((st.mean_ms * 1e6).round() as u64),
                format_ns((st.steady_ms * 1e6).round() as u64),
                st.count,
                if st.count == 1 { "" } else { "s" },
                format_ns(report.step_time_ns),
            );
            steps_lines(&mut s, st);
        }
        None => {
            let _ = writeln!(s, "step time        {}", format_ns(report.step_time_ns));
        }
    }
    let whole = if report.steps.is_some() { "time of the steps" } else { "step time" };
    let _ = writeln!(s, "bubble fraction  {:.2}% (idle / (devices x {whole}))", report.bubble_fraction * 100.0);
    if let Some(st) = &report.steps {
        let _ = writeln!(
            s,
            "throughput       {:.2} samples/s ({} steps x global batch {} / time of the steps)",
            report.samples_per_s, st.count, report.global_batch
        );
    } else if replicas > 1 {
        let _ = writeln!(
            s,
            "throughput       {:.2} samples/s (global batch {} = {} replicas x {} micro-batches x {} samples, / step time)",
            report.samples_per_s, report.global_batch, replicas, report.micro_batches, report.micro_batch_size
        );
    } else {
        let _ = writeln!(
            s,
            "throughput       {:.2} samples/s ({} micro-batches x {} samples / step time)",
            report.samples_per_s, report.micro_batches, report.micro_batch_size
        );
    }
    if let Some(mfu) = report.mfu {
        let _ = writeln!(s, "MFU              {:.2}% (model FLOPs per second / (devices x peak))", mfu * 100.0);
    }
    let synced = !report.collectives.is_empty();
    let tensor_note =
        if tensor > 1 { format!(", {} tensor all-reduce transfers", report.tensor_transfers) } else { String::new() };
    if synced {
        let sync_transfers: usize = report.sync_transfers;
        let _ = writeln!(
            s,
            "simulated        {} ops, {} transfers, {} collective{} ({} transfers){}",
            report.ops,
            report.transfers,
            report.collectives.len(),
            if report.collectives.len() == 1 { "" } else { "s" },
            sync_transfers,
            tensor_note
        );
        let worst = report.devices.iter().max_by_key(|d| (d.sync_exposed_ns, std::cmp::Reverse(d.device)));
        if let Some(w) = worst {
            let _ = writeln!(
                s,
                "sync exposed     {} at worst (device {}): synchronisation after its last compute op",
                format_ns(w.sync_exposed_ns),
                w.device
            );
        }
    } else {
        let _ = writeln!(s, "simulated        {} ops, {} transfers{}", report.ops, report.transfers, tensor_note);
    }
    let _ = writeln!(s);
    let placed = report.devices.iter().any(|d| d.cluster_device != d.device);
    let _ = writeln!(
        s,
        "{:>6}  {:>12}  {:>12}  {:>8}  {:>16}  {:>25}{}{}{}",
        "device",
        "busy",
        "idle",
        "bubble",
        "peak activations",
        "peak mem / capacity",
        if tensor > 1 { format!("  {:>12}", "tensor comm") } else { String::new() },
        if synced { format!("  {:>12}", "sync exposed") } else { String::new() },
        if placed { "  placed on" } else { "" }
    );
    for d in &report.devices {
        let capacity = d.memory_capacity_bytes.map_or_else(|| "unlimited".to_string(), format_bytes);
        let _ = writeln!(
            s,
            "{:>6}  {:>12}  {:>12}  {:>7.2}%  {:>16}  {:>25}{}{}{}",
            d.device,
            format_ns(d.busy_ns),
            format_ns(d.idle_ns),
            d.bubble_fraction * 100.0,
            d.peak_activations,
            format!("{} / {}", format_bytes(d.peak_memory_bytes), capacity),
            if tensor > 1 {
                format!("  {:>12}", format_ns((d.tensor_comm_ms * 1e6).round() as u64))
            } else {
                String::new()
            },
            if synced { format!("  {:>12}", format_ns(d.sync_exposed_ns)) } else { String::new() },
            if placed {
                if tensor > 1 {
                    format!(
                        "  cluster device {} (replica {}, stage {}, rank {})",
                        d.cluster_device, d.replica, d.stage, d.rank
                    )
                } else if replicas > 1 {
                    format!("  cluster device {} (replica {}, stage {})", d.cluster_device, d.replica, d.stage)
                } else {
                    format!("  cluster device {}", d.cluster_device)
                }
            } else {
                String::new()
            }
        );
        if !d.fits {
            s.pop();
            let _ = writeln!(s, "  OVER CAPACITY");
        }
    }
    if let Some(l) = busiest_link(report) {
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "most utilised link: {} ({:.1}% of the step busy, {} carried, up to {} transfer{} at once)",
            l.name,
            l.utilization * 100.0,
            format_bytes(l.bytes),
            l.peak_concurrent,
            if l.peak_concurrent == 1 { "" } else { "s" }
        );
    }
    let over: Vec<String> = report.over_capacity().iter().map(u32::to_string).collect();
    if !over.is_empty() {
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "memory: device(s) {} exceed their capacity (baton run --strict fails on this)",
            over.join(", ")
        );
    }
    let top = longest_gaps(report, options.longest_gaps);
    if !top.is_empty() {
        let _ = writeln!(s);
        let _ = writeln!(s, "longest idle gaps");
        for g in top {
            let _ = writeln!(
                s,
                "  device {:<3} {:>12} .. {:<12} {:>12}  {:<10} {}",
                g.device,
                format_ns(g.start_ns),
                format_ns(g.end_ns),
                format_ns(g.end_ns - g.start_ns),
                g.cause.as_str(),
                g.detail
            );
        }
    }
    s
}

/// The steps' section: each step's time, and without a flush each stage's
/// weights.
fn steps_lines(s: &mut String, st: &crate::Steps) {
    const SHOWN: usize = 12;
    let mut times: Vec<String> = st.step_ns.iter().take(SHOWN).map(|&n| format_ns(n)).collect();
    if st.step_ns.len() > SHOWN {
        times.push(format!("... ({} more)", st.step_ns.len() - SHOWN));
    }
    let how = if st.flush {
        "a flush between steps".to_string()
    } else {
        format!("no flush, weight versions {}", st.weight_versions)
    };
    let _ = writeln!(s, "steps            {how}: {}", times.join(", "));
    if !st.flush {
        let _ = writeln!(s, "  stage  device  staleness (steps)  weight versions  (distinct)  extra memory");
        for g in &st.stages {
            let _ = writeln!(
                s,
                "  {:>5}  {:>6}  {:>17}  {:>15}  {:>10}  {}",
                g.stage,
                g.device,
                g.staleness_steps,
                g.weight_versions,
                format!("({})", g.distinct_versions),
                format_bytes(g.extra_bytes)
            );
        }
    }
}
