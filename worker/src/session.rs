//! The worker's session with a coordinator: join, ask for work for free
//! slots, run it, renew leases, deliver results, and hand back what it will
//! not finish. This is the only module of the worker that sees the
//! generated protocol types.
//!
//! One task drives a [`Session`], one method per step ([`Session::join`],
//! [`Session::deliver`], [`Session::request`], [`Session::renew`],
//! [`Session::drain`]); each run is its own task in a `JoinSet`. If the
//! coordinator goes away, running work continues and finished results wait
//! (in memory and in the [`Spool`]) until it comes back; calls are retried
//! with capped exponential backoff and jitter, and the log says so at once
//! and then every [`REMINDER`].

use crate::request::RunRequest;
use crate::runner::{FailureKind, RunFailure, Runner};
use crate::spool::{RunOutcome, Spool, SpoolError, Spooled};
use rand::Rng;
use std::collections::{BTreeMap, HashMap};
use std::future::Future;
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};
use tessera_proto::channel::{self, Client, Dial, DialError};
use tessera_proto::v1 as pb;
use tessera_proto::PROTOCOL_VERSION;
use tokio::task::JoinSet;
use tokio_util::sync::CancellationToken;
use tonic::{Code, Status};

/// How often a worker that cannot reach its coordinator says so again.
pub const REMINDER: Duration = Duration::from_secs(60);
/// Most results sent in one `Report`.
const REPORT_BATCH: usize = 512;
/// After the grace period, how long a stopping worker keeps trying to
/// deliver finished results before leaving them in the spool.
const DELIVERY_AFTER_GRACE: Duration = Duration::from_secs(10);

/// How a worker connects and behaves.
#[derive(Clone, Debug)]
pub struct WorkerOptions {
    /// The coordinator's address, token and CA.
    pub dial: Dial,
    /// Name shown in `status` and stored with each result.
    pub name: String,
    /// Host name reported at join.
    pub host: String,
    /// Parallel runs.
    pub slots: u32,
    /// Where undelivered results are kept across restarts.
    pub spool: Spool,
    /// On shutdown, how long running work may take to finish.
    pub grace: Duration,
    /// Exit when the coordinator says the sweep is finished.
    pub exit_when_finished: bool,
    /// Exit after this long with nothing running and no work offered.
    pub idle_exit: Option<Duration>,
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
    #[error(transparent)]
    BadAddress(#[from] DialError),
    /// The spool could not be read or written.
    #[error(transparent)]
    Spool(#[from] SpoolError),
}

/// Why a worker's session ended normally.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Ending {
    /// The coordinator said the sweep is finished.
    SweepFinished,
    /// It was told to stop (a signal).
    Stopped,
    /// Nothing to do for the idle period.
    Idle,
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
    /// Why the session ended.
    pub ending: Ending,
}

fn unix_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_millis() as u64)
        .unwrap_or(0)
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
#[derive(Debug)]
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

/// Whether the coordinator answers, and when the log last said it does not.
#[derive(Debug)]
struct Contact {
    lost_since: Option<Instant>,
    last_said: Instant,
}

impl Contact {
    /// A call failed for a reason that may pass: log at once, then every [`REMINDER`].
    fn lost(&mut self, url: &str, doing: &str, error: &str) {
        let now = Instant::now();
        match self.lost_since {
            None => {
                tracing::warn!(coordinator = %url, error = %error, "cannot reach the coordinator ({doing}); running work continues and results are kept; retrying");
                self.lost_since = Some(now);
                self.last_said = now;
            }
            Some(since) if now.duration_since(self.last_said) >= REMINDER => {
                tracing::warn!(coordinator = %url, error = %error, waited_s = now.duration_since(since).as_secs(), "still cannot reach the coordinator ({doing}); is it running, and is the address right?");
                self.last_said = now;
            }
            Some(_) => {}
        }
    }

    /// A call succeeded.
    fn reached(&mut self, url: &str) {
        if let Some(since) = self.lost_since.take() {
            tracing::info!(coordinator = %url, after_s = since.elapsed().as_secs(), "reached the coordinator again");
        }
    }
}

/// A run under way.
#[derive(Debug)]
struct Running {
    cancel: CancellationToken,
    /// Its result is not wanted (lease lost or handed back).
    discard: bool,
}

