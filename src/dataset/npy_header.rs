//! The `.npy` header: read (versions 1.0, 2.0, 3.0) and write (1.0), following the NumPy format
//! description (NEP 1, "A Simple File Format for NumPy Arrays", 2007, and `numpy.lib.format`).
//!
//! Layout: magic `\x93NUMPY`, major and minor version bytes, header length (u16 little-endian in
//! 1.0, u32 in 2.0 and 3.0), then a Python dict literal with keys `descr` (dtype string such as
//! `'<f4'`), `fortran_order` (`True`/`False`) and `shape` (tuple of ints), padded with spaces and
//! a final newline so the data starts on a 64-byte boundary.
//!
//! Parsed here rather than by a crate: the crate tried (`npyz` 0.9.1) overflows (a panic in
//! debug builds) when a header's shape product exceeds u64, which a file can trigger, and brings
//! some twenty dependencies, one with a C build step, for a dict of three keys. This parser
//! accepts what numpy's `ast.literal_eval` accepts for these keys (either quote style, any key
//! order, optional trailing commas, Python 2 `L` suffixes) and rejects structured dtypes.

use std::io::{Read, Write};

use super::error::ErrorKind;

/// First six bytes of every `.npy` file.
pub const MAGIC: &[u8; 6] = b"\x93NUMPY";

/// Longest header accepted (numpy's default `max_header_size`, a guard against hostile files).
pub const MAX_HEADER_BYTES: usize = 10_000;

/// numpy aligns the data section to this many bytes.
pub const ARRAY_ALIGN: usize = 64;

/// Spare spaces numpy leaves so the first dimension can grow in place (`GROWTH_AXIS_MAX_DIGITS`).
pub const GROWTH_AXIS_MAX_DIGITS: usize = 21;

/// Element kinds the readers accept.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Scalar {
    /// `b` (numpy bool, one byte 0/1).
    Bool,
    /// `i` (signed integer).
    Int,
    /// `u` (unsigned integer).
    Uint,
    /// `f` (IEEE float).
    Float,
}

/// A simple (non-structured) dtype.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Dtype {
    /// Element kind.
    pub scalar: Scalar,
    /// Bytes per element.
    pub size: usize,
    /// Stored big-endian (`>`), else little-endian or single-byte.
    pub big_endian: bool,
}

/// A parsed header.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Header {
    /// The dtype string as written, e.g. `<f4`.
    pub descr: String,
    /// Column-major data.
    pub fortran_order: bool,
    /// Dimensions.
    pub shape: Vec<u64>,
    /// Number of elements (product of `shape`, checked for overflow).
    pub len: u64,
    /// Bytes from the start of the file to the data.
    pub data_offset: u64,
}

impl Header {
    /// The dtype, if `descr` is a bool, integer or float type numpy can write.
    pub fn dtype(&self) -> Option<Dtype> {
        let d = self.descr.as_bytes();
        let (order, rest) = match d.first() {
            Some(c @ (b'<' | b'>' | b'|' | b'=')) => (*c, &d[1..]),
            _ => (b'=', d),
        };
        let (kind, size) = rest.split_first()?;
        let size: usize = std::str::from_utf8(size).ok()?.parse().ok()?;
        let scalar = match (kind, size) {
            (b'b', 1) => Scalar::Bool,
            (b'i', 1 | 2 | 4 | 8) => Scalar::Int,
            (b'u', 1 | 2 | 4 | 8) => Scalar::Uint,
            (b'f', 2 | 4 | 8 | 16) => Scalar::Float,
            _ => return None,
        };
        let big_endian = order == b'>' || (order == b'=' && cfg!(target_endian = "big"));
        Some(Dtype {
            scalar,
            size,
            big_endian,
        })
    }
}

