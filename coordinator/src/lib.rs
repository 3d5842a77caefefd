//! The tessera coordinator: the sweep file, the SQLite store, the lease
//! scheduler, the planner that fits surrogates and proposes points, the gRPC
//! server and the query engine.
//!
//! It must not run simulations: workers do. It never sends a command line to
//! a worker, only a model name and parameter values.
