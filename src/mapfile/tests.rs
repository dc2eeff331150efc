//! One test per validation rule, plus round trips for every method kind.

use super::*;
use crate::method::{Bbq, BbqModel, BetaCalibration, Histogram, Isotonic, OneVsRest, Platt};
use serde_json::json;

/// A valid sealed temperature map document for K = 3.
fn valid() -> Value {
    seal(json!({
        "format_version": 1,
        "model": "letter-sorter",
        "map_version": "v1",
        "classes": 3,
        "class_names": ["billing", "leak", "other"],
        "input": "logits",
        "method": {"kind": "temperature", "temperature": 2.0},
        "policy": {"threshold": 0.9, "evidence": {"procedure": "sgr", "target_accuracy": 0.95}},
        "provenance": {"created_at": "2026-12-01T00:00:00Z",
                        "fit_data": {"sha256": "ab".repeat(32), "rows": 100},
                        "metrics": {"before": {"nll": 0.9}, "after": {"nll": 0.7}}}
    }))
}

fn seal(mut doc: Value) -> Value {
    doc["digest"] = json!(canonical::digest(&doc));
    doc
}

/// Applies `edit` to a valid document, reseals it and returns the problems' fields and messages.
fn problems_after(edit: impl FnOnce(&mut Value)) -> Vec<String> {
    let mut doc = valid();
    edit(&mut doc);
    let doc = seal(doc);
    match CalibrationMap::from_value(&doc) {
        Ok(_) => vec![],
        Err(e) => e.problems.iter().map(|p| p.to_string()).collect(),
    }
}

fn assert_problem(found: &[String], field: &str, fragment: &str) {
    assert!(
        found
            .iter()
            .any(|p| p.starts_with(&format!("{field}: ")) && p.contains(fragment)),
        "expected a problem at {field} containing {fragment:?}, got {found:#?}"
    );
}

#[test]
fn valid_document_loads_and_round_trips_byte_for_byte() {
    let m = CalibrationMap::from_value(&valid()).unwrap();
    assert_eq!(m.model(), "letter-sorter");
    assert_eq!(m.classes(), 3);
    assert_eq!(m.input_len(), 3);
    let text = m.to_json();
    let again = CalibrationMap::from_slice(text.as_bytes()).unwrap();
    assert_eq!(again.to_json(), text);
    assert_eq!(again.digest(), m.digest());
}

#[test]
fn wrong_lengths_are_named() {
    let found = problems_after(|d| {
        d["method"] = json!({"kind": "vector", "weights": [1.0, 1.0], "biases": [0.0, 0.0, 0.0]});
        d["class_names"] = json!(["a", "b"]);
    });
    assert_problem(&found, "method.weights", "must have 3 entries, got 2");
    assert_problem(&found, "class_names", "must have 3 entries, got 2");
}

