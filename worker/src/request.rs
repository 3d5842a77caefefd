//! One run as the coordinator asked for it, shared by the runners
//! ([`crate::runner`] for built-in models, [`crate::external`] for operator
//! commands) so that neither imports the other.

use std::collections::BTreeMap;
use std::time::Duration;

/// One run of one model at one point, as the coordinator asked for it.
#[derive(Clone, Debug, PartialEq)]
pub struct RunRequest {
    /// Model name: a built-in model or an operator-configured command.
    pub model: String,
    /// Swept parameter values, in the units of the sweep file.
    pub params: BTreeMap<String, f64>,
    /// Fixed inputs (the same at every point). Numbers are merged into the
    /// inputs of built-in models; external commands receive all of them.
    pub fixed: BTreeMap<String, serde_json::Value>,
    /// Seed of this replicate (derived by the coordinator).
    pub seed: u64,
    /// Replicate index at this point, from 0.
    pub replicate: u32,
    /// Design point the run belongs to.
    pub point_id: u64,
    /// Unique id of this evaluation (point, replicate, attempt).
    pub evaluation_id: u64,
    /// Wall-clock limit for the run; `None` waits forever.
    pub timeout: Option<Duration>,
    /// Metrics the sweep needs; a run that does not report one of them fails
    /// with [`FailureKind::MissingMetric`](tessera_models::outcome::FailureKind::MissingMetric).
    pub expected_metrics: Vec<String>,
}

impl RunRequest {
    /// A request for `model` with no parameters, seed 0 and no timeout;
    /// convenient for tests and `tessera simulate`.
    pub fn new(model: impl Into<String>) -> Self {
        RunRequest {
            model: model.into(),
            params: BTreeMap::new(),
            fixed: BTreeMap::new(),
            seed: 0,
            replicate: 0,
            point_id: 0,
            evaluation_id: 0,
            timeout: None,
            expected_metrics: Vec::new(),
        }
    }
}

/// "2.5 s", "120 ms": for failure messages.
pub fn format_duration(d: Duration) -> String {
    if d < Duration::from_secs(1) {
        format!("{} ms", d.as_millis())
    } else {
        format!("{} s", d.as_secs_f64())
    }
}
