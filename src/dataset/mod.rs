//! The input reader shared by every offline command (`fit`, `apply`, `eval`): logits and labels
//! from `.npy`, CSV or JSONL files, validated once at the boundary, and the writer for the
//! probabilities `apply` outputs.
//!
//! Input forms (METHODS.md section 0.3): logits are an n × K row-major matrix; K is taken from the
//! data. K = 1 (a `.npy` of shape `[N]` or `[N, 1]`, or one logit column) means one binary
//! log-odds score per row, so labels are 0/1 and the data has two classes.
//!
//! - `--logits X.npy [--labels y.npy]` ([`npy`]): logits float32 or float64, shape `[N, K]`,
//!   `[N]` or `[N, 1]`, C or Fortran order; labels any integer (or bool, or whole-valued float)
//!   dtype, shape `[N]` or `[N, 1]`. Logits keep their native precision. The data is read
//!   straight into one `Vec` of the file's dtype, so peak memory is the data size plus an I/O
//!   buffer; memory-mapping was not used because it needs `unsafe` and the crate forbids it.
//!   The header is parsed by [`npy_header`].
//! - `--data FILE.csv` ([`csv`]): a header row; a `label` column (any position, matched without
//!   regard to ASCII case), every other column a logit in header order.
//! - `--data FILE.jsonl` ([`jsonl`]): one object `{"logits": [...], "label": k}` per line;
//!   blank lines allowed.
//!
//! Text formats are parsed record by record (streaming: the text is never held whole) into f64
//! storage: 8 bytes per value, less than the text it came from.
//!
//! Every row-level problem is collected with its file and 1-based line (text) or row (`.npy`)
//! and reported together ([`DatasetError`]). Set-level checks a command may need are methods on
//! [`LabelledSet`]: [`LabelledSet::require_rows`], [`LabelledSet::require_two_classes`],
//! [`LabelledSet::check_classes`]. [`LabelledSet::digest`] is a SHA-256 of the numbers (not the
//! file bytes), for provenance.

pub mod csv;
pub mod error;
pub mod jsonl;
pub mod labels;
pub mod npy;
pub mod npy_header;
pub mod set;
pub mod writer;

use std::path::{Path, PathBuf};

pub use error::{DatasetError, ErrorKind, Location, Problem, MAX_PROBLEMS};
pub use labels::classes_for;
pub use set::{LabelledSet, DIGEST_DOMAIN};
pub use writer::{write_probabilities_csv, write_probabilities_npy, Precision};

/// Where a dataset comes from, as the user named it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Source {
    /// `--logits X.npy [--labels y.npy]`.
    Npy {
        /// The logits array.
        logits: PathBuf,
        /// The labels array, if given.
        labels: Option<PathBuf>,
    },
    /// `--data FILE.csv`.
    Csv(PathBuf),
    /// `--data FILE.jsonl`.
    Jsonl(PathBuf),
}

impl Source {
    /// The source for `--data PATH`, chosen by extension: `.csv`, or `.jsonl` / `.ndjson`.
    ///
    /// # Errors
    /// [`ErrorKind::UnknownFormat`] for any other extension (including `.npy`, which takes
    /// `--logits` and `--labels`).
    pub fn from_data_path(path: &Path) -> Result<Source, DatasetError> {
        let ext = path
            .extension()
            .and_then(|e| e.to_str())
            .unwrap_or("")
            .to_ascii_lowercase();
        match ext.as_str() {
            "csv" => Ok(Source::Csv(path.to_path_buf())),
            "jsonl" | "ndjson" => Ok(Source::Jsonl(path.to_path_buf())),
            _ => Err(DatasetError::file(
                path,
                ErrorKind::UnknownFormat { extension: ext },
            )),
        }
    }

    /// The main file: the logits file for `.npy`, else the data file.
    pub fn path(&self) -> &Path {
        match self {
            Source::Npy { logits, .. } => logits,
            Source::Csv(p) | Source::Jsonl(p) => p,
        }
    }
}

/// Whether the command needs labels (`fit`, `eval`) or can do without (`apply`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LabelNeed {
    /// Missing labels are an error.
    Required,
    /// Labels are read and validated if present.
    Optional,
}

/// Logits in their native precision, row-major n × k.
#[derive(Debug, Clone, PartialEq)]
pub enum Logits {
    /// float32 (from a `<f4` / `>f4` `.npy`).
    F32(Vec<f32>),
    /// float64 (from a `<f8` `.npy`, CSV or JSONL).
    F64(Vec<f64>),
}

impl Logits {
    /// Number of values (n · k).
    pub fn len(&self) -> usize {
        match self {
            Logits::F32(v) => v.len(),
            Logits::F64(v) => v.len(),
        }
    }

