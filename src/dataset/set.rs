//! [`LabelledSet`]: validated logits (n × K, native precision) with optional labels, the
//! set-level checks commands need, and a format-independent SHA-256 digest for provenance.

use std::path::Path;

use sha2::{Digest, Sha256};

use super::error::{DatasetError, ErrorKind, Location, Problems};
use super::labels::{check_int, classes_for};
use super::{Logits, LogitsView, Source};

/// Domain tag that opens the digest input, so the digest cannot collide with a hash of some other
/// encoding; bump the version if the encoding below ever changes.
pub const DIGEST_DOMAIN: &[u8] = b"candor.dataset.v1\0";

/// Bytes buffered before each hasher update.
const DIGEST_CHUNK_BYTES: usize = 64 * 1024;

/// Path shown in errors about a set built in memory.
const MEMORY_PATH: &str = "<memory>";

/// Logits (row-major n × k, n ≥ 1, k ≥ 1, all finite) and optional labels (each below
/// [`LabelledSet::classes`]), with the files they came from.
#[derive(Debug, Clone, PartialEq)]
pub struct LabelledSet {
    logits: Logits,
    k: usize,
    n: usize,
    labels: Option<Vec<u32>>,
    source: Option<Source>,
}

impl LabelledSet {
    /// Builds a set from values in memory, with the same checks the file readers make.
    ///
    /// # Errors
    /// [`ErrorKind::NoLogitColumns`] if `k == 0`, [`ErrorKind::Ragged`] if the length is not a
    /// multiple of `k`, [`ErrorKind::ZeroRows`], non-finite logits, labels length ≠ rows, or a
    /// label out of range; the path is `<memory>`.
    pub fn try_new(
        logits: Logits,
        k: usize,
        labels: Option<Vec<u32>>,
    ) -> Result<Self, DatasetError> {
        let path = Path::new(MEMORY_PATH);
        let len = logits.len();
        if k == 0 {
            return Err(DatasetError::file(path, ErrorKind::NoLogitColumns));
        }
        if !len.is_multiple_of(k) {
            let got = len % k;
            return Err(DatasetError::new(
                path,
                Location::Row((len / k) as u64),
                ErrorKind::Ragged {
                    expected: k,
                    got,
                    unit: "logits",
                },
            ));
        }
        let n = len / k;
        if n == 0 {
            return Err(DatasetError::file(path, ErrorKind::ZeroRows));
        }
        let mut problems = Problems::new(path);
        scan_non_finite(logits.view(), k, &mut problems);
        if let Some(y) = &labels {
            if y.len() != n {
                let kind = ErrorKind::LabelsLength {
                    labels: y.len() as u64,
                    rows: n as u64,
                };
                problems.push(Location::File, kind);
            }
            for (i, &v) in y.iter().enumerate() {
                if let Err(kind) = check_int(i128::from(v), classes_for(k)) {
                    problems.push(Location::Row(i as u64), kind);
                }
            }
        }
        problems.finish()?;
        Ok(LabelledSet {
            logits,
            k,
            n,
            labels,
            source: None,
        })
    }

    /// Assembles a set a reader has already validated.
    pub(crate) fn from_checked(
        logits: Logits,
        k: usize,
        labels: Option<Vec<u32>>,
        source: Source,
    ) -> Self {
        let n = logits.len().checked_div(k).unwrap_or(0);
        debug_assert!(k >= 1 && n >= 1 && n * k == logits.len());
        debug_assert!(labels.as_ref().is_none_or(|y| y.len() == n));
        LabelledSet {
            logits,
            k,
            n,
            labels,
            source: Some(source),
        }
    }

    /// Number of rows.
    pub fn n(&self) -> usize {
        self.n
    }

    /// Logits per row, as in the data (1 for one binary log-odds score per row).
    pub fn k(&self) -> usize {
        self.k
    }

    /// Number of classes: 2 when `k == 1`, else `k`.
    pub fn classes(&self) -> usize {
        classes_for(self.k)
    }

    /// The logits in native precision.
    pub fn logits(&self) -> &Logits {
        &self.logits
    }

