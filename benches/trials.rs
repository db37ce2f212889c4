//! `baton run --trials 1000` on the unbalanced demo with 5% compute jitter:
//! 1,000 simulations of the step (seeds 1 to 1000) on the rayon pool. Run
//! with `cargo bench --bench trials`.

use std::path::Path;
use std::time::Duration;

use criterion::{criterion_group, criterion_main, Criterion};

fn trials(c: &mut Criterion) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/unbalanced-split.yaml");
    let s = baton::scenario::load(&path, &["cluster.jitter=0.05".to_string()]).expect("demo scenario is valid");
    let mut group = c.benchmark_group("trials");
    group.sample_size(10).measurement_time(Duration::from_secs(6)).warm_up_time(Duration::from_secs(1));
    group.bench_function("unbalanced-demo-1000", |b| b.iter(|| baton::trials::run(&s, 1000).expect("simulates")));
    group.finish();
}

criterion_group!(benches, trials);
criterion_main!(benches);
