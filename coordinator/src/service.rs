//! The gRPC `Coordinator` service over an [`Engine`], and the conversion
//! between wire types and domain types (the only module that sees both).

use crate::engine::{Engine, EngineError};
use crate::scheduler::{lease_evaluation, Grant, JoinInfo, Report, ReportOutcome, ScheduleError};
use crate::status::SweepStatus;
use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use tessera_proto::v1 as pb;
use tessera_proto::v1::coordinator_server::Coordinator;
use tessera_proto::PROTOCOL_VERSION;
use tonic::{Request, Response, Status};

/// Answers `Predict` requests; set by the query layer when a surrogate is available.
pub type PredictFn =
    Arc<dyn Fn(pb::PredictRequest) -> Result<pb::PredictReply, Status> + Send + Sync>;

/// The gRPC service.
#[derive(Clone)]
pub struct CoordinatorService {
    engine: Arc<Engine>,
    /// Worker id to operator-given name, for the `worker` column of results.
    names: Arc<Mutex<HashMap<String, String>>>,
    predict: Option<PredictFn>,
}

impl std::fmt::Debug for CoordinatorService {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CoordinatorService").finish()
    }
}

impl CoordinatorService {
    /// A service over `engine`.
    pub fn new(engine: Arc<Engine>) -> Self {
        CoordinatorService {
            engine,
            names: Arc::new(Mutex::new(HashMap::new())),
            predict: None,
        }
    }

    /// Answers `Predict` with `f`.
    pub fn with_predict(mut self, f: PredictFn) -> Self {
        self.predict = Some(f);
        self
    }

    fn name_of(&self, worker_id: &str) -> String {
        self.names
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .get(worker_id)
            .cloned()
            .unwrap_or_else(|| worker_id.to_string())
    }

    fn lease(&self, g: Grant) -> pb::Lease {
        pb::Lease {
            lease_id: g.lease_id,
            evaluation_id: g.evaluation_id as u64,
            point_id: g.point_id as u64,
            replicate: g.replicate,
            seed: g.seed,
            model: self.engine.spec().model.name.clone(),
            params: g.params.into_iter().collect(),
            fixed_json: self.engine.fixed_json().to_string(),
            timeout_ms: self.engine.timeout_ms(),
            expected_metrics: self.engine.expected_metrics().to_vec(),
            attempt: g.attempt,
        }
    }
}

fn status_of(e: EngineError) -> Status {
    match e {
        EngineError::Schedule(ScheduleError::UnknownWorker(id)) => {
            Status::not_found(format!("unknown worker id {id:?}: join again"))
        }
        EngineError::Schedule(e @ ScheduleError::ModelNotOffered { .. }) => {
            Status::failed_precondition(e.to_string())
        }
        EngineError::Schedule(e @ ScheduleError::NoSlots) => {
            Status::invalid_argument(e.to_string())
        }
        EngineError::Commit(e) => Status::unavailable(format!("results not stored: {e}")),
    }
}

/// Converts a wire result to a domain report; `None` for a result without an outcome.
fn report_of(r: pb::RunResult) -> Result<Report, Status> {
    let evaluation_id = i64::try_from(r.evaluation_id)
        .map_err(|_| Status::invalid_argument("evaluation_id out of range"))?;
    if lease_evaluation(&r.lease_id).is_some_and(|e| e != evaluation_id) {
        return Err(Status::invalid_argument(format!(
            "lease {} does not belong to evaluation {evaluation_id}",
            r.lease_id
        )));
    }
    let outcome = match r.outcome {
        Some(pb::run_result::Outcome::Metrics(m)) => {
            ReportOutcome::Metrics(m.values.into_iter().collect())
        }
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
    }
}

/// Converts a wire status back to the domain snapshot (for `tessera status --coordinator`).
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
            .map(|w| crate::status::WorkerStatus {
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
        best: r.best.map(|b| crate::status::BestPoint {
            point_id: b.point_id as i64,
            params: b.params.into_iter().collect(),
            objective: b.objective,
            replicates: 0,
        }),
        finished: r.finished,
        objective_label: r.objective_label,
    }
}

