//! The dataset reader's error: which file, where in it, and what is wrong.
//!
//! Row-level problems (ragged rows, non-finite values, bad labels) are collected while a file is
//! read and reported together, up to [`MAX_PROBLEMS`]; structural problems (unreadable file, bad
//! header) stop the read at once.

use std::fmt;
use std::path::{Path, PathBuf};

/// Most problems kept in one [`DatasetError`]; further ones are only counted, so a file with a
/// million bad rows neither floods the terminal nor grows memory.
pub const MAX_PROBLEMS: usize = 20;

/// Where in a file a problem sits.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Location {
    /// The file as a whole (shape, header, row count).
    File,
    /// A 1-based physical line of a text file (CSV, JSONL), as an editor numbers it.
    Line(u64),
    /// One logit on a 1-based text line; `class` is the 0-based class index of the logit.
    LineClass {
        /// 1-based line.
        line: u64,
        /// 0-based class index (logit position within the row).
        class: usize,
    },
    /// A row of a `.npy` array, 0-based as numpy indexes it (shown also 1-based).
    Row(u64),
    /// One logit in a row of a `.npy` array.
    RowClass {
        /// 0-based row index, as numpy indexes it.
        row: u64,
        /// 0-based class index (column).
        class: usize,
    },
}

impl fmt::Display for Location {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            Location::File => f.write_str("whole file"),
            Location::Line(line) => write!(f, "line {line}"),
            Location::LineClass { line, class } => write!(f, "line {line}, logit of class {class}"),
            Location::Row(row) => write!(f, "row {} (numpy index {row})", row + 1),
            Location::RowClass { row, class } => {
                write!(
                    f,
                    "row {} (numpy index {row}), logit of class {class}",
                    row + 1
                )
            }
        }
    }
}

/// What is wrong.
#[derive(Debug, thiserror::Error)]
pub enum ErrorKind {
    /// The file could not be opened, read or written.
    #[error("cannot read or write the file: {0}")]
    Io(#[from] std::io::Error),
    /// `--data` was given a file whose extension names no supported format.
    #[error("unknown data format {extension:?}: use .csv or .jsonl with --data, or --logits X.npy --labels y.npy")]
    UnknownFormat {
        /// The extension found (empty if none).
        extension: String,
    },
    /// The `.npy` header could not be parsed.
    #[error("not a valid .npy file: {message}")]
    NpyHeader {
        /// What the header parser said.
        message: String,
    },
    /// The `.npy` dtype is not one this array may have.
    #[error("{array} must have dtype {expected}, found {found}")]
    NpyDtype {
        /// "logits" or "labels".
        array: &'static str,
        /// The accepted dtypes.
        expected: &'static str,
        /// The dtype in the file, numpy-style (e.g. `<f2`).
        found: String,
    },
    /// The `.npy` shape is not one this array may have.
    #[error("{array} must have shape {expected}, found {found:?}")]
    NpyShape {
        /// "logits" or "labels".
        array: &'static str,
        /// The accepted shapes.
        expected: &'static str,
        /// The shape in the file.
        found: Vec<u64>,
    },
    /// The `.npy` data section is not as long as the header says.
    #[error("the header declares {expected_bytes} bytes of data but the file holds {found_bytes} (truncated or not a plain .npy file)")]
    NpyLength {
        /// Bytes implied by shape and dtype.
        expected_bytes: u64,
        /// Bytes after the header.
        found_bytes: u64,
    },
    /// The CSV reader failed (bad quoting, invalid UTF-8 ...).
    #[error("malformed CSV: {message}")]
    Csv {
        /// What the CSV parser said.
        message: String,
    },
    /// A JSONL line is not an object of the expected form.
    #[error("expected an object {{\"logits\": [numbers], \"label\": integer}}: {message}")]
    Json {
        /// What the JSON parser said.
        message: String,
    },
    /// No logits: a CSV header with only `label`, or a JSONL row with `"logits": []`.
    #[error("no logits: each row needs at least one (in CSV, every column other than `label`)")]
    NoLogitColumns,
    /// The CSV header names `label` more than once.
    #[error("the header has more than one `label` column")]
    DuplicateLabelColumn,
    /// Labels are required and the CSV header has no `label` column.
    #[error("labels are required but the header has no `label` column")]
    MissingLabelColumn,
    /// Labels are required and the data has none.
    #[error("labels are required but the data has none (give --labels y.npy, a `label` column or a \"label\" key)")]
    NoLabels,
    /// Labels are required, or earlier rows had one, and this row has none.
    #[error("this row has no label")]
    MissingLabel,
    /// A row has a label though the first data row had none.
    #[error("this row has a label but the first data row had none: label all rows or none")]
    UnexpectedLabel,
    /// A row's length differs from the header's (CSV fields) or the first row's (logits).
    #[error("ragged row: expected {expected} {unit}, got {got}")]
    Ragged {
        /// Count in the header or first row.
        expected: usize,
        /// Count in this row.
        got: usize,
        /// What is counted: "fields" (CSV) or "logits".
        unit: &'static str,
    },
    /// A logit is not a number.
    #[error("not a number: {text:?}")]
    NotANumber {
        /// The text found.
        text: String,
    },
    /// A logit is NaN or infinite.
    #[error("non-finite logit {value}")]
    NonFinite {
        /// The value read.
        value: f64,
    },
    /// A label is not a whole number.
    #[error("label {text} is not an integer")]
    LabelNotInteger {
        /// The label as written.
        text: String,
    },
    /// A label is negative.
    #[error("label {value} is negative: labels are class indices 0..K-1")]
    LabelNegative {
        /// The label read.
        value: i128,
    },
    /// A label is not below the class count.
    #[error("label {value} is out of range: {classes} classes allow 0..={max}{hint}", max = classes - 1, hint = if *classes == 2 { " (binary)" } else { "" })]
    LabelOutOfRange {
        /// The label read.
        value: i128,
        /// The class count (2 for one score per row).
        classes: usize,
    },
    /// The labels file does not have one label per logits row.
    #[error("{labels} labels for {rows} logit rows")]
    LabelsLength {
        /// Labels in the labels file.
        labels: u64,
        /// Rows in the logits file.
        rows: u64,
    },
    /// The file holds no data rows.
    #[error("no data rows")]
    ZeroRows,
    /// Fitting needs at least two classes among the labels.
    #[error("every label is {class}: fitting needs at least two classes")]
    OneClass {
        /// The only class present.
        class: u32,
    },
    /// Fewer rows than a method needs.
    #[error("{rows} rows, but {what} needs at least {min}")]
    TooFewRows {
        /// Rows in the data.
        rows: usize,
        /// Rows needed.
        min: usize,
        /// Who needs them (e.g. "isotonic regression").
        what: String,
    },
    /// The caller's `--classes` disagrees with the data.
    #[error("--classes {expected} given, but the data has {found} classes{hint}", hint = if *found == 2 { " (one score or two logits per row)" } else { "" })]
    ClassesMismatch {
        /// Classes the caller expects.
        expected: usize,
        /// Classes the data implies (2 for one score per row).
        found: usize,
    },
}

/// One problem: where and what.
#[derive(Debug)]
pub struct Problem {
    /// Where in the file.
    pub location: Location,
    /// What is wrong.
    pub kind: ErrorKind,
}

/// A dataset that could not be read or does not meet a requirement.
///
/// The first problem is [`Self::location`] and [`Self::kind`]; any further ones found in the
/// same pass are in [`Self::more`] (at most [`MAX_PROBLEMS`] in all) and [`Self::omitted`]
/// counts those not kept. Its message is complete in itself (it names every kept problem), so it
/// reports no separate source. Boxed inside so a `Result` carrying it stays one pointer wide.
#[derive(Debug)]
pub struct DatasetError {
    inner: Box<Inner>,
}

/// The fields of a [`DatasetError`].
#[derive(Debug)]
struct Inner {
    path: PathBuf,
    location: Location,
    kind: ErrorKind,
    more: Vec<Problem>,
    omitted: u64,
}

impl DatasetError {
    /// A single problem in `path`.
    pub fn new(path: &Path, location: Location, kind: ErrorKind) -> Self {
        let inner = Inner {
            path: path.to_path_buf(),
            location,
            kind,
            more: Vec::new(),
            omitted: 0,
        };
        DatasetError {
            inner: Box::new(inner),
        }
    }

