//! JSONL input: `--data FILE.jsonl` (JSON Lines: one JSON value per line, RFC 8259 JSON).
//!
//! Each non-blank line is one object `{"logits": [numbers], "label": k}`; `"label"` may be
//! absent (or null) in every row, for `apply`, but the first data row decides and the rest must
//! agree. Other keys, other shapes and rows of a different length are errors; K is the length of
//! the first row's `logits`. Lines are read one at a time into a reused buffer and parsed into
//! f64 storage. Line numbers in errors are 1-based physical lines, blank lines included.
//!
//! Numbers must parse to the nearest f64, as CSV cells do, so the same text gives the same
//! [`LabelledSet::digest`]: this needs serde_json's `float_roundtrip` feature (its default
//! parser is off by one ulp for about one value in eight of Python's `repr` output).

use std::fs::File;
use std::io::{BufRead, BufReader};
use std::path::Path;

use serde::Deserialize;
use serde_json::Value;

use super::error::{DatasetError, ErrorKind, Location, Problems};
use super::labels::{check_float, check_int, classes_for, Presence};
use super::set::LabelledSet;
use super::{LabelNeed, Logits, Source};

/// Read buffer for JSONL text.
pub const READ_BUFFER_BYTES: usize = 1 << 20;

/// The UTF-8 byte order mark, skipped at the start of the file.
const UTF8_BOM: &[u8] = b"\xEF\xBB\xBF";

/// One line as written.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Row {
    logits: Vec<f64>,
    #[serde(default)]
    label: Option<Value>,
}

/// State carried from line to line.
struct Reading<'a> {
    values: Vec<f64>,
    labels: Vec<u32>,
    k: Option<usize>,
    rows: u64,
    presence: Presence,
    problems: Problems<'a>,
}

/// Reads a JSONL dataset.
///
/// # Errors
/// Unreadable file, a line that is not an object of the expected form, ragged rows, empty
/// `logits`, non-finite logits, bad or inconsistently present labels, zero rows.
pub fn read(path: &Path, need: LabelNeed) -> Result<LabelledSet, DatasetError> {
    let file = File::open(path).map_err(|e| DatasetError::file(path, ErrorKind::Io(e)))?;
    let mut reader = BufReader::with_capacity(READ_BUFFER_BYTES, file);
    let mut state = Reading {
        values: Vec::new(),
        labels: Vec::new(),
        k: None,
        rows: 0,
        presence: Presence::new(need == LabelNeed::Required),
        problems: Problems::new(path),
    };
    let mut buf = Vec::new();
    let mut line = 0u64;
    loop {
        buf.clear();
        let read = reader.read_until(b'\n', &mut buf);
        match read {
            Ok(0) => break,
            Ok(_) => line += 1,
            Err(e) => {
                return Err(DatasetError::new(
                    path,
                    Location::Line(line + 1),
                    ErrorKind::Io(e),
                ))
            }
        }
        // A UTF-8 byte order mark (as some editors write) may open the file.
        let text = match buf.strip_prefix(UTF8_BOM) {
            Some(rest) if line == 1 => rest,
            _ => &buf[..],
        };
        if text.iter().all(u8::is_ascii_whitespace) {
            continue;
        }
        state.rows += 1;
        match serde_json::from_slice::<Row>(text) {
            Ok(row) => state.add(row, line),
            Err(e) => state.problems.push(
                Location::Line(line),
                ErrorKind::Json {
                    message: e.to_string(),
                },
            ),
        }
    }
    let Reading {
        mut values,
        labels,
        k,
        rows,
        presence,
        problems,
    } = state;
    if rows == 0 {
        return Err(DatasetError::file(path, ErrorKind::ZeroRows));
    }
    problems.finish()?;
    let Some(k) = k else {
        return Err(DatasetError::file(path, ErrorKind::ZeroRows));
    };
    values.shrink_to_fit();
    let labels = presence.labelled().then_some(labels);
    Ok(LabelledSet::from_checked(
        Logits::F64(values),
        k,
        labels,
        Source::Jsonl(path.to_path_buf()),
    ))
}

impl Reading<'_> {
    /// Checks one parsed row and appends it; a ragged or empty row adds nothing.
    fn add(&mut self, row: Row, line: u64) {
        let here = Location::Line(line);
        if row.logits.is_empty() {
            self.problems.push(here, ErrorKind::NoLogitColumns);
            return;
        }
        let k = *self.k.get_or_insert(row.logits.len());
        if row.logits.len() != k {
            let kind = ErrorKind::Ragged {
                expected: k,
                got: row.logits.len(),
                unit: "logits",
            };
            self.problems.push(here, kind);
            return;
        }
        for (class, &value) in row.logits.iter().enumerate() {
            if !value.is_finite() {
                self.problems.push(
                    Location::LineClass { line, class },
                    ErrorKind::NonFinite { value },
                );
            }
        }
        self.values.extend_from_slice(&row.logits);
        if let Some(kind) = self.presence.observe(row.label.is_some()) {
            self.problems.push(here, kind);
        }
        if self.presence.labelled() {
            let label = row
                .label
                .as_ref()
                .map_or(Ok(0), |v| json_label(v, classes_for(k)));
            let label = label.unwrap_or_else(|kind| {
                self.problems.push(here, kind);
                0
            });
            self.labels.push(label);
        }
    }
}

/// Checks a JSON label value: a whole number below `classes`.
fn json_label(value: &Value, classes: usize) -> Result<u32, ErrorKind> {
    match value {
        Value::Number(num) => {
            if let Some(i) = num.as_i64() {
                check_int(i.into(), classes)
            } else if let Some(u) = num.as_u64() {
                check_int(u.into(), classes)
            } else {
                check_float(num.as_f64().unwrap_or(f64::NAN), &num.to_string(), classes)
            }
        }
        other => Err(ErrorKind::LabelNotInteger {
            text: other.to_string(),
        }),
    }
}

#[cfg(test)]
#[path = "jsonl_tests.rs"]
mod tests;
