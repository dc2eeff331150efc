//! Generated protobuf and gRPC code for `candor.v1` (from proto/candor/v1/calibrator.proto).
#![allow(missing_docs, clippy::all, clippy::pedantic)]

/// The `candor.v1` package.
pub mod v1 {
    tonic::include_proto!("candor.v1");
}

/// Encoded file descriptor set of proto/, served by gRPC server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] =
    include_bytes!(concat!(env!("OUT_DIR"), "/candor_descriptor.bin"));