    /// A single problem concerning `path` as a whole.
    pub fn file(path: &Path, kind: ErrorKind) -> Self {
        Self::new(path, Location::File, kind)
    }

    /// The file the (first) problem is in.
    pub fn path(&self) -> &Path {
        &self.inner.path
    }

    /// Where the first problem is.
    pub fn location(&self) -> Location {
        self.inner.location
    }

    /// What the first problem is.
    pub fn kind(&self) -> &ErrorKind {
        &self.inner.kind
    }

    /// Further problems found in the same pass, in file order.
    pub fn more(&self) -> &[Problem] {
        &self.inner.more
    }

    /// Problems found beyond those kept.
    pub fn omitted(&self) -> u64 {
        self.inner.omitted
    }
}

impl fmt::Display for DatasetError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let e = &self.inner;
        let path = e.path.display();
        let one = |f: &mut fmt::Formatter<'_>, location: Location, kind: &ErrorKind| match location
        {
            Location::File => write!(f, "{path}: {kind}"),
            _ => write!(f, "{path}: {location}: {kind}"),
        };
        one(f, e.location, &e.kind)?;
        for p in &e.more {
            f.write_str("\n  also ")?;
            one(f, p.location, &p.kind)?;
        }
        if e.omitted > 0 {
            write!(f, "\n  and {} more problems", e.omitted)?;
        }
        Ok(())
    }
}

impl std::error::Error for DatasetError {}

/// Collects row-level problems while a file is read, then fails once.
#[derive(Debug)]
pub(crate) struct Problems<'a> {
    path: &'a Path,
    kept: Vec<Problem>,
    omitted: u64,
}

impl<'a> Problems<'a> {
    /// An empty collection for `path`.
    pub(crate) fn new(path: &'a Path) -> Self {
        Problems {
            path,
            kept: Vec::new(),
            omitted: 0,
        }
    }

    /// Records a problem (kept if fewer than [`MAX_PROBLEMS`] are held, else counted).
    pub(crate) fn push(&mut self, location: Location, kind: ErrorKind) {
        if self.kept.len() < MAX_PROBLEMS {
            self.kept.push(Problem { location, kind });
        } else {
            self.omitted += 1;
        }
    }

    /// `Ok` if nothing was recorded, else one error holding every problem.
    pub(crate) fn finish(self) -> Result<(), DatasetError> {
        let mut kept = self.kept.into_iter();
        match kept.next() {
            None => Ok(()),
            Some(first) => Err(DatasetError {
                inner: Box::new(Inner {
                    path: self.path.to_path_buf(),
                    location: first.location,
                    kind: first.kind,
                    more: kept.collect(),
                    omitted: self.omitted,
                }),
            }),
        }
    }
}
