//! `.npy` input: `--logits X.npy [--labels y.npy]` (NumPy format description, NEP 1, 2007;
//! versions 1.0, 2.0 and 3.0; header in [`super::npy_header`]).
//!
//! Logits: float32 or float64 (either byte order), shape `[N, K]` (C or Fortran order), `[N]` or
//! `[N, 1]` (K = 1: one binary log-odds score per row). The data goes straight into one `Vec` of
//! the native dtype, allocated once at its final size after the header and the file length
//! agree; Fortran-ordered files are scattered into row-major positions as they are read, so they
//! cost no extra copy either. Peak memory: data size plus a [`READ_BUFFER_BYTES`] buffer
//! (measured: 1.08 GB peak for a 1.0 GB float32 logits file with 0.2 GB of int64 labels).
//! The data section, a plain array of fixed-size numbers, is decoded in chunks with
//! `from_le_bytes` / `from_be_bytes`. Memory-mapping was not used: it needs `unsafe`, which the
//! crate forbids, and a mapped f32 file would still need converting for f64 code.
//!
//! Labels: any integer dtype (int8..int64, uint8..uint64), bool, or a float dtype holding whole
//! numbers; shape `[N]` or `[N, 1]`.

use std::fs::File;
use std::io::{BufReader, Read};
use std::path::Path;

use super::error::{DatasetError, ErrorKind, Location, Problems};
use super::labels::{check_float, check_int, classes_for};
use super::npy_header::{read_header, Dtype, Header, Scalar};
use super::set::{scan_non_finite, LabelledSet};
use super::{LabelNeed, Logits, Source};

/// Bytes decoded per read of the data section.
pub const READ_BUFFER_BYTES: usize = 1 << 20;

/// Accepted logits dtypes, for messages.
const LOGITS_DTYPES: &str = "float32 or float64";
/// Accepted labels dtypes, for messages.
const LABELS_DTYPES: &str = "an integer (int8..int64, uint8..uint64), bool or whole-valued float";

/// An opened `.npy` file, positioned at the start of its data.
struct Opened {
    reader: BufReader<File>,
    header: Header,
    /// Bytes after the header.
    data_bytes: u64,
}

/// Reads logits and, if given, labels.
///
/// # Errors
/// Any [`ErrorKind`] a `.npy` pair can produce; see [`super::read`].
pub fn read(
    logits_path: &Path,
    labels_path: Option<&Path>,
    need: LabelNeed,
) -> Result<LabelledSet, DatasetError> {
    let (logits, k) = read_logits(logits_path)?;
    let n = logits.len() / k;
    let labels = match labels_path {
        Some(path) => Some(read_labels(path, n, classes_for(k))?),
        None if need == LabelNeed::Required => {
            return Err(DatasetError::file(logits_path, ErrorKind::NoLabels))
        }
        None => None,
    };
    let source = Source::Npy {
        logits: logits_path.to_path_buf(),
        labels: labels_path.map(Path::to_path_buf),
    };
    Ok(LabelledSet::from_checked(logits, k, labels, source))
}

/// Reads a logits array; returns the values (row-major) and K.
///
/// # Errors
/// Unreadable file, bad header, dtype, shape or length, zero rows, non-finite values.
pub fn read_logits(path: &Path) -> Result<(Logits, usize), DatasetError> {
    let mut opened = open(path)?;
    let (n, k) = match *opened.header.shape {
        [n] => (n, 1),
        [n, k] if k >= 1 => (n, k),
        _ => {
            return Err(bad_shape(
                path,
                "logits",
                "[N, K], [N] or [N, 1]",
                &opened.header,
            ))
        }
    };
    let dtype = match opened.header.dtype() {
        Some(
            d @ Dtype {
                scalar: Scalar::Float,
                size: 4 | 8,
                ..
            },
        ) => d,
        _ => return Err(bad_dtype(path, "logits", LOGITS_DTYPES, &opened.header)),
    };
    if n == 0 {
        return Err(DatasetError::file(path, ErrorKind::ZeroRows));
    }
    check_length(path, &opened, dtype)?;
    let (n, k) = (to_usize(path, n)?, to_usize(path, k)?);
    let logits = match dtype.size {
        4 => Logits::F32(read_matrix(path, &mut opened, dtype, n, k)?),
        _ => Logits::F64(read_matrix(path, &mut opened, dtype, n, k)?),
    };
    let mut problems = Problems::new(path);
    scan_non_finite(logits.view(), k, &mut problems);
    problems.finish()?;
    Ok((logits, k))
}

