//! Simulation speed: simulated operations plus transfers per second.
//!
//! The headline case is interleaved 1F1B with p = 32 devices, v = 4 chunks and
//! m = 2048 micro-batches: 2 x 32 x 4 x 2048 = 524,288 operations and about as
//! many transfers. A family of smaller cases shows how the cost scales (it
//! should be linear in operations). Run with `cargo bench --bench simulate`.

use std::time::Duration;

use baton::scenario::{parse, Scenario};
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};

fn scenario(p: u32, v: u32, m: u32, schedule: &str) -> Scenario {
    let text = format!(
        "title: bench\nmodel:\n  layers:\n    - {{ name: block, repeat: {}, forward: 1ms, backward: 2ms, activation: 16MiB }}\n\
         cluster:\n  devices: {p}\n  link: {{ latency: 5us, bandwidth: 64GB/s }}\n\
         pipeline:\n  stages: {p}\n  split: even\n  micro_batches: {m}\n  schedule: {schedule}\n  chunks: {v}\n",
        p * v
    );
    parse(&text, "bench.yaml", "bench", &[]).expect("bench scenario is valid")
}

fn simulate(c: &mut Criterion) {
    let mut group = c.benchmark_group("simulate");
    group.sample_size(10).measurement_time(Duration::from_secs(8)).warm_up_time(Duration::from_secs(1));
    let cases = [
        (4, 1, 64, "1f1b"),
        (8, 1, 512, "1f1b"),
        (8, 2, 512, "interleaved"),
        (16, 4, 512, "interleaved"),
        (32, 4, 2048, "interleaved"),
    ];
    for (p, v, m, schedule) in cases {
        let s = scenario(p, v, m, schedule);
        let probe = baton::simulate(&s).expect("simulates");
        let work = (probe.report.ops + probe.report.transfers) as u64;
        group.throughput(Throughput::Elements(work));
        let id = BenchmarkId::new(schedule, format!("p{p}-v{v}-m{m}"));
        group.bench_with_input(id, &s, |b, s| b.iter(|| baton::simulate(s).expect("simulates")));
    }
    group.finish();
}

criterion_group!(benches, simulate);
criterion_main!(benches);
