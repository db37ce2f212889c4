//! Data-parallel speed: 64 replicas x 8 stages (512 devices, 64 nodes of 8,
//! one card per node), m = 32, gradients synchronised in 4 buckets per piece
//! (`scenarios/replicas-64x8.yaml`): about 290k transfers with `ring`, 86k
//! with `hierarchical`. Elements = transfers (the pipeline's and the
//! collectives'); each collective transfer starts when the data it carries
//! has arrived at its sender and shares the cards with everything else.
//!
//! `tensor`: 8 stages of 8-device tensor groups, 80 transformer layers, m =
//! 64 (`scenarios/tensor-t8-p8.yaml`): every layer does four ring
//! all-reduces among its group per micro-batch, about 2.3 million transfers.
//!
//! Run with `cargo bench --bench replicas`.

use std::time::Duration;

use baton::scenario::{parse, Scenario};
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};

const SCENARIO: &str = include_str!("scenarios/replicas-64x8.yaml");

fn scenario(sync: &str) -> Scenario {
    let sets = [format!("gradients.sync={sync}")];
    parse(SCENARIO, "replicas-64x8.yaml", "bench", &sets).expect("bench scenario is valid")
}

fn replicas(c: &mut Criterion) {
    let mut group = c.benchmark_group("replicas");
    group.sample_size(10).measurement_time(Duration::from_secs(10)).warm_up_time(Duration::from_secs(1));
    for sync in ["ring", "hierarchical"] {
        let s = scenario(sync);
        let probe = baton::simulate(&s).expect("simulates");
        let transfers = probe.report.transfers + probe.report.sync_transfers;
        group.throughput(Throughput::Elements(transfers as u64));
        // The simulation itself: engine, executor, collectives and network.
        let plan = baton::schedule::build(s.pipeline.schedule, s.shape()).expect("plan");
        let costs = baton::stage_costs(&s);
        let sync_config = baton::sync_config(&s);
        group.bench_with_input(BenchmarkId::new("simulate-64x8-m32", sync), &s, |b, s| {
            b.iter(|| {
                baton::executor::simulate_step(
                    plan.clone(),
                    &costs,
                    baton::topology(s),
                    Default::default(),
                    sync_config.as_ref(),
                )
                .expect("simulates")
            })
        });
        // The same plus the plan and the report, as `baton run` does.
        group.bench_with_input(BenchmarkId::new("run-64x8-m32", sync), &s, |b, s| {
            b.iter(|| baton::simulate(s).expect("simulates"))
        });
    }
    group.finish();
}

fn tensor(c: &mut Criterion) {
    let mut group = c.benchmark_group("tensor");
    group.sample_size(10).measurement_time(Duration::from_secs(15)).warm_up_time(Duration::from_secs(1));
    let s = parse(include_str!("scenarios/tensor-t8-p8.yaml"), "tensor-t8-p8.yaml", "bench", &[])
        .expect("bench scenario is valid");
    let probe = baton::simulate(&s).expect("simulates");
    let r = &probe.report;
    group.throughput(Throughput::Elements((r.transfers + r.sync_transfers + r.tensor_transfers) as u64));
    let plan = baton::schedule::build(s.pipeline.schedule, s.shape()).expect("plan");
    let costs = baton::stage_costs(&s);
    let (sync, tensor) = (baton::sync_config(&s), baton::tensor_config(&s));
    group.bench_function("simulate-t8-p8-m64", |b| {
        b.iter(|| {
            baton::executor::simulate_parallel(
                plan.clone(),
                &costs,
                baton::topology(&s),
                Default::default(),
                sync.as_ref(),
                tensor.as_ref(),
            )
            .expect("simulates")
        })
    });
    group.finish();
}

criterion_group!(benches, replicas, tensor);
criterion_main!(benches);
