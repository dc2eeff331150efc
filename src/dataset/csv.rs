//! CSV input: `--data FILE.csv` (RFC 4180 as read by the `csv` crate).
//!
//! A header row; a `label` column (any position, name matched without regard to ASCII case;
//! optional when labels are not required, but when present every row needs a label); every
//! other column is a logit, in header order, so
//! K = number of columns − (1 if labelled). Cells are trimmed of ASCII whitespace (here rather
//! than by the csv crate's `Trim`, which costs a copy per record). Records are read one at a time
//! into a reused buffer and parsed into f64 storage, so memory holds the numbers, never the text.
//! Line numbers in errors are 1-based physical lines (the header is line 1).

use std::collections::VecDeque;
use std::fs::File;
use std::io::Read;
use std::path::Path;

use ::csv::{ByteRecord, ReaderBuilder};

use super::error::{DatasetError, ErrorKind, Location, Problems};
use super::labels::{classes_for, parse_text};
use super::set::LabelledSet;
use super::{LabelNeed, Logits, Source};

/// Read buffer for CSV text.
pub const READ_BUFFER_BYTES: usize = 1 << 20;

/// Name of the label column (compared ignoring ASCII case).
pub const LABEL_COLUMN: &str = "label";

/// Which header columns hold what.
#[derive(Debug)]
struct Layout {
    /// Index of the label column, if any.
    label: Option<usize>,
    /// Number of fields per record.
    fields: usize,
}

/// Values accumulated while reading.
struct Rows {
    values: Vec<f64>,
    labels: Option<Vec<u32>>,
    rows: u64,
}

/// Reads a CSV dataset.
///
/// # Errors
/// Unreadable file, malformed CSV, no header, no logit columns, duplicate or (when required)
/// missing `label` column, ragged rows, unparsable or non-finite logits, bad labels, zero rows.
pub fn read(path: &Path, need: LabelNeed) -> Result<LabelledSet, DatasetError> {
    let file = File::open(path).map_err(|e| DatasetError::file(path, ErrorKind::Io(e)))?;
    let mut reader = ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .buffer_capacity(READ_BUFFER_BYTES)
        .from_reader(LineIndex::new(file));
    let header = match reader.byte_headers() {
        Ok(h) => h.clone(),
        Err(e) => return Err(csv_error(path, e, reader.get_mut())),
    };
    let header_line = header
        .position()
        .map_or(1, |p| reader.get_mut().line_at(p.byte()));
    let layout = layout(path, &header, header_line, need)?;
    let k = layout.fields - usize::from(layout.label.is_some());
    let labels = layout.label.map(|_| Vec::new());
    let mut rows = Rows {
        values: Vec::new(),
        labels,
        rows: 0,
    };
    let mut problems = Problems::new(path);
    let mut record = ByteRecord::new();
    loop {
        match reader.read_byte_record(&mut record) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => return Err(csv_error(path, e, reader.get_mut())),
        }
        let line = record
            .position()
            .map_or(0, |p| reader.get_mut().line_at(p.byte()));
        rows.rows += 1;
        parse_record(&record, &layout, k, line, &mut rows, &mut problems);
    }
    if rows.rows == 0 {
        return Err(DatasetError::file(path, ErrorKind::ZeroRows));
    }
    problems.finish()?;
    let Rows {
        mut values, labels, ..
    } = rows;
    values.shrink_to_fit();
    let source = Source::Csv(path.to_path_buf());
    Ok(LabelledSet::from_checked(
        Logits::F64(values),
        k,
        labels,
        source,
    ))
}

/// Finds the label column and checks the header.
fn layout(
    path: &Path,
    header: &ByteRecord,
    line: u64,
    need: LabelNeed,
) -> Result<Layout, DatasetError> {
    let at_header = |kind| DatasetError::new(path, Location::Line(line), kind);
    if header.iter().all(|f| f.trim_ascii().is_empty()) {
        return Err(DatasetError::file(path, ErrorKind::ZeroRows));
    }
    let mut label_columns = header
        .iter()
        .enumerate()
        .filter(|(_, f)| f.trim_ascii().eq_ignore_ascii_case(LABEL_COLUMN.as_bytes()));
    let label = label_columns.next().map(|(i, _)| i);
    if label_columns.next().is_some() {
        return Err(at_header(ErrorKind::DuplicateLabelColumn));
    }
    if label.is_none() && need == LabelNeed::Required {
        return Err(at_header(ErrorKind::MissingLabelColumn));
    }
    if header.len() == usize::from(label.is_some()) {
        return Err(at_header(ErrorKind::NoLogitColumns));
    }
    Ok(Layout {
        label,
        fields: header.len(),
    })
}

