//! The charts' SVG and the page's HTML.

use super::tests::{build, map_with};
use super::*;
use crate::decision::{DecisionPolicy, Evidence};

#[test]
fn each_chart_has_its_marks_and_labels() {
    let evidence = Evidence {
        target_accuracy: Some(0.95),
        ..Evidence::default()
    };
    let policy = DecisionPolicy::new(Some(0.9), None, Some(evidence));
    let r = build(&map_with(policy, None), 600, &ReportSettings::default());
    let svg = charts::reliability(&r.calibrated, charts::Series::Calibrated).unwrap();
    assert!(
        svg.starts_with("<svg") && svg.contains("viewBox"),
        "{}",
        &svg[..80]
    );
    let bars = r
        .calibrated
        .reliability
        .iter()
        .filter(|b| b.count > 0)
        .count();
    // Fill and outline per non-empty bin, one count bar each, plus backgrounds and legend keys.
    assert!(svg.matches("<rect").count() >= 3 * bars, "{bars} bins");
    assert!(svg.matches("<circle").count() >= bars);
    for label in [
        "Accuracy (share right)",
        "Confidence (mean of bin)",
        "Items",
        "Perfect calibration",
    ] {
        assert!(svg.contains(label), "missing {label}");
    }
    assert!(
        svg.contains("#0072B2") || svg.contains("#0072b2"),
        "Okabe–Ito blue"
    );
    let svg = charts::confidence_histogram(&r.uncalibrated, &r.calibrated, &[0.9]).unwrap();
    assert!(svg.contains("Threshold 0.9") && svg.contains("Top-label confidence"));
    assert!(svg.contains("<polyline") || svg.contains("<path"));
    let svg = charts::risk_coverage(&r.uncalibrated, &r.calibrated, Some(0.05)).unwrap();
    for label in [
        "Target risk 5.0%",
        "Coverage (%",
        "Risk (%",
        "policy: ",
        "Operating point",
    ] {
        assert!(svg.contains(label), "missing {label}");
    }
    assert!(svg.matches("<circle").count() >= 2, "both operating points");
}

#[test]
fn the_page_is_self_contained_and_escapes_names() {
    let names = vec!["<b>bold</b>".to_owned(), "b & c".to_owned(), "c".to_owned()];
    let r = build(
        &map_with(DecisionPolicy::global(0.9), Some(names)),
        300,
        &ReportSettings::default(),
    );
    let page = render_html(&r).unwrap();
    assert!(page.starts_with("<!DOCTYPE html>"));
    assert_eq!(
        page.matches("<svg").count(),
        4,
        "two reliability charts, histogram, curve"
    );
    assert!(!page.contains("<script"));
    assert!(!page.contains("<b>bold"));
    assert!(page.contains("&lt;b&gt;bold&lt;/b&gt;") && page.contains("b &amp; c"));
    let without_ns = page.replace("xmlns=\"http://www.w3.org/2000/svg\"", "");
    assert!(
        !without_ns.contains("http://") && !without_ns.contains("https://"),
        "no links out"
    );
    for heading in [
        "The map",
        "Decision policy",
        "Metrics",
        "Per class",
        "Provenance",
        "Sign-off",
    ] {
        assert!(page.contains(heading), "missing {heading}");
    }
}
