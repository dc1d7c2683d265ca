//! Generates the gRPC code from `proto/probity/v1/*.proto`, with the protobuf compiler shipped in the
//! `protoc-bin-vendored` crate, so that a fresh machine needs nothing installed beyond the Rust toolchain.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protoc = protoc_bin_vendored::protoc_bin_path()?;
    // prost-build finds the compiler through PROTOC.
    std::env::set_var("PROTOC", protoc);

    let root = PathBuf::from(std::env::var("CARGO_MANIFEST_DIR")?)
        .join("..")
        .join("proto");
    let files = [
        root.join("probity/v1/scoring.proto"),
        root.join("probity/v1/models.proto"),
        root.join("probity/v1/outcomes.proto"),
        root.join("probity/v1/challengers.proto"),
    ];
    let out_dir = PathBuf::from(std::env::var("OUT_DIR")?);
    tonic_prost_build::configure()
        .file_descriptor_set_path(out_dir.join("probity_descriptor.bin"))
        .compile_protos(&files, std::slice::from_ref(&root))?;
    for file in &files {
        println!("cargo:rerun-if-changed={}", file.display());
    }
    Ok(())
}
