//! Protobuf and gRPC code for `candor.v1` (from proto/candor/v1/calibrator.proto): generated,
//! except the two data-plane messages, whose float arrays [`messages`] encodes and decodes in bulk.

pub mod messages;
#[allow(missing_docs)]
pub mod twins;

/// The `candor.v1` package.
pub mod v1 {
    #![allow(missing_docs, clippy::all, clippy::pedantic)]
    tonic::include_proto!("candor.v1");
    pub use super::messages::{CalibrateRequest, CalibrateResponse};
}

/// Encoded file descriptor set of proto/, served by gRPC server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] =
    include_bytes!(concat!(env!("OUT_DIR"), "/candor_descriptor.bin"));
