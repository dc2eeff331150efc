//! Tests for the `.npy` header: literal headers as numpy and other writers produce them, and
//! numpy's own output hashed with Python's hashlib.

use sha2::{Digest, Sha256};

use super::*;

/// A version 1.0 file prefix around `dict` (unpadded; the parser does not need padding).
fn v1(dict: &str) -> Vec<u8> {
    let mut out = MAGIC.to_vec();
    out.extend_from_slice(&[1, 0]);
    out.extend_from_slice(&(dict.len() as u16).to_le_bytes());
    out.extend_from_slice(dict.as_bytes());
    out
}

fn parse(dict: &str) -> Result<Header, ErrorKind> {
    read_header(&mut &v1(dict)[..])
}

fn message(dict: &str) -> String {
    match parse(dict) {
        Err(ErrorKind::NpyHeader { message }) => message,
        other => panic!("expected a header error for {dict:?}, got {other:?}"),
    }
}

#[test]
fn numpy_and_other_spellings() {
    let numpy = "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }        \n";
    let h = parse(numpy).unwrap();
    assert_eq!(
        (h.descr.as_str(), h.fortran_order, h.shape.clone(), h.len),
        ("<f4", false, vec![2, 3], 6)
    );
    assert_eq!(h.data_offset, (10 + numpy.len()) as u64);
    let other = "{\"shape\":(3L,),\"fortran_order\":True,\"descr\":\">i8\"}";
    let h = parse(other).unwrap();
    assert_eq!(
        (h.descr.as_str(), h.fortran_order, h.shape, h.len),
        (">i8", true, vec![3], 3)
    );
    let scalar = parse("{'descr': '<f8', 'fortran_order': False, 'shape': (), }").unwrap();
    assert_eq!((scalar.shape.len(), scalar.len), (0, 1));
}

#[test]
fn versions_two_and_three_use_a_u32_length() {
    let dict = "{'descr': '<f8', 'fortran_order': False, 'shape': (1,), }\n";
    for major in [2u8, 3] {
        let mut bytes = MAGIC.to_vec();
        bytes.extend_from_slice(&[major, 0]);
        bytes.extend_from_slice(&(dict.len() as u32).to_le_bytes());
        bytes.extend_from_slice(dict.as_bytes());
        let h = read_header(&mut &bytes[..]).unwrap();
        assert_eq!(
            (h.shape, h.data_offset),
            (vec![1], (12 + dict.len()) as u64)
        );
    }
}

#[test]
fn malformed_headers() {
    assert!(message("{'descr': '<f8', 'fortran_order': False}").contains("no \"shape\" key"));
    assert!(
        message("{'descr': '<f8', 'descr': '<f4', 'fortran_order': False, 'shape': ()}")
            .contains("twice")
    );
    assert!(
        message("{'descr': '<f8', 'fortran_order': False, 'shape': (), 'x': 1}")
            .contains("unexpected key")
    );
    assert!(
        message("{'descr': [('a', '<f8')], 'fortran_order': False, 'shape': ()}")
            .contains("structured")
    );
    assert!(
        message("{'descr': '<f8', 'fortran_order': 0, 'shape': ()}").contains("not True or False")
    );
    assert!(
        message("{'descr': '<f8', 'fortran_order': False, 'shape': (-1,)}")
            .contains("bad shape entry")
    );
    assert!(
        message("{'descr': '<f8', 'fortran_order': False, 'shape': ()} x")
            .contains("after the header")
    );
    assert!(message("{'descr': '<f8").contains("unterminated"));
    let huge = "{'descr': '<f8', 'fortran_order': False, 'shape': (4294967296, 4294967296, 16), }";
    assert!(message(huge).contains("more elements than a u64 counts"));
}

#[test]
fn bad_prefixes() {
    let text = |r: Result<Header, ErrorKind>| match r {
        Err(ErrorKind::NpyHeader { message }) => message,
        other => panic!("{other:?}"),
    };
    assert!(text(read_header(&mut &b"x,y\n1,2\n"[..])).contains("magic"));
    assert!(text(read_header(&mut &b"\x93NUMPY\x04\x00\x10\x00"[..])).contains("version 4.0"));
    assert!(
        text(read_header(&mut &b"\x93NUMPY\x01\x00\x10\x00{'de"[..]))
            .contains("ends inside the header")
    );
    assert!(text(read_header(&mut &b"\x93NU"[..])).contains("ends inside the magic"));
    let long = [&MAGIC[..], &[2, 0], &20_000u32.to_le_bytes()].concat();
    assert!(text(read_header(&mut &long[..])).contains("exceeds 10000"));
}

#[test]
fn dtypes() {
    let dtype = |descr: &str| {
        Header {
            descr: descr.to_string(),
            fortran_order: false,
            shape: vec![],
            len: 1,
            data_offset: 0,
        }
        .dtype()
    };
    let d = |scalar, size, big_endian| {
        Some(Dtype {
            scalar,
            size,
            big_endian,
        })
    };
    assert_eq!(dtype("<f4"), d(Scalar::Float, 4, false));
    assert_eq!(dtype(">i8"), d(Scalar::Int, 8, true));
    assert_eq!(dtype("|b1"), d(Scalar::Bool, 1, false));
    assert_eq!(dtype("|u1"), d(Scalar::Uint, 1, false));
    assert_eq!(dtype("<f2"), d(Scalar::Float, 2, false));
    assert_eq!(
        dtype("f8"),
        d(Scalar::Float, 8, cfg!(target_endian = "big"))
    );
    for other in ["<U1", "<c16", "|S3", "<M8[ns]", "<i3", "|O", ""] {
        assert_eq!(dtype(other), None, "{other}");
    }
}

#[test]
fn written_header_is_numpys() {
    // python3: buf = io.BytesIO(); np.save(buf, np.zeros((1234567890123, 0)));
    // hashlib.sha256(buf.getvalue()).hexdigest()  (numpy 2.4.6; header only, no data)
    let mut out = Vec::new();
    write_header(&mut out, "<f8", &[1234567890123, 0]).unwrap();
    let expected = "7dcd4729e7994de45b476a5011ac05796c83ac51aed786ca0db42cc533ffd932";
    assert_eq!(hex::encode(Sha256::digest(&out)), expected);
    assert_eq!(out.len() % ARRAY_ALIGN, 0);
    let h = read_header(&mut &out[..]).unwrap();
    assert_eq!(
        (h.shape, h.data_offset),
        (vec![1234567890123, 0], out.len() as u64)
    );
}
