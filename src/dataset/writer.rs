//! Output of `candor apply`: calibrated probabilities, n × K row-major, as a C-order `.npy`
//! (float32 or float64, little-endian, shape `[N, K]`, byte for byte what numpy's `np.save`
//! writes) or as CSV with a header `p0,p1,...`.
//!
//! CSV numbers use the shortest text that parses back to the same f64 (Rust's float
//! formatting), in exponent form below [`CSV_EXP_BELOW`] as Python's `repr` does, so a
//! probability of 1e-300 takes 6 characters, not 300.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::Path;

use super::error::{DatasetError, ErrorKind, Location};
use super::npy_header::write_header;

/// Write buffer for output files.
pub const WRITE_BUFFER_BYTES: usize = 1 << 20;

/// Magnitudes below this (and above zero) are written in exponent form in CSV.
pub const CSV_EXP_BELOW: f64 = 1e-4;

/// Magnitudes at or above this are written in exponent form in CSV.
pub const CSV_EXP_FROM: f64 = 1e16;

/// Element type of a written `.npy`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Precision {
    /// float32 (`<f4`): half the size; probabilities keep ~7 significant digits.
    F32,
    /// float64 (`<f8`).
    F64,
}

/// Writes `probs` (row-major n × `k`) to `path` as a C-order `.npy` of shape `[n, k]`.
///
/// The file is created or truncated; a failed write can leave it partial.
///
/// # Errors
/// [`ErrorKind::Ragged`] if `k == 0` or `probs.len()` is not a multiple of `k` (a caller bug),
/// [`ErrorKind::Io`] if the file cannot be written.
pub fn write_probabilities_npy(
    path: &Path,
    probs: &[f64],
    k: usize,
    precision: Precision,
) -> Result<(), DatasetError> {
    let n = rows(path, probs, k)?;
    let io_err = |e: std::io::Error| DatasetError::file(path, ErrorKind::Io(e));
    let mut out = BufWriter::with_capacity(WRITE_BUFFER_BYTES, File::create(path).map_err(io_err)?);
    let shape = [n as u64, k as u64];
    match precision {
        Precision::F32 => {
            write_header(&mut out, "<f4", &shape).map_err(io_err)?;
            // Narrowing to f32 is the documented purpose of this precision.
            probs
                .iter()
                .try_for_each(|&p| out.write_all(&(p as f32).to_le_bytes()))
                .map_err(io_err)?;
        }
        Precision::F64 => {
            write_header(&mut out, "<f8", &shape).map_err(io_err)?;
            probs
                .iter()
                .try_for_each(|p| out.write_all(&p.to_le_bytes()))
                .map_err(io_err)?;
        }
    }
    out.flush().map_err(io_err)
}

/// Writes `probs` (row-major n × `k`) to `path` as CSV: a header `p0,...,p{k-1}`, then one row
/// per sample.
///
/// The file is created or truncated; a failed write can leave it partial.
///
/// # Errors
/// [`ErrorKind::Ragged`] if `k == 0` or `probs.len()` is not a multiple of `k` (a caller bug),
/// [`ErrorKind::Io`] if the file cannot be written.
pub fn write_probabilities_csv(path: &Path, probs: &[f64], k: usize) -> Result<(), DatasetError> {
    rows(path, probs, k)?;
    let io_err = |e: std::io::Error| DatasetError::file(path, ErrorKind::Io(e));
    let file = File::create(path).map_err(io_err)?;
    let mut w = ::csv::WriterBuilder::new()
        .buffer_capacity(WRITE_BUFFER_BYTES)
        .from_writer(file);
    let csv_err = |e: ::csv::Error| io_err(std::io::Error::other(e.to_string()));
    for class in 0..k {
        w.write_field(format!("p{class}")).map_err(csv_err)?;
    }
    w.write_record(None::<&[u8]>).map_err(csv_err)?;
    let mut text = String::new();
    for row in probs.chunks_exact(k) {
        for &p in row {
            text.clear();
            format_value(&mut text, p);
            w.write_field(&text).map_err(csv_err)?;
        }
        w.write_record(None::<&[u8]>).map_err(csv_err)?;
    }
    w.flush().map_err(io_err)
}

