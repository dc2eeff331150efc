//! The reviewer's report on a million labelled items: applying the map, evaluating both sets of
//! probabilities (with the default bootstrap for that many items), applying the policy, drawing
//! the charts and laying out the page — everything `candor report` does after reading its
//! input.
//!
//! Target (issue: the reviewer's report): 1,000,000 rows in under 10 s.

use candor::cli::inputs::{calibrate, uncalibrated};
use candor::dataset::{LabelledSet, Logits};
use candor::eval::{BootstrapConfig, DEFAULT_LEVEL};
use candor::mapfile::CalibrationMap;
use candor::report::{
    assemble, render_html, replicates_for, DataIdentity, ReportInput, ReportSettings,
    DEFAULT_REPORT_BINS,
};
use criterion::{criterion_group, criterion_main, Criterion};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use std::hint::black_box;
use std::path::Path;
use std::time::Duration;

const ROWS: usize = 1_000_000;
const CLASSES: usize = 6;

/// Overconfident logits like the demo's: N(0, 2.5²) noise, the true class lifted by 2, all ×3.
fn data(rows: usize) -> LabelledSet {
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let normal = Normal::new(0.0f32, 2.5).expect("valid normal");
    let mut logits = Vec::with_capacity(rows * CLASSES);
    let mut labels = Vec::with_capacity(rows);
    for _ in 0..rows {
        let y = rng.random_range(0..CLASSES);
        for k in 0..CLASSES {
            let lift = if k == y { 2.0 } else { 0.0 };
            logits.push(3.0 * (normal.sample(&mut rng) + lift));
        }
        labels.push(y as u32);
    }
    LabelledSet::try_new(Logits::F32(logits), CLASSES, Some(labels)).expect("valid set")
}

/// The whole report for `set`, with `replicates` bootstrap replicates (0 = none); returns the
/// page's length.
fn report(map: &CalibrationMap, set: &LabelledSet, replicates: usize) -> usize {
    let calibrated = calibrate(map, set).expect("shapes match");
    let before = uncalibrated(set);
    let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
    let bootstrap = (replicates > 0).then(|| {
        BootstrapConfig::try_new(replicates, DEFAULT_LEVEL, 0)
            .expect("valid bootstrap")
            .with_threads(threads)
    });
    let settings = ReportSettings::try_new(DEFAULT_REPORT_BINS, bootstrap).expect("valid bins");
    let data = DataIdentity {
        source: "bench".into(),
        digest: "0".repeat(64),
    };
    let input = ReportInput {
        map,
        uncalibrated: &before,
        calibrated: &calibrated,
        labels: set.labels().expect("labelled"),
        data: &data,
    };
    let built = assemble(&input, &settings).expect("report assembles");
    render_html(&built).expect("report renders").len()
}

fn bench(c: &mut Criterion) {
    let map_path = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/maps/letter-sorter.json");
    let map = CalibrationMap::load(&map_path).expect("demo map is valid");
    let set = data(ROWS);
    let default_replicates = replicates_for(ROWS, None);
    let mut group = c.benchmark_group("report");
    group.sample_size(10);
    group.measurement_time(Duration::from_secs(60));
    group.bench_function("1m_rows_default_bootstrap", |b| {
        b.iter(|| black_box(report(&map, &set, default_replicates)))
    });
    group.bench_function("1m_rows_no_bootstrap", |b| {
        b.iter(|| black_box(report(&map, &set, 0)))
    });
    group.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
