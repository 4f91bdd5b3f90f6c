//! Compiles the wire contract in proto/ with a vendored protoc, and writes
//! the file descriptor set that server reflection serves.

use std::path::PathBuf;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let protoc = protoc_bin_vendored::protoc_bin_path()?;
    // Safety of set_var: build scripts are single-threaded at this point.
    unsafe { std::env::set_var("PROTOC", protoc) };
    let out = PathBuf::from(std::env::var("OUT_DIR")?);
    tonic_prost_build::configure()
        .file_descriptor_set_path(out.join("plumbline_descriptor.bin"))
        .compile_protos(&["proto/plumbline/v1/plumbline.proto"], &["proto"])?;
    println!("cargo:rerun-if-changed=proto");
    // sqlx::migrate! embeds the migrations: a new one must rebuild.
    println!("cargo:rerun-if-changed=migrations");
    Ok(())
}
