//! Simulation speed of the schedules that split the backward pass, against
//! 1F1B on the same pipeline: simulated operations plus transfers per second.
//!
//! p = 16 devices, m = 512 micro-batches, one chunk each: 1F1B runs
//! 2 x 16 x 512 = 16,384 operations, the split schedules 24,576, all with
//! 2 x 15 x 512 = 15,360 transfers. `custom` plays ZB-H1's order read back
//! from its text; `zb-auto` builds its candidate orders and plays each, so
//! its throughput counts the operations and transfers of every order it
//! played. Run with `cargo bench --bench schedules`.

use std::time::Duration;

use baton::scenario::{parse_in, Scenario};
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};

fn scenario(dir: &std::path::Path, schedule: &str, extra: &str) -> Scenario {
    let text = format!(
        "title: bench\nmodel:\n  layers:\n    - {{ name: block, repeat: 32, forward: 1ms, backward: 2ms, weight: 1ms, activation: 16MiB }}\n\
         cluster:\n  devices: 16\n  link: {{ latency: 5us, bandwidth: 64GB/s }}\n\
         pipeline:\n  stages: 16\n  micro_batches: 512\n  schedule: {schedule}\n{extra}"
    );
    parse_in(&text, "bench.yaml", "bench", dir, &[]).expect("bench scenario is valid")
}

fn schedules(c: &mut Criterion) {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let h1 = scenario(dir.path(), "zb-h1", "");
    let order = baton::schedule::order_text(&baton::fixed_plan(&h1).expect("builds"));
    std::fs::write(dir.path().join("zb-h1.order"), order).expect("writes the order");
    let mut group = c.benchmark_group("schedules");
    group.sample_size(10).measurement_time(Duration::from_secs(6)).warm_up_time(Duration::from_secs(1));
    let cases = [("1f1b", ""), ("zb-h1", ""), ("zb-h2", ""), ("custom", "  order: zb-h1.order\n"), ("zb-auto", "")];
    for (schedule, extra) in cases {
        let s = scenario(dir.path(), schedule, extra);
        let probe = baton::simulate(&s).expect("simulates");
        let orders = probe.report.schedule_choice.as_ref().map_or(1, |c| c.tried.len() as u64);
        let work = (probe.report.ops + probe.report.transfers) as u64 * orders;
        group.throughput(Throughput::Elements(work));
        let id = BenchmarkId::new(schedule, "p16-m512");
        group.bench_with_input(id, &s, |b, s| b.iter(|| baton::simulate(s).expect("simulates")));
    }
    group.finish();
}

criterion_group!(benches, schedules);
criterion_main!(benches);
