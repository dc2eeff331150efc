//! Tests for the CSV reader: literal files written to a temp dir; expected values are the
//! literals themselves (decimal text → nearest f64, Rust `str::parse`).

use std::io::Write;
use std::path::{Path, PathBuf};

use super::*;
use crate::dataset::{LabelledSet, Location};

fn put(dir: &Path, text: &str) -> PathBuf {
    let path = dir.join("data.csv");
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

#[test]
fn label_column_anywhere_logits_in_header_order() {
    let set = ok(
        "z0, z1, Label, z2\n0.5,-1.25,2,3\r\n\"1e-3\",0,0,-7.5\n",
        LabelNeed::Required,
    );
    assert_eq!(
        set.logits(),
        &Logits::F64(vec![0.5, -1.25, 3.0, 1e-3, 0.0, -7.5])
    );
    assert_eq!(
        (set.n(), set.k(), set.labels()),
        (2, 3, Some(&[2u32, 0][..]))
    );
    assert!(matches!(set.source(), Some(Source::Csv(p)) if p.ends_with("data.csv")));
}

#[test]
fn unlabelled_and_one_score_per_row() {
    let set = ok("s\n0.5\n-2\n", LabelNeed::Optional);
    assert_eq!((set.k(), set.classes(), set.labels()), (1, 2, None));
    let set = ok("s,label\n0.5,1\n-2,0\n", LabelNeed::Required);
    assert_eq!(set.labels(), Some(&[1u32, 0][..]));
    let e = fail("s,label\n0.5,1\n-2,2\n", LabelNeed::Required);
    assert_eq!(e.location(), Location::Line(3));
    assert!(matches!(
        e.kind(),
        ErrorKind::LabelOutOfRange {
            value: 2,
            classes: 2
        }
    ));
}

#[test]
fn header_problems() {
    let e = fail("a,b\n1,2\n", LabelNeed::Required);
    assert_eq!(e.location(), Location::Line(1));
    assert!(matches!(e.kind(), ErrorKind::MissingLabelColumn));
    assert!(matches!(
        fail("label,a,LABEL\n0,1,0\n", LabelNeed::Optional).kind(),
        ErrorKind::DuplicateLabelColumn
    ));
    assert!(matches!(
        fail("label\n0\n", LabelNeed::Optional).kind(),
        ErrorKind::NoLogitColumns
    ));
    assert!(matches!(
        fail("a,label\n", LabelNeed::Required).kind(),
        ErrorKind::ZeroRows
    ));
    assert!(matches!(
        fail("", LabelNeed::Optional).kind(),
        ErrorKind::ZeroRows
    ));
}

#[test]
fn row_problems_name_file_line_and_class() {
    let text = "a,b,label\n1,2,0\n1,2\nnan,inf,1\n1,x,1\n3,4,1.5\n5,6,-1\n7,8,\n";
    let e = fail(text, LabelNeed::Required);
    assert!(e.path().ends_with("data.csv"));
    assert_eq!(e.location(), Location::Line(3));
    assert!(matches!(
        e.kind(),
        ErrorKind::Ragged {
            expected: 3,
            got: 2,
            unit: "fields"
        }
    ));
    let rest: Vec<_> = e
        .more()
        .iter()
        .map(|p| (p.location, p.kind.to_string()))
        .collect();
    let expected = [
        (
            Location::LineClass { line: 4, class: 0 },
            "non-finite logit NaN",
        ),
        (
            Location::LineClass { line: 4, class: 1 },
            "non-finite logit inf",
        ),
        (
            Location::LineClass { line: 5, class: 1 },
            "not a number: \"x\"",
        ),
        (Location::Line(6), "label 1.5 is not an integer"),
        (
            Location::Line(7),
            "label -1 is negative: labels are class indices 0..K-1",
        ),
        (Location::Line(8), "this row has no label"),
    ];
    let expected: Vec<_> = expected.iter().map(|(l, m)| (*l, m.to_string())).collect();
    assert_eq!(rest, expected);
    let first = e.to_string();
    assert!(
        first.contains("data.csv: line 3: ragged row: expected 3 fields, got 2"),
        "{first}"
    );
}

#[test]
fn blank_lines_are_skipped_and_counted() {
    let e = fail("a,label\n\n1,0\n\n2,5\n", LabelNeed::Required);
    assert_eq!(e.location(), Location::Line(5));
    let set = ok("a,label\n\n1,0\n\n2,1\n\n", LabelNeed::Required);
    assert_eq!(set.n(), 2);
    // CRLF endings and blank lines before the header.
    let e = fail(
        "\r\na,label\r\n\r\n1,0\r\n\r\n\r\n2\r\n",
        LabelNeed::Required,
    );
    assert_eq!(e.location(), Location::Line(7));
    let e = fail("\r\na,b\r\n", LabelNeed::Required);
    assert_eq!(e.location(), Location::Line(2));
    // A quoted field spanning two lines: the next record starts on line 4.
    let e = fail("a,label\n\"1\n\",5\n2,x\n", LabelNeed::Required);
    assert_eq!(e.location(), Location::Line(2));
    assert_eq!(e.more()[0].location, Location::Line(4));
}

#[test]
fn two_hundred_thousand_rows_stream() {
    // 200k rows x 4 logits: values are small dyadic rationals so text → f64 is exact.
    const ROWS: usize = 200_000;
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("big.csv");
    let mut w = std::io::BufWriter::new(std::fs::File::create(&path).unwrap());
    writeln!(w, "z0,z1,z2,z3,label").unwrap();
    let mut values = Vec::with_capacity(ROWS * 4);
    let mut labels = Vec::with_capacity(ROWS);
    for i in 0..ROWS {
        let row = [
            (i % 97) as f64 * 0.25,
            -((i % 13) as f64) * 0.5,
            (i % 7) as f64,
            -1.5,
        ];
        writeln!(w, "{},{},{},{},{}", row[0], row[1], row[2], row[3], i % 4).unwrap();
        values.extend_from_slice(&row);
        labels.push((i % 4) as u32);
    }
    w.flush().unwrap();
    drop(w);
    let started = std::time::Instant::now();
    let set = read(&path, LabelNeed::Required).unwrap();
    let elapsed = started.elapsed();
    eprintln!("read {ROWS} CSV rows in {elapsed:?}");
    assert_eq!((set.n(), set.k()), (ROWS, 4));
    assert_eq!(set.class_counts(), Some(vec![ROWS / 4; 4]));
    let in_memory = LabelledSet::try_new(Logits::F64(values), 4, Some(labels)).unwrap();
    assert_eq!(set.digest(), in_memory.digest());
    assert_eq!(set.logits(), in_memory.logits());
}

#[test]
fn byte_order_mark_before_the_header() {
    let set = ok("\u{feff}label,z0\n1,2\n", LabelNeed::Required);
    assert_eq!((set.k(), set.labels()), (1, Some(&[1u32][..])));
    let e = fail("\u{feff}label,z0\n1,2\n5,0\n", LabelNeed::Required);
    assert_eq!(e.location(), Location::Line(3));
}
