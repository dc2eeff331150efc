//! Tests for the `.npy` reader. Files are built byte by byte per the NumPy `.npy` format
//! description (magic, version, header length, padded dict, data); `npy_bytes` is checked
//! against files numpy 2.4.6 wrote.

use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};

use super::*;
use crate::dataset::{read as read_source, LabelNeed, Logits, Source};

/// A `.npy` file: version `major`.0, dtype `descr`, shape as Python tuple text, raw data.
fn npy_bytes(major: u8, descr: &str, fortran: bool, shape: &str, data: &[u8]) -> Vec<u8> {
    let fortran = if fortran { "True" } else { "False" };
    let mut dict =
        format!("{{'descr': '{descr}', 'fortran_order': {fortran}, 'shape': {shape}, }}");
    let prefix = if major == 1 { 10 } else { 12 };
    // numpy leaves 21 spaces for the shape to grow, then pads to a multiple of 64 ending in '\n'.
    let unpadded = prefix + dict.len() + 21 + 1;
    let total = unpadded.div_ceil(64) * 64;
    dict.push_str(&" ".repeat(total - prefix - dict.len() - 1));
    dict.push('\n');
    let mut out = b"\x93NUMPY".to_vec();
    out.extend_from_slice(&[major, 0]);
    if major == 1 {
        out.extend_from_slice(&(dict.len() as u16).to_le_bytes());
    } else {
        out.extend_from_slice(&(dict.len() as u32).to_le_bytes());
    }
    out.extend_from_slice(dict.as_bytes());
    out.extend_from_slice(data);
    out
}