/// Reads and parses the header, leaving `r` at the first data byte.
///
/// # Errors
/// [`ErrorKind::NpyHeader`] for a missing magic, unknown version, oversized or malformed
/// header; [`ErrorKind::Io`] if reading fails otherwise.
pub fn read_header(r: &mut impl Read) -> Result<Header, ErrorKind> {
    let bad = |message: String| ErrorKind::NpyHeader { message };
    let mut fixed = [0u8; 8];
    read_exact(r, &mut fixed, "the magic string")?;
    if &fixed[..6] != MAGIC {
        return Err(bad("no \\x93NUMPY magic string at the start".to_string()));
    }
    let (len, prefix) = match (fixed[6], fixed[7]) {
        (1, 0) => {
            let mut b = [0u8; 2];
            read_exact(r, &mut b, "the header length")?;
            (usize::from(u16::from_le_bytes(b)), 10)
        }
        (2 | 3, 0) => {
            let mut b = [0u8; 4];
            read_exact(r, &mut b, "the header length")?;
            (u32::from_le_bytes(b) as usize, 12)
        }
        (major, minor) => return Err(bad(format!("unsupported format version {major}.{minor}"))),
    };
    if len > MAX_HEADER_BYTES {
        return Err(bad(format!(
            "header of {len} bytes exceeds {MAX_HEADER_BYTES}"
        )));
    }
    let mut text = vec![0u8; len];
    read_exact(r, &mut text, "the header")?;
    let mut header = parse_dict(&text).map_err(bad)?;
    header.data_offset = (prefix + len) as u64;
    Ok(header)
}

/// `read_exact`, reporting a short file as a header problem.
fn read_exact(r: &mut impl Read, buf: &mut [u8], what: &str) -> Result<(), ErrorKind> {
    r.read_exact(buf).map_err(|e| match e.kind() {
        std::io::ErrorKind::UnexpectedEof => ErrorKind::NpyHeader {
            message: format!("the file ends inside {what}"),
        },
        _ => ErrorKind::Io(e),
    })
}

/// Writes a version 1.0 header for a C-order array, byte for byte as numpy's `np.save` does
/// (2.x), so the data starts on an [`ARRAY_ALIGN`] boundary.
///
/// # Errors
/// Any error of `out`; `InvalidInput` if the header would exceed a version 1.0 length.
pub fn write_header(out: &mut impl Write, descr: &str, shape: &[u64]) -> std::io::Result<()> {
    let dims: Vec<String> = shape.iter().map(u64::to_string).collect();
    let tuple = match dims.len() {
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    let mut text = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {tuple}, }}");
    if let Some(first) = dims.first() {
        text.push_str(&" ".repeat(GROWTH_AXIS_MAX_DIGITS.saturating_sub(first.len())));
    }
    let prefix = MAGIC.len() + 2 + 2;
    let unpadded = text.len() + 1;
    let pad = ARRAY_ALIGN - (prefix + unpadded) % ARRAY_ALIGN;
    let len = u16::try_from(unpadded + pad).map_err(|_| {
        std::io::Error::new(std::io::ErrorKind::InvalidInput, "npy header too long")
    })?;
    out.write_all(MAGIC)?;
    out.write_all(&[1, 0])?;
    out.write_all(&len.to_le_bytes())?;
    out.write_all(text.as_bytes())?;
    out.write_all(" ".repeat(pad).as_bytes())?;
    out.write_all(b"\n")
}