#[tonic::async_trait]
impl Coordinator for CoordinatorService {
    async fn join(&self, req: Request<pb::JoinRequest>) -> Result<Response<pb::JoinReply>, Status> {
        let r = req.into_inner();
        if r.protocol != PROTOCOL_VERSION {
            return Err(Status::failed_precondition(format!(
                "protocol mismatch: the worker speaks tessera protocol {} (tessera {}), this coordinator speaks {} (tessera {}); run the same tessera version on both",
                r.protocol,
                r.version,
                PROTOCOL_VERSION,
                env!("CARGO_PKG_VERSION")
            )));
        }
        let name = if r.name.is_empty() {
            r.host.clone()
        } else {
            r.name.clone()
        };
        let info = JoinInfo {
            name: name.clone(),
            host: r.host,
            slots: r.slots,
            models: r.models,
            version: r.version,
        };
        let id = self.engine.join(info).map_err(status_of)?;
        tracing::info!(worker = %id, name = %name, slots = r.slots, "worker joined");
        self.names
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .insert(id.clone(), name);
        let times = self.engine.times();
        Ok(Response::new(pb::JoinReply {
            protocol: PROTOCOL_VERSION,
            worker_id: id,
            sweep: self.engine.spec().name,
            lease_ms: times.lease.as_millis() as u64,
            renew_every_ms: times.renew_every.as_millis() as u64,
            version: env!("CARGO_PKG_VERSION").to_string(),
        }))
    }

    async fn request_work(
        &self,
        req: Request<pb::WorkRequest>,
    ) -> Result<Response<pb::WorkReply>, Status> {
        let r = req.into_inner();
        let (grants, finished) = self
            .engine
            .request_work(&r.worker_id, r.free_slots)
            .map_err(status_of)?;
        let leases: Vec<pb::Lease> = grants.into_iter().map(|g| self.lease(g)).collect();
        if !leases.is_empty() {
            for l in &leases {
                tracing::debug!(
                    worker = %r.worker_id,
                    evaluation = l.evaluation_id,
                    point = l.point_id,
                    replicate = l.replicate,
                    attempt = l.attempt,
                    lease = %l.lease_id,
                    "leased"
                );
            }
        }
        Ok(Response::new(pb::WorkReply {
            retry_after_ms: if leases.is_empty() { 250 } else { 0 },
            leases,
            finished,
        }))
    }

    async fn renew(
        &self,
        req: Request<pb::RenewRequest>,
    ) -> Result<Response<pb::RenewReply>, Status> {
        let r = req.into_inner();
        let lost = self
            .engine
            .renew(&r.worker_id, &r.lease_ids)
            .map_err(status_of)?;
        Ok(Response::new(pb::RenewReply {
            lost,
            lease_ms: self.engine.times().lease.as_millis() as u64,
        }))
    }

    async fn report(
        &self,
        req: Request<pb::ReportRequest>,
    ) -> Result<Response<pb::ReportReply>, Status> {
        let r = req.into_inner();
        let reports = r
            .results
            .into_iter()
            .map(report_of)
            .collect::<Result<Vec<_>, _>>()?;
        let name = self.name_of(&r.worker_id);
        let acked = self
            .engine
            .report(&r.worker_id, &name, reports)
            .await
            .map_err(status_of)?;
        for e in &acked {
            tracing::debug!(worker = %r.worker_id, evaluation = e, "result durable");
        }
        Ok(Response::new(pb::ReportReply {
            acknowledged: acked.into_iter().map(|e| e as u64).collect(),
        }))
    }

    async fn hand_back(
        &self,
        req: Request<pb::HandBackRequest>,
    ) -> Result<Response<pb::HandBackReply>, Status> {
        let r = req.into_inner();
        self.engine
            .hand_back(&r.worker_id, &r.lease_ids)
            .map_err(status_of)?;
        tracing::info!(worker = %r.worker_id, count = r.lease_ids.len(), "leases handed back");
        Ok(Response::new(pb::HandBackReply {}))
    }

    async fn leave(
        &self,
        req: Request<pb::LeaveRequest>,
    ) -> Result<Response<pb::LeaveReply>, Status> {
        let r = req.into_inner();
        match self.engine.leave(&r.worker_id) {
            Ok(()) | Err(EngineError::Schedule(ScheduleError::UnknownWorker(_))) => {}
            Err(e) => return Err(status_of(e)),
        }
        tracing::info!(worker = %r.worker_id, "worker left");
        Ok(Response::new(pb::LeaveReply {}))
    }

    async fn status(
        &self,
        _req: Request<pb::StatusRequest>,
    ) -> Result<Response<pb::StatusReply>, Status> {
        Ok(Response::new(status_reply(self.engine.status())))
    }

    async fn predict(
        &self,
        req: Request<pb::PredictRequest>,
    ) -> Result<Response<pb::PredictReply>, Status> {
        let req = req.into_inner();
        if let Some(f) = &self.predict {
            return f(req).map(Response::new);
        }
        let fits = self.engine.fits();
        if fits.is_empty() {
            return Err(Status::failed_precondition(
                "no surrogate yet: it is fitted once results arrive (every few seconds); try again shortly",
            ));
        }
        crate::query::wire::answer(&fits, &self.engine.spec(), &req)
            .map(Response::new)
            .map_err(crate::query::wire::status_of)
    }
}
