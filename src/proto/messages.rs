//! `CalibrateRequest` and `CalibrateResponse`, written by hand so that their float arrays move in
//! bulk.
//!
//! prost's generated code reads a packed `repeated float` one element at a time through the
//! buffer's `Buf` interface, a bounds check and an advance per float, and writes it the same way.
//! At K = 1000 that was about a quarter of the sidecar's CPU per request (perf, sidecar
//! comparison). These two messages carry the data plane's arrays, so they implement
//! `prost::Message` themselves:
//! - packed floats are copied a buffer chunk at a time;
//! - every other field goes through prost's own field functions;
//! - input the bulk path does not take (unpacked floats, a length that is not a whole number of
//!   floats or runs past the buffer) is handed to prost, which reads or refuses it as the
//!   generated code would.
//!
//! The bytes written are the bytes prost writes (fields in tag order, defaults left out); the
//! tests check both directions against prost-derived twins of the two messages.

use prost::bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

/// One row to calibrate (`candor.v1.CalibrateRequest`).
#[derive(Clone, PartialEq, Default, Debug)]
pub struct CalibrateRequest {
    /// Model name as written in the map. May be empty when exactly one model is loaded.
    pub model: String,
    /// Raw logits (pre-softmax scores), one per class; one single log-odds score for maps whose
    /// input form is "binary_score".
    pub logits: Vec<f32>,
    /// Caller's identifier, echoed back. Optional.
    pub request_id: String,
    /// 0 returns every class probability in class order; k > 0 returns the k largest, most
    /// probable first, with their class indices in `classes`.
    pub top_k: u32,
    /// Pin a map version (for replays and audits). Empty: the active version, or the canary for
    /// the share of request ids the canary takes. An unknown version is NOT_FOUND.
    pub map_version: String,
}

/// The answer to one row (`candor.v1.CalibrateResponse`).
#[derive(Clone, PartialEq, Default, Debug)]
pub struct CalibrateResponse {
    /// Calibrated probabilities: every class in class order (top_k = 0), or the top_k largest.
    pub probabilities: Vec<f32>,
    /// argmax of the calibrated probabilities (ties go to the smallest index).
    pub predicted_class: u32,
    /// Calibrated probability of the predicted class.
    pub confidence: f32,
    /// A [`super::v1::Decision`] value.
    pub decision: i32,
    /// Threshold that applied to the predicted class. 1.5 stands for "no auto-accept at all".
    pub threshold: f32,
    /// Version of the map that produced this answer.
    pub map_version: String,
    /// The request's identifier.
    pub request_id: String,
    /// With top_k > 0: class index of each entry of `probabilities`.
    pub classes: Vec<u32>,
    /// How `map_version` was chosen: a [`super::v1::Route`] value.
    pub route: i32,
    /// True for the sampled share of accepted items that a person should check as well (the audit
    /// sample that keeps the live accuracy estimate honest). Always false for deferred items.
    pub audit: bool,
}

/// Names a decoding error's place the way prost-derived messages do.
fn at(message: &'static str, field: &'static str) -> impl FnOnce(DecodeError) -> DecodeError {
    move |mut e| {
        e.push(message, field);
        e
    }
}

impl prost::Message for CalibrateRequest {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        if !self.model.is_empty() {
            encoding::string::encode(1, &self.model, buf);
        }
        put_floats(2, &self.logits, buf);
        if !self.request_id.is_empty() {
            encoding::string::encode(3, &self.request_id, buf);
        }
        if self.top_k != 0 {
            encoding::uint32::encode(4, &self.top_k, buf);
        }
        if !self.map_version.is_empty() {
            encoding::string::encode(5, &self.map_version, buf);
        }
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        const NAME: &str = "CalibrateRequest";
        match tag {
            1 => encoding::string::merge(wire_type, &mut self.model, buf, ctx)
                .map_err(at(NAME, "model")),
            2 => merge_floats(wire_type, &mut self.logits, buf, ctx).map_err(at(NAME, "logits")),
            3 => encoding::string::merge(wire_type, &mut self.request_id, buf, ctx)
                .map_err(at(NAME, "request_id")),
            4 => encoding::uint32::merge(wire_type, &mut self.top_k, buf, ctx)
                .map_err(at(NAME, "top_k")),
            5 => encoding::string::merge(wire_type, &mut self.map_version, buf, ctx)
                .map_err(at(NAME, "map_version")),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        string_len(1, &self.model)
            + floats_len(2, &self.logits)
            + string_len(3, &self.request_id)
            + if self.top_k != 0 {
                encoding::uint32::encoded_len(4, &self.top_k)
            } else {
                0
            }
            + string_len(5, &self.map_version)
    }

    fn clear(&mut self) {
        self.model.clear();
        self.logits.clear();
        self.request_id.clear();
        self.top_k = 0;
        self.map_version.clear();
    }
}