/// Parses the header dict; `data_offset` is left 0 for the caller.
fn parse_dict(text: &[u8]) -> Result<Header, String> {
    let mut c = Cursor { s: text, i: 0 };
    let (mut descr, mut fortran_order, mut shape) = (None, None, None);
    c.expect(b'{')?;
    while !c.eat(b'}') {
        let key = c.string()?;
        c.expect(b':')?;
        c.ws();
        let fresh = match key {
            "descr" if c.peek() == Some(b'[') => {
                return Err("structured dtypes (a list of fields) are not supported".to_string())
            }
            "descr" => descr.replace(c.string()?.to_string()).is_none(),
            "fortran_order" => fortran_order.replace(c.boolean()?).is_none(),
            "shape" => shape.replace(c.tuple()?).is_none(),
            other => return Err(format!("unexpected key {other:?}")),
        };
        if !fresh {
            return Err(format!("key {key:?} appears twice"));
        }
        if !c.eat(b',') {
            c.expect(b'}')?;
            break;
        }
    }
    c.ws();
    if c.i != text.len() {
        return Err("unexpected text after the header dict".to_string());
    }
    let missing = |k: &str| format!("the header has no {k:?} key");
    let shape: Vec<u64> = shape.ok_or_else(|| missing("shape"))?;
    let len = shape.iter().try_fold(1u64, |a, &d| a.checked_mul(d));
    let len = len.ok_or_else(|| format!("shape {shape:?} has more elements than a u64 counts"))?;
    Ok(Header {
        descr: descr.ok_or_else(|| missing("descr"))?,
        fortran_order: fortran_order.ok_or_else(|| missing("fortran_order"))?,
        shape,
        len,
        data_offset: 0,
    })
}

/// A position in the header text; every method skips leading whitespace.
struct Cursor<'a> {
    s: &'a [u8],
    i: usize,
}

impl<'a> Cursor<'a> {
    fn ws(&mut self) {
        while self.s.get(self.i).is_some_and(u8::is_ascii_whitespace) {
            self.i += 1;
        }
    }

    fn peek(&self) -> Option<u8> {
        self.s.get(self.i).copied()
    }

    /// Consumes `c` (after whitespace) if it is next.
    fn eat(&mut self, c: u8) -> bool {
        self.ws();
        let found = self.peek() == Some(c);
        self.i += usize::from(found);
        found
    }

    fn expect(&mut self, c: u8) -> Result<(), String> {
        if self.eat(c) {
            return Ok(());
        }
        Err(format!(
            "expected '{}' at byte {} of the header",
            c as char, self.i
        ))
    }

    /// A quoted string without escapes.
    fn string(&mut self) -> Result<&'a str, String> {
        self.ws();
        let quote = self.peek().filter(|q| matches!(q, b'\'' | b'"'));
        let quote = quote.ok_or_else(|| format!("expected a string at byte {}", self.i))?;
        let start = self.i + 1;
        let end = self.s[start..]
            .iter()
            .position(|&b| b == quote || b == b'\\');
        let end = start + end.ok_or("unterminated string")?;
        if self.s[end] == b'\\' {
            return Err("escapes in header strings are not supported".to_string());
        }
        self.i = end + 1;
        std::str::from_utf8(&self.s[start..end])
            .map_err(|_| "header string is not UTF-8".to_string())
    }

    fn boolean(&mut self) -> Result<bool, String> {
        self.ws();
        let word_len = self.s[self.i..]
            .iter()
            .take_while(|b| b.is_ascii_alphabetic())
            .count();
        let word = &self.s[self.i..self.i + word_len];
        self.i += word_len;
        match word {
            b"True" => Ok(true),
            b"False" => Ok(false),
            _ => Err(format!(
                "fortran_order is {:?}, not True or False",
                String::from_utf8_lossy(word)
            )),
        }
    }

    /// A tuple of non-negative ints, e.g. `()`, `(3,)`, `(2, 3)`, `(2L, 3L)`.
    fn tuple(&mut self) -> Result<Vec<u64>, String> {
        self.expect(b'(')?;
        let mut dims = Vec::new();
        while !self.eat(b')') {
            let digits = self.s[self.i..]
                .iter()
                .take_while(|b| b.is_ascii_digit())
                .count();
            let text = std::str::from_utf8(&self.s[self.i..self.i + digits]).unwrap_or("");
            dims.push(
                text.parse()
                    .map_err(|_| format!("bad shape entry at byte {}", self.i))?,
            );
            self.i += digits;
            self.i += usize::from(matches!(self.peek(), Some(b'L' | b'l')));
            if !self.eat(b',') {
                self.expect(b')')?;
                break;
            }
        }
        Ok(dims)
    }
}

#[cfg(test)]
#[path = "npy_header_tests.rs"]
mod tests;
