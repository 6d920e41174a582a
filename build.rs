//! Compiles the gRPC API in proto/ with protox (no system protoc needed) and tonic-prost-build;
//! also writes the file descriptor set that server reflection serves.

use std::path::PathBuf;

use prost::Message;

const PROTO_ROOT: &str = "proto";
const PROTOS: &[&str] = &["mtgauge/v1/common.proto", "mtgauge/v1/refsets.proto", "mtgauge/v1/sessions.proto", "mtgauge/v1/scoring.proto", "mtgauge/v1/history.proto"];

fn main() -> Result<(), Box<dyn std::error::Error>> {
    for p in PROTOS {
        println!("cargo:rerun-if-changed={PROTO_ROOT}/{p}");
    }
    let out = PathBuf::from(std::env::var("OUT_DIR")?);
    let fds = protox::compile(PROTOS, [PROTO_ROOT])?;
    std::fs::write(out.join("mtgauge_descriptor.bin"), fds.encode_to_vec())?;
    tonic_prost_build::configure().build_client(true).build_server(true).compile_fds(fds)?;
    Ok(())
}
