//! `baton run --what-if layers` on 16 stages of 4 layers (64 layers, m =
//! 64, `benches/scenarios/whatif-p16.yaml`): 16 stage, 64 layer and 30 link
//! re-simulations, on the rayon pool. Run with `cargo bench --bench whatif`.

use std::path::Path;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, Criterion};

fn whatif(c: &mut Criterion) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/scenarios/whatif-p16.yaml");
    let s = baton::scenario::load(&path, &[]).expect("bench scenario is valid");
    let base = baton::simulate(&s).expect("simulates");
    let mut group = c.benchmark_group("whatif");
    group.sample_size(10).measurement_time(Duration::from_secs(6)).warm_up_time(Duration::from_secs(1));
    group.bench_function("layers-p16-l64-m64", |b| {
        b.iter(|| baton::whatif::analyse(&s, &base, 0.9, baton::whatif::Scope::Layers).expect("re-simulates"))
    });
    group.finish();
}

criterion_group!(benches, whatif);
criterion_main!(benches);
