//! Extraction throughput: `Analyzer::vectorize` (MIME walk, charsets, HTML, normalization,
//! hashed n-grams) over the invented demo corpus, held in memory.
//!
//! Two views of the same work: bytes of raw mail per second, which is how relay capacity is
//! planned, and messages per second, which is how queue latency is felt. The corpus is
//! invented demonstration data; it stands in for the size and MIME variety of real mail, not
//! for its content.

use std::hint::black_box;

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use tamis::analyze::Analyzer;

/// Large enough to cover every MIME shape and charset the generator writes many times over.
const MESSAGES: usize = 2000;
const SEED: u64 = 7;

fn corpus() -> Vec<Vec<u8>> {
    tamis::demo::generate(SEED, MESSAGES)
        .map(|m| m.bytes)
        .collect()
}

/// One pass over the corpus; the sum of non-zeros keeps the work observable.
fn pass(analyzer: &mut Analyzer, corpus: &[Vec<u8>]) -> usize {
    let mut nnz = 0;
    for raw in corpus {
        // A message the extractor refuses still cost its parse; count it and move on.
        if let Ok(v) = analyzer.vectorize(black_box(raw)) {
            nnz += v.nnz();
        }
    }
    nnz
}

fn bench_bytes(c: &mut Criterion) {
    let corpus = corpus();
    let total: u64 = corpus.iter().map(|m| m.len() as u64).sum();
    let mut analyzer = Analyzer::default();
    // Warm the reusable buffers so the measurement sees the steady state of a daemon.
    black_box(pass(&mut analyzer, &corpus));
    let mut group = c.benchmark_group("vectorize_bytes");
    group.throughput(Throughput::Bytes(total));
    group.sample_size(20);
    group.bench_function("demo_corpus", |b| {
        b.iter(|| black_box(pass(&mut analyzer, &corpus)))
    });
    group.finish();
}

fn bench_messages(c: &mut Criterion) {
    let corpus = corpus();
    let mut analyzer = Analyzer::default();
    black_box(pass(&mut analyzer, &corpus));
    let mut group = c.benchmark_group("vectorize_messages");
    group.throughput(Throughput::Elements(corpus.len() as u64));
    group.sample_size(20);
    group.bench_function("demo_corpus", |b| {
        b.iter(|| black_box(pass(&mut analyzer, &corpus)))
    });
    group.finish();
}

criterion_group!(benches, bench_bytes, bench_messages);
criterion_main!(benches);