impl prost::Message for CalibrateResponse {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        put_floats(1, &self.probabilities, buf);
        if self.predicted_class != 0 {
            encoding::uint32::encode(2, &self.predicted_class, buf);
        }
        if self.confidence != 0.0 {
            encoding::float::encode(3, &self.confidence, buf);
        }
        if self.decision != 0 {
            encoding::int32::encode(4, &self.decision, buf);
        }
        if self.threshold != 0.0 {
            encoding::float::encode(5, &self.threshold, buf);
        }
        if !self.map_version.is_empty() {
            encoding::string::encode(6, &self.map_version, buf);
        }
        if !self.request_id.is_empty() {
            encoding::string::encode(7, &self.request_id, buf);
        }
        encoding::uint32::encode_packed(8, &self.classes, buf);
        if self.route != 0 {
            encoding::int32::encode(9, &self.route, buf);
        }
        if self.audit {
            encoding::bool::encode(10, &self.audit, buf);
        }
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        const NAME: &str = "CalibrateResponse";
        match tag {
            1 => merge_floats(wire_type, &mut self.probabilities, buf, ctx)
                .map_err(at(NAME, "probabilities")),
            2 => encoding::uint32::merge(wire_type, &mut self.predicted_class, buf, ctx)
                .map_err(at(NAME, "predicted_class")),
            3 => encoding::float::merge(wire_type, &mut self.confidence, buf, ctx)
                .map_err(at(NAME, "confidence")),
            4 => encoding::int32::merge(wire_type, &mut self.decision, buf, ctx)
                .map_err(at(NAME, "decision")),
            5 => encoding::float::merge(wire_type, &mut self.threshold, buf, ctx)
                .map_err(at(NAME, "threshold")),
            6 => encoding::string::merge(wire_type, &mut self.map_version, buf, ctx)
                .map_err(at(NAME, "map_version")),
            7 => encoding::string::merge(wire_type, &mut self.request_id, buf, ctx)
                .map_err(at(NAME, "request_id")),
            8 => encoding::uint32::merge_repeated(wire_type, &mut self.classes, buf, ctx)
                .map_err(at(NAME, "classes")),
            9 => encoding::int32::merge(wire_type, &mut self.route, buf, ctx)
                .map_err(at(NAME, "route")),
            10 => encoding::bool::merge(wire_type, &mut self.audit, buf, ctx)
                .map_err(at(NAME, "audit")),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        let mut n = floats_len(1, &self.probabilities);
        if self.predicted_class != 0 {
            n += encoding::uint32::encoded_len(2, &self.predicted_class);
        }
        if self.confidence != 0.0 {
            n += encoding::float::encoded_len(3, &self.confidence);
        }
        if self.decision != 0 {
            n += encoding::int32::encoded_len(4, &self.decision);
        }
        if self.threshold != 0.0 {
            n += encoding::float::encoded_len(5, &self.threshold);
        }
        n += string_len(6, &self.map_version) + string_len(7, &self.request_id);
        n += encoding::uint32::encoded_len_packed(8, &self.classes);
        if self.route != 0 {
            n += encoding::int32::encoded_len(9, &self.route);
        }
        if self.audit {
            n += encoding::bool::encoded_len(10, &self.audit);
        }
        n
    }

    fn clear(&mut self) {
        self.probabilities.clear();
        self.predicted_class = 0;
        self.confidence = 0.0;
        self.decision = 0;
        self.threshold = 0.0;
        self.map_version.clear();
        self.request_id.clear();
        self.classes.clear();
        self.route = 0;
        self.audit = false;
    }
}

fn string_len(tag: u32, s: &String) -> usize {
    if s.is_empty() {
        0
    } else {
        encoding::string::encoded_len(tag, s)
    }
}

/// Encoded length of a packed float field (nothing when empty).
fn floats_len(tag: u32, values: &[f32]) -> usize {
    if values.is_empty() {
        0
    } else {
        let bytes = values.len() * 4;
        encoding::key_len(tag) + encoding::encoded_len_varint(bytes as u64) + bytes
    }
}

/// Floats written to the buffer per copy.
const BLOCK: usize = 256;

/// Writes a packed float field: key, byte length, then the little-endian floats a block at a
/// time (nothing when empty, as prost does).
fn put_floats(tag: u32, values: &[f32], buf: &mut impl BufMut) {
    if values.is_empty() {
        return;
    }
    encoding::encode_key(tag, WireType::LengthDelimited, buf);
    encoding::encode_varint((values.len() * 4) as u64, buf);
    let mut block = [0u8; BLOCK * 4];
    for chunk in values.chunks(BLOCK) {
        let bytes = &mut block[..chunk.len() * 4];
        for (b, v) in bytes.chunks_exact_mut(4).zip(chunk) {
            b.copy_from_slice(&v.to_le_bytes());
        }
        buf.put_slice(bytes);
    }
}

/// Merges a float field: a packed run whose length is a whole number of floats within the
/// buffer is copied in bulk; anything else (one unpacked float, a bad length) goes to prost.
fn merge_floats(
    wire_type: WireType,
    values: &mut Vec<f32>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    if wire_type == WireType::LengthDelimited {
        let mut peek = buf.chunk();
        let before = peek.len();
        if let Ok(len) = encoding::decode_varint(&mut peek) {
            let header = before - peek.len();
            if let Ok(len) = usize::try_from(len) {
                if len % 4 == 0 && len <= buf.remaining() - header {
                    buf.advance(header);
                    take_floats(len, values, buf);
                    return Ok(());
                }
            }
        }
    }
    encoding::float::merge_repeated(wire_type, values, buf, ctx)
}

/// Appends `len / 4` little-endian floats from `buf` (`len` a multiple of 4, at most
/// `buf.remaining()`), a whole chunk of the buffer at a time.
fn take_floats(mut len: usize, values: &mut Vec<f32>, buf: &mut impl Buf) {
    values.reserve(len / 4);
    while len > 0 {
        let chunk = buf.chunk();
        let whole = chunk.len().min(len) / 4 * 4;
        if whole == 0 {
            // A float split across two chunks of the buffer.
            values.push(buf.get_f32_le());
            len -= 4;
            continue;
        }
        values.extend(
            chunk[..whole]
                .chunks_exact(4)
                .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]])),
        );
        buf.advance(whole);
        len -= whole;
    }
}

#[cfg(test)]
#[path = "messages_tests.rs"]
mod tests;
