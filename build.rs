//! Compiles the gRPC API with protox (a pure-Rust protobuf compiler: no
//! protoc on the machine) and writes the descriptor set for reflection.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let proto = "proto/apportion/v1/apportion.proto";
    println!("cargo:rerun-if-changed={proto}");
    let descriptors = protox::compile([proto], ["proto"])?;
    let out_dir = PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(
        out_dir.join("apportion_descriptor.bin"),
        protox::prost::Message::encode_to_vec(&descriptors),
    )?;
    tonic_prost_build::configure()
        .build_client(true)
        .build_server(true)
        .compile_fds(descriptors)?;
    Ok(())
}
