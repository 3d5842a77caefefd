//! The worker's gRPC loop: join, ask for work for free slots, run it, renew
//! leases, report results, and hand back what it will not finish.
//!
//! One task drives everything with `select!`; each run is its own task in a
//! `JoinSet`. If the coordinator goes away, running work continues and
//! finished results wait (in memory and in the [`Spool`]) until it comes
//! back; calls are retried with capped exponential backoff and jitter.

use crate::runner::{FailureKind, RunFailure, RunRequest, Runner};
use crate::spool::{Spool, SpoolError, Spooled};
use rand::Rng;
use std::collections::{BTreeMap, HashMap, HashSet};
use std::future::Future;
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};
use tessera_proto::v1 as pb;
use tessera_proto::v1::coordinator_client::CoordinatorClient;
use tessera_proto::PROTOCOL_VERSION;
use tokio::task::JoinSet;
use tokio_util::sync::CancellationToken;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint};
use tonic::{Code, Request, Status};

/// How a worker connects and behaves.
#[derive(Clone, Debug)]
pub struct WorkerOptions {
    /// Coordinator URL, `http://host:port` or `https://host:port`.
    pub coordinator: String,
    /// Name shown in `status` and stored with each result.
    pub name: String,
    /// Host name reported at join.
    pub host: String,
    /// Parallel runs.
    pub slots: u32,
    /// Bearer token, if the coordinator requires one.
    pub token: Option<String>,
    /// PEM CA certificate to trust for TLS.
    pub ca_pem: Option<Vec<u8>>,
    /// Where undelivered results are kept across restarts.
    pub spool: Spool,
    /// On shutdown, how long running work may take to finish.
    pub grace: Duration,
    /// Exit when the coordinator says the sweep is finished.
    pub exit_when_finished: bool,
    /// Longest wait between retries while the coordinator is unreachable.
    pub max_backoff: Duration,
}

/// Why a worker stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum WorkerError {
    /// The coordinator refused this worker for good (token, version, model).
    #[error("{0}")]
    Refused(String),
    /// The coordinator address is not valid.
    #[error("coordinator address {url:?} is not valid: {message}")]
    BadAddress {
        /// The address given.
        url: String,
        /// What is wrong.
        message: String,
    },
    /// The spool could not be read or written.
    #[error(transparent)]
    Spool(#[from] SpoolError),
}

/// How a worker's session ended.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct WorkerSummary {
    /// Results acknowledged by the coordinator.
    pub delivered: u64,
    /// Leases handed back on shutdown.
    pub handed_back: u64,
    /// Results still undelivered (kept in the spool, if any).
    pub undelivered: u64,
    /// The coordinator said the sweep is finished.
    pub sweep_finished: bool,
}

/// Adds the bearer token to every call.
#[derive(Clone)]
struct Bearer(Option<tonic::metadata::MetadataValue<tonic::metadata::Ascii>>);

impl tonic::service::Interceptor for Bearer {
    fn call(&mut self, mut req: Request<()>) -> Result<Request<()>, Status> {
        if let Some(v) = &self.0 {
            req.metadata_mut().insert("authorization", v.clone());
        }
        Ok(req)
    }
}

type Client = CoordinatorClient<InterceptedService<Channel, Bearer>>;

fn unix_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_millis() as u64)
        .unwrap_or(0)
}