/// Reads a labels array of `rows` entries, each below `classes`.
///
/// # Errors
/// Unreadable file, bad header, dtype or shape, length ≠ `rows`, a label negative, out of
/// range or not a whole number.
pub fn read_labels(path: &Path, rows: usize, classes: usize) -> Result<Vec<u32>, DatasetError> {
    let mut opened = open(path)?;
    let n = match *opened.header.shape {
        [n] | [n, 1] => n,
        _ => return Err(bad_shape(path, "labels", "[N] or [N, 1]", &opened.header)),
    };
    let Some(dtype) = opened.header.dtype().filter(|d| d.size <= 8) else {
        return Err(bad_dtype(path, "labels", LABELS_DTYPES, &opened.header));
    };
    if n != rows as u64 {
        let kind = ErrorKind::LabelsLength {
            labels: n,
            rows: rows as u64,
        };
        return Err(DatasetError::file(path, kind));
    }
    check_length(path, &opened, dtype)?;
    let mut labels = Vec::with_capacity(rows);
    let mut problems = Problems::new(path);
    let mut keep = |i: usize, checked: Result<u32, ErrorKind>| {
        labels.push(checked.unwrap_or_else(|kind| {
            problems.push(Location::Row(i as u64), kind);
            0
        }));
    };
    let int = |v: i128| check_int(v, classes);
    let (o, d) = (&mut opened, dtype);
    let done = match (d.scalar, d.size) {
        (Scalar::Bool | Scalar::Uint, 1) => decode::<u8>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Int, 1) => decode::<i8>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Int, 2) => decode::<i16>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Int, 4) => decode::<i32>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Int, 8) => decode::<i64>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Uint, 2) => decode::<u16>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Uint, 4) => decode::<u32>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Uint, 8) => decode::<u64>(o, d, rows, |i, v| keep(i, int(v.into()))),
        (Scalar::Float, 4) => decode::<f32>(o, d, rows, |i, v| {
            keep(i, check_float(v.into(), &v.to_string(), classes))
        }),
        (Scalar::Float, 8) => decode::<f64>(o, d, rows, |i, v| {
            keep(i, check_float(v, &v.to_string(), classes))
        }),
        _ => return Err(bad_dtype(path, "labels", LABELS_DTYPES, &o.header)),
    };
    done.map_err(|e| DatasetError::file(path, ErrorKind::Io(e)))?;
    problems.finish()?;
    Ok(labels)
}

/// Opens a file and parses its header.
fn open(path: &Path) -> Result<Opened, DatasetError> {
    let io_err = |e: std::io::Error| DatasetError::file(path, ErrorKind::Io(e));
    let file = File::open(path).map_err(io_err)?;
    let file_len = file.metadata().map_err(io_err)?.len();
    let mut reader = BufReader::new(file);
    let header = read_header(&mut reader).map_err(|kind| DatasetError::file(path, kind))?;
    let data_bytes = file_len.saturating_sub(header.data_offset);
    Ok(Opened {
        reader,
        header,
        data_bytes,
    })
}

/// Checks that the data section holds exactly `len` elements of `dtype`.
fn check_length(path: &Path, opened: &Opened, dtype: Dtype) -> Result<(), DatasetError> {
    let expected_bytes = opened.header.len.saturating_mul(dtype.size as u64);
    let found_bytes = opened.data_bytes;
    if expected_bytes == found_bytes {
        return Ok(());
    }
    Err(DatasetError::file(
        path,
        ErrorKind::NpyLength {
            expected_bytes,
            found_bytes,
        },
    ))
}

