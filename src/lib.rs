//! The wiring that needs both sides of tessera at once, shared by the
//! `tessera` binary, its benchmarks and its end-to-end tests.
//!
//! [`cluster::LocalCluster`] is a coordinator on a loopback port plus
//! in-process workers, talking the same gRPC as a distributed sweep: what
//! `tessera run` and `tessera demo` use. This crate must not hold sweep
//! logic: the coordinator, worker, models and surrogate crates own that.

pub mod cluster;