fn connect(opts: &WorkerOptions) -> Result<Client, WorkerError> {
    let bad = |message: String| WorkerError::BadAddress {
        url: opts.coordinator.clone(),
        message,
    };
    let url = &opts.coordinator;
    let rest = url
        .strip_prefix("http://")
        .or_else(|| url.strip_prefix("https://"))
        .ok_or_else(|| bad("write it as http://HOST:PORT (or https:// with TLS), for example http://10.0.0.5:7300".into()))?;
    if rest.is_empty() || rest.starts_with(':') || rest.starts_with('/') {
        return Err(bad(
            "it names no host; for example http://10.0.0.5:7300".into()
        ));
    }
    let mut ep = Endpoint::from_shared(opts.coordinator.clone())
        .map_err(|e| bad(format!("{e}; expected for example http://10.0.0.5:7300")))?
        .connect_timeout(Duration::from_secs(5))
        .timeout(Duration::from_secs(60))
        .tcp_nodelay(true)
        .http2_keep_alive_interval(Duration::from_secs(20))
        .keep_alive_while_idle(true);
    let https = opts.coordinator.starts_with("https://");
    if https && opts.ca_pem.is_none() {
        return Err(bad(
            "it uses https://, but no --ca was given: give the CA certificate (PEM) that signed the coordinator's certificate".into(),
        ));
    }
    if !https && opts.ca_pem.is_some() {
        return Err(bad(
            "--ca was given, so the coordinator uses TLS: write the address with https://".into(),
        ));
    }
    if let Some(ca) = &opts.ca_pem {
        ep = ep
            .tls_config(ClientTlsConfig::new().ca_certificate(Certificate::from_pem(ca)))
            .map_err(|e| bad(format!("TLS: {e}")))?;
    }
    let token =
        match &opts.token {
            Some(t) => Some(format!("Bearer {t}").parse().map_err(|_| {
                bad("the token contains characters not allowed in a header".into())
            })?),
            None => None,
        };
    Ok(CoordinatorClient::with_interceptor(
        ep.connect_lazy(),
        Bearer(token),
    ))
}

/// What to do about a failed call.
enum Trouble {
    /// Give up: the coordinator refused us.
    Fatal(String),
    /// The coordinator forgot us (it restarted): join again.
    Rejoin,
    /// Try again later.
    Transient(String),
}

fn classify(s: &Status) -> Trouble {
    if s.message().contains("invalid peer certificate") {
        return Trouble::Fatal(format!(
            "cannot verify the coordinator's TLS certificate ({}): check that --ca is the CA that signed it and that the address matches the certificate's name",
            s.message()
        ));
    }
    match s.code() {
        Code::Unauthenticated => Trouble::Fatal(format!(
            "the coordinator rejected this worker: {}",
            s.message()
        )),
        Code::PermissionDenied | Code::FailedPrecondition | Code::InvalidArgument => {
            Trouble::Fatal(format!(
                "the coordinator refused this worker: {}",
                s.message()
            ))
        }
        Code::NotFound => Trouble::Rejoin,
        _ => Trouble::Transient(format!("{}: {}", s.code(), s.message())),
    }
}

/// Capped exponential backoff with full jitter.
struct Backoff {
    attempt: u32,
    cap: Duration,
}

impl Backoff {
    fn next(&mut self) -> Duration {
        let base = Duration::from_millis(200).saturating_mul(1u32 << self.attempt.min(10));
        self.attempt += 1;
        let ceiling = base.min(self.cap);
        let ms = ceiling.as_millis().max(1) as u64;
        Duration::from_millis(rand::rng().random_range(ms / 2..=ms))
    }
    fn reset(&mut self) {
        self.attempt = 0;
    }
}

struct Running {
    cancel: CancellationToken,
}

fn spooled_to_wire(s: &Spooled) -> pb::RunResult {
    pb::RunResult {
        lease_id: s.lease_id.clone(),
        evaluation_id: s.evaluation_id,
        started_unix_ms: s.started_unix_ms,
        ended_unix_ms: s.ended_unix_ms,
        attempt: s.attempt,
        outcome: match (&s.metrics, &s.failure) {
            (Some(m), _) => Some(pb::run_result::Outcome::Metrics(pb::Metrics {
                values: m.iter().map(|(k, v)| (k.clone(), *v)).collect(),
            })),
            (None, Some((kind, reason, tail))) => {
                Some(pb::run_result::Outcome::Failure(pb::Failure {
                    reason: reason.clone(),
                    stderr_tail: tail.clone(),
                    kind: kind.clone(),
                }))
            }
            (None, None) => Some(pb::run_result::Outcome::Failure(pb::Failure {
                reason: "the run produced no outcome".into(),
                stderr_tail: String::new(),
                kind: FailureKind::NoMetrics.as_str().into(),
            })),
        },
    }
}

fn request_of(l: &pb::Lease) -> Result<RunRequest, RunFailure> {
    let fixed: BTreeMap<String, serde_json::Value> = if l.fixed_json.trim().is_empty() {
        BTreeMap::new()
    } else {
        serde_json::from_str(&l.fixed_json).map_err(|e| {
            RunFailure::new(
                FailureKind::BadInput,
                format!("fixed inputs from the coordinator are not a JSON object: {e}"),
            )
        })?
    };
    Ok(RunRequest {
        model: l.model.clone(),
        params: l.params.iter().map(|(k, v)| (k.clone(), *v)).collect(),
        fixed,
        seed: l.seed,
        replicate: l.replicate,
        point_id: l.point_id,
        evaluation_id: l.evaluation_id,
        timeout: (l.timeout_ms > 0).then(|| Duration::from_millis(l.timeout_ms)),
        expected_metrics: l.expected_metrics.clone(),
    })
}

