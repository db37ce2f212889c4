//! How far the simulation is from the floor: baton's `simulate` against a
//! one-pass computation of the same start and end times in dependency order
//! (no event queue, no link network), on the latency-only headline case:
//! interleaved 1F1B, p = 32, v = 4, m = 2048, where no two transfers ever
//! share a link, so each takes its latency plus its bytes at the link's
//! bandwidth. Both give the same step time to the nanosecond (checked before
//! timing). Besides criterion's figures, prints the ratio baton / floor
//! measured in one run. Run with `cargo bench --bench floor`.

use std::time::{Duration, Instant};

use baton::executor::StageCost;
use baton::scenario::{parse, Scenario};
use baton::schedule::Plan;
use criterion::{criterion_group, criterion_main, Criterion, Throughput};

fn scenario(p: u32, v: u32, m: u32) -> Scenario {
    let text = format!(
        "title: floor\nmodel:\n  layers:\n    - {{ name: block, repeat: {}, forward: 1ms, backward: 2ms, activation: 16MiB }}\n\
         cluster:\n  devices: {p}\n  link: {{ latency: 5us, bandwidth: 64GB/s }}\n\
         pipeline:\n  stages: {p}\n  split: even\n  micro_batches: {m}\n  schedule: interleaved\n  chunks: {v}\n",
        p * v
    );
    parse(&text, "floor.yaml", "floor", &[]).expect("bench scenario is valid")
}

const NOT_YET: u64 = u64::MAX;
const NOBODY: u32 = u32::MAX;

/// Every op's end in dependency order: a device runs its next op as soon as
/// it is free and the op's inputs have arrived (a transfer to another device
/// takes `latency_ns` plus its bytes at `bytes_per_s`, rounded up); a device
/// blocked on an input waits on that input's slot and is run again when it
/// ends. Returns the step time.
fn floor(plan: &Plan, costs: &[StageCost], latency_ns: u64, bytes_per_s: u64) -> u64 {
    let shape = plan.shape;
    let p = shape.stages as usize;
    let mut end = vec![NOT_YET; shape.op_slots()];
    let mut waiter = vec![NOBODY; shape.op_slots()];
    let mut free = vec![0u64; p];
    let mut next = vec![0usize; p];
    let mut ready: Vec<usize> = (0..p).collect();
    let transfer = |bytes: u64| latency_ns + (bytes as u128 * 1_000_000_000).div_ceil(bytes_per_s as u128) as u64;
    let mut step = 0;
    while let Some(d) = ready.pop() {
        while let Some(&op) = plan.per_device[d].get(next[d]) {
            let mut at = free[d];
            let mut blocked = None;
            op.each_input(&shape, |e| {
                let slot = shape.op_index(e.op);
                let done = end[slot];
                if done == NOT_YET {
                    blocked = Some(slot);
                    return;
                }
                let moved = e.flow.crosses_stages() && shape.device_of(e.op.stage) as usize != d;
                let bytes = costs[e.op.stage.min(op.stage) as usize].send_bytes;
                at = at.max(if moved { done + transfer(bytes) } else { done });
            });
            if let Some(slot) = blocked {
                waiter[slot] = d as u32;
                break;
            }
            let finish = at + costs[op.stage as usize].time(op.kind).as_ns();
            let slot = shape.op_index(op);
            end[slot] = finish;
            free[d] = finish;
            step = step.max(finish);
            next[d] += 1;
            let w = std::mem::replace(&mut waiter[slot], NOBODY);
            if w != NOBODY {
                ready.push(w as usize);
            }
        }
    }
    debug_assert!(next.iter().enumerate().all(|(d, &n)| n == plan.per_device[d].len()));
    step
}

fn inputs(s: &Scenario) -> (Plan, Vec<StageCost>) {
    (baton::fixed_plan(s).expect("plan"), baton::stage_costs(s))
}

fn bench(c: &mut Criterion) {
    let s = scenario(32, 4, 2048);
    let (plan, costs) = inputs(&s);
    let run = baton::simulate(&s).expect("simulates");
    let work = (run.report.ops + run.report.transfers) as u64;
    assert_eq!(
        floor(&plan, &costs, 5_000, 64_000_000_000),
        run.report.step_time_ns,
        "the floor computes the same step"
    );
    // The ratio in one run: alternate the two, best of each.
    let (mut best_floor, mut best_baton) = (Duration::MAX, Duration::MAX);
    for _ in 0..5 {
        let t = Instant::now();
        std::hint::black_box(floor(&plan, &costs, 5_000, 64_000_000_000));
        best_floor = best_floor.min(t.elapsed());
        let t = Instant::now();
        std::hint::black_box(baton::simulate(&s).expect("simulates"));
        best_baton = best_baton.min(t.elapsed());
    }
    eprintln!(
        "floor: {work} ops+transfers; one pass {:.1} ms ({:.1} ns each), baton {:.1} ms ({:.1} ns each): baton / floor = {:.1}",
        best_floor.as_secs_f64() * 1e3,
        best_floor.as_secs_f64() * 1e9 / work as f64,
        best_baton.as_secs_f64() * 1e3,
        best_baton.as_secs_f64() * 1e9 / work as f64,
        best_baton.as_secs_f64() / best_floor.as_secs_f64()
    );
    let mut group = c.benchmark_group("floor");
    group.sample_size(10).measurement_time(Duration::from_secs(8)).warm_up_time(Duration::from_secs(1));
    group.throughput(Throughput::Elements(work));
    group.bench_function("one-pass p32-v4-m2048", |b| {
        b.iter(|| floor(std::hint::black_box(&plan), &costs, 5_000, 64_000_000_000))
    });
    group.bench_function("baton p32-v4-m2048", |b| b.iter(|| baton::simulate(&s).expect("simulates")));
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
