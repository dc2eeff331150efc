use super::*;
use crate::decision::{DecisionPolicy, Evidence};
use crate::eval::{classwise_ece, ece, risk_coverage, Predictions};
use crate::mapfile::{CalibrationMap, MapParts};
use crate::method::{InputForm, Method, Temperature};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use serde_json::json;

/// Temperature of the test map.
const T: f64 = 2.0;
/// The fit-data digest recorded in the test map's provenance.
const FIT_DIGEST: &str = "0123456789abcdef0123456789abcdef0123456789abcdef0123456789abcdef";

pub(super) fn map_with(policy: DecisionPolicy, names: Option<Vec<String>>) -> CalibrationMap {
    let mut provenance = serde_json::Map::new();
    provenance.insert(
        "fit_data".into(),
        json!({"sha256": FIT_DIGEST, "rows": 600}),
    );
    CalibrationMap::from_parts(MapParts {
        model: "sorter".into(),
        map_version: "v1".into(),
        classes: 3,
        class_names: names,
        input: InputForm::Logits,
        method: Method::Temperature(Temperature::try_new(T, "t").unwrap()),
        policy,
        provenance,
    })
    .unwrap()
}

fn softmax(z: &[f64], t: f64) -> Vec<f64> {
    let m = z.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let e: Vec<f64> = z.iter().map(|v| ((v - m) / t).exp()).collect();
    let s: f64 = e.iter().sum();
    e.iter().map(|v| v / s).collect()
}

/// n overconfident 3-class items: (uncalibrated, calibrated at T, labels).
fn items(n: usize) -> (Vec<f64>, Vec<f64>, Vec<u32>) {
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let normal = Normal::new(0.0, 2.5).unwrap();
    let (mut before, mut after, mut labels) = (vec![], vec![], vec![]);
    for i in 0..n {
        let y = (i % 3) as u32;
        let mut z: Vec<f64> = (0..3).map(|_| normal.sample(&mut rng)).collect();
        z[y as usize] += 2.0;
        let z: Vec<f64> = z.iter().map(|v| v * 3.0).collect();
        before.extend(softmax(&z, 1.0));
        after.extend(softmax(&z, T));
        labels.push(y);
    }
    (before, after, labels)
}

fn data(digest: &str) -> DataIdentity {
    DataIdentity {
        source: "test.jsonl".into(),
        digest: digest.into(),
    }
}

pub(super) fn build(map: &CalibrationMap, n: usize, settings: &ReportSettings) -> Report {
    let (before, after, labels) = items(n);
    let d = data("abc");
    let input = ReportInput {
        map,
        uncalibrated: &before,
        calibrated: &after,
        labels: &labels,
        data: &d,
    };
    assemble(&input, settings).unwrap()
}

#[test]
fn counts_add_up() {
    let policy = DecisionPolicy::new(Some(0.8), Some(vec![Some(0.6), None, Some(0.9)]), None);
    let r = build(&map_with(policy, None), 600, &ReportSettings::default());
    for view in [&r.uncalibrated, &r.calibrated] {
        assert_eq!(view.reliability.iter().map(|b| b.count).sum::<u64>(), 600);
        assert_eq!(view.histogram.iter().sum::<u64>(), 600);
        assert_eq!(view.histogram.len(), HISTOGRAM_BINS);
        assert!(view.risk_coverage.len() <= RISK_COVERAGE_POINTS);
        assert_eq!(view.risk_coverage.last().map(|p| p.0), Some(1.0));
    }
    let p = &r.policy;
    assert_eq!(p.calibrated.accepted + p.calibrated.deferred(), 600);
    let sum = |f: fn(&ClassRow) -> u64| p.classes.iter().map(f).sum::<u64>();
    assert_eq!(sum(|c| c.outcome.items), 600);
    assert_eq!(sum(|c| c.outcome.accepted), p.calibrated.accepted);
    assert_eq!(
        sum(|c| c.outcome.accepted_correct),
        p.calibrated.accepted_correct
    );
    // Class 1 has no threshold: never accepted, however confident.
    assert_eq!(p.classes[1].outcome.accepted, 0);
    assert_eq!(p.classes[1].threshold, None);
    assert_eq!(p.thresholds, vec![0.6, 0.9]);
    assert!(p.per_class);
}

