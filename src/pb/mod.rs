//! The generated gRPC API (proto/mtgauge/v1), included once, and its conversions to and from
//! the engine's types ([`convert`]).

#[allow(missing_docs, clippy::all)]
mod generated {
    tonic::include_proto!("mtgauge.v1");
}
pub use generated::*;

/// Encoded file descriptor set of the API, for server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("mtgauge_descriptor");

pub mod convert;
