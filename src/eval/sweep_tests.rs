//! The sweep engine against the weighted engine of `replicate.rs` (itself tested against the
//! expanded resampled sample and the single-metric functions): the same counts must give the
//! same metrics, whatever the chunk length, block width, thread count and ties.

use super::super::fixtures::{RANDOM_LABELS, RANDOM_PROBS};
use super::super::multinomial::{ChunkCounts, ChunkedMultinomial};
use super::super::replicate::Prepared;
use super::super::{percentile_interval, standard_report, BootstrapConfig};
use super::*;
use proptest::prelude::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Largest difference allowed between the two engines: they sum the same terms in different
/// orders (sweep order vs input order), so they agree to rounding.
const ENGINE_TOLERANCE: f64 = 1e-12;

/// Chosen counts per replicate, over sweep positions, served in chunks of `chunk`.
struct Given {
    counts: Vec<Vec<u32>>,
    chunk: usize,
}

impl ChunkCounts for Given {
    fn chunk_len(&self) -> usize {
        self.chunk
    }
    fn totals(&self, r: usize) -> Vec<u64> {
        let sum = |c: &[u32]| c.iter().map(|&w| u64::from(w)).sum();
        self.counts[r].chunks(self.chunk).map(sum).collect()
    }
    fn fill(&self, r: usize, c: usize, _total: u64, add: &mut dyn FnMut(usize)) {
        let part = self.counts[r].chunks(self.chunk).nth(c).unwrap_or(&[]);
        for (j, &w) in part.iter().enumerate() {
            (0..w).for_each(|_| add(j));
        }
    }
}

/// Counts of replicate r of `source`, moved from sweep positions to item indices.
fn by_item(sweep: &Sweep<'_, '_>, source: &dyn ChunkCounts, r: usize) -> Vec<u32> {
    let mut w = vec![0u32; sweep.item.len()];
    for (c, &t) in source.totals(r).iter().enumerate() {
        let base = c * source.chunk_len();
        source.fill(r, c, t, &mut |j| w[sweep.item[base + j]] += 1);
    }
    w
}

fn metrics_close(got: &StandardMetrics, want: &StandardMetrics) -> Result<(), String> {
    let pairs = [
        ("accuracy", got.accuracy, want.accuracy),
        ("ece", got.ece, want.ece),
        ("adaptive_ece", got.adaptive_ece, want.adaptive_ece),
        ("mce", got.mce, want.mce),
        ("classwise_ece", got.classwise_ece, want.classwise_ece),
        ("nll", got.nll, want.nll),
        ("brier", got.brier, want.brier),
        ("aurc", got.aurc, want.aurc),
        ("coverage", got.coverage, want.coverage),
        (
            "accepted_accuracy",
            got.accepted_accuracy.unwrap_or(-1.0),
            want.accepted_accuracy.unwrap_or(-1.0),
        ),
    ];
    for (name, g, w) in pairs {
        if (g - w).abs() > ENGINE_TOLERANCE * w.abs().max(1.0) {
            return Err(format!("{name}: sweep {g}, weighted engine {w}"));
        }
    }
    Ok(())
}

/// Every replicate of `source` through both engines.
fn compare(
    p: &Predictions<'_>,
    settings: &StandardSettings,
    source: &dyn ChunkCounts,
    reps: usize,
) {
    let mut sweep = Sweep::new(p, settings);
    let prepared = Prepared::new(p, settings);
    for threads in [1, 2, 0] {
        if threads == 0 {
            // Rows read in place, as for sets above MAX_SORTED_VALUES.
            sweep.rows = Vec::new();
        }
        let got = sweep.run(source, reps, threads).unwrap();
        assert_eq!(got.len(), reps);
        for (r, g) in got.iter().enumerate() {
            let want = prepared.evaluate(&by_item(&sweep, source, r), &mut Vec::new());
            if let Err(e) = metrics_close(g, &want) {
                panic!("replicate {r}, {threads} threads: {e}");
            }
        }
    }
}