#[test]
fn per_class_decisions_match_the_policy_item_by_item() {
    let policy = DecisionPolicy::new(None, Some(vec![Some(0.7), Some(0.95), None]), None);
    let map = map_with(policy.clone(), None);
    let r = build(&map, 300, &ReportSettings::default());
    let (_, after, labels) = items(300);
    let p = Predictions::try_new(&after, 3, &labels).unwrap();
    let (mut accepted, mut right) = (0u64, 0u64);
    for i in 0..p.n() {
        let conf = p.confidence()[i];
        let class = p.predicted()[i] as usize;
        let t = [Some(0.7), Some(0.95), None][class];
        if t.is_some_and(|t| conf >= t) {
            accepted += 1;
            right += u64::from(p.correct()[i]);
        }
    }
    assert_eq!(r.policy.calibrated.accepted, accepted);
    assert_eq!(r.policy.calibrated.accepted_correct, right);
}

#[test]
fn operating_point_sits_on_the_curve_for_a_global_threshold() {
    let map = map_with(DecisionPolicy::global(0.9), None);
    let r = build(&map, 600, &ReportSettings::default());
    let (_, after, labels) = items(600);
    let p = Predictions::try_new(&after, 3, &labels).unwrap();
    let accepted = p.confidence().iter().filter(|&&c| c >= 0.9).count();
    assert!(accepted > 0 && accepted < 600, "{accepted}");
    let curve = risk_coverage(&p);
    let (coverage, risk) = r.calibrated.operating_point;
    // Closed form: the top `accepted` items of the descending order are exactly those ≥ θ.
    assert_eq!(coverage, accepted as f64 / 600.0);
    assert_eq!(coverage, curve.coverage[accepted - 1]);
    assert!((risk.unwrap() - curve.risk[accepted - 1]).abs() < 1e-15);
}

#[test]
fn one_vs_rest_terms_average_to_the_classwise_ece() {
    let map = map_with(DecisionPolicy::global(0.9), None);
    let r = build(&map, 600, &ReportSettings::default());
    let (before, after, labels) = items(600);
    let bins = EqualWidthBins::default();
    for (probs, get) in [
        (
            &before,
            (|c: &ClassRow| c.ece_uncalibrated) as fn(&ClassRow) -> f64,
        ),
        (&after, |c: &ClassRow| c.ece_calibrated),
    ] {
        let p = Predictions::try_new(probs, 3, &labels).unwrap();
        let mean = r.policy.classes.iter().map(get).sum::<f64>() / 3.0;
        // Closed form: the classwise ECE is the mean of the per-class terms (METHODS.md 1.5).
        assert!((mean - classwise_ece(&p, &bins)).abs() < 1e-12);
    }
    let row = r.metrics.iter().find(|m| m.name == "ECE").unwrap();
    let p = Predictions::try_new(&after, 3, &labels).unwrap();
    assert_eq!(row.calibrated.value, ece(&p, &bins));
    assert!(
        row.calibrated.interval.is_none(),
        "no bootstrap, no interval"
    );
    assert!(
        row.calibrated.value < row.uncalibrated.value,
        "temperature helps here"
    );
}

#[test]
fn bootstrap_intervals_bracket_the_values() {
    let config = crate::eval::BootstrapConfig::try_new(50, 0.9, 3).unwrap();
    let settings = ReportSettings::try_new(10, Some(config)).unwrap();
    let r = build(&map_with(DecisionPolicy::global(0.9), None), 400, &settings);
    assert_eq!(r.bootstrap.as_ref().map(|b| b.replicates), Some(50));
    assert_eq!(r.n_bins, 10);
    assert_eq!(r.policy.level, 0.9);
    let acc = r.metrics.iter().find(|m| m.name == "Accuracy").unwrap();
    let (lo, hi) = acc.calibrated.interval.unwrap();
    assert!(lo <= acc.calibrated.value && acc.calibrated.value <= hi);
}

/// Ten binary items; at θ = 0.8 eight are accepted and seven of them are right.
fn ten_items() -> (Vec<f64>, Vec<u32>) {
    let conf = [0.95, 0.9, 0.9, 0.85, 0.85, 0.8, 0.8, 0.82, 0.6, 0.55];
    let labels = vec![0, 0, 0, 0, 0, 0, 0, 1, 0, 1];
    (conf.iter().flat_map(|&c| [c, 1.0 - c]).collect(), labels)
}

