//! Conversion between the generated protocol types and the coordinator's
//! domain types, in both directions: the server side ([`crate::service`])
//! and the client side ([`crate::client`]) use these functions, so no other
//! module of the coordinator sees a prost type but `server.rs`, which
//! registers the generated service.

use crate::fitter::MetricFit;
use crate::query::{describe_params, predict, MetricPrediction, PointPrediction, QueryError};
use crate::scheduler::{lease_evaluation, Grant, LeaseContext, Report, ReportOutcome};
use crate::spec::Spec;
use crate::status::{BestPoint, SweepStatus, WorkerStatus};
use std::collections::BTreeMap;
use tessera_proto::v1 as pb;
use tonic::Status;

/// The wire form of a grant.
pub fn lease(g: Grant, ctx: &LeaseContext) -> pb::Lease {
    pb::Lease {
        lease_id: g.lease_id,
        evaluation_id: g.evaluation_id as u64,
        point_id: g.point_id as u64,
        replicate: g.replicate,
        seed: g.seed,
        model: ctx.model.clone(),
        params: g.params.into_iter().collect(),
        fixed_json: ctx.fixed_json.clone(),
        timeout_ms: ctx.timeout_ms,
        expected_metrics: ctx.expected_metrics.clone(),
        attempt: g.attempt,
    }
}

/// Converts a wire result to a domain report; `None` for a result without an outcome.
pub fn report_of(r: pb::RunResult) -> Result<Report, Status> {
    let evaluation_id = i64::try_from(r.evaluation_id)
        .map_err(|_| Status::invalid_argument("evaluation_id out of range"))?;
    if lease_evaluation(&r.lease_id).is_some_and(|e| e != evaluation_id) {
        return Err(Status::invalid_argument(format!(
            "lease {} does not belong to evaluation {evaluation_id}",
            r.lease_id
        )));
    }
    let outcome = match r.outcome {
        Some(pb::run_result::Outcome::Metrics(m)) => ReportOutcome::Metrics(
            m.bits
                .into_iter()
                .map(|(k, b)| (k, f64::from_bits(b)))
                .collect(),
        ),
        Some(pb::run_result::Outcome::Failure(f)) => ReportOutcome::Failure {
            kind: f.kind,
            reason: f.reason,
            stderr_tail: f.stderr_tail,
        },
        None => {
            return Err(Status::invalid_argument(format!(
                "result for evaluation {evaluation_id} has neither metrics nor a failure"
            )))
        }
    };
    Ok(Report {
        evaluation_id,
        lease_id: r.lease_id,
        outcome,
        started_unix_ms: r.started_unix_ms,
        ended_unix_ms: r.ended_unix_ms,
    })
}

/// Converts a status snapshot to its wire form.
pub fn status_reply(s: SweepStatus) -> pb::StatusReply {
    pb::StatusReply {
        sweep: s.sweep,
        done: s.done,
        failed: s.failed,
        running: s.running,
        queued: s.queued,
        budget: s.budget,
        points: s.points,
        replicates: s.replicates,
        workers: s
            .workers
            .into_iter()
            .map(|w| pb::WorkerStatus {
                worker_id: w.worker_id,
                name: w.name,
                host: w.host,
                slots: w.slots,
                running: w.running,
                last_contact_unix_ms: w.last_contact_unix_ms,
                completed: w.completed,
                runs_per_minute: w.runs_per_minute,
                connected: w.connected,
            })
            .collect(),
        failures: s
            .failures
            .into_iter()
            .map(|(reason, count)| pb::FailureGroup { reason, count })
            .collect(),
        best: s.best.map(|b| pb::BestPoint {
            params: b.params.into_iter().collect(),
            objective: b.objective,
            point_id: b.point_id as u64,
        }),
        finished: s.finished,
        evaluations_total: s.evaluations_total,
        objective_label: s.objective_label,
        failure_region: s.failure_region.unwrap_or_default(),
        stop_reason: s.stop_reason.unwrap_or_default(),
        reproducible: s.reproducible,
        waves: s
            .waves
            .into_iter()
            .map(|w| pb::CalibrationWave {
                wave: w.wave,
                points: w.points as u64,
                fraction: w.fraction,
                fraction_se: w.fraction_se,
            })
            .collect(),
    }
}