    /// True if there are no values.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// A borrowed view of the values.
    pub fn view(&self) -> LogitsView<'_> {
        match self {
            Logits::F32(v) => LogitsView::F32(v),
            Logits::F64(v) => LogitsView::F64(v),
        }
    }
}

/// Borrowed logits, row-major n × k, for code generic over the element type (match once, then
/// run a monomorphic loop over the slice).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum LogitsView<'a> {
    /// float32 values.
    F32(&'a [f32]),
    /// float64 values.
    F64(&'a [f64]),
}

impl LogitsView<'_> {
    /// Value `j` (flat row-major index) widened to f64.
    ///
    /// # Panics
    /// If `j` is out of range (an internal bug, never caused by input data).
    #[inline]
    pub fn get_f64(&self, j: usize) -> f64 {
        match self {
            LogitsView::F32(v) => f64::from(v[j]),
            LogitsView::F64(v) => v[j],
        }
    }
}

/// Reads and validates the dataset named by `source`.
///
/// # Errors
/// A [`DatasetError`] naming the file, the location and every problem found (up to
/// [`MAX_PROBLEMS`]): unreadable file, bad `.npy` header/dtype/shape, malformed CSV/JSON, ragged
/// rows, non-finite logits, bad labels, labels length ≠ rows, missing labels when `need` is
/// [`LabelNeed::Required`], zero rows.
pub fn read(source: &Source, need: LabelNeed) -> Result<LabelledSet, DatasetError> {
    match source {
        Source::Npy { logits, labels } => npy::read(logits, labels.as_deref(), need),
        Source::Csv(path) => csv::read(path, need),
        Source::Jsonl(path) => jsonl::read(path, need),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn data_path_picks_format_by_extension() {
        let csv = Source::from_data_path(Path::new("a/b.CSV"));
        assert!(matches!(csv, Ok(Source::Csv(_))));
        let jsonl = Source::from_data_path(Path::new("x.ndjson"));
        assert!(matches!(jsonl, Ok(Source::Jsonl(_))));
        let err = Source::from_data_path(Path::new("x.npy")).unwrap_err();
        assert_eq!(err.path(), Path::new("x.npy"));
        assert!(matches!(err.kind(), ErrorKind::UnknownFormat { extension } if extension == "npy"));
    }

    #[test]
    fn view_widens_f32_exactly() {
        let l = Logits::F32(vec![0.1f32, -2.5]);
        assert_eq!(l.view().get_f64(0), f64::from(0.1f32));
        assert_eq!(l.view().get_f64(1), -2.5);
        assert_eq!(l.len(), 2);
    }

    #[test]
    fn same_numbers_same_digest_in_every_format() {
        // Values exactly representable in f32, so an f32 file holds the same numbers.
        let logits = [0.5, -1.25, 3.0, 0.0, 2.0, -0.0];
        let labels = [2.0, 0.0];
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        let csv = d.join("d.csv");
        std::fs::write(&csv, "a,b,c,label\n0.5,-1.25,3,2\n0,2,-0,0\n").unwrap();
        let jsonl = d.join("d.jsonl");
        let text = "{\"logits\": [0.5, -1.25, 3.0], \"label\": 2}\n{\"logits\": [0, 2, -0.0], \"label\": 0}\n";
        std::fs::write(&jsonl, text).unwrap();
        let (x64, x32, y) = (d.join("x64.npy"), d.join("x32.npy"), d.join("y.npy"));
        write_probabilities_npy(&x64, &logits, 3, Precision::F64).unwrap();
        write_probabilities_npy(&x32, &logits, 3, Precision::F32).unwrap();
        // Labels as a whole-valued float64 [2, 1] array, which the labels reader accepts.
        write_probabilities_npy(&y, &labels, 1, Precision::F64).unwrap();
        let npy = |x: &Path| Source::Npy {
            logits: x.to_path_buf(),
            labels: Some(y.clone()),
        };
        let sources = [Source::Csv(csv), Source::Jsonl(jsonl), npy(&x64), npy(&x32)];
        let digests: Vec<String> = sources
            .iter()
            .map(|s| read(s, LabelNeed::Required).unwrap().digest())
            .collect();
        let memory = LabelledSet::try_new(Logits::F64(logits.to_vec()), 3, Some(vec![2, 0]));
        let expected = memory.unwrap().digest();
        assert!(
            digests.iter().all(|d| *d == expected),
            "{digests:?} vs {expected}"
        );
        assert!(matches!(
            read(&sources[3], LabelNeed::Required).unwrap().logits(),
            Logits::F32(_)
        ));
    }
}
