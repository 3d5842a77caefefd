//! The tessera wire protocol: `proto/tessera.proto`, the Rust code tonic
//! generates from it at build time, and [`channel`], the one builder every
//! client uses to dial a coordinator (address check, TLS, token, timeouts).
//!
//! This crate must not hold sweep logic. The coordinator converts these
//! types to its domain types in `coordinator/src/wire.rs` and the worker in
//! `worker/src/session.rs`, so the rest of the code never sees prost types.

pub mod channel;

/// Generated messages and the `Coordinator` service (client and server).
#[allow(clippy::all, missing_docs)]
pub mod v1 {
    tonic::include_proto!("tessera.v1");
}

/// The encoded file descriptor set, served by gRPC server reflection.
pub const FILE_DESCRIPTOR_SET: &[u8] =
    include_bytes!(concat!(env!("OUT_DIR"), "/tessera_descriptor.bin"));

/// Protocol version spoken by this build. A worker and a coordinator with
/// different versions refuse each other at `Join`.
pub const PROTOCOL_VERSION: u32 = 2;
