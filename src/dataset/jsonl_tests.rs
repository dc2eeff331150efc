//! Tests for the JSONL reader: literal files written to a temp dir; expected values are the
//! literals themselves.

use std::path::{Path, PathBuf};

use super::*;
use crate::dataset::{LabelledSet, Location};

fn put(dir: &Path, text: &str) -> PathBuf {
    let path = dir.join("data.jsonl");
    std::fs::write(&path, text).unwrap();
    path
}

fn ok(text: &str, need: LabelNeed) -> LabelledSet {
    let dir = tempfile::tempdir().unwrap();
    read(&put(dir.path(), text), need).unwrap()
}

fn fail(text: &str, need: LabelNeed) -> DatasetError {
    let dir = tempfile::tempdir().unwrap();
    read(&put(dir.path(), text), need).unwrap_err()
}

/// The first problem's location and message.
fn first(text: &str, need: LabelNeed) -> (Location, String) {
    let e = fail(text, need);
    assert!(e.path().ends_with("data.jsonl"));
    (e.location(), e.kind().to_string())
}

#[test]
fn rows_labels_and_blank_lines() {
    let text = "{\"logits\": [0.5, -1.25, 3], \"label\": 2}\n\n  \r\n{\"label\": 0, \"logits\": [1e-3, 0, -7.5]}\r\n";
    let set = ok(text, LabelNeed::Required);
    assert_eq!(
        set.logits(),
        &Logits::F64(vec![0.5, -1.25, 3.0, 1e-3, 0.0, -7.5])
    );
    assert_eq!(
        (set.n(), set.k(), set.labels()),
        (2, 3, Some(&[2u32, 0][..]))
    );
    assert!(matches!(set.source(), Some(Source::Jsonl(_))));
}

#[test]
fn byte_order_mark_is_skipped() {
    let set = ok(
        "\u{feff}{\"logits\": [1, 2], \"label\": 1}\r\n",
        LabelNeed::Required,
    );
    assert_eq!((set.n(), set.labels()), (1, Some(&[1u32][..])));
}

#[test]
fn labels_optional_for_apply() {
    let set = ok(
        "{\"logits\": [0.3]}\n{\"logits\": [-2], \"label\": null}\n",
        LabelNeed::Optional,
    );
    assert_eq!((set.k(), set.classes(), set.labels()), (1, 2, None));
    let set = ok("{\"logits\": [0.3], \"label\": 1}\n", LabelNeed::Optional);
    assert_eq!(set.labels(), Some(&[1u32][..]));
}

#[test]
fn label_presence_must_agree() {
    let missing = "this row has no label".to_string();
    let unexpected =
        "this row has a label but the first data row had none: label all rows or none".to_string();
    let text = "{\"logits\": [1]}\n";
    assert_eq!(
        first(text, LabelNeed::Required),
        (Location::Line(1), missing.clone())
    );
    let text = "{\"logits\": [1], \"label\": 0}\n\n{\"logits\": [1]}\n";
    assert_eq!(
        first(text, LabelNeed::Optional),
        (Location::Line(3), missing)
    );
    let text = "{\"logits\": [1]}\n{\"logits\": [1], \"label\": 0}\n";
    assert_eq!(
        first(text, LabelNeed::Optional),
        (Location::Line(2), unexpected)
    );
}

#[test]
fn malformed_lines() {
    let cases = [
        ("[1, 2]\n", Location::Line(1)),
        ("{\"logits\": [1], \"id\": 7}\n", Location::Line(1)),
        ("{\"logits\": [1, \"a\"]}\n", Location::Line(1)),
        ("\n{\"logits\": [1e999]}\n", Location::Line(2)),
        ("{\"logits\": [1]} trailing\n", Location::Line(1)),
        ("{\"label\": 1}\n", Location::Line(1)),
        ("not json\n", Location::Line(1)),
    ];
    for (text, location) in cases {
        let e = fail(text, LabelNeed::Optional);
        assert_eq!(e.location(), location, "{text:?}");
        assert!(matches!(e.kind(), ErrorKind::Json { .. }), "{text:?}: {e}");
    }
}

#[test]
fn row_problems_are_collected_with_lines() {
    let text = concat!(
        "{\"logits\": [0, 1], \"label\": 1}\n",
        "{\"logits\": [0, 1, 2], \"label\": 1}\n",
        "{\"logits\": [], \"label\": 1}\n",
        "{\"logits\": [0, 1], \"label\": \"1\"}\n",
        "{\"logits\": [0, 1], \"label\": 1.5}\n",
        "{\"logits\": [0, 1], \"label\": -1}\n",
        "{\"logits\": [0, 1], \"label\": 2}\n",
        "{\"logits\": [0, 1], \"label\": 1.0}\n",
    );
    let e = fail(text, LabelNeed::Required);
    let got: Vec<_> = std::iter::once((e.location(), e.kind().to_string()))
        .chain(e.more().iter().map(|p| (p.location, p.kind.to_string())))
        .collect();
    let expected = [
        (Location::Line(2), "ragged row: expected 2 logits, got 3"),
        (
            Location::Line(3),
            "no logits: each row needs at least one (in CSV, every column other than `label`)",
        ),
        (Location::Line(4), "label \"1\" is not an integer"),
        (Location::Line(5), "label 1.5 is not an integer"),
        (
            Location::Line(6),
            "label -1 is negative: labels are class indices 0..K-1",
        ),
        (
            Location::Line(7),
            "label 2 is out of range: 2 classes allow 0..=1 (binary)",
        ),
    ];
    let expected: Vec<_> = expected.iter().map(|(l, m)| (*l, m.to_string())).collect();
    assert_eq!(got, expected);
}

#[test]
fn zero_rows() {
    assert!(matches!(
        fail("", LabelNeed::Optional).kind(),
        ErrorKind::ZeroRows
    ));
    assert!(matches!(
        fail("\n \n\t\n", LabelNeed::Optional).kind(),
        ErrorKind::ZeroRows
    ));
}

#[test]
fn decimals_parse_to_the_nearest_f64() {
    // serde_json without its `float_roundtrip` feature parses these one ulp off (to
    // 0.9053558666731176 and 0.3645723961860758); Rust float literals are correctly rounded.
    let set = ok(
        "{\"logits\": [0.9053558666731177, 0.36457239618607573]}\n",
        LabelNeed::Optional,
    );
    let expected = vec![0.9053558666731177, 0.36457239618607573];
    assert_eq!(set.logits(), &Logits::F64(expected));
}