    /// Borrowed logits for code generic over f32/f64.
    pub fn view(&self) -> LogitsView<'_> {
        self.logits.view()
    }

    /// Labels (class indices below [`Self::classes`]), if the data had them.
    pub fn labels(&self) -> Option<&[u32]> {
        self.labels.as_deref()
    }

    /// The files the set was read from (`None` if built in memory).
    pub fn source(&self) -> Option<&Source> {
        self.source.as_ref()
    }

    /// Copies row `i` into `out`, widened to f64.
    ///
    /// # Panics
    /// If `i >= n` or `out.len() != k` (caller bugs, not data problems).
    pub fn row_f64(&self, i: usize, out: &mut [f64]) {
        let row = i * self.k..(i + 1) * self.k;
        match self.view() {
            LogitsView::F32(v) => out
                .iter_mut()
                .zip(&v[row])
                .for_each(|(o, &x)| *o = f64::from(x)),
            LogitsView::F64(v) => out.copy_from_slice(&v[row]),
        }
    }

    /// Rows per class (length [`Self::classes`]), or `None` without labels.
    pub fn class_counts(&self) -> Option<Vec<usize>> {
        let mut counts = vec![0usize; self.classes()];
        for &y in self.labels.as_deref()? {
            counts[y as usize] += 1;
        }
        Some(counts)
    }

    /// The labels, or an error if the data has none.
    ///
    /// # Errors
    /// [`ErrorKind::NoLabels`].
    pub fn require_labels(&self) -> Result<&[u32], DatasetError> {
        self.labels
            .as_deref()
            .ok_or_else(|| DatasetError::file(self.path(), ErrorKind::NoLabels))
    }

    /// Checks that there are at least `min` rows; `what` names who needs them.
    ///
    /// # Errors
    /// [`ErrorKind::TooFewRows`].
    pub fn require_rows(&self, min: usize, what: &str) -> Result<(), DatasetError> {
        if self.n >= min {
            return Ok(());
        }
        let kind = ErrorKind::TooFewRows {
            rows: self.n,
            min,
            what: what.to_string(),
        };
        Err(DatasetError::file(self.path(), kind))
    }

    /// Checks that the labels hold at least two classes (fitting needs them; applying does not).
    ///
    /// # Errors
    /// [`ErrorKind::NoLabels`] or [`ErrorKind::OneClass`].
    pub fn require_two_classes(&self) -> Result<(), DatasetError> {
        let labels = self.require_labels()?;
        match labels.first() {
            Some(&first) if labels.iter().all(|&y| y == first) => Err(DatasetError::file(
                self.path(),
                ErrorKind::OneClass { class: first },
            )),
            _ => Ok(()),
        }
    }

    /// Checks a caller's `--classes` against the data (2 matches one score per row).
    ///
    /// # Errors
    /// [`ErrorKind::ClassesMismatch`].
    pub fn check_classes(&self, expected: usize) -> Result<(), DatasetError> {
        if expected == self.classes() {
            return Ok(());
        }
        let kind = ErrorKind::ClassesMismatch {
            expected,
            found: self.classes(),
        };
        Err(DatasetError::file(self.path(), kind))
    }

    /// SHA-256 of the numbers, as lowercase hex: the same n, k, logit values and labels give the
    /// same digest whatever file format they came from.
    ///
    /// The hashed bytes are, in order: [`DIGEST_DOMAIN`]; n and k as u64 little-endian; every
    /// logit, row-major, as the little-endian bytes of its f64 value (f32 widened exactly;
    /// −0.0 written as +0.0); one byte, 1 if labels follow and 0 if not; each label as u64
    /// little-endian. An f32 file and a text file of the same decimals differ unless the
    /// decimals are exactly representable in f32, because the text parses to other f64 values.
    pub fn digest(&self) -> String {
        let mut hasher = Sha256::new();
        hasher.update(DIGEST_DOMAIN);
        hasher.update((self.n as u64).to_le_bytes());
        hasher.update((self.k as u64).to_le_bytes());
        match self.view() {
            LogitsView::F32(v) => hash_f64(&mut hasher, v),
            LogitsView::F64(v) => hash_f64(&mut hasher, v),
        }
        match &self.labels {
            None => hasher.update([0u8]),
            Some(y) => {
                hasher.update([1u8]);
                let mut buf = Vec::with_capacity(DIGEST_CHUNK_BYTES);
                for chunk in y.chunks(DIGEST_CHUNK_BYTES / 8) {
                    buf.clear();
                    chunk
                        .iter()
                        .for_each(|&v| buf.extend_from_slice(&u64::from(v).to_le_bytes()));
                    hasher.update(&buf);
                }
            }
        }
        hex::encode(hasher.finalize())
    }

    /// Path named in set-level errors.
    fn path(&self) -> &Path {
        self.source
            .as_ref()
            .map_or(Path::new(MEMORY_PATH), Source::path)
    }
}

/// Feeds values to the hasher as canonical f64 little-endian bytes.
fn hash_f64<T: Copy + Into<f64>>(hasher: &mut Sha256, values: &[T]) {
    let mut buf = Vec::with_capacity(DIGEST_CHUNK_BYTES);
    for chunk in values.chunks(DIGEST_CHUNK_BYTES / 8) {
        buf.clear();
        // `+ 0.0` maps −0.0 to +0.0 and leaves every other value unchanged.
        chunk
            .iter()
            .for_each(|&v| buf.extend_from_slice(&(v.into() + 0.0).to_le_bytes()));
        hasher.update(&buf);
    }
}

/// Records every non-finite logit with its 0-based row and class.
pub(crate) fn scan_non_finite(view: LogitsView<'_>, k: usize, problems: &mut Problems<'_>) {
    fn scan<T: Copy + Into<f64>>(v: &[T], k: usize, problems: &mut Problems<'_>) {
        for (j, &x) in v.iter().enumerate() {
            let value: f64 = x.into();
            if !value.is_finite() {
                let location = Location::RowClass {
                    row: (j / k) as u64,
                    class: j % k,
                };
                problems.push(location, ErrorKind::NonFinite { value });
            }
        }
    }
    match view {
        LogitsView::F32(v) => scan(v, k, problems),
        LogitsView::F64(v) => scan(v, k, problems),
    }
}

#[cfg(test)]
#[path = "set_tests.rs"]
mod tests;
