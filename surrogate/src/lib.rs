//! Pure numerics for tessera: space-filling designs, Gaussian-process
//! surrogates, acquisition functions and surrogate validation.
//!
//! This crate owns the mathematics and nothing else. It must not do I/O,
//! async, gRPC or SQLite; every function is deterministic given its inputs
//! and a seed. Inputs live in the unit cube: the coordinator maps natural
//! units (log scales, integers) to and from it.

pub mod acquisition;
pub mod design;
pub mod gp;
