//! The tessera worker: the gRPC client loop, the `Runner` trait that runs
//! the built-in models (from `tessera-models`) and the runner for external
//! simulators.
//!
//! It must not decide what to run next: the coordinator does. It runs only
//! the built-in models and the external commands its own operator configured.

pub mod external;
pub mod guard;
pub mod request;
pub mod runner;
pub mod session;
pub mod spool;

/// The built-in models (re-exported from `tessera-models`).
pub use tessera_models as models;