/// Reads n × k values of type `T` into a row-major `Vec`, whatever the file's order.
fn read_matrix<T: Element>(
    path: &Path,
    opened: &mut Opened,
    dtype: Dtype,
    n: usize,
    k: usize,
) -> Result<Vec<T>, DatasetError> {
    let io_err = |e: std::io::Error| DatasetError::file(path, ErrorKind::Io(e));
    if opened.header.fortran_order && k > 1 {
        // Fortran order stores column after column: element j is row j % n, column j / n.
        let mut out = vec![T::default(); n * k];
        decode::<T>(opened, dtype, n * k, |j, v| out[(j % n) * k + j / n] = v).map_err(io_err)?;
        return Ok(out);
    }
    let mut out = Vec::with_capacity(n * k);
    decode::<T>(opened, dtype, n * k, |_, v| out.push(v)).map_err(io_err)?;
    Ok(out)
}

/// A fixed-size numeric element of a `.npy` data section.
trait Element: Copy + Default {
    /// Bytes per element.
    const SIZE: usize;
    /// Decodes one element from exactly [`Self::SIZE`] bytes.
    fn decode(bytes: &[u8], big_endian: bool) -> Self;
}

macro_rules! element {
    ($($t:ty),*) => {$(
        impl Element for $t {
            const SIZE: usize = std::mem::size_of::<$t>();
            #[inline(always)]
            fn decode(bytes: &[u8], big_endian: bool) -> Self {
                let mut raw = [0u8; std::mem::size_of::<$t>()];
                raw.copy_from_slice(bytes);
                if big_endian { <$t>::from_be_bytes(raw) } else { <$t>::from_le_bytes(raw) }
            }
        }
    )*};
}
element!(f32, f64, i8, i16, i32, i64, u8, u16, u32, u64);

/// Decodes `count` elements from the data section in [`READ_BUFFER_BYTES`] chunks, handing each
/// to `sink` with its index (file order). The caller has checked the dtype size and length.
fn decode<T: Element>(
    opened: &mut Opened,
    dtype: Dtype,
    count: usize,
    mut sink: impl FnMut(usize, T),
) -> std::io::Result<()> {
    debug_assert_eq!(dtype.size, T::SIZE);
    let big_endian = dtype.big_endian;
    let per_chunk = (READ_BUFFER_BYTES / T::SIZE).max(1);
    let mut buf = vec![0u8; per_chunk.min(count) * T::SIZE];
    let mut done = 0;
    while done < count {
        let bytes = &mut buf[..per_chunk.min(count - done) * T::SIZE];
        opened.reader.read_exact(bytes)?;
        for (i, raw) in bytes.chunks_exact(T::SIZE).enumerate() {
            sink(done + i, T::decode(raw, big_endian));
        }
        done += bytes.len() / T::SIZE;
    }
    Ok(())
}

/// A shape error.
fn bad_shape(path: &Path, array: &'static str, expected: &'static str, h: &Header) -> DatasetError {
    DatasetError::file(
        path,
        ErrorKind::NpyShape {
            array,
            expected,
            found: h.shape.clone(),
        },
    )
}

/// A dtype error.
fn bad_dtype(path: &Path, array: &'static str, expected: &'static str, h: &Header) -> DatasetError {
    DatasetError::file(
        path,
        ErrorKind::NpyDtype {
            array,
            expected,
            found: h.descr.clone(),
        },
    )
}

/// A dimension as usize (fails only on 32-bit targets with giant headers, caught by the
/// length check before).
fn to_usize(path: &Path, v: u64) -> Result<usize, DatasetError> {
    usize::try_from(v).map_err(|_| {
        DatasetError::file(
            path,
            ErrorKind::NpyHeader {
                message: format!("dimension {v} too large"),
            },
        )
    })
}

#[cfg(test)]
#[path = "npy_tests.rs"]
mod tests;