/// n items over `distinct` confidence levels (long runs of ties when `distinct` is small) with
/// K = 3 probabilities, and labels right about 70% of the time.
fn tied_set(n: usize, distinct: u32, seed: u64) -> (Vec<f64>, Vec<u32>) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let (mut probs, mut labels) = (Vec::with_capacity(3 * n), Vec::with_capacity(n));
    for _ in 0..n {
        let top = 0.4 + 0.5 * f64::from(rng.random_range(0..distinct)) / f64::from(distinct);
        let k = rng.random_range(0..3u32);
        let rest = (1.0 - top) / 2.0;
        probs.extend((0..3).map(|j| if j == k { top } else { rest }));
        let right = rng.random_bool(0.7);
        labels.push(if right { k } else { (k + 1) % 3 });
    }
    (probs, labels)
}

#[test]
fn real_draw_with_runs_spanning_chunks_matches_the_weighted_engine() {
    // 5 and 2 confidence levels over 4,500 items: runs of about 900 and 2,250 items cross
    // one or several 1,024-item chunks, so run totals come from later chunks' totals and
    // counts; 17 groups and a threshold inside a run.
    for (levels, seed) in [(5, 3), (2, 4)] {
        let (probs, labels) = tied_set(4500, levels, seed);
        let p = Predictions::try_new(&probs, 3, &labels).unwrap();
        let settings = StandardSettings::try_new(10, 17, 0.7).unwrap();
        compare(&p, &settings, &ChunkedMultinomial::new(p.n(), 11), 40);
    }
    // Continuous confidences: no ties at all.
    let p = Predictions::try_new(&RANDOM_PROBS, 3, &RANDOM_LABELS).unwrap();
    let settings = StandardSettings::with_threshold(0.7).unwrap();
    compare(&p, &settings, &ChunkedMultinomial::new(p.n(), 12), 40);
}

#[test]
fn every_instruction_set_gives_the_same_bits() {
    // Lanes never mix and Rust never fuses a multiply and an add, so the AVX-512, AVX2 and
    // baseline compilations agree exactly.
    let (probs, labels) = tied_set(3000, 30, 5);
    let p = Predictions::try_new(&probs, 3, &labels).unwrap();
    let settings = StandardSettings::try_new(15, 15, 0.75).unwrap();
    let sweep = Sweep::new(&p, &settings);
    let draw = ChunkedMultinomial::new(p.n(), 17);
    let widest = sweep.run(&draw, 37, 2).unwrap();
    let scalar = sweep.run_on(&draw, 37, 2, pulp::Arch::Scalar).unwrap();
    assert_eq!(widest, scalar);
}

#[test]
fn report_intervals_come_from_the_swept_replicates() {
    let (probs, labels) = tied_set(3000, 40, 8);
    let p = Predictions::try_new(&probs, 3, &labels).unwrap();
    let settings = StandardSettings::try_new(15, 15, 0.75).unwrap();
    let config = BootstrapConfig::try_new(120, 0.9, 21).unwrap();
    let report = standard_report(&p, &settings, &config).unwrap();
    for threads in [2, 3, 8] {
        let other = standard_report(&p, &settings, &config.with_threads(threads)).unwrap();
        assert_eq!(report, other, "{threads} threads");
    }
    let draw = ChunkedMultinomial::new(p.n(), 21);
    let (sweep, prepared) = (Sweep::new(&p, &settings), Prepared::new(&p, &settings));
    let reps: Vec<StandardMetrics> = (0..120)
        .map(|r| prepared.evaluate(&by_item(&sweep, &draw, r), &mut Vec::new()))
        .collect();
    let interval = |get: fn(&StandardMetrics) -> f64| {
        let values: Vec<f64> = reps.iter().map(get).collect();
        percentile_interval(&values, 0.9).unwrap().unwrap()
    };
    for (got, (low, high)) in [
        (report.ece, interval(|m| m.ece)),
        (report.adaptive_ece, interval(|m| m.adaptive_ece)),
        (report.aurc, interval(|m| m.aurc)),
        (report.classwise_ece, interval(|m| m.classwise_ece)),
    ] {
        assert!((got.low - low).abs() < ENGINE_TOLERANCE, "{got:?} vs {low}");
        assert!(
            (got.high - high).abs() < ENGINE_TOLERANCE,
            "{got:?} vs {high}"
        );
    }
    assert_eq!(report.bootstrap.rng, super::super::CHUNKED_RNG_NAME);
}

