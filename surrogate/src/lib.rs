//! Pure numerics for tessera: space-filling designs, Gaussian-process
//! surrogates, acquisition functions and surrogate validation.
//!
//! This crate owns the mathematics and nothing else. It must not do I/O,
//! async, gRPC or SQLite; every function is deterministic given its inputs
//! and its seed. Inputs live in the unit cube: the coordinator maps natural
//! units (log scales, integers) to and from it.
//!
//! Modules: [`design`] (maximin Latin hypercubes and design measures),
//! [`gp`] (Gaussian-process regression: fit, predict, leave-one-out),
//! [`acquisition`] (expected improvement and the choice of new points),
//! [`transform`] (fitting bounded metrics on an unbounded scale),
//! [`mcmc`] (posterior sampling and convergence diagnostics), [`sobol`]
//! (variance-based sensitivity indices), [`stats`]
//! (quantiles, ranks, correlation, normal quantiles, Kolmogorov-Smirnov).
//!
//! ```
//! use tessera_surrogate::{acquisition, design, gp};
//!
//! // A 12-point design in [0,1]^2 and a function to learn.
//! let x = design::maximin_lhs(12, 2, 7);
//! let y: Vec<f64> = x.iter().map(|p| (p[0] - 0.3).powi(2) + (p[1] - 0.6).powi(2)).collect();
//! let model = gp::fit(&gp::Observations::new(x, y), &gp::FitOptions::default())?;
//! let at = model.predict(&[vec![0.3, 0.6]]);
//! assert!(at[0].mean.abs() < 0.1 && at[0].sd >= 0.0);
//! // Two new points for two idle workers.
//! let next = acquisition::propose(&model, acquisition::Strategy::Improve, 2, &acquisition::Context::default(), 1);
//! assert_eq!(next.len(), 2);
//! # Ok::<(), gp::GpError>(())
//! ```

pub mod acquisition;
pub mod design;
pub mod gp;
pub mod mcmc;
pub mod sobol;
pub mod stats;
pub mod transform;
