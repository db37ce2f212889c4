//! Link contention speed: 64 devices on 8 nodes (one network card each),
//! 1F1B over 64 stages with m = 1024 micro-batches and `spread` placement,
//! so every one of the ~129k transfers crosses two node cards shared by the
//! eight devices of a node. Elements = transfers; each start and each finish
//! re-rates the transfers it shares links with.
//!
//! How the cost grows: a settle (one per simulated instant in which transfers
//! start or finish) walks only the component of transfers connected to the
//! changed links through links that can limit them, and water-fills it:
//! `O(rounds x links in the component + sum of route lengths)`, where rounds is
//! at most the number of distinct bottleneck links; it then scans the
//! transfers in flight once for the earliest completion. So it grows with the
//! number of concurrent transfers (and the links they cross), never with the
//! number of links in the topology. Device links that cannot limit their
//! transfers (capacity at least the sum of what those transfers could get
//! through the cards) are left out, so a component here is a few cards and
//! the transfers on them.
//!
//! Run with `cargo bench --bench topology`.

use std::time::Duration;

use baton::scenario::{parse, Scenario};
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};

fn scenario(activation: &str) -> Scenario {
    let text = format!(
        "title: contention bench\nmodel:\n  layers:\n    - {{ name: block, repeat: 64, forward: 1ms, backward: 2ms, activation: {activation} }}\n\
         cluster:\n  nodes: 8\n  devices_per_node: 8\n  device_link: {{ latency: 2us, bandwidth: 150GB/s }}\n\
         \x20 node_link: {{ latency: 6us, bandwidth: 25GB/s, count: 1 }}\n\
         placement: spread\n\
         pipeline:\n  stages: 64\n  split: even\n  micro_batches: 1024\n  schedule: 1f1b\n"
    );
    parse(&text, "bench.yaml", "bench", &[]).expect("bench scenario is valid")
}

fn contention(c: &mut Criterion) {
    let mut group = c.benchmark_group("contention");
    group.sample_size(10).measurement_time(Duration::from_secs(10)).warm_up_time(Duration::from_secs(1));
    // 4 MiB keeps the cards 67-72% busy with up to 13 transfers sharing one;
    // 16 MiB oversubscribes them (busy 95-97% of the step, up to 50 at once).
    for activation in ["4MiB", "16MiB"] {
        let s = scenario(activation);
        let probe = baton::simulate(&s).expect("simulates");
        group.throughput(Throughput::Elements(probe.report.transfers as u64));
        // The simulation itself: engine, executor and link network.
        let plan = baton::schedule::build(s.pipeline.schedule, s.shape()).expect("plan");
        let costs = baton::stage_costs(&s);
        group.bench_with_input(BenchmarkId::new("simulate-p64-8-nodes-spread-m1024", activation), &s, |b, s| {
            b.iter(|| baton::executor::simulate(plan.clone(), &costs, baton::topology(s)).expect("simulates"))
        });
        // The same plus building the plan and the report, as `baton run` does.
        group.bench_with_input(BenchmarkId::new("run-p64-8-nodes-spread-m1024", activation), &s, |b, s| {
            b.iter(|| baton::simulate(s).expect("simulates"))
        });
    }
    group.finish();
}

criterion_group!(benches, contention);
criterion_main!(benches);
