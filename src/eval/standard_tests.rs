//! Tests of the standard set and its weighted replicate engine (kept apart from standard.rs for
//! length).

use super::super::fixtures::{BOOT_INDICES, E3_LABELS, E3_PROBS, RANDOM_LABELS, RANDOM_PROBS};
use super::super::replicate::Prepared;
use super::super::{
    accept_stats, accuracy, adaptive_ece, aurc, brier, classwise_ece, ece, mce, nll,
};
use super::super::{BootstrapConfig, IndexMatrix, Predictions};
use super::*;
use proptest::prelude::*;

/// The standard set computed with the single-metric functions.
fn by_functions(p: &Predictions<'_>, s: &StandardSettings) -> StandardMetrics {
    let accept = accept_stats(p, s.threshold()).unwrap();
    StandardMetrics {
        n: p.n(),
        accuracy: accuracy(p),
        ece: ece(p, s.bins()),
        adaptive_ece: adaptive_ece(p, s.adaptive_groups()).unwrap(),
        mce: mce(p, s.bins()),
        classwise_ece: classwise_ece(p, s.bins()),
        nll: nll(p),
        brier: brier(p),
        aurc: aurc(p).aurc,
        coverage: accept.coverage,
        accepted_accuracy: accept.accepted_accuracy,
    }
}

fn assert_close(got: &StandardMetrics, want: &StandardMetrics, tol: f64) {
    let pairs = [
        (got.accuracy, want.accuracy),
        (got.ece, want.ece),
        (got.adaptive_ece, want.adaptive_ece),
        (got.mce, want.mce),
        (got.classwise_ece, want.classwise_ece),
        (got.nll, want.nll),
        (got.brier, want.brier),
        (got.aurc, want.aurc),
        (got.coverage, want.coverage),
        (
            got.accepted_accuracy.unwrap_or(-1.0),
            want.accepted_accuracy.unwrap_or(-1.0),
        ),
    ];
    for (i, (g, w)) in pairs.into_iter().enumerate() {
        assert!((g - w).abs() <= tol, "metric {i}: got {g}, want {w}");
    }
    assert_eq!(got.n, want.n);
}

#[test]
fn point_values_equal_the_single_metric_functions() {
    let p = Predictions::try_new(&E3_PROBS, 3, &E3_LABELS).unwrap();
    for settings in [
        StandardSettings::try_new(5, 3, 0.6).unwrap(),
        StandardSettings::with_threshold(0.99).unwrap(),
    ] {
        assert_eq!(standard_metrics(&p, &settings), by_functions(&p, &settings));
    }
    let p = Predictions::try_new(&RANDOM_PROBS, 3, &RANDOM_LABELS).unwrap();
    let settings = StandardSettings::with_threshold(0.7).unwrap();
    assert_eq!(standard_metrics(&p, &settings), by_functions(&p, &settings));
}

/// Python for the two tests below (names from fixtures.rs):
/// ```text
/// P12, y12 = P[:12], y[:12]
/// def standard(P, y, M=10, B=3, theta=0.7):
///     conf, pred = P.max(1), P.argmax(1); hit = (pred == y).astype(float)
///     ece, mce = ece_mce(conf, hit, M)
///     acc_mask = conf >= theta
///     return dict(accuracy=hit.mean(), ece=ece, adaptive_ece=adaptive(conf, hit, B), mce=mce,
///                 classwise_ece=classwise(P, y, M), nll=log_loss(y, P, labels=[0, 1, 2]),
///                 brier=np.mean(np.sum((P - np.eye(3)[y])**2, axis=1)), aurc=aurc(conf, hit)[0],
///                 coverage=acc_mask.mean(),
///                 accepted_accuracy=hit[acc_mask].mean() if acc_mask.any() else None)
/// idx = np.random.default_rng(5).integers(0, 12, size=(20, 12))
/// reps = [standard(P12[r], y12[r]) for r in idx]       # theta=0.9 for the second test
/// for key: vals = [m[key] for m in reps if m[key] is not None]
///          np.quantile(vals, [(1 - 0.9) / 2, (1 + 0.9) / 2])
/// ```
#[test]
fn injected_indices_match_numpy_standard_set() {
    let p = Predictions::try_new(&RANDOM_PROBS[..36], 3, &RANDOM_LABELS[..12]).unwrap();
    let settings = StandardSettings::try_new(10, 3, 0.7).unwrap();
    let m = IndexMatrix::try_new(12, BOOT_INDICES.to_vec()).unwrap();
    let r = standard_report_with_indices(&p, &settings, 0.9, &m).unwrap();
    let want = [
        ("accuracy", r.accuracy, [0.75, 0.5833333333333334, 1.0]),
        (
            "ece",
            r.ece,
            [0.1049804139712539, 0.10536062992055273, 0.26990266633976145],
        ),
        (
            "adaptive",
            r.adaptive_ece,
            [0.09890308917961191, 0.10206849665720417, 0.3344826734825392],
        ),
        (
            "mce",
            r.mce,
            [0.5716779129634698, 0.18901403298271569, 0.5716779129634698],
        ),
        (
            "classwise",
            r.classwise_ece,
            [0.17929820310390535, 0.13917452884148895, 0.2760330085427722],
        ),
        (
            "nll",
            r.nll,
            [0.7085213776051146, 0.3062433248942987, 0.9727760504648878],
        ),
        (
            "brier",
            r.brier,
            [0.392600338974129, 0.12040139637810805, 0.5630351832185991],
        ),
        (
            "aurc",
            r.aurc,
            [0.1949795574795575, 0.0, 0.34377374939874944],
        ),
        ("coverage", r.coverage, [0.8333333333333334, 0.6625, 1.0]),
    ];
    for (name, got, [value, low, high]) in want {
        for (g, w) in [(got.value, value), (got.low, low), (got.high, high)] {
            assert!(
                (g - w).abs() <= 1e-12,
                "{name}: got {got:?}, want {value} [{low}, {high}]"
            );
        }
    }
    let acc = r.accepted_accuracy.unwrap();
    assert!((acc.value - 0.8).abs() < 1e-15 && (acc.low - 0.6633333333333333).abs() < 1e-12);
    assert_eq!((acc.high, r.accepted_accuracy_skipped), (1.0, 0));
    assert_eq!(r.bootstrap.seed, None);
    assert_eq!(
        (r.bootstrap.replicates, r.n, r.n_bins, r.adaptive_groups),
        (20, 12, 10, 3)
    );
}

