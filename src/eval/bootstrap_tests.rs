//! Tests of the bootstrap: numpy quantiles, injected indices, streams, skips and the SE check
//! (kept apart from bootstrap.rs for length).

use super::super::fixtures::{BOOT_INDICES, RANDOM_LABELS, RANDOM_PROBS};
use super::super::Predictions;
use super::*;

#[test]
fn quantile_follows_numpy_linear() {
    // v = np.array([3.1, 0.2, 5.5, 1.7, 2.2, 9.0, 4.4]); float(np.quantile(v, q)) for each q.
    let mut v = [3.1, 0.2, 5.5, 1.7, 2.2, 9.0, 4.4];
    v.sort_by(f64::total_cmp);
    let cases = [
        (0.025, 0.42500000000000004),
        (0.975, 8.474999999999998),
        (0.5, 3.1),
        (0.3, 2.1),
        (0.0, 0.2),
        (1.0, 9.0),
        ((1.0 - 0.9) / 2.0, 0.6499999999999999),
        ((1.0 + 0.9) / 2.0, 7.9499999999999975),
    ];
    for (q, want) in cases {
        assert_eq!(quantile_linear(&v, q), Some(want), "q = {q}");
    }
    assert_eq!(quantile_linear(&[], 0.5), None);
    assert_eq!(
        percentile_interval(&v, 0.9).unwrap(),
        Some((0.6499999999999999, 7.9499999999999975))
    );
    assert!(percentile_interval(&v, 1.0).is_err());
}

#[test]
fn injected_indices_match_numpy_percentile_interval() {
    // idx = np.random.default_rng(5).integers(0, 12, size=(20, 12))
    // m = np.array([conf[:12][r].mean() for r in idx])
    // np.quantile(m, [(1 - 0.9) / 2, (1 + 0.9) / 2]) = [0.7587922125776644, 0.8352180518194452]
    let p = Predictions::try_new(&RANDOM_PROBS[..36], 3, &RANDOM_LABELS[..12]).unwrap();
    let m = IndexMatrix::try_new(12, BOOT_INDICES.to_vec()).unwrap();
    assert_eq!(m.replicates(), 20);
    let conf = p.confidence();
    let reps = bootstrap_with_indices(&m, |idx| {
        Some(idx.iter().map(|&i| conf[i]).sum::<f64>() / idx.len() as f64)
    });
    assert_eq!((reps.values.len(), reps.skipped), (20, 0));
    assert!((reps.values[0] - 0.7708309953258471).abs() < 1e-15); // m[0]
    let (low, high) = reps.interval(0.9).unwrap().unwrap();
    assert!((low - 0.7587922125776644).abs() < 1e-15, "{low}");
    assert!((high - 0.8352180518194452).abs() < 1e-15, "{high}");
}

#[test]
fn index_matrix_is_validated() {
    assert!(matches!(
        IndexMatrix::try_new(0, vec![0]),
        Err(EvalError::Empty { .. })
    ));
    assert!(matches!(
        IndexMatrix::try_new(3, vec![0, 1]),
        Err(EvalError::Length { .. })
    ));
    let e = IndexMatrix::try_new(2, vec![0, 1, 1, 2]).unwrap_err();
    assert_eq!(
        e,
        EvalError::IndexOutOfRange {
            replicate: 1,
            position: 1,
            index: 2,
            n: 2
        }
    );
}

#[test]
fn streams_are_per_replicate_and_thread_independent() {
    let mut a = Vec::new();
    let mut b = Vec::new();
    resample_indices(50, 7, 3, &mut a);
    resample_indices(50, 7, 3, &mut b);
    assert_eq!(a, b);
    assert!(a.iter().all(|&i| i < 50));
    resample_indices(50, 7, 4, &mut b);
    assert_ne!(a, b);
    let metric = |idx: &[usize]| Some(idx.iter().map(|&i| (i as f64).sqrt()).sum::<f64>());
    let config = BootstrapConfig::try_new(37, 0.95, 11).unwrap();
    let one = bootstrap(50, &config, metric).unwrap();
    let three = bootstrap(50, &config.with_threads(3), metric).unwrap();
    assert_eq!(one, three);
    let other_seed = bootstrap(50, &BootstrapConfig::try_new(37, 0.95, 12).unwrap(), metric);
    assert_ne!(one, other_seed.unwrap());
}

#[test]
fn undefined_replicates_are_skipped_and_counted() {
    let config = BootstrapConfig::try_new(200, 0.95, 1)
        .unwrap()
        .with_threads(2);
    let reps = bootstrap(5, &config, |idx| (idx[0] != 0).then_some(1.0)).unwrap();
    let mut idx = Vec::new();
    let expected_skips = (0..200u64)
        .filter(|&r| {
            resample_indices(5, 1, r, &mut idx);
            idx[0] == 0
        })
        .count();
    assert!(expected_skips > 0);
    assert_eq!(
        (reps.skipped, reps.values.len()),
        (expected_skips, 200 - expected_skips)
    );
    let none = bootstrap(5, &config, |_| None::<f64>).unwrap();
    assert_eq!(none.interval(0.95).unwrap(), None);
    assert!(bootstrap(0, &config, |_| Some(0.0)).is_err());
    assert!(BootstrapConfig::try_new(0, 0.95, 1).is_err());
}

#[test]
fn bootstrap_se_of_accuracy_matches_binomial_formula() {
    // METHODS.md 1.9 / 5.5: bootstrap SE of accuracy ≈ sqrt(acc(1 − acc)/n). With R = 2000 the
    // SE estimate has a relative sd of about 1/sqrt(2R) ≈ 1.6%; the tolerance is 8%.
    let n = 2000;
    let correct: Vec<bool> = (0..n).map(|i| i % 5 != 0).collect(); // accuracy 0.8
    let config = BootstrapConfig::try_new(2000, 0.95, 2024)
        .unwrap()
        .with_threads(2);
    let reps = bootstrap(n, &config, |idx| {
        Some(idx.iter().filter(|&&i| correct[i]).count() as f64 / n as f64)
    })
    .unwrap();
    let want = (0.8f64 * 0.2 / n as f64).sqrt();
    let se = reps.standard_error().unwrap();
    assert!((se / want - 1.0).abs() < 0.08, "SE {se} vs {want}");
    let (low, high) = reps.interval(0.95).unwrap().unwrap();
    // 1.959963984540054 = scipy.stats.norm.ppf(0.975)
    let width = (high - low) / (2.0 * 1.959963984540054 * want);
    assert!((width - 1.0).abs() < 0.12, "width ratio {width}");
    assert!(low < 0.8 && 0.8 < high);
}
