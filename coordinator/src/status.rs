//! What `tessera status` shows: a snapshot of a sweep's progress.
//!
//! The same [`SweepStatus`] comes from a running coordinator (over gRPC,
//! with live workers) or from a database file alone (no workers known).

use crate::scheduler::{best_point, group_reason, PointResults};
use crate::spec::Spec;
use crate::store::{EvalStatus, EvaluationRecord, PointRecord};
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
    /// The objective in the user's sign (the metric itself for minimize or
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

/// Computes the status of a sweep from its stored points and evaluations.
pub fn from_records(
    spec: &Spec,
    points: &[PointRecord],
    evaluations: &[EvaluationRecord],
) -> SweepStatus {
    let mut per_point: BTreeMap<i64, PointResults> = points
        .iter()
        .map(|p| {
            (
                p.id,
                PointResults {
                    point_id: p.id,
                    values: p.values.clone(),
                    replicates: Vec::new(),
                    failed: 0,
                },
            )
        })
        .collect();
    let (mut done, mut failed, mut queued) = (0u64, 0u64, 0u64);
    let mut failures: BTreeMap<String, u64> = BTreeMap::new();
    for e in evaluations {
        match e.status {
            EvalStatus::Done => {
                done += 1;
                if let Some(p) = per_point.get_mut(&e.point_id) {
                    p.replicates.push(e.metrics.clone());
                }
            }
            EvalStatus::Failed => {
                failed += 1;
                let reason = e.failure_reason.clone().unwrap_or_default();
                *failures.entry(group_reason(&reason)).or_insert(0) += 1;
            }
            EvalStatus::Queued => queued += 1,
        }
    }
    let budget_evals = u64::from(spec.budget) * u64::from(spec.replicates.max(1));
    let mut failures: Vec<(String, u64)> = failures.into_iter().collect();
    failures.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
    let total_known = done + failed + queued;
    SweepStatus {
        sweep: spec.name.clone(),
        done,
        failed,
        running: 0,
        queued: queued + budget_evals.saturating_sub(total_known),
        budget: u64::from(spec.budget),
        points: points.len() as u64,
        replicates: spec.replicates,
        evaluations_total: budget_evals,
        workers: Vec::new(),
        failures,
        best: best_point(spec, per_point.values()),
        finished: points.len() as u64 >= u64::from(spec.budget) && queued == 0,
        objective_label: spec.objective_label(),
    }
}