#[test]
fn accuracy_interval_has_the_binomial_standard_error() {
    // METHODS.md 1.9: the bootstrap SE of accuracy ≈ sqrt(acc(1 − acc)/n) (closed form). With
    // R = 2000 the SE estimate itself has about 1.6% relative error; allow 8%. The 95%
    // percentile interval is then about ±1.96 SE around the point value.
    let (probs, labels) = tied_set(20_000, 1000, 4);
    let p = Predictions::try_new(&probs, 3, &labels).unwrap();
    let settings = StandardSettings::with_threshold(0.8).unwrap();
    let sweep = Sweep::new(&p, &settings);
    let reps = sweep
        .run(&ChunkedMultinomial::new(p.n(), 99), 2000, 2)
        .unwrap();
    let acc: Vec<f64> = reps.iter().map(|m| m.accuracy).collect();
    let mean = acc.iter().sum::<f64>() / acc.len() as f64;
    let se = (acc.iter().map(|a| (a - mean).powi(2)).sum::<f64>() / 1999.0).sqrt();
    let point = super::super::accuracy(&p);
    let want = (point * (1.0 - point) / p.n() as f64).sqrt();
    assert!(
        (se / want - 1.0).abs() < 0.08,
        "bootstrap SE {se}, binomial {want}"
    );
    assert!((mean - point).abs() < 4.0 * want / (2000f64).sqrt() + 1e-12);
}

/// All n counts of replicate r of `source`, by position.
fn all_counts(source: &dyn ChunkCounts, n: usize, r: usize) -> Vec<u32> {
    let mut w = vec![0u32; n];
    for (c, &t) in source.totals(r).iter().enumerate() {
        let base = c * source.chunk_len();
        source.fill(r, c, t, &mut |j| w[base + j] += 1);
    }
    w
}

/// Probability rows (some entries on quarter steps, so ties and exact bin edges occur), labels.
fn predictions_strategy() -> impl Strategy<Value = (Vec<f64>, Vec<u32>, usize)> {
    (2usize..5, 1usize..40).prop_flat_map(|(k, n)| {
        let entry = prop_oneof![0.0f64..1.0, (0u8..5).prop_map(|v| f64::from(v) / 4.0)];
        let raw = proptest::collection::vec(entry, n * k);
        let labels = proptest::collection::vec(0..k as u32, n);
        (raw, labels).prop_map(move |(mut raw, labels)| {
            for row in raw.chunks_exact_mut(k) {
                row[0] += 1e-3;
                let sum: f64 = row.iter().sum();
                row.iter_mut().for_each(|v| *v /= sum);
            }
            (raw, labels, k)
        })
    })
}

/// Rows drawn from three fixed rows, so most items tie with many others.
fn tied_strategy() -> impl Strategy<Value = (Vec<f64>, Vec<u32>, usize)> {
    const ROWS: [[f64; 3]; 3] = [[0.5, 0.25, 0.25], [0.2, 0.6, 0.2], [0.1, 0.1, 0.8]];
    proptest::collection::vec((0usize..3, 0u32..3), 1..60).prop_map(|items| {
        let probs = items.iter().flat_map(|&(r, _)| ROWS[r]).collect();
        let labels = items.iter().map(|&(_, y)| y).collect();
        (probs, labels, 3)
    })
}

proptest! {
    #[test]
    fn long_runs_of_ties_match_the_weighted_engine(
        (probs, labels, k) in tied_strategy(),
        chunk in 1usize..5,
        groups in 1usize..8,
        seed in 0u64..1000,
    ) {
        let p = Predictions::try_new(&probs, k, &labels).unwrap();
        let settings = StandardSettings::try_new(4, groups, 0.55).unwrap();
        let draw = ChunkedMultinomial::new(p.n(), seed);
        let counts = (0..4).map(|r| all_counts(&draw, p.n(), r)).collect();
        compare(&p, &settings, &Given { counts, chunk }, 4);
    }

    #[test]
    fn any_counts_any_chunk_length_match_the_weighted_engine(
        (probs, labels, k) in predictions_strategy(),
        chunk in 1usize..6,
        groups in 1usize..6,
        seed in 0u64..1000,
    ) {
        let p = Predictions::try_new(&probs, k, &labels).unwrap();
        let settings = StandardSettings::try_new(5, groups, 0.5).unwrap();
        // Multinomial counts (n draws) from the chunked stream, served in short chunks so
        // runs of ties cross chunk boundaries.
        let draw = ChunkedMultinomial::new(p.n(), seed);
        let counts = (0..5).map(|r| all_counts(&draw, p.n(), r)).collect();
        compare(&p, &settings, &Given { counts, chunk }, 5);
    }
}
