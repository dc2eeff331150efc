use super::*;

fn spec(target: f64) -> WindowSpec {
    WindowSpec {
        reference: Some(ConfidenceReference {
            items: 1000,
            // Deciles of a uniform reference on [0, 1] (closed form).
            edges: (1..10).map(|b| f64::from(b) / 10.0).collect(),
            proportions: vec![0.1; 10],
            accept_rate: Some(0.4),
            mean_confidence: Some(0.5),
        }),
        target_accuracy: Some(target),
        confidence_level: Some(0.95),
        audit_rate: 0.1,
    }
}

fn audited(correct: bool) -> LabelledDecision {
    LabelledDecision {
        confidence: 0.95,
        correct,
        accepted: true,
        audit: true,
    }
}

fn tracker_with(target: f64, hits: usize, misses: usize) -> LiveQuality {
    let mut t = Tracker::new(WindowSizes::default());
    let s = |_: &str, _: &str| spec(target);
    for i in 0..hits + misses {
        t.outcome("m", "v1", audited(i < hits), &s);
    }
    t.report().remove(0)
}

#[test]
fn the_promise_is_judged_on_the_exact_interval_of_the_audit_sample() {
    // scipy 1.17.1 stats.binomtest(k, 200).proportion_ci(0.95, 'exact'):
    //   190 → (0.90997, 0.97577); 180 → (0.84979, 0.93784); 160 → (0.73777, 0.85311).
    let q = tracker_with(0.9, 190, 10);
    assert_eq!(q.promise, Promise::Kept);
    let a = q.accepted_accuracy.unwrap();
    assert_eq!(a.n, 200);
    assert!(
        (a.lower - 0.909_972_462_298_441_2).abs() < 1e-9,
        "{}",
        a.lower
    );
    assert!(
        (a.upper - 0.975_765_834_527_891_7).abs() < 1e-9,
        "{}",
        a.upper
    );
    assert!((a.estimate - 0.95).abs() < 1e-15);
    assert_eq!(tracker_with(0.9, 180, 20).promise, Promise::Uncertain);
    assert_eq!(tracker_with(0.9, 160, 40).promise, Promise::Broken);
    assert_eq!(tracker_with(0.9, 20, 0).promise, Promise::TooFewAudits);
    let lines = verdict_lines(&tracker_with(0.9, 160, 40));
    assert!(lines[0].starts_with("PROMISE BROKEN"), "{lines:?}");
}

#[test]
fn only_audited_accepted_labels_estimate_accepted_accuracy() {
    let mut t = Tracker::new(WindowSizes::default());
    let s = |_: &str, _: &str| spec(0.9);
    for _ in 0..40 {
        t.outcome("m", "v1", audited(true), &s);
        // A complaint about an accepted item: labelled, but not by the random audit.
        let mut unaudited = audited(false);
        unaudited.audit = false;
        t.outcome("m", "v1", unaudited, &s);
        let mut deferred = audited(false);
        (deferred.accepted, deferred.audit, deferred.confidence) = (false, false, 0.3);
        t.outcome("m", "v1", deferred, &s);
    }
    let q = t.report().remove(0);
    assert_eq!(q.accepted_accuracy.unwrap().estimate, 1.0);
    assert_eq!(q.unaudited_accepted_labels, 40);
    let d = q.deferred_accuracy.unwrap();
    assert_eq!((d.n, d.estimate), (40, 0.0));
    // Weighted ECE: audited items weigh 1/0.1 = 10 each (400 in all) at confidence 0.95 with
    // accuracy 1, deferred ones 1 each (40) at 0.3 with accuracy 0 (closed form).
    let want = (400.0 * 0.05 + 40.0 * 0.3) / 440.0;
    assert!((q.weighted_ece.unwrap() - want).abs() < 1e-12);
}

#[test]
fn windows_slide_and_drift_is_flagged_only_when_the_distribution_moves() {
    let sizes = WindowSizes {
        decisions: 1000,
        labels: 10,
    };
    let mut t = Tracker::new(sizes);
    let s = |_: &str, _: &str| spec(0.9);
    // Like the reference: confidences spread evenly over the ten deciles.
    for i in 0..1000 {
        let c = (i % 10) as f32 / 10.0 + 0.05;
        t.decision("m", "v1", c, c >= 0.6, &s);
    }
    let q = t.report().remove(0);
    assert_eq!(q.drift_level, DriftLevel::Stable);
    assert!(q.drift.unwrap().psi < 1e-12);
    assert!((q.automation_rate.unwrap() - 0.4).abs() < 1e-12);
    // Then every new item is very confident: after 1000 more, the window holds only those.
    for _ in 0..1000 {
        t.decision("m", "v1", 0.99, true, &s);
    }
    let q = t.report().remove(0);
    assert_eq!((q.window_decisions, q.decisions_total), (1000, 2000));
    assert_eq!(q.automation_rate, Some(1.0));
    assert_eq!(q.drift_level, DriftLevel::Large);
    // All mass in the last bin: binned KS = 0.9 (closed form).
    assert!((q.drift.unwrap().ks_binned - 0.9).abs() < 1e-12);
    assert!(verdict_lines(&q).iter().any(|l| l.starts_with("DRIFT")));
    // Too few items in a new version's window: not judged.
    t.decision("m", "v2", 0.99, true, &s);
    assert_eq!(t.report()[1].drift_level, DriftLevel::TooFewItems);
}

#[test]
fn a_map_without_reference_or_target_is_reported_as_such() {
    let mut t = Tracker::new(WindowSizes::default());
    let s = |_: &str, _: &str| WindowSpec::default();
    t.decision("m", "v1", 0.7, false, &s);
    let q = t.report().remove(0);
    assert_eq!(
        (q.drift_level, q.promise),
        (DriftLevel::NoReference, Promise::NoTarget)
    );
    assert_eq!(q.confidence_level, DEFAULT_CONFIDENCE_LEVEL);
}

#[test]
fn a_slot_names_one_window_for_good_and_the_report_keeps_model_then_version_order() {
    let mut t = Tracker::new(WindowSizes::default());
    let opened = std::cell::Cell::new(0);
    let s = |_: &str, _: &str| {
        opened.set(opened.get() + 1);
        WindowSpec::default()
    };
    let b2 = t.slot("b", "v2", &s);
    let a1 = t.slot("a", "v1", &s);
    assert_eq!(t.slot("b", "v2", &s), b2);
    assert_ne!(a1, b2);
    assert_eq!(opened.get(), 2, "a window is opened once");
    t.decision_in(b2, 0.9, true);
    t.decision_in(b2, 0.4, false);
    t.decision("b", "v2", 0.8, true, &s);
    t.decision("a", "v1", 0.8, true, &s);
    let r = t.report();
    let seen: Vec<(&str, &str, u64)> = r
        .iter()
        .map(|q| (q.model.as_str(), q.map_version.as_str(), q.decisions_total))
        .collect();
    assert_eq!(seen, [("a", "v1", 1), ("b", "v2", 3)]);
}
