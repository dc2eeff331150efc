//! Compiles proto/ with a pure-Rust protobuf compiler (no system protoc needed) and writes the
//! file descriptor set that server reflection serves.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protos = [
        "proto/candor/v1/calibrator.proto",
        "proto/candor/v1/admin.proto",
    ];
    for p in protos {
        println!("cargo:rerun-if-changed={p}");
    }
    let fds = protox::compile(protos, ["proto"])?;
    let out = PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(
        out.join("candor_descriptor.bin"),
        prost::Message::encode_to_vec(&fds),
    )?;
    // The two data-plane messages are written by hand (src/proto/messages.rs) so that their
    // float arrays are encoded and decoded in bulk.
    tonic_prost_build::configure()
        .extern_path(
            ".candor.v1.CalibrateRequest",
            "crate::proto::messages::CalibrateRequest",
        )
        .extern_path(
            ".candor.v1.CalibrateResponse",
            "crate::proto::messages::CalibrateResponse",
        )
        .build_client(true)
        .build_server(true)
        .compile_fds(fds)?;
    Ok(())
}
