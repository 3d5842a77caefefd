//! The gRPC `Coordinator` service over an [`Engine`]: each call converted
//! from its wire form ([`crate::wire`]), answered by the engine, and
//! converted back.

use crate::engine::{Engine, EngineError};
use crate::scheduler::{JoinInfo, ScheduleError};
use crate::wire;
use std::collections::HashMap;
use std::sync::{Arc, Mutex};
use tessera_proto::v1 as pb;
use tessera_proto::v1::coordinator_server::Coordinator;
use tessera_proto::PROTOCOL_VERSION;
use tonic::{Request, Response, Status};

/// How soon a worker offered no work asks again while points are being
/// planned, and otherwise (our choices: a plan lands within tens of
/// milliseconds of the retry; idle polling stays cheap).
const RETRY_WHILE_PLANNING_MS: u64 = 25;
const RETRY_IDLE_MS: u64 = 250;

/// The gRPC service.
#[derive(Clone)]
pub struct CoordinatorService {
    engine: Arc<Engine>,
    /// Worker id to operator-given name, for the `worker` column of results.
    /// Locked briefly per call, never across an await.
    names: Arc<Mutex<HashMap<String, String>>>,
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
        }
    }

    fn name_of(&self, worker_id: &str) -> String {
        self.names
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .get(worker_id)
            .cloned()
            .unwrap_or_else(|| worker_id.to_string())
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
            sweep: self.engine.spec().name.clone(),
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
        let ctx = self.engine.lease_context();
        let leases: Vec<pb::Lease> = grants.into_iter().map(|g| wire::lease(g, ctx)).collect();
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
        // Nothing now: ask again soon if points are being planned (so slots
        // do not stay idle after a plan lands), otherwise a while later.
        let retry_after_ms = if !leases.is_empty() {
            0
        } else if !finished && self.engine.plan_under_way() {
            RETRY_WHILE_PLANNING_MS
        } else {
            RETRY_IDLE_MS
        };
        Ok(Response::new(pb::WorkReply {
            retry_after_ms,
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
            .map(wire::report_of)
            .collect::<Result<Vec<_>, _>>()?;
        let name = if r.worker_name.is_empty() {
            self.name_of(&r.worker_id)
        } else {
            r.worker_name.clone()
        };
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
        Ok(Response::new(wire::status_reply(self.engine.status())))
    }

    async fn predict(
        &self,
        req: Request<pb::PredictRequest>,
    ) -> Result<Response<pb::PredictReply>, Status> {
        let req = req.into_inner();
        let fits = self.engine.fits();
        if fits.is_empty() {
            return Err(Status::failed_precondition(
                "no surrogate yet: it is fitted once results arrive (every few seconds); try again shortly",
            ));
        }
        wire::answer(&fits, self.engine.spec(), &req)
            .map(Response::new)
            .map_err(wire::query_status)
    }
}