#[test]
fn replicates_without_accepted_items_are_skipped() {
    // Same Python with theta=0.9: 3 replicates accept nothing; accepted accuracy [1.0, 1.0],
    // coverage quantiles [0.0, 0.25].
    let p = Predictions::try_new(&RANDOM_PROBS[..36], 3, &RANDOM_LABELS[..12]).unwrap();
    let settings = StandardSettings::try_new(10, 3, 0.9).unwrap();
    let m = IndexMatrix::try_new(12, BOOT_INDICES.to_vec()).unwrap();
    let r = standard_report_with_indices(&p, &settings, 0.9, &m).unwrap();
    assert_eq!(r.accepted_accuracy_skipped, 3);
    assert_eq!(
        r.accepted_accuracy,
        Some(MetricSummary {
            value: 1.0,
            low: 1.0,
            high: 1.0
        })
    );
    assert_eq!((r.coverage.low, r.coverage.high), (0.0, 0.25));
    let json = serde_json::to_value(&r).unwrap();
    assert_eq!(json["bootstrap"]["rng"], "injected index matrix");
    let none = StandardSettings::try_new(10, 3, 0.99).unwrap();
    let r = standard_report_with_indices(&p, &none, 0.9, &m).unwrap();
    assert_eq!(
        (r.accepted_accuracy, r.accepted_accuracy_skipped),
        (None, 20)
    );
    assert!(serde_json::to_value(&r).unwrap()["accepted_accuracy"].is_null());
    let wrong_n = IndexMatrix::try_new(6, vec![0; 6]).unwrap();
    assert!(standard_report_with_indices(&p, &none, 0.9, &wrong_n).is_err());
}

#[test]
fn rng_path_is_seeded_and_independent_of_threads() {
    // The replicate values themselves are checked against the weighted engine in
    // sweep_tests.rs; here the report around them.
    let p = Predictions::try_new(&RANDOM_PROBS, 3, &RANDOM_LABELS).unwrap();
    let settings = StandardSettings::with_threshold(0.7).unwrap();
    let config = BootstrapConfig::try_new(200, 0.95, 99).unwrap();
    let report = standard_report(&p, &settings, &config).unwrap();
    assert_eq!(
        report,
        standard_report(&p, &settings, &config.with_threads(2)).unwrap()
    );
    assert_eq!(report.bootstrap.seed, Some(99));
    assert_eq!(report.bootstrap.replicates, 200);
    assert_eq!(standard_metrics(&p, &settings).ece, report.ece.value);
    assert!(report.ece.low <= report.ece.value && report.ece.value <= report.ece.high);
    let other = BootstrapConfig::try_new(200, 0.95, 100).unwrap();
    assert_ne!(report, standard_report(&p, &settings, &other).unwrap());
}

/// Probability rows (some entries on quarter steps, so ties and exact bin edges occur), labels.
fn predictions_strategy() -> impl Strategy<Value = (Vec<f64>, Vec<u32>, usize)> {
    (2usize..5, 1usize..30).prop_flat_map(|(k, n)| {
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

proptest! {
    #[test]
    fn metrics_stay_in_their_ranges((probs, labels, k) in predictions_strategy()) {
        let p = Predictions::try_new(&probs, k, &labels).unwrap();
        let m = standard_metrics(&p, &StandardSettings::try_new(7, 4, 0.5).unwrap());
        for v in [m.ece, m.mce, m.adaptive_ece, m.classwise_ece, m.accuracy, m.aurc, m.coverage] {
            prop_assert!((0.0..=1.0).contains(&v), "{m:?}");
        }
        prop_assert!(m.ece <= m.mce + 1e-12);
        prop_assert!((0.0..=2.0).contains(&m.brier));
        prop_assert!(m.nll >= 0.0 && m.nll <= 36.05);
        prop_assert!(aurc(&p).excess >= -1e-12);
    }

    #[test]
    fn weighted_replicate_equals_expanded_sample(
        (probs, labels, k) in predictions_strategy(),
        seed in 0u64..1000,
    ) {
        let p = Predictions::try_new(&probs, k, &labels).unwrap();
        let settings = StandardSettings::try_new(5, 3, 0.5).unwrap();
        let mut w = vec![0u32; p.n()];
        let mut idx = Vec::new();
        super::super::resample_indices(p.n(), seed, 0, &mut idx);
        idx.iter().for_each(|&i| w[i] += 1);
        // The resampled sample with copies in original index order (the engine's tie order).
        let (mut rows, mut ys) = (Vec::new(), Vec::new());
        for (i, &wi) in w.iter().enumerate() {
            for _ in 0..wi {
                rows.extend_from_slice(p.row(i));
                ys.push(p.labels()[i]);
            }
        }
        let expanded = Predictions::try_new(&rows, k, &ys).unwrap();
        let got = Prepared::new(&p, &settings).evaluate(&w, &mut Vec::new());
        assert_close(&got, &by_functions(&expanded, &settings), 1e-12);
    }
}
