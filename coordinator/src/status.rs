//! What `tessera status` shows: a snapshot of a sweep's progress.
//!
//! The same [`SweepStatus`] comes from a running coordinator (over gRPC,
//! with live workers) or from a database file alone (no workers known); the
//! scheduler counts both (`scheduler::status_from_records` for the file).

use crate::spec::Spec;
use serde::Serialize;
use std::collections::BTreeMap;

/// One worker as the coordinator sees it.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct WorkerStatus {
    /// Id given at join.
    pub worker_id: String,
    /// Operator-given name.
    pub name: String,
    /// Host name.
    pub host: String,
    /// Parallel runs offered.
    pub slots: u32,
    /// Runs under way now.
    pub running: u32,
    /// Last time the worker was heard from (Unix ms).
    pub last_contact_unix_ms: u64,
    /// Evaluations it completed since joining.
    pub completed: u64,
    /// Completed runs per minute since it joined.
    pub runs_per_minute: f64,
    /// Heard from within two lease periods and has not left.
    pub connected: bool,
}

/// The best point so far.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct BestPoint {
    /// Point row id.
    pub point_id: i64,
    /// Parameter values, natural units.
    pub params: BTreeMap<String, f64>,
    /// The objective in the sweep file's sign (the metric itself for minimize or
    /// maximize; the standardised discrepancy for calibration targets).
    pub objective: f64,
    /// Finished replicates behind the value.
    pub replicates: u32,
}

/// A snapshot of a sweep.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct SweepStatus {
    /// Sweep name.
    pub sweep: String,
    /// Evaluations with metrics.
    pub done: u64,
    /// Evaluations that failed after all retries.
    pub failed: u64,
    /// Evaluations leased to a worker now.
    pub running: u64,
    /// Evaluations waiting, including those of points not yet proposed.
    pub queued: u64,
    /// Points in the budget.
    pub budget: u64,
    /// Points created so far.
    pub points: u64,
    /// Replicates per point.
    pub replicates: u32,
    /// Evaluations in the whole budget (budget x replicates).
    pub evaluations_total: u64,
    /// Workers known to the coordinator (empty when read from a file).
    pub workers: Vec<WorkerStatus>,
    /// Failure reasons with their counts, most frequent first.
    pub failures: Vec<(String, u64)>,
    /// Best point so far.
    pub best: Option<BestPoint>,
    /// Every evaluation of the budget is final.
    pub finished: bool,
    /// What the objective is.
    pub objective_label: String,
}

/// Per-point results, for the best point and the planner.
#[derive(Clone, Debug, Default)]
pub struct PointResults {
    /// Point row id.
    pub point_id: i64,
    /// Index of the point within the sweep (0 for the first).
    pub idx: u64,
    /// Values in natural units, in spec parameter order.
    pub values: Vec<f64>,
    /// Metrics of each finished replicate.
    pub replicates: Vec<BTreeMap<String, f64>>,
    /// Replicates that failed for good.
    pub failed: u32,
}

/// Failure reasons grouped for `status`: the first line, at most 120 chars.
pub fn group_reason(reason: &str) -> String {
    let line = reason.lines().next().unwrap_or("").trim();
    let line = if line.is_empty() {
        "unknown failure"
    } else {
        line
    };
    line.chars().take(120).collect()
}

/// The best point among `points` by mean loss over finished replicates.
pub fn best_point<'a>(
    spec: &Spec,
    points: impl Iterator<Item = &'a PointResults>,
) -> Option<BestPoint> {
    let mut best: Option<(f64, &PointResults)> = None;
    for p in points {
        let losses: Vec<f64> = p.replicates.iter().filter_map(|m| spec.loss(m)).collect();
        if losses.is_empty() {
            continue;
        }
        let mean = losses.iter().sum::<f64>() / losses.len() as f64;
        if !mean.is_finite() {
            continue;
        }
        if best.is_none_or(|(b, _)| mean < b) {
            best = Some((mean, p));
        }
    }
    best.map(|(loss, p)| BestPoint {
        point_id: p.point_id,
        params: spec
            .params
            .iter()
            .zip(p.values.iter())
            .map(|(ps, v)| (ps.name.clone(), *v))
            .collect(),
        objective: spec.display_objective(loss),
        replicates: p.replicates.len() as u32,
    })
}
