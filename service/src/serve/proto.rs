//! The code generated from `proto/probity/v1/*.proto` (package `probity.v1`), and its file descriptor set for
//! server reflection.

#![allow(missing_docs, clippy::all, clippy::pedantic)]

tonic::include_proto!("probity.v1");

/// The encoded `FileDescriptorSet` of the probity protos, served by gRPC reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] = tonic::include_file_descriptor_set!("probity_descriptor");
