//! What one run of a model produces: its metrics, or a typed failure.
//!
//! These types are shared by the built-in models (this crate), the worker's
//! runners and the external-command runner, so none of them has to import
//! the others.

use std::collections::BTreeMap;
use std::fmt;

/// Metric name to value, as produced by one run.
pub type Metrics = BTreeMap<String, f64>;

/// Why a run produced no usable metrics.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum FailureKind {
    /// The simulator exited with a non-zero code or was killed by a signal.
    Exit,
    /// The run took longer than its timeout and was killed.
    Timeout,
    /// The run was cancelled (worker shutting down, lease lost) and killed.
    Cancelled,
    /// The run finished but reported no metrics object.
    NoMetrics,
    /// A metric the sweep expects was not reported.
    MissingMetric,
    /// A metric was NaN, infinite or null.
    NonFinite,
    /// The inputs were rejected (unknown name, out of range, wrong type).
    BadInput,
    /// The simulator could not be started (command not found, not executable).
    Spawn,
    /// This worker offers no model of that name.
    UnknownModel,
}

impl FailureKind {
    /// Every kind, in declaration order.
    pub const ALL: [FailureKind; 9] = [
        FailureKind::Exit,
        FailureKind::Timeout,
        FailureKind::Cancelled,
        FailureKind::NoMetrics,
        FailureKind::MissingMetric,
        FailureKind::NonFinite,
        FailureKind::BadInput,
        FailureKind::Spawn,
        FailureKind::UnknownModel,
    ];

    /// Stable snake_case name, as stored and sent over the wire.
    pub fn as_str(&self) -> &'static str {
        match self {
            FailureKind::Exit => "exit",
            FailureKind::Timeout => "timeout",
            FailureKind::Cancelled => "cancelled",
            FailureKind::NoMetrics => "no_metrics",
            FailureKind::MissingMetric => "missing_metric",
            FailureKind::NonFinite => "non_finite",
            FailureKind::BadInput => "bad_input",
            FailureKind::Spawn => "spawn",
            FailureKind::UnknownModel => "unknown_model",
        }
    }

    /// The kind whose [`as_str`](Self::as_str) is `s`.
    pub fn parse(s: &str) -> Option<FailureKind> {
        FailureKind::ALL.into_iter().find(|k| k.as_str() == s)
    }
}

impl fmt::Display for FailureKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A failed run: what kind of failure, a sentence saying why, and the last
/// part of the simulator's stderr (empty for built-in models).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{kind}: {reason}")]
pub struct RunFailure {
    /// Failure class.
    pub kind: FailureKind,
    /// One or two sentences for a person.
    pub reason: String,
    /// At most the last 4 KiB of stderr.
    pub stderr_tail: String,
}

impl RunFailure {
    /// A failure with no stderr.
    pub fn new(kind: FailureKind, reason: impl Into<String>) -> Self {
        RunFailure {
            kind,
            reason: reason.into(),
            stderr_tail: String::new(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn failure_kind_names_round_trip() {
        for k in FailureKind::ALL {
            assert_eq!(FailureKind::parse(k.as_str()), Some(k));
        }
        assert_eq!(FailureKind::MissingMetric.as_str(), "missing_metric");
        assert_eq!(FailureKind::parse("nope"), None);
    }
}