#[test]
fn non_numbers_are_named() {
    // JSON has no NaN or infinity; a string in their place is named.
    let found = problems_after(|d| d["method"]["temperature"] = json!("NaN"));
    assert_problem(
        &found,
        "method.temperature",
        "must be a number, got a string",
    );
    let err = CalibrationMap::from_slice(br#"{"classes": 1e999}"#).unwrap_err();
    assert!(err.problems[0].message.contains("not valid JSON"), "{err}");
}

#[test]
fn temperature_must_be_positive() {
    let found = problems_after(|d| d["method"]["temperature"] = json!(0.0));
    assert_problem(&found, "method.temperature", "must be finite and > 0");
    let found = problems_after(|d| d["method"]["temperature"] = json!(-1.5));
    assert_problem(&found, "method.temperature", "got -1.5");
}

#[test]
fn knots_must_increase() {
    let found = problems_after(|d| {
        d["classes"] = json!(2);
        d["class_names"] = Value::Null;
        d["method"] = json!({"kind": "isotonic", "per_class": [{"x": [0.1, 0.5, 0.3], "y": [0.1, 0.2, 0.3]}]});
    });
    assert_problem(
        &found,
        "method.per_class[0].x[2]",
        "must be greater than the previous entry",
    );
}

#[test]
fn values_must_lie_in_the_unit_interval() {
    let found = problems_after(|d| {
        d["classes"] = json!(2);
        d["class_names"] = Value::Null;
        d["method"] = json!({"kind": "histogram", "per_class": [{"edges": [0.0, 0.5, 1.0], "values": [0.2, 1.2]}]});
    });
    assert_problem(
        &found,
        "method.per_class[0].values[1]",
        "must lie in [0, 1], got 1.2",
    );
}

#[test]
fn bins_must_cover_the_unit_interval() {
    let found = problems_after(|d| {
        d["classes"] = json!(2);
        d["class_names"] = Value::Null;
        d["method"] = json!({"kind": "histogram", "per_class": [{"edges": [0.1, 0.5, 1.0], "values": [0.2, 0.3]}]});
    });
    assert_problem(
        &found,
        "method.per_class[0].edges",
        "bins must cover [0, 1]",
    );
}

#[test]
fn thresholds_must_lie_in_the_unit_interval() {
    let found = problems_after(|d| {
        d["policy"] = json!({"threshold": 1.5, "per_class": [0.9, -0.1, null]});
    });
    assert_problem(&found, "policy.threshold", "must lie in [0, 1], got 1.5");
    assert_problem(&found, "policy.per_class[1]", "got -0.1");
    let found = problems_after(|d| d["policy"]["per_class"] = json!([0.9]));
    assert_problem(&found, "policy.per_class", "must have 3 entries, got 1");
}

#[test]
fn digest_mismatch_is_refused() {
    let mut doc = valid();
    doc["method"]["temperature"] = json!(2.5); // edited after sealing
    let err = CalibrationMap::from_value(&doc).unwrap_err();
    assert_eq!(err.problems.len(), 1);
    assert_eq!(err.problems[0].field, "digest");
    assert!(err.problems[0]
        .message
        .contains("does not match the content"));
}

#[test]
fn unknown_format_version_is_refused() {
    let found = problems_after(|d| d["format_version"] = json!(2));
    assert_problem(&found, "format_version", "unknown format version 2");
}

#[test]
fn unknown_fields_kinds_and_names_are_refused() {
    let found = problems_after(|d| {
        d["temprature"] = json!(1.0);
        d["model"] = json!("has space");
        d["method"]["kind"] = json!("magic");
    });
    assert_problem(&found, "temprature", "unknown field");
    assert_problem(&found, "model", "must be 1 to 128 characters");
    assert_problem(&found, "method.kind", "unknown method \"magic\"");
}

#[test]
fn every_problem_is_reported_at_once() {
    let found = problems_after(|d| {
        d["method"]["temperature"] = json!(-1.0);
        d["policy"]["threshold"] = json!(2.0);
        d["class_names"] = json!(["a", "a", ""]);
    });
    assert!(found.len() >= 4, "{found:#?}");
}

#[test]
fn binary_score_input_needs_two_classes() {
    let found = problems_after(|d| d["input"] = json!("binary_score"));
    assert_problem(&found, "input", "needs classes = 2");
    let found = problems_after(|d| d["classes"] = json!(1));
    assert_problem(&found, "classes", "must lie in 2..=100000");
}

#[test]
fn evidence_ranges_are_checked() {
    let found = problems_after(|d| {
        d["policy"]["evidence"] =
            json!({"confidence_level": 1.0, "accepted": 5, "items": 3, "errors": 9});
    });
    assert_problem(
        &found,
        "policy.evidence.confidence_level",
        "must lie in (0, 1)",
    );
    assert_problem(
        &found,
        "policy.evidence.accepted",
        "5 accepted out of only 3",
    );
    assert_problem(&found, "policy.evidence.errors", "9 errors among only 5");
}

#[test]
fn every_method_kind_round_trips() {
    let methods = vec![
        Method::Identity,
        Method::Platt(
            OneVsRest::try_new(3, vec![Platt::try_new(-1.0, 0.1, "m").unwrap(); 3], "m").unwrap(),
        ),
        Method::Histogram(
            OneVsRest::try_new(
                3,
                vec![Histogram::try_new(vec![0.0, 0.5, 1.0], vec![0.1, 0.9], "m").unwrap(); 3],
                "m",
            )
            .unwrap(),
        ),
        Method::Isotonic(
            OneVsRest::try_new(
                3,
                vec![Isotonic::try_new(vec![0.1, 0.9], vec![0.0, 1.0], "m").unwrap(); 3],
                "m",
            )
            .unwrap(),
        ),
        Method::Bbq(
            OneVsRest::try_new(
                3,
                vec![
                    Bbq::try_new(
                        vec![BbqModel {
                            weight: 1.0,
                            edges: vec![0.0, 0.3, 1.0],
                            values: vec![0.2, 0.8]
                        }],
                        "m",
                    )
                    .unwrap();
                    3
                ],
                "m",
            )
            .unwrap(),
        ),
        Method::Beta(
            OneVsRest::try_new(
                3,
                vec![BetaCalibration::try_new(1.0, 2.0, 0.5, 1e-12, "m").unwrap(); 3],
                "m",
            )
            .unwrap(),
        ),
        Method::Vector(
            crate::method::VectorScaling::try_new(
                3,
                vec![1.0, 2.0, 0.5],
                vec![0.0, 0.1, -0.1],
                "m",
            )
            .unwrap(),
        ),
        Method::Matrix(
            crate::method::MatrixScaling::try_new(
                3,
                vec![vec![1.0, 0.0, 0.2]; 3],
                vec![0.0; 3],
                "m",
            )
            .unwrap(),
        ),
        Method::Dirichlet(
            crate::method::Dirichlet::try_new(
                3,
                vec![vec![1.0, 0.0, 0.2]; 3],
                vec![0.0; 3],
                1e-12,
                "m",
            )
            .unwrap(),
        ),
    ];
    for method in methods {
        let kind = method.kind();
        let map = CalibrationMap::from_parts(MapParts {
            model: "m".into(),
            map_version: "1".into(),
            classes: 3,
            class_names: None,
            input: InputForm::Logits,
            method: method.clone(),
            policy: DecisionPolicy::new(None, Some(vec![Some(0.5), None, Some(1.0)]), None),
            provenance: Map::new(),
        })
        .unwrap_or_else(|e| panic!("{kind}: {e}"));
        let again = CalibrationMap::from_slice(map.to_json().as_bytes()).unwrap();
        assert_eq!(again.method(), &method, "{kind}");
        assert_eq!(again.policy(), map.policy(), "{kind}");
    }
}

/// Found by the map_file fuzz target: a document without `input` validated (it defaults to
/// logits), but `to_json` wrote `"input": "logits"` under the old digest, so the written map was
/// refused. Other lenient forms behave the same way.
#[test]
fn lenient_documents_write_back_with_their_digest() {
    let edits: [fn(&mut Value); 4] = [
        |d| {
            d.as_object_mut().unwrap().remove("input");
        },
        |d| d["policy"]["per_class"] = Value::Null,
        |d| d["policy"]["evidence"]["expected_coverage"] = Value::Null,
        // 2^53 + 1 as an integer: read as the f64 2^53, which the canonical form writes
        // differently.
        |d| d["method"]["temperature"] = json!(9007199254740993u64),
    ];
    for edit in edits {
        let mut doc = valid();
        edit(&mut doc);
        let doc = seal(doc);
        let map = CalibrationMap::from_value(&doc).unwrap();
        let text = map.to_json();
        let again = CalibrationMap::from_slice(text.as_bytes()).unwrap();
        assert_eq!(again.digest(), map.digest(), "{text}");
        assert_eq!(again.to_json(), text);
        assert_eq!(again.input(), InputForm::Logits);
    }
    // A document in the form candor writes is written from its parts, byte for byte.
    let text = CalibrationMap::from_value(&valid()).unwrap().to_json();
    assert!(CalibrationMap::from_slice(text.as_bytes())
        .unwrap()
        .original
        .is_none());
}

#[test]
fn audit_rate_and_reference_are_read_checked_and_written_back() {
    let mut doc = valid();
    doc["policy"]["audit_rate"] = json!(0.05);
    doc["provenance"]["reference"] = json!({"items": 4, "edges": [0.6, 0.9],
        "proportions": [0.25, 0.25, 0.5], "accept_rate": 0.5, "mean_confidence": 0.8});
    let doc = seal(doc);
    let map = CalibrationMap::from_value(&doc).unwrap();
    assert_eq!(map.policy().audit_rate(), Some(0.05));
    let r = map.reference().unwrap();
    assert_eq!(
        (r.items, r.edges.len(), r.bin_of(0.6), r.bin_of(0.61)),
        (4, 2, 0, 1)
    );
    assert_eq!(r.bin_of(0.95), 2);
    let back = CalibrationMap::from_slice(map.to_json().as_bytes()).unwrap();
    assert_eq!(back.digest(), map.digest());
    assert_eq!(back.reference(), map.reference());
    assert_eq!(back.policy().audit_rate(), Some(0.05));

    let found = problems_after(|d| d["policy"]["audit_rate"] = json!(1.5));
    assert_problem(&found, "policy.audit_rate", "must lie in [0, 1], got 1.5");
    let found = problems_after(|d| {
        d["provenance"]["reference"] =
            json!({"items": 4, "edges": [0.9, 0.6], "proportions": [0.25, 0.25, 0.4]})
    });
    assert_problem(
        &found,
        "provenance.reference.edges[1]",
        "strictly ascending",
    );
    assert_problem(&found, "provenance.reference.proportions", "must sum to 1");
    let found = problems_after(|d| {
        d["provenance"]["reference"] = json!({"items": 4, "edges": [0.5], "proportions": [1.0]})
    });
    assert_problem(
        &found,
        "provenance.reference.proportions",
        "one entry more than edges (2), got 1",
    );
    let found = problems_after(|d| {
        d["provenance"]["reference"] =
            json!({"items": 4, "edges": [], "proportions": [1.0], "drift": 1})
    });
    assert_problem(&found, "provenance.reference.drift", "unknown field");
}

#[test]
fn a_reference_of_tied_confidences_keeps_one_bin_per_distinct_edge() {
    // Quantiles of {0.5 ×5, 0.9 ×5} at b/10 (numpy 'linear' rule): 0.5 for b ≤ 4, 0.7 at b = 5
    // (halfway), 0.9 for b ≥ 6 — three distinct edges (closed form).
    let conf: Vec<f64> = [0.5; 5].iter().chain(&[0.9; 5]).copied().collect();
    let r = ConfidenceReference::from_confidences(&conf, Some(5)).unwrap();
    assert_eq!(r.edges, vec![0.5, 0.7, 0.9]);
    assert_eq!(r.proportions, vec![0.5, 0.0, 0.5, 0.0]);
    assert_eq!(r.accept_rate, Some(0.5));
    assert!((r.mean_confidence.unwrap() - 0.7).abs() < 1e-15);
}
