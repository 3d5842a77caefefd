//! The tessera worker: the gRPC client loop, the `Runner` trait, the built-in
//! models (the `tiling` tissue model and published test functions) and the
//! runner for external simulators.
//!
//! It must not decide what to run next: the coordinator does. It runs only
//! the built-in models and the external commands its own operator configured.

pub mod client;
pub mod external;
pub mod models;
pub mod runner;
pub mod spool;
