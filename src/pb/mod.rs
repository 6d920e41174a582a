//! The generated gRPC API (proto/mtgauge/v1), included once, and its conversions to and from
//! the engine's types ([`convert`]).

#[allow(missing_docs, clippy::all)]
mod generated {
    tonic::include_proto!("mtgauge.v1");
}
pub use generated::*;

/// Encoded file descriptor set of the API, for server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("mtgauge_descriptor");

/// HTTP/2 flow-control window of one gRPC stream, on both ends of the wire (the protocol's
/// 64 KiB default throttles many producers sharing one connection).
pub const STREAM_WINDOW_BYTES: u32 = 1 << 20;
/// HTTP/2 flow-control window of one connection, on both ends of the wire.
pub const CONNECTION_WINDOW_BYTES: u32 = 16 << 20;

pub mod convert;
pub mod external;