fn to_wire(s: &Spooled) -> pb::RunResult {
    pb::RunResult {
        lease_id: s.lease_id.clone(),
        evaluation_id: s.evaluation_id,
        started_unix_ms: s.started_unix_ms,
        ended_unix_ms: s.ended_unix_ms,
        attempt: s.attempt,
        outcome: Some(match &s.outcome {
            RunOutcome::Metrics(m) => pb::run_result::Outcome::Metrics(pb::Metrics {
                bits: m.iter().map(|(k, v)| (k.clone(), v.to_bits())).collect(),
            }),
            RunOutcome::Failure {
                kind,
                reason,
                stderr_tail,
            } => pb::run_result::Outcome::Failure(pb::Failure {
                reason: reason.clone(),
                stderr_tail: stderr_tail.clone(),
                kind: kind.clone(),
            }),
        }),
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

/// The first line of a failure reason, for the log (the whole reason is stored).
fn first_line(s: &str) -> &str {
    s.lines().next().unwrap_or("")
}

/// Runs the worker until the sweep is finished (if `exit_when_finished`),
/// it has been idle for `idle_exit`, the coordinator refuses it, or
/// `shutdown` completes. On shutdown, running work gets `grace` to finish;
/// the rest is cancelled and handed back, and finished results are
/// delivered (or left in the spool).
pub async fn run(
    opts: WorkerOptions,
    runner: Arc<dyn Runner>,
    shutdown: impl Future<Output = ()>,
) -> Result<WorkerSummary, WorkerError> {
    let mut session = Session::new(opts, runner)?;
    session.run(shutdown).await
}

/// One worker's state while it serves a coordinator.
pub struct Session {
    opts: WorkerOptions,
    client: Client,
    runner: Arc<dyn Runner>,
    models: Vec<String>,
    /// Set by `join`; cleared when the coordinator no longer knows us.
    worker_id: Option<String>,
    renew_every: Duration,
    backoff: Backoff,
    /// No call before this instant (backing off).
    next_try: Instant,
    /// No `RequestWork` before this instant (the coordinator had nothing).
    poll_at: Instant,
    contact: Contact,
    running: HashMap<String, Running>,
    /// The runs under way; each task ends when its run ends or is cancelled.
    runs: JoinSet<(String, Spooled)>,
    undelivered: Vec<Spooled>,
    delivered: u64,
    handed_back: u64,
    sweep_finished: bool,
    /// Set when shutdown began: the end of the grace period.
    grace_ends: Option<Instant>,
    /// The grace period is over and the rest was handed back.
    handed_rest: bool,
    /// Nothing running and nothing offered since this instant.
    idle_since: Instant,
}

impl std::fmt::Debug for Session {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Session")
            .field("name", &self.opts.name)
            .field("worker_id", &self.worker_id)
            .field("running", &self.running.len())
            .field("undelivered", &self.undelivered.len())
            .finish()
    }
}

impl Session {
    /// A session for `opts`: checks the address and loads the spool; no
    /// network call yet.
    pub fn new(opts: WorkerOptions, runner: Arc<dyn Runner>) -> Result<Session, WorkerError> {
        let client = channel::connect(&opts.dial)?;
        let undelivered = opts.spool.load()?;
        if !undelivered.is_empty() {
            tracing::info!(
                count = undelivered.len(),
                "delivering results left by an earlier run"
            );
        }
        let now = Instant::now();
        Ok(Session {
            models: runner.models(),
            backoff: Backoff {
                attempt: 0,
                cap: opts.max_backoff,
            },
            opts,
            client,
            runner,
            worker_id: None,
            renew_every: Duration::from_secs(10),
            next_try: now,
            poll_at: now,
            contact: Contact {
                lost_since: None,
                last_said: now,
            },
            running: HashMap::new(),
            runs: JoinSet::new(),
            undelivered,
            delivered: 0,
            handed_back: 0,
            sweep_finished: false,
            grace_ends: None,
            handed_rest: false,
            idle_since: now,
        })
    }

    fn may_call(&self) -> bool {
        Instant::now() >= self.next_try
    }

    fn back_off(&mut self) {
        self.next_try = Instant::now() + self.backoff.next();
    }

    fn answered(&mut self) {
        self.backoff.reset();
        self.contact.reached(&self.opts.dial.url);
    }

    /// Handles a failed call: fatal, rejoin, or back off and say so.
    fn trouble(&mut self, s: &Status, doing: &str) -> Result<(), WorkerError> {
        match classify(s) {
            Trouble::Fatal(m) => Err(WorkerError::Refused(m)),
            Trouble::Rejoin => {
                self.worker_id = None;
                Ok(())
            }
            Trouble::Transient(m) => {
                self.contact.lost(&self.opts.dial.url, doing, &m);
                self.back_off();
                Ok(())
            }
        }
    }

    /// Joins the coordinator (again, after it forgot us).
    pub async fn join(&mut self) -> Result<(), WorkerError> {
        let req = pb::JoinRequest {
            protocol: PROTOCOL_VERSION,
            name: self.opts.name.clone(),
            host: self.opts.host.clone(),
            slots: self.opts.slots,
            models: self.models.clone(),
            version: env!("CARGO_PKG_VERSION").to_string(),
        };
        match self.client.join(req).await {
            Ok(r) => {
                let r = r.into_inner();
                if r.protocol != PROTOCOL_VERSION {
                    return Err(WorkerError::Refused(format!(
                        "protocol mismatch: this worker speaks {PROTOCOL_VERSION}, the coordinator {} (tessera {})",
                        r.protocol, r.version
                    )));
                }
                tracing::info!(worker = %r.worker_id, sweep = %r.sweep, "joined the coordinator");
                self.worker_id = Some(r.worker_id);
                self.renew_every = Duration::from_millis(r.renew_every_ms.max(100));
                self.answered();
                Ok(())
            }
            Err(s) => self.trouble(&s, "joining"),
        }
    }

    /// Sends finished results; keeps those not acknowledged.
    pub async fn deliver(&mut self) -> Result<(), WorkerError> {
        let Some(wid) = self.worker_id.clone() else {
            return Ok(());
        };
        if self.undelivered.is_empty() {
            return Ok(());
        }
        let req = pb::ReportRequest {
            worker_id: wid,
            worker_name: self.opts.name.clone(),
            results: self
                .undelivered
                .iter()
                .take(REPORT_BATCH)
                .map(to_wire)
                .collect(),
        };
        match self.client.report(req).await {
            Ok(r) => {
                let acked: std::collections::HashSet<u64> =
                    r.into_inner().acknowledged.into_iter().collect();
                let before = self.undelivered.len();
                self.undelivered
                    .retain(|s| !acked.contains(&s.evaluation_id));
                self.delivered += (before - self.undelivered.len()) as u64;
                self.opts.spool.save(&self.undelivered)?;
                self.answered();
                Ok(())
            }
            Err(s)
                if matches!(classify(&s), Trouble::Fatal(_))
                    && s.code() != Code::Unauthenticated =>
            {
                // The coordinator will never take these (for example a
                // result for another sweep): keeping them would block the spool.
                tracing::error!(error = %s.message(), count = self.undelivered.len().min(REPORT_BATCH), "results refused by the coordinator; dropping them");
                let n = self.undelivered.len().min(REPORT_BATCH);
                self.undelivered.drain(..n);
                self.opts.spool.save(&self.undelivered)?;
                Ok(())
            }
            Err(s) => self.trouble(&s, "delivering results"),
        }
    }

    /// Asks for work for the free slots and starts it.
    pub async fn request(&mut self) -> Result<(), WorkerError> {
        let Some(wid) = self.worker_id.clone() else {
            return Ok(());
        };
        let free = self.opts.slots.saturating_sub(self.running.len() as u32);
        if free == 0 {
            return Ok(());
        }
        let req = pb::WorkRequest {
            worker_id: wid,
            free_slots: free,
        };
        match self.client.request_work(req).await {
            Ok(r) => {
                let r = r.into_inner();
                self.answered();
                self.sweep_finished = r.finished;
                if r.leases.is_empty() {
                    let wait = Duration::from_millis(r.retry_after_ms.clamp(20, 5_000));
                    self.poll_at = Instant::now() + wait;
                } else {
                    self.idle_since = Instant::now();
                }
                for lease in r.leases {
                    self.start(lease);
                }
                Ok(())
            }
            Err(s) => self.trouble(&s, "asking for work"),
        }
    }

    /// Starts one run as its own task.
    fn start(&mut self, lease: pb::Lease) {
        let cancel = CancellationToken::new();
        self.running.insert(
            lease.lease_id.clone(),
            Running {
                cancel: cancel.clone(),
                discard: false,
            },
        );
        tracing::debug!(
            evaluation = lease.evaluation_id,
            point = lease.point_id,
            replicate = lease.replicate,
            attempt = lease.attempt,
            model = %lease.model,
            lease = %lease.lease_id,
            "run started"
        );
        let runner = self.runner.clone();
        self.runs.spawn(async move {
            let started = unix_ms();
            let outcome = match request_of(&lease) {
                Ok(req) => runner.run(req, cancel).await,
                Err(f) => Err(f),
            };
            let outcome = match outcome {
                Ok(m) => RunOutcome::Metrics(m),
                Err(f) => RunOutcome::Failure {
                    kind: f.kind.as_str().to_string(),
                    reason: f.reason,
                    stderr_tail: f.stderr_tail,
                },
            };
            (
                lease.lease_id.clone(),
                Spooled {
                    lease_id: lease.lease_id,
                    evaluation_id: lease.evaluation_id,
                    attempt: lease.attempt,
                    started_unix_ms: started,
                    ended_unix_ms: unix_ms(),
                    outcome,
                },
            )
        });
    }

    /// Takes in a finished run (and any others already finished).
    fn finished(
        &mut self,
        first: Result<(String, Spooled), tokio::task::JoinError>,
    ) -> Result<(), WorkerError> {
        let mut all = vec![first];
        while let Some(j) = self.runs.try_join_next() {
            all.push(j);
        }
        for j in all {
            let (lease_id, item) = match j {
                Ok(x) => x,
                Err(e) => {
                    tracing::error!(error = %e, "a run task failed");
                    continue;
                }
            };
            let discard = self.running.remove(&lease_id).is_some_and(|r| r.discard);
            if discard {
                tracing::debug!(
                    evaluation = item.evaluation_id,
                    "run stopped (lease lost or handed back)"
                );
                continue;
            }
            match &item.outcome {
                RunOutcome::Metrics(_) => tracing::debug!(
                    evaluation = item.evaluation_id,
                    ms = item.ended_unix_ms.saturating_sub(item.started_unix_ms),
                    "run finished"
                ),
                RunOutcome::Failure { kind, reason, .. } => tracing::warn!(
                    evaluation = item.evaluation_id,
                    kind = %kind,
                    reason = %first_line(reason),
                    "run failed"
                ),
            }
            self.undelivered.push(item);
        }
        self.idle_since = Instant::now();
        self.opts.spool.save(&self.undelivered)?;
        self.poll_at = Instant::now();
        Ok(())
    }

    /// Renews the leases of running work; stops runs whose lease was lost.
    pub async fn renew(&mut self) -> Result<(), WorkerError> {
        let Some(wid) = self.worker_id.clone() else {
            return Ok(());
        };
        let ids: Vec<String> = self
            .running
            .iter()
            .filter(|(_, r)| !r.discard)
            .map(|(k, _)| k.clone())
            .collect();
        match self
            .client
            .renew(pb::RenewRequest {
                worker_id: wid,
                lease_ids: ids,
            })
            .await
        {
            Ok(r) => {
                self.answered();
                for lost in r.into_inner().lost {
                    if let Some(run) = self.running.get_mut(&lost) {
                        tracing::info!(lease = %lost, "lease lost (done elsewhere or expired); stopping that run");
                        run.cancel.cancel();
                        run.discard = true;
                    }
                }
                Ok(())
            }
            Err(s) => match classify(&s) {
                // A renewal that fails for a passing reason is simply tried
                // again at the next tick; the leases may expire meanwhile,
                // and the results are still delivered (first result wins).
                Trouble::Transient(m) => {
                    self.contact
                        .lost(&self.opts.dial.url, "renewing leases", &m);
                    Ok(())
                }
                _ => self.trouble(&s, "renewing leases"),
            },
        }
    }

    /// The grace period is over: cancels what still runs and hands it back.
    pub async fn drain(&mut self) {
        self.handed_rest = true;
        let ids: Vec<String> = self
            .running
            .iter()
            .filter(|(_, r)| !r.discard)
            .map(|(k, _)| k.clone())
            .collect();
        for id in &ids {
            if let Some(r) = self.running.get_mut(id) {
                r.cancel.cancel();
                r.discard = true;
            }
        }
        if let (Some(wid), false) = (self.worker_id.clone(), ids.is_empty()) {
            let n = ids.len() as u64;
            match self
                .client
                .hand_back(pb::HandBackRequest {
                    worker_id: wid,
                    lease_ids: ids,
                })
                .await
            {
                Ok(_) => self.handed_back += n,
                Err(s) => {
                    tracing::warn!(error = %s.message(), "could not hand leases back; they will expire and be handed out again")
                }
            }
        }
    }

    /// Says goodbye so the coordinator frees our slots at once.
    async fn leave(&mut self) {
        if let Some(wid) = self.worker_id.clone() {
            let _ = self.client.leave(pb::LeaveRequest { worker_id: wid }).await;
        }
    }

    /// Why the session should end now, if it should.
    fn ending(&self) -> Option<Ending> {
        let nothing_left = self.running.is_empty() && self.undelivered.is_empty();
        if let Some(grace_ends) = self.grace_ends {
            let gave_up =
                self.running.is_empty() && Instant::now() > grace_ends + DELIVERY_AFTER_GRACE;
            // Results that cannot be delivered by then stay in the spool.
            if nothing_left || gave_up {
                return Some(Ending::Stopped);
            }
            return None;
        }
        if nothing_left && self.sweep_finished && self.opts.exit_when_finished {
            return Some(Ending::SweepFinished);
        }
        if let Some(idle) = self.opts.idle_exit {
            if nothing_left && self.idle_since.elapsed() >= idle {
                return Some(Ending::Idle);
            }
        }
        None
    }

    /// The whole session: see [`run`].
    pub async fn run(
        &mut self,
        shutdown: impl Future<Output = ()>,
    ) -> Result<WorkerSummary, WorkerError> {
        tokio::pin!(shutdown);
        let mut renew_tick = tokio::time::interval(self.renew_every);
        renew_tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        let mut renew_period = self.renew_every;
        let ending = loop {
            if self.worker_id.is_none() && self.may_call() {
                self.join().await?;
                if self.renew_every != renew_period {
                    renew_period = self.renew_every;
                    renew_tick = tokio::time::interval(renew_period);
                    renew_tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
                }
            }
            if self.may_call() {
                self.deliver().await?;
            }
            let stopping = self.grace_ends.is_some();
            let want_work = !(stopping || self.sweep_finished && self.opts.exit_when_finished);
            if want_work && self.may_call() && Instant::now() >= self.poll_at {
                self.request().await?;
            }
            if let Some(e) = self.ending() {
                break e;
            }
            // Wait for the next thing to do.
            let free = self.opts.slots.saturating_sub(self.running.len() as u32);
            let now = Instant::now();
            let mut wake = now + Duration::from_secs(1);
            if !self.may_call() {
                wake = wake.min(self.next_try);
            } else if self.worker_id.is_none() || !self.undelivered.is_empty() {
                wake = now;
            } else if want_work && free > 0 {
                wake = wake.min(self.poll_at);
            }
            if let Some(idle) = self.opts.idle_exit {
                wake = wake.min(self.idle_since + idle);
            }
            let grace_at = self.grace_ends.filter(|_| !self.handed_rest);
            tokio::select! {
                Some(joined) = self.runs.join_next(), if !self.runs.is_empty() => {
                    self.finished(joined)?;
                }
                _ = renew_tick.tick() => {
                    if !self.running.is_empty() {
                        self.renew().await?;
                    }
                }
                _ = &mut shutdown, if self.grace_ends.is_none() => {
                    tracing::info!(running = self.running.len(), grace_s = self.opts.grace.as_secs(), "stopping: finishing running work within the grace period");
                    self.grace_ends = Some(Instant::now() + self.opts.grace);
                }
                _ = tokio::time::sleep_until(grace_at.unwrap_or(now).into()), if grace_at.is_some() => {
                    self.drain().await;
                }
                _ = tokio::time::sleep_until(wake.into()) => {}
            }
        };
        self.leave().await;
        let undelivered = self.undelivered.len() as u64;
        if undelivered > 0 {
            match self.opts.spool.path() {
                Some(p) => {
                    tracing::warn!(count = undelivered, spool = %p.display(), "results not delivered; kept in the spool for the next start")
                }
                None => tracing::warn!(
                    count = undelivered,
                    "results not delivered; they will be run again"
                ),
            }
        }
        Ok(WorkerSummary {
            delivered: self.delivered,
            handed_back: self.handed_back,
            undelivered,
            sweep_finished: self.sweep_finished,
            ending,
        })
    }
}
