//! The hand-written messages against prost-derived twins: the same bytes out, the same values in,
//! the same inputs refused.

use super::{CalibrateRequest, CalibrateResponse};
use crate::proto::twins::{GeneratedRequest as RequestTwin, GeneratedResponse as ResponseTwin};
use proptest::prelude::*;
use prost::bytes::Buf;
use prost::Message;

/// The same message as an encoder that does not pack repeated floats would write it.
#[derive(Clone, PartialEq, prost::Message)]
struct UnpackedRequestTwin {
    #[prost(string, tag = "1")]
    model: String,
    #[prost(float, repeated, packed = "false", tag = "2")]
    logits: Vec<f32>,
}

fn request_twin(r: &CalibrateRequest) -> RequestTwin {
    RequestTwin {
        model: r.model.clone(),
        logits: r.logits.clone(),
        request_id: r.request_id.clone(),
        top_k: r.top_k,
        map_version: r.map_version.clone(),
    }
}

fn response_twin(r: &CalibrateResponse) -> ResponseTwin {
    ResponseTwin {
        probabilities: r.probabilities.clone(),
        predicted_class: r.predicted_class,
        confidence: r.confidence,
        decision: r.decision,
        threshold: r.threshold,
        map_version: r.map_version.clone(),
        request_id: r.request_id.clone(),
        classes: r.classes.clone(),
        route: r.route,
        audit: r.audit,
    }
}

fn bits(v: &[f32]) -> Vec<u32> {
    v.iter().map(|x| x.to_bits()).collect()
}

fn float() -> impl Strategy<Value = f32> {
    prop_oneof![
        8 => -1e6f32..1e6f32,
        1 => Just(-0.0f32),
        1 => any::<u32>().prop_map(f32::from_bits),
    ]
}

fn name() -> impl Strategy<Value = String> {
    prop_oneof![Just(String::new()), "[a-zé._-]{1,12}"]
}

fn request() -> impl Strategy<Value = CalibrateRequest> {
    (
        name(),
        prop::collection::vec(float(), 0..40),
        name(),
        prop_oneof![Just(0u32), any::<u32>()],
        name(),
    )
        .prop_map(
            |(model, logits, request_id, top_k, map_version)| CalibrateRequest {
                model,
                logits,
                request_id,
                top_k,
                map_version,
            },
        )
}

fn response() -> impl Strategy<Value = CalibrateResponse> {
    (
        prop::collection::vec(float(), 0..40),
        prop_oneof![Just(0u32), any::<u32>()],
        float(),
        prop_oneof![Just(0i32), -3i32..3],
        float(),
        (name(), name()),
        prop::collection::vec(any::<u32>(), 0..5),
        0i32..4,
        any::<bool>(),
    )
        .prop_map(
            |(
                probabilities,
                predicted_class,
                confidence,
                decision,
                threshold,
                (map_version, request_id),
                classes,
                route,
                audit,
            )| CalibrateResponse {
                probabilities,
                predicted_class,
                confidence,
                decision,
                threshold,
                map_version,
                request_id,
                classes,
                route,
                audit,
            },
        )
}

/// `m` encodes to its prost twin's bytes and the length it announces, and reads back to the same
/// floats, bit for bit (`floats` picks them), and the same bytes.
fn encodes_like_its_twin<M: Message + Default>(
    m: &M,
    twin: &impl Message,
    floats: fn(&M) -> &[f32],
) -> Result<(), TestCaseError> {
    let bytes = m.encode_to_vec();
    prop_assert_eq!(m.encoded_len(), bytes.len());
    prop_assert_eq!(&bytes, &twin.encode_to_vec());
    let back = M::decode(bytes.as_slice()).unwrap();
    prop_assert_eq!(bits(floats(&back)), bits(floats(m)));
    prop_assert_eq!(back.encode_to_vec(), bytes);
    Ok(())
}

/// A buffer that hands out `bytes` in two chunks split at `at`, as a buffer that received a
/// message in two reads does.
fn split(bytes: &[u8], at: usize) -> impl Buf + '_ {
    let (a, b) = bytes.split_at(at);
    a.chain(b)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    #[test]
    fn a_request_encodes_to_prosts_bytes_and_reads_back(r in request()) {
        encodes_like_its_twin(&r, &request_twin(&r), |m| &m.logits)?;
    }

    #[test]
    fn a_response_encodes_to_prosts_bytes_and_reads_back(r in response()) {
        encodes_like_its_twin(&r, &response_twin(&r), |m| &m.probabilities)?;
    }

    #[test]
    fn any_split_of_the_buffer_reads_the_same_floats(r in request(), at in 0usize..200) {
        let bytes = r.encode_to_vec();
        let at = at.min(bytes.len());
        let back = CalibrateRequest::decode(split(&bytes, at)).unwrap();
        prop_assert_eq!(bits(&back.logits), bits(&r.logits));
        prop_assert_eq!(back.encode_to_vec(), bytes);
    }

    #[test]
    fn damaged_bytes_are_refused_or_read_exactly_as_prost_does(
        r in request(),
        cut in 0usize..400,
        flips in prop::collection::vec((0usize..400, any::<u8>()), 0..3),
    ) {
        let mut bytes = r.encode_to_vec();
        for (i, b) in flips {
            if !bytes.is_empty() {
                let i = i % bytes.len();
                bytes[i] = b;
            }
        }
        bytes.truncate(cut.min(bytes.len()));
        let ours = CalibrateRequest::decode(bytes.as_slice());
        let twin = RequestTwin::decode(bytes.as_slice());
        match (ours, twin) {
            (Ok(o), Ok(t)) => {
                prop_assert_eq!(o.encode_to_vec(), t.encode_to_vec());
            }
            (Err(_), Err(_)) => {}
            (o, t) => prop_assert!(false, "ours {o:?}, prost {t:?}"),
        }
    }
}

