//! Tests for `LabelledSet`: digest against Python's hashlib, checks and accessors against
//! literal inputs.

use super::*;

fn small() -> LabelledSet {
    let logits = Logits::F64(vec![0.5, -1.25, 3.0, 0.0]);
    LabelledSet::try_new(logits, 2, Some(vec![1, 0])).unwrap()
}

#[test]
fn digest_matches_reference_encoding() {
    // python3: hashlib.sha256(b'candor.dataset.v1\0' + struct.pack('<QQ',2,2)
    //   + struct.pack('<4d',0.5,-1.25,3.0,0.0) + b'\x01' + struct.pack('<2Q',1,0)).hexdigest()
    let expected = "e6af114bc4eecc88a8900a5a82e65114d5091fd204f0c4ba27b214db19a75fc4";
    assert_eq!(small().digest(), expected);
    // Same call without labels: ... + b'\x00' (no label bytes).
    let unlabelled =
        LabelledSet::try_new(Logits::F64(vec![0.5, -1.25, 3.0, 0.0]), 2, None).unwrap();
    let expected = "f7b6171fe05e119b658d18074e8318311d51158be807549a82106be65292778a";
    assert_eq!(unlabelled.digest(), expected);
}

#[test]
fn digest_ignores_precision_and_sign_of_zero() {
    let f32_set = LabelledSet::try_new(
        Logits::F32(vec![0.5, -1.25, 3.0, -0.0]),
        2,
        Some(vec![1, 0]),
    )
    .unwrap();
    assert_eq!(f32_set.digest(), small().digest());
    let other = LabelledSet::try_new(
        Logits::F64(vec![0.5, -1.25, 3.0, 0.0]),
        1,
        Some(vec![1, 0, 0, 1]),
    )
    .unwrap();
    assert_ne!(other.digest(), small().digest());
}

#[test]
fn accessors_and_counts() {
    let s = small();
    assert_eq!((s.n(), s.k(), s.classes()), (2, 2, 2));
    let mut row = [0.0; 2];
    s.row_f64(1, &mut row);
    assert_eq!(row, [3.0, 0.0]);
    assert_eq!(s.class_counts(), Some(vec![1, 1]));
    let f32_set = LabelledSet::try_new(Logits::F32(vec![0.1, 2.0]), 1, None).unwrap();
    let mut one = [0.0; 1];
    f32_set.row_f64(0, &mut one);
    assert_eq!(one[0], f64::from(0.1f32));
    assert_eq!(f32_set.class_counts(), None);
    assert_eq!(f32_set.classes(), 2);
}

#[test]
fn set_level_checks() {
    let s = small();
    assert!(s.require_rows(2, "temperature scaling").is_ok());
    let err = s.require_rows(3, "isotonic regression").unwrap_err();
    assert_eq!(err.path(), Path::new(MEMORY_PATH));
    assert!(
        matches!(err.kind(), ErrorKind::TooFewRows { rows: 2, min: 3, what } if what == "isotonic regression")
    );
    assert!(s.require_two_classes().is_ok());
    assert!(s.check_classes(2).is_ok());
    assert!(matches!(
        s.check_classes(3).unwrap_err().kind(),
        ErrorKind::ClassesMismatch {
            expected: 3,
            found: 2
        }
    ));
    let one = LabelledSet::try_new(Logits::F64(vec![1.0, 2.0]), 1, Some(vec![1, 1])).unwrap();
    assert!(matches!(
        one.require_two_classes().unwrap_err().kind(),
        ErrorKind::OneClass { class: 1 }
    ));
    let none = LabelledSet::try_new(Logits::F64(vec![1.0]), 1, None).unwrap();
    assert!(matches!(
        none.require_two_classes().unwrap_err().kind(),
        ErrorKind::NoLabels
    ));
}

#[test]
fn try_new_rejects_bad_values() {
    let err = LabelledSet::try_new(
        Logits::F64(vec![1.0, f64::NAN, 0.0, f64::INFINITY]),
        2,
        None,
    )
    .unwrap_err();
    assert_eq!(err.location(), Location::RowClass { row: 0, class: 1 });
    assert_eq!(err.more().len(), 1);
    assert_eq!(
        err.more()[0].location,
        Location::RowClass { row: 1, class: 1 }
    );
    let err = LabelledSet::try_new(Logits::F64(vec![1.0, 2.0]), 1, Some(vec![0, 2])).unwrap_err();
    assert_eq!(err.location(), Location::Row(1));
    assert!(matches!(
        err.kind(),
        ErrorKind::LabelOutOfRange {
            value: 2,
            classes: 2
        }
    ));
    let err = LabelledSet::try_new(Logits::F64(vec![1.0, 2.0, 3.0]), 2, None).unwrap_err();
    assert!(matches!(
        err.kind(),
        ErrorKind::Ragged {
            expected: 2,
            got: 1,
            ..
        }
    ));
    let err = LabelledSet::try_new(Logits::F64(vec![]), 2, None).unwrap_err();
    assert!(matches!(err.kind(), ErrorKind::ZeroRows));
    let err = LabelledSet::try_new(Logits::F64(vec![1.0]), 1, Some(vec![0, 1])).unwrap_err();
    assert!(matches!(
        err.kind(),
        ErrorKind::LabelsLength { labels: 2, rows: 1 }
    ));
}

#[test]
fn problems_are_capped() {
    let err = LabelledSet::try_new(Logits::F64(vec![f64::NAN; 25]), 1, None).unwrap_err();
    assert_eq!(err.more().len(), MAX_PROBLEMS_FOR_TEST - 1);
    assert_eq!(err.omitted(), 5);
    assert!(err.to_string().ends_with("and 5 more problems"));
}

const MAX_PROBLEMS_FOR_TEST: usize = crate::dataset::MAX_PROBLEMS;

#[test]
fn messages_name_file_and_place() {
    let e = LabelledSet::try_new(Logits::F64(vec![]), 1, None).unwrap_err();
    assert_eq!(e.to_string(), "<memory>: no data rows");
    let e = LabelledSet::try_new(Logits::F64(vec![1.0, f64::INFINITY]), 1, Some(vec![0, 3]))
        .unwrap_err();
    let expected = "<memory>: row 2 (numpy index 1), logit of class 0: non-finite logit inf\n  \
                    also <memory>: row 2 (numpy index 1): label 3 is out of range: 2 classes allow 0..=1 (binary)";
    assert_eq!(e.to_string(), expected);
}
