//! What people look at: figures (SVG and PNG) and the HTML report of a sweep.
//!
//! This crate owns drawing and page layout only. It must not fit, query or
//! read the store: callers hand it numbers in natural units with labels
//! that carry units, and it decides nothing about what they mean.

pub mod chart;
pub mod html;