/// Parses one record into `rows`, recording its problems; a ragged record adds nothing.
fn parse_record(
    record: &ByteRecord,
    layout: &Layout,
    k: usize,
    line: u64,
    rows: &mut Rows,
    problems: &mut Problems<'_>,
) {
    if record.len() != layout.fields {
        let kind = ErrorKind::Ragged {
            expected: layout.fields,
            got: record.len(),
            unit: "fields",
        };
        problems.push(Location::Line(line), kind);
        return;
    }
    let mut class = 0;
    for (i, field) in record.iter().enumerate() {
        if Some(i) == layout.label {
            let label = match std::str::from_utf8(field) {
                Ok(text) => parse_text(text, classes_for(k)),
                Err(_) => Err(ErrorKind::LabelNotInteger {
                    text: String::from_utf8_lossy(field).into_owned(),
                }),
            };
            let label = label.unwrap_or_else(|kind| {
                problems.push(Location::Line(line), kind);
                0
            });
            rows.labels.get_or_insert_with(Vec::new).push(label);
            continue;
        }
        let value = parse_logit(field).unwrap_or_else(|kind| {
            problems.push(Location::LineClass { line, class }, kind);
            0.0
        });
        rows.values.push(value);
        class += 1;
    }
}

/// Parses one logit cell.
fn parse_logit(field: &[u8]) -> Result<f64, ErrorKind> {
    let field = field.trim_ascii();
    let text = || String::from_utf8_lossy(field).into_owned();
    let value: f64 = std::str::from_utf8(field)
        .ok()
        .and_then(|t| t.parse().ok())
        .ok_or_else(|| ErrorKind::NotANumber { text: text() })?;
    if value.is_finite() {
        Ok(value)
    } else {
        Err(ErrorKind::NonFinite { value })
    }
}

/// Maps a CSV reader error to a dataset error at its line.
fn csv_error(path: &Path, e: ::csv::Error, index: &mut LineIndex<File>) -> DatasetError {
    let location = e
        .position()
        .map_or(Location::File, |p| Location::Line(index.line_at(p.byte())));
    let message = e.to_string();
    match e.into_kind() {
        ::csv::ErrorKind::Io(io) => DatasetError::new(path, location, ErrorKind::Io(io)),
        _ => DatasetError::new(path, location, ErrorKind::Csv { message }),
    }
}

/// The file under the CSV reader, remembering where its line breaks are so records get true
/// 1-based line numbers. (The csv crate's `Position::line` miscounts after blank lines and with
/// CRLF endings: rust-csv issues #208 and #395; its `Position::byte` is where parsing of a record
/// began, before any blank lines it skipped.) Only breaks not yet passed are kept, so memory is
/// bounded by the reader's look-ahead.
struct LineIndex<R> {
    inner: R,
    /// Bytes read so far.
    offset: u64,
    /// Offsets and bytes (`\r` or `\n`) of line-break characters at or after the last record start.
    breaks: VecDeque<(u64, u8)>,
    /// `\n` bytes before the last record start.
    newlines_before: u64,
}

impl<R> LineIndex<R> {
    /// Wraps `inner`, at offset 0.
    fn new(inner: R) -> Self {
        LineIndex {
            inner,
            offset: 0,
            breaks: VecDeque::new(),
            newlines_before: 0,
        }
    }

    /// 1-based line of the first byte at or after `start` that is not a line break: the line a
    /// record whose parsing began at `start` is on. `start` must not decrease between calls.
    fn line_at(&mut self, start: u64) -> u64 {
        while let Some(&(at, byte)) = self.breaks.front() {
            if at >= start {
                break;
            }
            self.newlines_before += u64::from(byte == b'\n');
            self.breaks.pop_front();
        }
        // Breaks at start, start + 1, ... are blank lines (or the rest of a CRLF) skipped before
        // the record's first byte.
        let skipped = (start..)
            .zip(&self.breaks)
            .take_while(|(expected, (at, _))| at == expected)
            .filter(|(_, (_, byte))| *byte == b'\n')
            .count() as u64;
        self.newlines_before + 1 + skipped
    }
}

impl<R: Read> Read for LineIndex<R> {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.inner.read(buf)?;
        for (i, &byte) in buf[..n].iter().enumerate() {
            if byte == b'\n' || byte == b'\r' {
                self.breaks.push_back((self.offset + i as u64, byte));
            }
        }
        self.offset += n as u64;
        Ok(n)
    }
}

#[cfg(test)]
#[path = "csv_tests.rs"]
mod tests;
