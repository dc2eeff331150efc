//! Threshold selection on a million labelled items, as `candor fit` runs it after calibrating the
//! certification rows: SGR and fixed-sequence testing (the default grid with its start rule),
//! both per class, the coverage target, and the sample-size estimate printed when nothing can be
//! certified.
//!
//! Target (issue: certified acceptance thresholds): threshold selection on 1,000,000 labelled
//! items in under 2 s, for both procedures.

use candor::decision::certify::{
    coverage_target, default_grid, default_min_accepted, fixed_sequence_skipping, items_needed,
    per_class, sgr, Method, Procedure,
};
use criterion::{criterion_group, criterion_main, Criterion};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use std::hint::black_box;
use std::time::Duration;

const ITEMS: usize = 1_000_000;
/// Classes of the per-class cases (predicted class drawn uniformly).
const CLASSES: u32 = 10;
/// Target accuracy 0.9 (r* = 0.1) at 95% confidence, as in `candor fit --target-accuracy 0.9`.
const TARGET_RISK: f64 = 0.1;
const DELTA: f64 = 0.05;

/// Calibrated confidences κ ~ Uniform(0.5, 1) with P(correct | κ) = κ, and a predicted class.
fn data() -> (Vec<f64>, Vec<bool>, Vec<u32>) {
    let mut rng = ChaCha8Rng::seed_from_u64(51);
    let mut out = (
        Vec::with_capacity(ITEMS),
        Vec::with_capacity(ITEMS),
        Vec::with_capacity(ITEMS),
    );
    for _ in 0..ITEMS {
        let kappa = 0.5 + 0.5 * rng.random::<f64>();
        out.0.push(kappa);
        out.1.push(rng.random::<f64>() < kappa);
        out.2.push(rng.random_range(0..CLASSES));
    }
    out
}

fn bench(c: &mut Criterion) {
    let (conf, correct, predicted) = data();
    let grid = default_grid();
    let min_accepted = default_min_accepted(TARGET_RISK, DELTA).expect("valid levels");
    let mut group = c.benchmark_group("threshold_selection_1m");
    group.sample_size(10);
    group.measurement_time(Duration::from_secs(10));
    group.bench_function("sgr", |b| {
        b.iter(|| black_box(sgr(&conf, &correct, TARGET_RISK, DELTA).expect("runs")))
    });
    group.bench_function("fixed_sequence", |b| {
        b.iter(|| {
            let cert =
                fixed_sequence_skipping(&conf, &correct, &grid, min_accepted, TARGET_RISK, DELTA);
            black_box(cert.expect("runs"))
        })
    });
    let methods = [
        ("per_class_sgr", Method::Sgr),
        (
            "per_class_fixed_sequence",
            Method::FixedSequence {
                grid: &grid,
                min_accepted,
            },
        ),
    ];
    for (name, method) in methods {
        group.bench_function(name, |b| {
            b.iter(|| {
                let cert = per_class(
                    &conf,
                    &correct,
                    &predicted,
                    CLASSES,
                    method,
                    TARGET_RISK,
                    DELTA,
                );
                black_box(cert.expect("runs"))
            })
        });
    }
    group.bench_function("coverage_target", |b| {
        b.iter(|| black_box(coverage_target(&conf, Some(&correct), 0.5, DELTA).expect("runs")))
    });
    group.bench_function("items_needed", |b| {
        b.iter(|| {
            black_box(items_needed(&conf, &correct, 0.01, DELTA, Procedure::Sgr).expect("runs"))
        })
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
