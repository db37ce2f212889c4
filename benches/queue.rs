//! Which queue holds the engine's fixed events: std `BinaryHeap` or the
//! `priority-queue` crate? Both are driven through a hold pattern (pop the
//! earliest, push one later) at the queue sizes a pipeline simulation sees
//! (one pending event per device and per transfer in flight: tens to
//! thousands). The engine keeps the faster one for fixed events and uses
//! `priority-queue` only where a queued time must move (transfer completions).

use std::cmp::Reverse;
use std::collections::BinaryHeap;

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use priority_queue::PriorityQueue;

fn hold(c: &mut Criterion) {
    let mut group = c.benchmark_group("queue-hold");
    for size in [16usize, 128, 1024] {
        group.throughput(Throughput::Elements(1));
        group.bench_with_input(BenchmarkId::new("std-binary-heap", size), &size, |b, &n| {
            let mut q: BinaryHeap<Reverse<(u64, u64)>> = (0..n as u64).map(|i| Reverse((i * 7919 % 1000, i))).collect();
            let mut seq = n as u64;
            b.iter(|| {
                let Reverse((t, _)) = q.pop().unwrap();
                seq += 1;
                q.push(Reverse((t + 1 + seq % 97, seq)));
            })
        });
        group.bench_with_input(BenchmarkId::new("priority-queue", size), &size, |b, &n| {
            let mut q: PriorityQueue<u64, Reverse<(u64, u64)>> = PriorityQueue::new();
            for i in 0..n as u64 {
                q.push(i, Reverse((i * 7919 % 1000, i)));
            }
            let mut seq = n as u64;
            b.iter(|| {
                let (k, Reverse((t, _))) = q.pop().unwrap();
                seq += 1;
                q.push(k, Reverse((t + 1 + seq % 97, seq)));
            })
        });
    }
    group.finish();
}

criterion_group!(benches, hold);
criterion_main!(benches);
