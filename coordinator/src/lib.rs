//! The tessera coordinator: the sweep file, the SQLite store, the lease
//! scheduler, the planner that fits surrogates and proposes points, the gRPC
//! server and the query engine.
//!
//! It must not run simulations: workers do. It never sends a command line to
//! a worker, only a model name and parameter values.
//!
//! Start reading at [`engine::Engine`]: one running sweep. Requests arrive
//! through [`service`] (gRPC), are decided by [`scheduler`] (pure state, no
//! I/O), and results become durable through [`committer`] (the only SQLite
//! writer while serving, with group commit) before they are acknowledged.
//! Calibration to measurements (history matching, posterior sampling) is
//! [`calibration`]; the answers read from a sweep file are [`query`].

pub mod calibration;
pub mod client;
pub mod committer;
pub mod engine;
pub mod fitter;
pub mod planner;
pub mod query;
pub mod scheduler;
pub mod seed;
pub mod server;
pub mod service;
pub mod spec;
pub mod status;
pub mod store;
pub mod wire;
