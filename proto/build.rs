//! Compiles `proto/tessera.proto` with protox (a pure-Rust protobuf compiler),
//! so building tessera needs no system `protoc`.

use prost::Message;
use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    println!("cargo:rerun-if-changed=proto/tessera.proto");
    let fds = protox::compile(["tessera.proto"], ["proto"])?;
    let out = PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(out.join("tessera_descriptor.bin"), fds.encode_to_vec())?;
    tonic_prost_build::configure()
        .build_server(true)
        .build_client(true)
        .compile_fds(fds)?;
    Ok(())
}