#[test]
fn clopper_pearson_figures_match_scipy() {
    let map = CalibrationMap::from_parts(MapParts {
        model: "m".into(),
        map_version: "1".into(),
        classes: 2,
        class_names: None,
        input: InputForm::Logits,
        method: Method::Identity,
        policy: DecisionPolicy::global(0.8),
        provenance: serde_json::Map::new(),
    })
    .unwrap();
    let (probs, labels) = ten_items();
    let d = data("x");
    let input = ReportInput {
        map: &map,
        uncalibrated: &probs,
        calibrated: &probs,
        labels: &labels,
        data: &d,
    };
    let r = assemble(&input, &ReportSettings::default()).unwrap();
    let p = &r.policy;
    assert_eq!(
        (p.calibrated.accepted, p.calibrated.accepted_correct),
        (8, 7)
    );
    // scipy 1.17.1: beta.ppf(0.05, 7, 2) = 0.5293205913988683;
    // beta.ppf(0.025, 7, 2) = 0.47349032912479344; beta.ppf(0.975, 8, 1) = 0.9968402764687481.
    let close = |a: f64, b: f64| assert!((a - b).abs() < 1e-9, "{a} vs {b}");
    close(p.accuracy_lower_bound.unwrap(), 0.5293205913988683);
    let (lo, hi) = p.accuracy_interval.unwrap();
    close(lo, 0.47349032912479344);
    close(hi, 0.9968402764687481);
    let text = p.sentences.join(" ");
    assert!(
        text.contains("at least 52.9% of items accepted this way are right"),
        "{text}"
    );
    assert!(
        text.contains("8 (80.0%) would be accepted and 2 sent to a person"),
        "{text}"
    );
}

#[test]
fn evidence_sentence_states_a_certificate_in_plain_words() {
    let evidence = Evidence {
        procedure: Some("sgr".into()),
        target_accuracy: Some(0.98),
        confidence_level: Some(0.95),
        certified_accuracy: Some(0.9812),
        items: Some(2500),
        accepted: Some(2310),
        ..Evidence::default()
    };
    let policy = DecisionPolicy::new(Some(0.91), None, Some(evidence));
    let r = build(&map_with(policy, None), 300, &ReportSettings::default());
    assert!(r.policy.certified);
    assert_eq!(r.policy.target_risk.map(|t| (t * 100.0).round()), Some(2.0));
    let text = r.policy.sentences.join(" ");
    assert!(
        text.contains(
            "At threshold 0.91, 2,310 of 2,500 held-out items would be accepted; at 95% \
             confidence at least 98.1% of accepted items are right (target 98.0%)"
        ),
        "{text}"
    );
}

#[test]
fn an_uncertified_threshold_is_called_so() {
    let mut extra = std::collections::BTreeMap::new();
    extra.insert("note".to_owned(), json!("set by hand"));
    let evidence = Evidence {
        procedure: Some("fixed".into()),
        certified_accuracy: Some(0.99),
        confidence_level: Some(0.95),
        extra,
        ..Evidence::default()
    };
    let policy = DecisionPolicy::new(Some(0.9), None, Some(evidence));
    let r = build(&map_with(policy, None), 300, &ReportSettings::default());
    assert!(!r.policy.certified, "a fixed threshold is never certified");
    let text = r.policy.sentences.join(" ");
    assert!(text.contains("Not certified"), "{text}");
    assert!(text.contains("note: set by hand"), "{text}");
    assert!(text.contains("It is a policy, not a guarantee."), "{text}");
    let r = build(
        &map_with(DecisionPolicy::global(0.9), None),
        300,
        &ReportSettings::default(),
    );
    assert!(r.policy.sentences.join(" ").contains("Not certified"));
}

#[test]
fn in_sample_data_is_flagged_and_bad_inputs_are_named() {
    let map = map_with(DecisionPolicy::global(0.9), None);
    let (before, after, labels) = items(60);
    let same = data(FIT_DIGEST);
    let mut input = ReportInput {
        map: &map,
        uncalibrated: &before,
        calibrated: &after,
        labels: &labels,
        data: &same,
    };
    assert!(
        assemble(&input, &ReportSettings::default())
            .unwrap()
            .in_sample
    );
    let mut bad = after.clone();
    bad[4] = f64::NAN;
    input.calibrated = &bad;
    let e = assemble(&input, &ReportSettings::default()).unwrap_err();
    assert!(e.to_string().starts_with("calibrated probabilities"), "{e}");
    input.calibrated = &after[..after.len() - 3];
    let e = assemble(&input, &ReportSettings::default()).unwrap_err();
    assert!(matches!(e, ReportError::Classes { .. }), "{e}");
    assert!(ReportSettings::try_new(0, None).is_err());
}

#[test]
fn default_replicates_shrink_with_the_data_and_explicit_wins() {
    use crate::eval::DEFAULT_REPLICATES;
    assert_eq!(replicates_for(2_000, None), DEFAULT_REPLICATES);
    assert_eq!(replicates_for(50_000, None), 1_000);
    assert_eq!(replicates_for(100_000, None), 500);
    assert_eq!(replicates_for(500_000, None), 100);
    assert_eq!(replicates_for(1_000_000, None), MIN_DEFAULT_REPLICATES);
    assert_eq!(replicates_for(50_000_000, None), MIN_DEFAULT_REPLICATES);
    assert_eq!(replicates_for(1_000_000, Some(1_000)), 1_000);
    assert_eq!(replicates_for(10, Some(0)), 0);
}
