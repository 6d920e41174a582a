//! The generated gRPC API (proto/mtgauge/v1), included once.

#![allow(missing_docs, clippy::all)]

tonic::include_proto!("mtgauge.v1");

/// Encoded file descriptor set of the API, for server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("mtgauge_descriptor");