#[test]
fn unpacked_floats_are_read_one_by_one() {
    let sent = UnpackedRequestTwin {
        model: "triage".into(),
        logits: vec![1.5, -2.25, 0.0, 3.0],
    };
    let r = CalibrateRequest::decode(sent.encode_to_vec().as_slice()).unwrap();
    assert_eq!(r.model, "triage");
    assert_eq!(r.logits, [1.5, -2.25, 0.0, 3.0]);
}

#[test]
fn a_repeated_packed_field_appends_and_a_repeated_string_replaces() {
    // Protobuf merge rules (the protobuf encoding guide): concatenated messages merge, repeated
    // fields append, scalar fields keep the last value.
    let a = CalibrateRequest {
        model: "a".into(),
        logits: vec![1.0, 2.0],
        ..Default::default()
    };
    let b = CalibrateRequest {
        model: "b".into(),
        logits: vec![3.0],
        ..Default::default()
    };
    let mut bytes = a.encode_to_vec();
    bytes.extend(b.encode_to_vec());
    let r = CalibrateRequest::decode(bytes.as_slice()).unwrap();
    assert_eq!(r.model, "b");
    assert_eq!(r.logits, [1.0, 2.0, 3.0]);
}

#[test]
fn a_packed_length_that_is_not_whole_floats_is_refused_with_the_field_named() {
    // Field 2, wire type 2 (key 0x12), length 5: one float and a stray byte.
    let bytes = [0x12, 5, 0, 0, 128, 63, 7];
    let e = CalibrateRequest::decode(&bytes[..]).unwrap_err();
    assert!(RequestTwin::decode(&bytes[..]).is_err());
    assert!(e.to_string().contains("CalibrateRequest.logits"), "{e}");
    // Length 8 with four bytes left.
    let short = [0x12, 8, 0, 0, 128, 63];
    assert!(CalibrateRequest::decode(&short[..]).is_err());
    assert!(RequestTwin::decode(&short[..]).is_err());
}

#[test]
fn known_bytes_of_a_small_request() {
    // Hand-assembled from the protobuf encoding guide: key (tag << 3 | wire type), then
    // length-delimited payload; 1.0f32 is 0x3f800000, little-endian 00 00 80 3f.
    let r = CalibrateRequest {
        model: "m".into(),
        logits: vec![1.0, -2.0],
        top_k: 1,
        ..Default::default()
    };
    assert_eq!(
        r.encode_to_vec(),
        [0x0a, 1, b'm', 0x12, 8, 0, 0, 0x80, 0x3f, 0, 0, 0, 0xc0, 0x20, 1]
    );
}

#[test]
fn a_large_array_crosses_the_write_blocks_intact() {
    // More floats than one write block, and not a multiple of it.
    let logits: Vec<f32> = (0..1000).map(|i| i as f32 * 0.25 - 7.0).collect();
    let r = CalibrateResponse {
        probabilities: logits.clone(),
        ..Default::default()
    };
    let bytes = r.encode_to_vec();
    assert_eq!(bytes, response_twin(&r).encode_to_vec());
    assert_eq!(
        CalibrateResponse::decode(bytes.as_slice())
            .unwrap()
            .probabilities,
        logits
    );
}

#[test]
fn the_hand_written_messages_have_every_field_the_proto_declares() {
    // A field added to either message in proto/candor/v1/calibrator.proto must be added to
    // messages.rs (and twins.rs) too; until then this lists what is missing.
    use prost_types::field_descriptor_proto::{Label, Type};
    let set = prost_types::FileDescriptorSet::decode(crate::proto::FILE_DESCRIPTOR_SET).unwrap();
    let fields = |message: &str| -> Vec<(i32, String, Type, Label)> {
        let m = set
            .file
            .iter()
            .filter(|f| f.package() == "candor.v1")
            .flat_map(|f| &f.message_type)
            .find(|m| m.name() == message)
            .unwrap();
        m.field
            .iter()
            .map(|f| (f.number(), f.name().to_owned(), f.r#type(), f.label()))
            .collect()
    };
    let (one, many) = (Label::Optional, Label::Repeated);
    let expect = |v: &[(i32, &str, Type, Label)]| -> Vec<(i32, String, Type, Label)> {
        v.iter()
            .map(|(n, s, t, l)| (*n, s.to_string(), *t, *l))
            .collect()
    };
    assert_eq!(
        fields("CalibrateRequest"),
        expect(&[
            (1, "model", Type::String, one),
            (2, "logits", Type::Float, many),
            (3, "request_id", Type::String, one),
            (4, "top_k", Type::Uint32, one),
            (5, "map_version", Type::String, one),
        ])
    );
    assert_eq!(
        fields("CalibrateResponse"),
        expect(&[
            (1, "probabilities", Type::Float, many),
            (2, "predicted_class", Type::Uint32, one),
            (3, "confidence", Type::Float, one),
            (4, "decision", Type::Enum, one),
            (5, "threshold", Type::Float, one),
            (6, "map_version", Type::String, one),
            (7, "request_id", Type::String, one),
            (8, "classes", Type::Uint32, many),
            (9, "route", Type::Enum, one),
            (10, "audit", Type::Bool, one),
        ])
    );
}