/// Runs the worker until the sweep is finished (if `exit_when_finished`),
/// the coordinator refuses it, or `shutdown` completes. On shutdown, running
/// work gets `grace` to finish; the rest is cancelled and handed back, and
/// finished results are delivered (or left in the spool).
pub async fn run(
    opts: WorkerOptions,
    runner: Arc<dyn Runner>,
    shutdown: impl Future<Output = ()>,
) -> Result<WorkerSummary, WorkerError> {
    let mut client = connect(&opts)?;
    let mut undelivered: Vec<Spooled> = opts.spool.load()?;
    if !undelivered.is_empty() {
        tracing::info!(
            count = undelivered.len(),
            "delivering results left by an earlier run"
        );
    }
    let models = runner.models();
    let mut worker_id: Option<String> = None;
    let mut renew_every = Duration::from_secs(10);
    let mut backoff = Backoff {
        attempt: 0,
        cap: opts.max_backoff,
    };
    let mut next_try = Instant::now();
    let mut running: HashMap<String, Running> = HashMap::new();
    // Runs under way. Each task ends when its run ends or is cancelled.
    let mut runs: JoinSet<(String, Spooled)> = JoinSet::new();
    let mut discard: HashSet<String> = HashSet::new();
    let mut renew_tick = tokio::time::interval(renew_every);
    renew_tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    let mut summary = WorkerSummary {
        delivered: 0,
        handed_back: 0,
        undelivered: 0,
        sweep_finished: false,
    };
    let mut draining: Option<Instant> = None;
    let mut cancelled_rest = false;
    let mut poll_after = Duration::ZERO;
    let mut unreachable_since: Option<Instant> = None;
    let mut last_reminder = Instant::now();
    tokio::pin!(shutdown);

    loop {
        let now = Instant::now();
        let connected_ok = now >= next_try;
        // 1. Join when needed.
        if worker_id.is_none() && connected_ok {
            let req = pb::JoinRequest {
                protocol: PROTOCOL_VERSION,
                name: opts.name.clone(),
                host: opts.host.clone(),
                slots: opts.slots,
                models: models.clone(),
                version: env!("CARGO_PKG_VERSION").to_string(),
            };
            match client.join(req).await {
                Ok(r) => {
                    let r = r.into_inner();
                    if r.protocol != PROTOCOL_VERSION {
                        return Err(WorkerError::Refused(format!(
                            "protocol mismatch: this worker speaks {PROTOCOL_VERSION}, the coordinator {} (tessera {})",
                            r.protocol, r.version
                        )));
                    }
                    tracing::info!(worker = %r.worker_id, sweep = %r.sweep, "joined the coordinator");
                    worker_id = Some(r.worker_id);
                    renew_every = Duration::from_millis(r.renew_every_ms.max(100));
                    renew_tick = tokio::time::interval(renew_every);
                    renew_tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
                    backoff.reset();
                    unreachable_since = None;
                }
                Err(s) => match classify(&s) {
                    Trouble::Fatal(m) => return Err(WorkerError::Refused(m)),
                    Trouble::Rejoin | Trouble::Transient(_) => {
                        let wait = backoff.next();
                        match unreachable_since {
                            None => {
                                tracing::warn!(coordinator = %opts.coordinator, error = %s.message(), "coordinator unreachable; retrying with backoff");
                                unreachable_since = Some(now);
                                last_reminder = now;
                            }
                            Some(since)
                                if now.duration_since(last_reminder) > Duration::from_secs(60) =>
                            {
                                tracing::warn!(coordinator = %opts.coordinator, waited_s = now.duration_since(since).as_secs(), error = %s.message(), "still cannot reach the coordinator; is it running, and is the address right?");
                                last_reminder = now;
                            }
                            Some(_) => {}
                        }
                        next_try = now + wait;
                    }
                },
            }
        }
        // 2. Deliver finished results.
        if let (Some(wid), false) = (&worker_id, undelivered.is_empty()) {
            if Instant::now() >= next_try {
                let batch: Vec<pb::RunResult> =
                    undelivered.iter().take(512).map(spooled_to_wire).collect();
                let req = pb::ReportRequest {
                    worker_id: wid.clone(),
                    results: batch,
                };
                match client.report(req).await {
                    Ok(r) => {
                        let acked: HashSet<u64> = r.into_inner().acknowledged.into_iter().collect();
                        let before = undelivered.len();
                        undelivered.retain(|s| !acked.contains(&s.evaluation_id));
                        summary.delivered += (before - undelivered.len()) as u64;
                        opts.spool.save(&undelivered)?;
                        backoff.reset();
                        unreachable_since = None;
                    }
                    Err(s) => match classify(&s) {
                        Trouble::Fatal(m) if s.code() == Code::Unauthenticated => {
                            return Err(WorkerError::Refused(m))
                        }
                        Trouble::Fatal(m) => {
                            tracing::error!(error = %m, "results refused; dropping them");
                            undelivered.clear();
                            opts.spool.save(&undelivered)?;
                        }
                        Trouble::Rejoin => worker_id = None,
                        Trouble::Transient(m) => {
                            if unreachable_since.is_none() {
                                tracing::warn!(error = %m, "cannot deliver results; keeping them and retrying");
                                unreachable_since = Some(Instant::now());
                            }
                            next_try = Instant::now() + backoff.next();
                        }
                    },
                }
            }
        }
        // 3. Ask for work for free slots.
        let free = opts.slots.saturating_sub(running.len() as u32);
        let stop_asking = draining.is_some() || (summary.sweep_finished && opts.exit_when_finished);
        if let (Some(wid), true) = (
            &worker_id,
            free > 0 && !stop_asking && Instant::now() >= next_try && poll_after.is_zero(),
        ) {
            let req = pb::WorkRequest {
                worker_id: wid.clone(),
                free_slots: free,
            };
            match client.request_work(req).await {
                Ok(r) => {
                    let r = r.into_inner();
                    backoff.reset();
                    unreachable_since = None;
                    summary.sweep_finished = r.finished;
                    if r.leases.is_empty() {
                        poll_after = Duration::from_millis(r.retry_after_ms.clamp(20, 5_000));
                    }
                    for lease in r.leases {
                        let cancel = CancellationToken::new();
                        running.insert(
                            lease.lease_id.clone(),
                            Running {
                                cancel: cancel.clone(),
                            },
                        );
                        tracing::debug!(
                            evaluation = lease.evaluation_id,
                            point = lease.point_id,
                            replicate = lease.replicate,
                            attempt = lease.attempt,
                            model = %lease.model,
                            "run started"
                        );
                        let runner = runner.clone();
                        runs.spawn(async move {
                            let started = unix_ms();
                            let outcome = match request_of(&lease) {
                                Ok(req) => runner.run(req, cancel).await,
                                Err(f) => Err(f),
                            };
                            let ended = unix_ms();
                            let (metrics, failure) = match outcome {
                                Ok(m) => (Some(m), None),
                                Err(f) => (
                                    None,
                                    Some((f.kind.as_str().to_string(), f.reason, f.stderr_tail)),
                                ),
                            };
                            (
                                lease.lease_id.clone(),
                                Spooled {
                                    lease_id: lease.lease_id,
                                    evaluation_id: lease.evaluation_id,
                                    attempt: lease.attempt,
                                    started_unix_ms: started,
                                    ended_unix_ms: ended,
                                    metrics,
                                    failure,
                                },
                            )
                        });
                    }
                }
                Err(s) => match classify(&s) {
                    Trouble::Fatal(m) => return Err(WorkerError::Refused(m)),
                    Trouble::Rejoin => worker_id = None,
                    Trouble::Transient(m) => {
                        if unreachable_since.is_none() {
                            tracing::warn!(error = %m, "cannot reach the coordinator; running work continues");
                            unreachable_since = Some(Instant::now());
                        }
                        next_try = Instant::now() + backoff.next();
                    }
                },
            }
        }
        // 4. Done?
        let idle = running.is_empty() && undelivered.is_empty();
        if idle && (draining.is_some() || (summary.sweep_finished && opts.exit_when_finished)) {
            break;
        }
        if let Some(deadline) = draining {
            // Give up on delivery some time after the grace period.
            if running.is_empty() && Instant::now() > deadline + Duration::from_secs(10) {
                break;
            }
        }
        // 5. Wait for something to happen.
        let wait = if !poll_after.is_zero() {
            poll_after
        } else if Instant::now() < next_try {
            next_try - Instant::now()
        } else if free == 0 || stop_asking {
            Duration::from_secs(1)
        } else {
            Duration::ZERO
        };
        let grace_at = draining.filter(|_| !cancelled_rest);
        tracing::trace!(
            running = running.len(),
            undelivered = undelivered.len(),
            free,
            ?wait,
            "waiting"
        );
        tokio::select! {
            Some(joined) = runs.join_next(), if !runs.is_empty() => {
                let mut finished = vec![joined];
                while let Some(j) = runs.try_join_next() {
                    finished.push(j);
                }
                for j in finished {
                    match j {
                        Ok((lease_id, item)) => {
                            running.remove(&lease_id);
                            if discard.remove(&lease_id) {
                                tracing::debug!(evaluation = item.evaluation_id, "run stopped (lease lost or handed back)");
                                continue;
                            }
                            match &item.failure {
                                None => tracing::debug!(evaluation = item.evaluation_id, ms = item.ended_unix_ms.saturating_sub(item.started_unix_ms), "run finished"),
                                Some((kind, reason, _)) => tracing::warn!(evaluation = item.evaluation_id, kind = %kind, reason = %reason, "run failed"),
                            }
                            undelivered.push(item);
                        }
                        Err(e) => tracing::error!(error = %e, "a run task failed"),
                    }
                }
                opts.spool.save(&undelivered)?;
                poll_after = Duration::ZERO;
            }
            _ = renew_tick.tick() => {
                if let Some(wid) = &worker_id {
                    let ids: Vec<String> = running.keys().filter(|k| !discard.contains(*k)).cloned().collect();
                    match client.renew(pb::RenewRequest { worker_id: wid.clone(), lease_ids: ids }).await {
                        Ok(r) => {
                            for lost in r.into_inner().lost {
                                if let Some(run) = running.get(&lost) {
                                    tracing::info!(lease = %lost, "lease lost (done elsewhere or expired); stopping that run");
                                    run.cancel.cancel();
                                    discard.insert(lost);
                                }
                            }
                        }
                        Err(s) => match classify(&s) {
                            Trouble::Rejoin => worker_id = None,
                            Trouble::Fatal(m) if s.code() == Code::Unauthenticated => return Err(WorkerError::Refused(m)),
                            _ => {}
                        },
                    }
                }
                poll_after = Duration::ZERO;
            }
            _ = &mut shutdown, if draining.is_none() => {
                tracing::info!(running = running.len(), grace_s = opts.grace.as_secs(), "stopping: finishing running work within the grace period");
                draining = Some(Instant::now() + opts.grace);
            }
            _ = tokio::time::sleep_until(grace_at.unwrap_or_else(Instant::now).into()), if grace_at.is_some() => {
                cancelled_rest = true;
                let ids: Vec<String> = running.keys().filter(|k| !discard.contains(*k)).cloned().collect();
                for id in &ids {
                    if let Some(r) = running.get(id) {
                        r.cancel.cancel();
                    }
                    discard.insert(id.clone());
                }
                if let (Some(wid), false) = (&worker_id, ids.is_empty()) {
                    let n = ids.len() as u64;
                    match client.hand_back(pb::HandBackRequest { worker_id: wid.clone(), lease_ids: ids }).await {
                        Ok(_) => summary.handed_back += n,
                        Err(s) => tracing::warn!(error = %s.message(), "could not hand leases back; they will expire"),
                    }
                }
            }
            _ = tokio::time::sleep(wait) => {
                poll_after = Duration::ZERO;
            }
        }
    }
    if let Some(wid) = &worker_id {
        let _ = client
            .leave(pb::LeaveRequest {
                worker_id: wid.clone(),
            })
            .await;
    }
    summary.undelivered = undelivered.len() as u64;
    if !undelivered.is_empty() {
        match opts.spool.path() {
            Some(p) => {
                tracing::warn!(count = undelivered.len(), spool = %p.display(), "results not delivered; kept in the spool for the next start")
            }
            None => tracing::warn!(
                count = undelivered.len(),
                "results not delivered; they will be run again"
            ),
        }
    }
    Ok(summary)
}
