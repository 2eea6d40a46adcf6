//! Loading a 2^22-weight model: `load_model` (read, checksum, decode, validate) against the
//! baseline of merely reading the same file's bytes, in the same run. The ratio says what
//! the format costs beyond I/O.

use criterion::{Criterion, criterion_group, criterion_main};
use tamis::features::FeatureSpec;
use tamis::model::file::{load_model, save_model};
use tamis::model::{LinearModel, TrainingSummary};

fn bench(c: &mut Criterion) {
    let spec = FeatureSpec {
        hash_bits: 22,
        ..FeatureSpec::default()
    };
    let weights: Vec<f32> = (0..spec.dimensions())
        .map(|i| (i % 1000) as f32 / 1e3)
        .collect();
    let model = LinearModel::new(spec, weights, 0.1, None, None, TrainingSummary::default())
        .expect("valid model");
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("big.tamis");
    save_model(&model, &path).expect("save");
    let mut group = c.benchmark_group("model_load_2^22");
    group.bench_function("read bytes only (baseline)", |b| {
        b.iter(|| std::fs::read(&path).expect("read"))
    });
    group.bench_function("load_model", |b| {
        b.iter(|| load_model(&path).expect("load"))
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
