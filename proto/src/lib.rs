//! The tessera wire protocol: `proto/tessera.proto` and the Rust code tonic
//! generates from it at build time.
//!
//! This crate owns the message and service definitions and nothing else: no
//! hand-written logic. The coordinator and the worker each convert these types
//! to their own domain types in one module (`coordinator::wire`,
//! `worker::wire`), so domain code never sees prost types.

#![allow(clippy::all, missing_docs)]

/// Generated messages and the `Coordinator` service (client and server).
pub mod v1 {
    tonic::include_proto!("tessera.v1");
}

/// The encoded file descriptor set, served by gRPC server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] =
    include_bytes!(concat!(env!("OUT_DIR"), "/tessera_descriptor.bin"));

/// Protocol version spoken by this build. A worker and a coordinator with
/// different versions refuse each other at `Join`.
pub const PROTOCOL_VERSION: u32 = 1;
