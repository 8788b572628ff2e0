//! Compiles the protobuf API with a pure-Rust compiler (`protox`), so that no system `protoc`
//! is needed, and writes the encoded descriptor set to `OUT_DIR` for server reflection.

use std::{env, fs, path::PathBuf};

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protos = [
        "proto/hypsogrid/v1/cycle.proto",
        "proto/hypsogrid/v1/service.proto",
        "proto/hypsogrid/v1/products.proto",
    ];
    for p in &protos {
        println!("cargo:rerun-if-changed={p}");
    }
    let fds = protox::compile(protos, ["proto"])?;
    let out = PathBuf::from(env::var("OUT_DIR")?);
    fs::write(
        out.join("hypsogrid_descriptor.bin"),
        prost::Message::encode_to_vec(&fds),
    )?;
    tonic_prost_build::configure()
        // Area answers' values are encoded and decoded as one block (src/wire.rs).
        .extern_path(
            ".hypsogrid.v1.QuantityValues",
            "crate::wire::QuantityValues",
        )
        .build_server(true)
        .build_client(true)
        .compile_fds(fds)?;
    Ok(())
}