/// Shortest round-trip text for `x`, in exponent form for very small or large magnitudes.
fn format_value(out: &mut String, x: f64) {
    use std::fmt::Write as _;
    let a = x.abs();
    // Writing to a String cannot fail.
    let _ = if a != 0.0 && !(CSV_EXP_BELOW..CSV_EXP_FROM).contains(&a) {
        write!(out, "{x:e}")
    } else {
        write!(out, "{x}")
    };
}

/// Number of rows, or an error if `probs` is not n × k with k ≥ 1.
fn rows(path: &Path, probs: &[f64], k: usize) -> Result<usize, DatasetError> {
    if k == 0 || !probs.len().is_multiple_of(k) {
        let kind = ErrorKind::Ragged {
            expected: k,
            got: probs.len(),
            unit: "values (not a multiple of K)",
        };
        return Err(DatasetError::new(path, Location::File, kind));
    }
    Ok(probs.len() / k)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::dataset::{npy, Logits};
    use sha2::{Digest, Sha256};

    #[test]
    fn npy_round_trip_both_precisions() {
        let dir = tempfile::tempdir().unwrap();
        let probs = [0.25, 0.75, 1e-300, 1.0, 0.1, 0.9];
        let p64 = dir.path().join("p64.npy");
        write_probabilities_npy(&p64, &probs, 2, Precision::F64).unwrap();
        let (logits, k) = npy::read_logits(&p64).unwrap();
        assert_eq!((logits, k), (Logits::F64(probs.to_vec()), 2));
        let p32 = dir.path().join("p32.npy");
        write_probabilities_npy(&p32, &probs, 3, Precision::F32).unwrap();
        let (logits, k) = npy::read_logits(&p32).unwrap();
        let narrowed: Vec<f32> = probs.iter().map(|&p| p as f32).collect();
        assert_eq!((logits, k), (Logits::F32(narrowed), 3));
        // python3: p = np.array([0.25, 0.75, 1e-300, 1.0, 0.1, 0.9]); buf = io.BytesIO();
        // np.save(buf, p.reshape(3, 2)) or np.save(buf, p.reshape(2, 3).astype(np.float32));
        // hashlib.sha256(buf.getvalue()).hexdigest()  (numpy 2.4.6)
        let sha = |p: &Path| hex::encode(Sha256::digest(std::fs::read(p).unwrap()));
        assert_eq!(
            sha(&p64),
            "34d2047372b228cafff2f6c388176f49ab937d6061cc0c57a3c39ff7857e8ea5"
        );
        assert_eq!(
            sha(&p32),
            "c1bb3a77e2f460d456db21d78e59b84f8aace0c61a33ff85c7e482f4baffb2a6"
        );
    }

    #[test]
    fn csv_text_and_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("p.csv");
        write_probabilities_csv(&path, &[0.5, 0.5, 1e-300, 1.0], 2).unwrap();
        let text = std::fs::read_to_string(&path).unwrap();
        assert_eq!(text, "p0,p1\n0.5,0.5\n1e-300,1\n");
        let set = crate::dataset::read(
            &crate::dataset::Source::Csv(path),
            crate::dataset::LabelNeed::Optional,
        )
        .unwrap();
        assert_eq!(set.logits(), &Logits::F64(vec![0.5, 0.5, 1e-300, 1.0]));
    }

    #[test]
    fn rejects_shape_mismatch() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("bad.csv");
        let err = write_probabilities_csv(&path, &[0.5, 0.5, 1.0], 2).unwrap_err();
        assert_eq!(err.path(), path);
        assert!(matches!(
            err.kind(),
            ErrorKind::Ragged {
                expected: 2,
                got: 3,
                ..
            }
        ));
        let err = write_probabilities_npy(&path, &[0.5], 0, Precision::F64).unwrap_err();
        assert!(matches!(err.kind(), ErrorKind::Ragged { expected: 0, .. }));
    }
}