/// Converts a wire status back to the domain snapshot (the client side of `Status`).
pub fn status_from_reply(r: pb::StatusReply) -> SweepStatus {
    SweepStatus {
        sweep: r.sweep,
        done: r.done,
        failed: r.failed,
        running: r.running,
        queued: r.queued,
        budget: r.budget,
        points: r.points,
        replicates: r.replicates,
        evaluations_total: r.evaluations_total,
        workers: r
            .workers
            .into_iter()
            .map(|w| WorkerStatus {
                worker_id: w.worker_id,
                name: w.name,
                host: w.host,
                slots: w.slots,
                running: w.running,
                last_contact_unix_ms: w.last_contact_unix_ms,
                completed: w.completed,
                runs_per_minute: w.runs_per_minute,
                connected: w.connected,
            })
            .collect(),
        failures: r
            .failures
            .into_iter()
            .map(|f| (f.reason, f.count))
            .collect(),
        best: r.best.map(|b| BestPoint {
            point_id: b.point_id as i64,
            params: b.params.into_iter().collect(),
            objective: b.objective,
            replicates: 0,
        }),
        finished: r.finished,
        objective_label: r.objective_label,
        failure_region: Some(r.failure_region).filter(|s| !s.is_empty()),
        stop_reason: Some(r.stop_reason).filter(|s| !s.is_empty()),
        reproducible: r.reproducible,
        waves: r
            .waves
            .into_iter()
            .map(|w| crate::status::Wave {
                wave: w.wave,
                points: w.points as usize,
                fraction: w.fraction,
                fraction_se: w.fraction_se,
            })
            .collect(),
    }
}

/// The points of a request, keyed by parameter name.
pub fn request_points(req: &pb::PredictRequest) -> Vec<BTreeMap<String, f64>> {
    req.points
        .iter()
        .map(|p| p.values.iter().map(|(k, v)| (k.clone(), *v)).collect())
        .collect()
}

/// The wire form of predictions.
pub fn predict_reply(predictions: Vec<PointPrediction>) -> pb::PredictReply {
    pb::PredictReply {
        predictions: predictions
            .into_iter()
            .map(|p| pb::PointPrediction {
                point: Some(pb::PointValues {
                    values: p.point.into_iter().collect(),
                }),
                metrics: p
                    .metrics
                    .into_iter()
                    .map(|m| pb::MetricPrediction {
                        metric: m.metric,
                        unit: m.unit,
                        mean: m.mean,
                        sd: m.sd,
                        lower95: m.lower95,
                        upper95: m.upper95,
                        sd_ratio: m.sd_ratio,
                    })
                    .collect(),
                warnings: p.warnings,
            })
            .collect(),
    }
}

/// Predictions back from their wire form (the client side of `Predict`).
pub fn predictions_from_reply(reply: pb::PredictReply) -> Vec<PointPrediction> {
    reply
        .predictions
        .into_iter()
        .map(|p| PointPrediction {
            point: p
                .point
                .map(|v| v.values.into_iter().collect())
                .unwrap_or_default(),
            metrics: p
                .metrics
                .into_iter()
                .map(|m| MetricPrediction {
                    metric: m.metric,
                    unit: m.unit,
                    mean: m.mean,
                    sd: m.sd,
                    lower95: m.lower95,
                    upper95: m.upper95,
                    sd_ratio: m.sd_ratio,
                })
                .collect(),
            warnings: p.warnings,
        })
        .collect()
}

/// The gRPC status for a query error.
pub fn query_status(e: QueryError) -> Status {
    match e {
        QueryError::UnknownParameter { .. }
        | QueryError::MissingParameters { .. }
        | QueryError::BadValue { .. }
        | QueryError::BadAssignment { .. }
        | QueryError::NoPoints { .. }
        | QueryError::NotAParameter { .. }
        | QueryError::NoSuchMetric { .. } => Status::invalid_argument(e.to_string()),
        QueryError::NoFits { .. } | QueryError::NoSweep { .. } | QueryError::NoTargets => {
            Status::failed_precondition(e.to_string())
        }
        QueryError::Store(_) => Status::unavailable(e.to_string()),
        QueryError::StoredSpec { .. } | QueryError::DamagedFit { .. } | QueryError::Internal(_) => {
            Status::internal(e.to_string())
        }
    }
}

/// The request for predictions at `points`.
pub fn predict_request(points: Vec<BTreeMap<String, f64>>) -> pb::PredictRequest {
    pb::PredictRequest {
        points: points
            .into_iter()
            .map(|p| pb::PointValues {
                values: p.into_iter().collect(),
            })
            .collect(),
    }
}

/// Answers a request from fits already loaded.
pub fn answer(
    fits: &[MetricFit],
    spec: &Spec,
    req: &pb::PredictRequest,
) -> Result<pb::PredictReply, QueryError> {
    let points = request_points(req);
    if points.is_empty() {
        return Err(QueryError::NoPoints {
            valid: describe_params(spec),
        });
    }
    Ok(predict_reply(predict(fits, spec, &points)?))
}