fn f32le(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn f64le(v: &[f64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn put(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

/// Writes a version 1.0, C-order file `name` into `dir`.
fn file(dir: &Path, name: &str, descr: &str, shape: &str, data: &[u8]) -> PathBuf {
    put(dir, name, &npy_bytes(1, descr, false, shape, data))
}

/// Small non-negative integers as `size`-byte integers of the given byte order.
fn ints(values: &[u8], size: usize, big_endian: bool) -> Vec<u8> {
    let one = |&v: &u8| {
        let mut b = vec![0u8; size];
        b[if big_endian { size - 1 } else { 0 }] = v;
        b
    };
    values.iter().flat_map(one).collect()
}

fn sha(bytes: &[u8]) -> String {
    hex::encode(Sha256::digest(bytes))
}

#[test]
fn builder_matches_numpy_files() {
    // python3: buf = io.BytesIO(); np.save(buf, a); hashlib.sha256(buf.getvalue()).hexdigest()
    // with a = np.array([[1.5, -2.0], [0.25, 3.0]], dtype='<f4')
    let b = npy_bytes(1, "<f4", false, "(2, 2)", &f32le(&[1.5, -2.0, 0.25, 3.0]));
    assert_eq!(
        sha(&b),
        "1166d8dd0ecdaf708968932d349c31e073eb3e510c34ee248ccd57524537b6f7"
    );
    // a = np.array([1, 0], dtype=np.int16)
    let b = npy_bytes(1, "<i2", false, "(2,)", &[1, 0, 0, 0]);
    assert_eq!(
        sha(&b),
        "12a535d9f02849a062fec9f9dbf99384ce679068bbd5ff2bac907078c6865f11"
    );
    // a = np.asfortranarray(np.array([[1., 2., 3.], [4., 5., 6.]]))
    let b = npy_bytes(
        1,
        "<f8",
        true,
        "(2, 3)",
        &f64le(&[1.0, 4.0, 2.0, 5.0, 3.0, 6.0]),
    );
    assert_eq!(
        sha(&b),
        "2e0fb6c2fa795ca385c6c59d72c9c23d46e7a5b3885e112601b5642d5334cdbd"
    );
    // a = np.array([0.5, -1.0, 2.0], dtype='>f8')
    let be: Vec<u8> = [0.5f64, -1.0, 2.0]
        .iter()
        .flat_map(|x| x.to_be_bytes())
        .collect();
    let b = npy_bytes(1, ">f8", false, "(3,)", &be);
    assert_eq!(
        sha(&b),
        "5067566b97b685e10c133c765e2674c1ee076c976a8f22fdcda05f6ad5f3a067"
    );
}

#[test]
fn f32_matrix_with_int16_labels() {
    let dir = tempfile::tempdir().unwrap();
    let x = file(
        dir.path(),
        "x.npy",
        "<f4",
        "(2, 2)",
        &f32le(&[1.5, -2.0, 0.25, 3.0]),
    );
    let y = file(dir.path(), "y.npy", "<i2", "(2,)", &[1, 0, 0, 0]);
    let source = Source::Npy {
        logits: x,
        labels: Some(y),
    };
    let set = read_source(&source, LabelNeed::Required).unwrap();
    assert_eq!(set.logits(), &Logits::F32(vec![1.5, -2.0, 0.25, 3.0]));
    assert_eq!(
        (set.n(), set.k(), set.labels()),
        (2, 2, Some(&[1u32, 0][..]))
    );
    assert_eq!(set.source(), Some(&source));
}

#[test]
fn fortran_order_is_read_row_major() {
    let dir = tempfile::tempdir().unwrap();
    let data = f64le(&[1.0, 4.0, 2.0, 5.0, 3.0, 6.0]);
    let x = put(
        dir.path(),
        "x.npy",
        &npy_bytes(1, "<f8", true, "(2, 3)", &data),
    );
    let (logits, k) = read_logits(&x).unwrap();
    assert_eq!(
        (logits, k),
        (Logits::F64(vec![1.0, 2.0, 3.0, 4.0, 5.0, 6.0]), 3)
    );
}

#[test]
fn one_score_per_row_in_every_spelling() {
    let dir = tempfile::tempdir().unwrap();
    let be: Vec<u8> = [0.5f64, -1.0, 2.0]
        .iter()
        .flat_map(|x| x.to_be_bytes())
        .collect();
    let flat = file(dir.path(), "flat.npy", ">f8", "(3,)", &be);
    let column = file(
        dir.path(),
        "col.npy",
        "<f8",
        "(3, 1)",
        &f64le(&[0.5, -1.0, 2.0]),
    );
    let y = file(dir.path(), "y.npy", "|u1", "(3,)", &[1, 0, 1]);
    for x in [flat, column] {
        let set = read(&x, Some(&y), LabelNeed::Required).unwrap();
        assert_eq!(set.logits(), &Logits::F64(vec![0.5, -1.0, 2.0]));
        assert_eq!(
            (set.k(), set.classes(), set.class_counts()),
            (1, 2, Some(vec![1, 2]))
        );
    }
}

#[test]
fn every_label_dtype() {
    let dir = tempfile::tempdir().unwrap();
    let x = file(dir.path(), "x.npy", "<f4", "(3, 3)", &f32le(&[0.0; 9]));
    let cases = [
        ("|i1", ints(&[2, 0, 1], 1, false)),
        ("<i2", ints(&[2, 0, 1], 2, false)),
        (">i4", ints(&[2, 0, 1], 4, true)),
        ("<i8", ints(&[2, 0, 1], 8, false)),
        ("|u1", ints(&[2, 0, 1], 1, false)),
        ("<u2", ints(&[2, 0, 1], 2, false)),
        ("<u4", ints(&[2, 0, 1], 4, false)),
        (">u8", ints(&[2, 0, 1], 8, true)),
        ("<f4", f32le(&[2.0, 0.0, 1.0])),
        ("<f8", f64le(&[2.0, 0.0, 1.0])),
    ];
    for (descr, data) in cases {
        let y = file(dir.path(), "y.npy", descr, "(3,)", &data);
        let set = read(&x, Some(&y), LabelNeed::Required).unwrap();
        assert_eq!(set.labels(), Some(&[2u32, 0, 1][..]), "dtype {descr}");
    }
    let y = file(dir.path(), "b.npy", "|b1", "(3, 1)", &[1, 0, 1]);
    assert_eq!(read_labels(&y, 3, 2).unwrap(), vec![1, 0, 1]);
}

#[test]
fn header_versions_two_and_three() {
    let dir = tempfile::tempdir().unwrap();
    for major in [2, 3] {
        let x = put(
            dir.path(),
            "x.npy",
            &npy_bytes(major, "<f8", false, "(2,)", &f64le(&[1.0, -1.0])),
        );
        let (logits, k) = read_logits(&x).unwrap();
        assert_eq!(
            (logits, k),
            (Logits::F64(vec![1.0, -1.0]), 1),
            "version {major}"
        );
    }
}

#[test]
fn unlabelled_for_apply() {
    let dir = tempfile::tempdir().unwrap();
    let x = file(dir.path(), "x.npy", "<f8", "(2,)", &f64le(&[1.0, -1.0]));
    let set = read(&x, None, LabelNeed::Optional).unwrap();
    assert_eq!(set.labels(), None);
    let err = read(&x, None, LabelNeed::Required).unwrap_err();
    assert_eq!(err.path(), x);
    assert!(matches!(err.kind(), ErrorKind::NoLabels));
}

/// Reads logits `x` (and labels `y`) and returns the error.
fn fail(x: &Path, y: Option<&Path>) -> DatasetError {
    read(x, y, LabelNeed::Optional).unwrap_err()
}

#[test]
fn logits_file_errors() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let half = file(d, "h.npy", "<f2", "(2,)", &[0, 0, 0, 0]);
    let e = fail(&half, None);
    assert!(
        matches!(e.kind(), ErrorKind::NpyDtype { array: "logits", found, .. } if found == "<f2")
    );
    assert_eq!(e.path(), half);
    let ints = file(d, "i.npy", "<i4", "(1,)", &[0; 4]);
    assert!(matches!(
        fail(&ints, None).kind(),
        ErrorKind::NpyDtype { .. }
    ));
    let cube = file(d, "c.npy", "<f8", "(1, 1, 1)", &[0; 8]);
    assert!(
        matches!(fail(&cube, None).kind(), ErrorKind::NpyShape { found, .. } if found == &[1, 1, 1])
    );
    let short = file(d, "s.npy", "<f4", "(2, 2)", &[0; 12]);
    let e = fail(&short, None);
    assert!(matches!(
        e.kind(),
        ErrorKind::NpyLength {
            expected_bytes: 16,
            found_bytes: 12
        }
    ));
    let junk = put(d, "j.npy", b"x,y\n1,2\n");
    assert!(matches!(
        fail(&junk, None).kind(),
        ErrorKind::NpyHeader { .. }
    ));
    let empty = file(d, "e.npy", "<f4", "(0, 3)", &[]);
    assert!(matches!(fail(&empty, None).kind(), ErrorKind::ZeroRows));
    let missing = d.join("absent.npy");
    let e = fail(&missing, None);
    assert!(matches!(e.kind(), ErrorKind::Io(_)));
    assert_eq!(e.path(), missing);
}

#[test]
fn non_finite_logits_name_row_and_class() {
    let dir = tempfile::tempdir().unwrap();
    let data = f32le(&[0.0, 1.0, 2.0, 3.0, 4.0, f32::NAN]);
    let x = file(dir.path(), "x.npy", "<f4", "(2, 3)", &data);
    let e = fail(&x, None);
    assert_eq!(e.location(), Location::RowClass { row: 1, class: 2 });
    assert!(matches!(e.kind(), ErrorKind::NonFinite { value } if value.is_nan()));
    let text = e.to_string();
    assert!(
        text.ends_with("x.npy: row 2 (numpy index 1), logit of class 2: non-finite logit NaN"),
        "{text}"
    );
}

#[test]
fn labels_file_errors() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let x3 = file(d, "x.npy", "<f4", "(3, 3)", &f32le(&[0.0; 9]));
    let short = file(d, "short.npy", "|u1", "(2,)", &[0, 1]);
    let e = fail(&x3, Some(&short));
    assert_eq!(e.path(), short);
    assert!(matches!(
        e.kind(),
        ErrorKind::LabelsLength { labels: 2, rows: 3 }
    ));
    let high = file(d, "high.npy", "|u1", "(3,)", &[0, 1, 3]);
    let e = fail(&x3, Some(&high));
    assert_eq!((e.path(), e.location()), (high.as_path(), Location::Row(2)));
    assert!(matches!(
        e.kind(),
        ErrorKind::LabelOutOfRange {
            value: 3,
            classes: 3
        }
    ));
    let neg = file(d, "neg.npy", "|i1", "(3,)", &[0, 255, 1]);
    let e = fail(&x3, Some(&neg));
    assert_eq!(e.location(), Location::Row(1));
    assert!(matches!(e.kind(), ErrorKind::LabelNegative { value: -1 }));
    let frac = file(d, "frac.npy", "<f8", "(3,)", &f64le(&[0.0, 0.5, 1.0]));
    assert!(
        matches!(fail(&x3, Some(&frac)).kind(), ErrorKind::LabelNotInteger { text } if text == "0.5")
    );
    let wide = file(d, "wide.npy", "|u1", "(3, 2)", &[0; 6]);
    assert!(matches!(
        fail(&x3, Some(&wide)).kind(),
        ErrorKind::NpyShape {
            array: "labels",
            ..
        }
    ));
    let text = file(d, "text.npy", "<U1", "(3,)", &[0; 12]);
    assert!(matches!(
        fail(&x3, Some(&text)).kind(),
        ErrorKind::NpyDtype {
            array: "labels",
            ..
        }
    ));
    // One score per row: labels must be 0/1.
    let x1 = file(d, "x1.npy", "<f8", "(3,)", &f64le(&[0.0; 3]));
    let data: Vec<u8> = [0i64, 1, 2].iter().flat_map(|v| v.to_le_bytes()).collect();
    let two = file(d, "two.npy", "<i8", "(3,)", &data);
    let e = fail(&x1, Some(&two));
    assert!(matches!(
        e.kind(),
        ErrorKind::LabelOutOfRange {
            value: 2,
            classes: 2
        }
    ));
    assert!(
        e.to_string().contains("2 classes allow 0..=1 (binary)"),
        "{e}"
    );
}

#[test]
fn huge_declared_shape_is_an_error_not_a_panic() {
    let dir = tempfile::tempdir().unwrap();
    let shape = "(4294967296, 4294967296, 16)";
    let x = put(
        dir.path(),
        "x.npy",
        &npy_bytes(1, "<f8", false, shape, &[0; 8]),
    );
    let e = fail(&x, None);
    assert!(
        matches!(
            e.kind(),
            ErrorKind::NpyHeader { .. } | ErrorKind::NpyShape { .. }
        ),
        "{e}"
    );
}
