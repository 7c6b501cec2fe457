//! Compiles proto/deeptime/cluster/v1/*.proto with no system protoc: protox
//! parses them into a descriptor set, tonic-prost-build generates the code.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let file = "deeptime/cluster/v1/cluster.proto";
    println!("cargo:rerun-if-changed={file}");
    let descriptors = protox::compile([file], ["."])?;
    let out = PathBuf::from(std::env::var("OUT_DIR")?);
    std::fs::write(
        out.join("cluster_descriptor.bin"),
        prost::Message::encode_to_vec(&descriptors),
    )?;
    tonic_prost_build::configure().compile_fds(descriptors)?;
    Ok(())
}
