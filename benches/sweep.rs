//! Sweep speed: 1,000 points of an 8-stage, 64-micro-batch scenario on all
//! cores, the scenario parsed once (each point only applies its overrides to
//! the parsed tree). The points differ by the seed of a 5% compute jitter, so
//! every one is a distinct simulation (`scenarios/sweep-p8-m64.yaml`, which
//! also shows the same sweep as a whole `baton sweep` process). Run with
//! `cargo bench --bench sweep`.

use std::time::Duration;

use baton::scenario::Document;
use baton::sweep::{self, Grid};
use criterion::{criterion_group, criterion_main, Criterion, Throughput};

const SCENARIO: &str = include_str!("scenarios/sweep-p8-m64.yaml");

fn bench(c: &mut Criterion) {
    let doc = Document::from_text(SCENARIO, "bench.yaml", "bench", std::path::Path::new("")).expect("valid scenario");
    let grid = Grid::new(vec![sweep::parse_vary("seed=1..1000").expect("valid --vary")]).expect("valid grid");
    let indices: Vec<usize> = (0..grid.len()).collect();
    let pool = rayon::ThreadPoolBuilder::new().build().expect("thread pool");
    let mut group = c.benchmark_group("sweep");
    group.sample_size(10).measurement_time(Duration::from_secs(10)).warm_up_time(Duration::from_secs(1));
    group.throughput(Throughput::Elements(grid.len() as u64));
    group.bench_function("1000-points-p8-m64-all-cores", |b| {
        b.iter(|| {
            let points =
                pool.install(|| sweep::run(&doc, &[], &grid, &indices, baton::DEFAULT_MAX_MEMORY_BYTES, &|| {}));
            assert!(points.iter().all(|p| p.result.is_ok()));
            points
        })
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
