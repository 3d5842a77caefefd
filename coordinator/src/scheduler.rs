//! The lease scheduler: which evaluation runs where, and until when.
//!
//! The scheduler keeps the live state of a sweep in memory: the queue of
//! evaluations waiting for a worker, the leases held by workers (each with a
//! deadline), the workers themselves, and the running tallies shown by
//! `status`. SQLite stays the source of truth: the scheduler is rebuilt from
//! the store when a coordinator starts, and it only counts a result once the
//! store has said the result is committed ([`Scheduler::apply_committed`]).
//!
//! It does no I/O of its own and holds no async state, so every rule can be
//! tested with plain function calls and chosen instants (every method takes `now`).

use crate::spec::{Spec, DEFAULT_REPRODUCIBLE_BATCH};
use crate::status::{best_point, group_reason, BestPoint, PointResults, SweepStatus, WorkerStatus};
use crate::store::{CommitResult, EvalStatus, EvaluationRecord, PointRecord};
use std::collections::{BTreeMap, HashMap, HashSet, VecDeque};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

/// Failure kinds that are final at once: the run's inputs were rejected, and
/// the same inputs would be rejected again.
pub const NOT_RETRIED: &[&str] = &["bad_input"];

/// Milliseconds since the Unix epoch, for records people read.
pub fn unix_ms() -> u64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map(|d| d.as_millis() as u64)
        .unwrap_or(0)
}

/// How long leases live and how often workers renew them.
#[derive(Clone, Copy, Debug)]
pub struct LeaseTimes {
    /// A lease not renewed for this long expires and its evaluation is queued again.
    pub lease: Duration,
    /// How often a worker is asked to renew (well under `lease`).
    pub renew_every: Duration,
}

impl Default for LeaseTimes {
    fn default() -> Self {
        LeaseTimes {
            lease: Duration::from_secs(30),
            renew_every: Duration::from_secs(10),
        }
    }
}

/// One evaluation handed to a worker.
#[derive(Clone, Debug, PartialEq)]
pub struct Grant {
    /// Lease id: `<evaluation id>.<coordinator nonce>.<counter>`.
    pub lease_id: String,
    /// Evaluation row id in the store.
    pub evaluation_id: i64,
    /// Point row id in the store.
    pub point_id: i64,
    /// Replicate index (0-based).
    pub replicate: u32,
    /// Seed of this replicate, derived from the sweep seed.
    pub seed: u64,
    /// Parameter values in natural units, by name.
    pub params: BTreeMap<String, f64>,
    /// Which attempt this is (1 for the first).
    pub attempt: u32,
}

/// What every lease of a sweep carries besides its grant.
#[derive(Clone, Debug, PartialEq)]
pub struct LeaseContext {
    /// Model name.
    pub model: String,
    /// Fixed inputs as a JSON object.
    pub fixed_json: String,
    /// Per-run timeout in milliseconds.
    pub timeout_ms: u64,
    /// Metrics every run must report.
    pub expected_metrics: Vec<String>,
}

/// A worker's `Join`, as the scheduler needs it.
#[derive(Clone, Debug)]
pub struct JoinInfo {
    /// Name the operator gave the worker.
    pub name: String,
    /// Host name the worker runs on.
    pub host: String,
    /// Parallel runs the worker offers.
    pub slots: u32,
    /// Model names the worker can run.
    pub models: Vec<String>,
    /// tessera version of the worker.
    pub version: String,
}

/// Why the scheduler refused a request.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum ScheduleError {
    /// The worker id is not known (for example after a coordinator restart).
    #[error("unknown worker id {0:?}: join again")]
    UnknownWorker(String),
    /// The worker cannot run this sweep's model.
    #[error(
        "this sweep runs model {model:?}, but the worker offers only [{offered}]; start the worker with --command {model}=\"...\" or use a built-in model"
    )]
    ModelNotOffered {
        /// The sweep's model.
        model: String,
        /// What the worker offers, comma separated.
        offered: String,
    },
    /// A worker offered no slots.
    #[error("a worker must offer at least one slot")]
    NoSlots,
}

/// What a worker sends back for one lease, before it is committed.
#[derive(Clone, Debug)]
pub struct Report {
    /// Evaluation the result is for.
    pub evaluation_id: i64,
    /// The lease it ran under (may be stale).
    pub lease_id: String,
    /// Metrics, or the failure.
    pub outcome: ReportOutcome,
    /// When the run started and ended (Unix ms).
    pub started_unix_ms: u64,
    /// When the run ended (Unix ms).
    pub ended_unix_ms: u64,
}

/// Metrics or a failure.
#[derive(Clone, Debug)]
pub enum ReportOutcome {
    /// The run produced these metrics.
    Metrics(BTreeMap<String, f64>),
    /// The run failed.
    Failure {
        /// Short machine-readable kind (exit, timeout, ...).
        kind: String,
        /// What went wrong, in words.
        reason: String,
        /// The end of the simulator's stderr.
        stderr_tail: String,
    },
}

/// A report after the scheduler decided whether a failure is final.
#[derive(Clone, Debug)]
pub struct Decided {
    /// The report.
    pub report: Report,
    /// For a failure: true when no retries are left.
    pub final_attempt: bool,
}

/// One evaluation that is not final yet.
#[derive(Debug)]
struct Pending {
    point_id: i64,
    replicate: u32,
    seed: u64,
    /// Failed attempts so far.
    failures: u32,
    lease: Option<Held>,
}

/// A lease a worker holds.
#[derive(Debug)]
struct Held {
    lease_id: String,
    worker_id: String,
    deadline: Instant,
}

#[derive(Debug)]
struct Worker {
    info: JoinInfo,
    joined: Instant,
    last_contact: Instant,
    last_contact_unix_ms: u64,
    completed: u64,
    running: HashSet<i64>,
    left: bool,
}

/// The live state of one sweep.
#[derive(Debug)]
pub struct Scheduler {
    spec: std::sync::Arc<Spec>,
    times: LeaseTimes,
    nonce: String,
    counter: u64,
    queue: VecDeque<i64>,
    pending: HashMap<i64, Pending>,
    workers: HashMap<String, Worker>,
    points: BTreeMap<i64, PointResults>,
    point_ids_in_order: Vec<i64>,
    done: u64,
    failed: u64,
    failures: BTreeMap<String, u64>,
    planning: bool,
    /// Each batch waits for every result before it.
    reproducible: bool,
    /// Why no more points will be proposed before the budget, if so.
    stop_reason: Option<String>,
    /// Calibration waves so far.
    waves: Vec<crate::status::Wave>,
    /// The batch number of the next planning round (the design is batch 0).
    next_batch: u32,
    /// Where runs fail, worked out again only when the failure count changes.
    failure_region: std::sync::Mutex<(u64, Option<String>)>,
    /// Wall time of the successful runs reported since the start, and how many.
    run_ms: u64,
    runs_timed: u64,
}

impl Scheduler {
    /// Rebuilds the live state from what the store holds.
    ///
    /// Every evaluation still `queued` in the store goes to the queue, in
    /// point order; leases do not survive a restart (workers that still run
    /// such an evaluation re-adopt it when they renew).
    pub fn new(
        spec: std::sync::Arc<Spec>,
        times: LeaseTimes,
        nonce: String,
        points: &[PointRecord],
        evaluations: &[EvaluationRecord],
    ) -> Self {
        let mut s = Scheduler {
            spec,
            times,
            nonce,
            counter: 0,
            queue: VecDeque::new(),
            pending: HashMap::new(),
            workers: HashMap::new(),
            points: BTreeMap::new(),
            point_ids_in_order: Vec::new(),
            done: 0,
            failed: 0,
            failures: BTreeMap::new(),
            planning: false,
            reproducible: false,
            stop_reason: None,
            waves: Vec::new(),
            next_batch: 1,
            failure_region: std::sync::Mutex::new((0, None)),
            run_ms: 0,
            runs_timed: 0,
        };
        s.add_points(points);
        let mut evals: Vec<&EvaluationRecord> = evaluations.iter().collect();
        evals.sort_by_key(|e| (e.point_idx, e.replicate, e.id));
        for e in evals {
            s.add_evaluation(e);
        }
        s
    }

    /// Adds newly stored points (their evaluations follow through
    /// [`Scheduler::add_evaluation`]).
    pub fn add_points(&mut self, points: &[PointRecord]) {
        for p in points {
            self.next_batch = self.next_batch.max(p.batch + 1);
            if !self.points.contains_key(&p.id) {
                self.point_ids_in_order.push(p.id);
            }
            self.points.entry(p.id).or_insert_with(|| PointResults {
                point_id: p.id,
                idx: p.idx,
                values: p.values.clone(),
                replicates: Vec::new(),
                failed: 0,
            });
        }
    }

    /// Adds one evaluation from the store.
    pub fn add_evaluation(&mut self, e: &EvaluationRecord) {
        match e.status {
            EvalStatus::Queued => {
                if self.pending.contains_key(&e.id) {
                    return;
                }
                self.pending.insert(
                    e.id,
                    Pending {
                        point_id: e.point_id,
                        replicate: e.replicate,
                        seed: e.seed,
                        failures: e.attempts,
                        lease: None,
                    },
                );
                self.queue.push_back(e.id);
            }
            EvalStatus::Done => {
                self.done += 1;
                if let Some(p) = self.points.get_mut(&e.point_id) {
                    p.replicates.push(e.metrics.clone());
                }
            }
            EvalStatus::Failed => {
                self.failed += 1;
                let reason = e.failure_reason.clone().unwrap_or_default();
                *self.failures.entry(group_reason(&reason)).or_insert(0) += 1;
                if let Some(p) = self.points.get_mut(&e.point_id) {
                    p.failed += 1;
                }
            }
        }
    }

    /// The sweep this scheduler runs.
    pub fn spec(&self) -> &Spec {
        &self.spec
    }

    /// Lease durations.
    pub fn times(&self) -> LeaseTimes {
        self.times
    }

    /// Registers a worker and returns its id.
    pub fn join(&mut self, info: JoinInfo, now: Instant) -> Result<String, ScheduleError> {
        if info.slots == 0 {
            return Err(ScheduleError::NoSlots);
        }
        if !info.models.iter().any(|m| m == &self.spec.model.name) {
            return Err(ScheduleError::ModelNotOffered {
                model: self.spec.model.name.clone(),
                offered: info.models.join(", "),
            });
        }
        self.counter += 1;
        let id = format!("w{}-{}", self.counter, self.nonce);
        self.workers.insert(
            id.clone(),
            Worker {
                info,
                joined: now,
                last_contact: now,
                last_contact_unix_ms: unix_ms(),
                completed: 0,
                running: HashSet::new(),
                left: false,
            },
        );
        Ok(id)
    }

    fn touch(&mut self, worker_id: &str, now: Instant) -> Result<&mut Worker, ScheduleError> {
        let w = self
            .workers
            .get_mut(worker_id)
            .ok_or_else(|| ScheduleError::UnknownWorker(worker_id.to_string()))?;
        w.last_contact = now;
        w.last_contact_unix_ms = unix_ms();
        w.left = false;
        Ok(w)
    }

    /// Hands up to `free` queued evaluations to a worker.
    pub fn request_work(
        &mut self,
        worker_id: &str,
        free: u32,
        now: Instant,
    ) -> Result<Vec<Grant>, ScheduleError> {
        self.expire(now);
        self.touch(worker_id, now)?;
        let mut grants = Vec::new();
        while grants.len() < free as usize {
            let Some(eid) = self.queue.pop_front() else {
                break;
            };
            let Some(p) = self.pending.get(&eid) else {
                continue; // became final while queued
            };
            if p.lease.is_some() {
                continue;
            }
            self.counter += 1;
            let lease_id = format!("{eid}.{}.{}", self.nonce, self.counter);
            let grant = self.grant(eid, lease_id, worker_id, now);
            grants.extend(grant);
        }
        Ok(grants)
    }

    fn grant(
        &mut self,
        eid: i64,
        lease_id: String,
        worker_id: &str,
        now: Instant,
    ) -> Option<Grant> {
        let deadline = now + self.times.lease;
        let p = self.pending.get_mut(&eid)?;
        p.lease = Some(Held {
            lease_id: lease_id.clone(),
            worker_id: worker_id.to_string(),
            deadline,
        });
        let point = self.points.get(&p.point_id)?;
        let params = self
            .spec
            .params
            .iter()
            .zip(point.values.iter())
            .map(|(ps, v)| (ps.name.clone(), *v))
            .collect();
        let grant = Grant {
            lease_id,
            evaluation_id: eid,
            point_id: p.point_id,
            replicate: p.replicate,
            seed: crate::seed::attempt_seed(p.seed, p.failures + 1),
            params,
            attempt: p.failures + 1,
        };
        if let Some(w) = self.workers.get_mut(worker_id) {
            w.running.insert(eid);
        }
        Some(grant)
    }

    /// Extends the worker's leases; returns the ones it no longer holds.
    ///
    /// A lease from before a coordinator restart (another nonce) is
    /// re-adopted when its evaluation is still queued and unleased, so the
    /// work already running is not thrown away.
    pub fn renew(
        &mut self,
        worker_id: &str,
        lease_ids: &[String],
        now: Instant,
    ) -> Result<Vec<String>, ScheduleError> {
        self.expire(now);
        self.touch(worker_id, now)?;
        let deadline = now + self.times.lease;
        let mut lost = Vec::new();
        for lid in lease_ids {
            let Some(eid) = lease_evaluation(lid) else {
                lost.push(lid.clone());
                continue;
            };
            let Some(p) = self.pending.get_mut(&eid) else {
                lost.push(lid.clone()); // already final
                continue;
            };
            match &mut p.lease {
                Some(h) if h.lease_id == *lid && h.worker_id == worker_id => h.deadline = deadline,
                Some(_) => lost.push(lid.clone()),
                None => {
                    // Queued again (expired, or the coordinator restarted):
                    // give it back to the worker that is still running it.
                    self.queue.retain(|q| *q != eid);
                    p.lease = Some(Held {
                        lease_id: lid.clone(),
                        worker_id: worker_id.to_string(),
                        deadline,
                    });
                    if let Some(w) = self.workers.get_mut(worker_id) {
                        w.running.insert(eid);
                    }
                }
            }
        }
        Ok(lost)
    }

    /// Returns leases a worker will not finish to the front of the queue.
    pub fn hand_back(
        &mut self,
        worker_id: &str,
        lease_ids: &[String],
        now: Instant,
    ) -> Result<(), ScheduleError> {
        self.touch(worker_id, now)?;
        for lid in lease_ids {
            let Some(eid) = lease_evaluation(lid) else {
                continue;
            };
            if let Some(p) = self.pending.get_mut(&eid) {
                if matches!(&p.lease, Some(h) if h.lease_id == *lid) {
                    p.lease = None;
                    self.queue.push_front(eid);
                }
            }
            if let Some(w) = self.workers.get_mut(worker_id) {
                w.running.remove(&eid);
            }
        }
        Ok(())
    }

    /// A worker leaves: its leases go back to the queue.
    pub fn leave(&mut self, worker_id: &str, now: Instant) -> Result<(), ScheduleError> {
        let held: Vec<String> = self
            .pending
            .values()
            .filter_map(|p| p.lease.as_ref())
            .filter(|h| h.worker_id == worker_id)
            .map(|h| h.lease_id.clone())
            .collect();
        self.hand_back(worker_id, &held, now)?;
        if let Some(w) = self.workers.get_mut(worker_id) {
            w.left = true;
        }
        Ok(())
    }

    /// Expires leases whose deadline has passed; their evaluations go to the
    /// front of the queue. Returns how many expired.
    pub fn expire(&mut self, now: Instant) -> usize {
        let mut expired = Vec::new();
        for (eid, p) in self.pending.iter_mut() {
            if let Some(h) = &p.lease {
                if h.deadline <= now {
                    expired.push((*eid, h.worker_id.clone()));
                    p.lease = None;
                }
            }
        }
        expired.sort();
        for (eid, wid) in expired.iter().rev() {
            self.queue.push_front(*eid);
            if let Some(w) = self.workers.get_mut(wid) {
                w.running.remove(eid);
            }
        }
        if !expired.is_empty() {
            tracing::warn!(
                count = expired.len(),
                "leases expired; evaluations queued again"
            );
        }
        expired.len()
    }

    /// Decides, for each report, whether a failure uses up the last retry.
    /// Reports for evaluations already final pass through (the store will
    /// call them duplicates).
    pub fn decide(&self, reports: Vec<Report>) -> Vec<Decided> {
        reports
            .into_iter()
            .map(|r| {
                let failures = self.pending.get(&r.evaluation_id).map_or(0, |p| p.failures);
                // Inputs a model rejects stay rejected: retrying cannot help.
                let hopeless = matches!(&r.outcome, ReportOutcome::Failure { kind, .. } if NOT_RETRIED.contains(&kind.as_str()));
                let final_attempt = hopeless || failures + 1 > self.spec.retries;
                Decided {
                    report: r,
                    final_attempt,
                }
            })
            .collect()
    }

    /// Applies results the store has committed. Returns the evaluation ids
    /// that may be acknowledged (stored, duplicate or unknown alike: the
    /// worker must not send them again).
    pub fn apply_committed(
        &mut self,
        worker_id: &str,
        decided: &[Decided],
        committed: &[CommitResult],
        now: Instant,
    ) -> Vec<i64> {
        let mut acked = Vec::with_capacity(decided.len());
        for (d, c) in decided.iter().zip(committed.iter()) {
            let eid = d.report.evaluation_id;
            acked.push(eid);
            if let Some(w) = self.workers.get_mut(worker_id) {
                w.running.remove(&eid);
                w.last_contact = now;
                w.last_contact_unix_ms = unix_ms();
            }
            if !matches!(c, CommitResult::Stored) {
                continue;
            }
            match &d.report.outcome {
                ReportOutcome::Metrics(m) => {
                    self.run_ms = self.run_ms.saturating_add(
                        d.report
                            .ended_unix_ms
                            .saturating_sub(d.report.started_unix_ms),
                    );
                    self.runs_timed += 1;
                    if let Some(p) = self.pending.remove(&eid) {
                        self.release_lease_of(eid, &p);
                        if let Some(pt) = self.points.get_mut(&p.point_id) {
                            pt.replicates.push(m.clone());
                        }
                    }
                    self.done += 1;
                    if let Some(w) = self.workers.get_mut(worker_id) {
                        w.completed += 1;
                    }
                }
                ReportOutcome::Failure { reason, .. } => {
                    if d.final_attempt {
                        if let Some(p) = self.pending.remove(&eid) {
                            self.release_lease_of(eid, &p);
                            if let Some(pt) = self.points.get_mut(&p.point_id) {
                                pt.failed += 1;
                            }
                        }
                        self.failed += 1;
                        *self.failures.entry(group_reason(reason)).or_insert(0) += 1;
                    } else if let Some(p) = self.pending.get_mut(&eid) {
                        p.failures += 1;
                        let lease = p.lease.take();
                        if let Some(h) = lease {
                            if let Some(w) = self.workers.get_mut(&h.worker_id) {
                                w.running.remove(&eid);
                            }
                        }
                        self.queue.push_back(eid);
                    }
                }
            }
        }
        acked
    }

    fn release_lease_of(&mut self, eid: i64, p: &Pending) {
        if let Some(h) = &p.lease {
            if let Some(w) = self.workers.get_mut(&h.worker_id) {
                w.running.remove(&eid);
            }
        }
    }

    /// Number of points in the sweep so far.
    pub fn point_count(&self) -> usize {
        self.points.len()
    }

    /// True when every evaluation is final and no more points will come
    /// (the budget is used, or the sweep was stopped early).
    pub fn finished(&self) -> bool {
        self.pending.is_empty()
            && (self.points.len() as u64 >= u64::from(self.spec.budget)
                || self.stop_reason.is_some())
    }

    /// Sets the calibration waves recorded so far.
    pub fn set_waves(&mut self, waves: Vec<crate::status::Wave>) {
        self.waves = waves;
    }

    /// Records a calibration wave.
    pub fn push_wave(&mut self, wave: crate::status::Wave) {
        self.waves.push(wave);
    }

    /// Sets whether each batch waits for every result before it.
    pub fn set_reproducible(&mut self, on: bool) {
        self.reproducible = on;
    }

    /// Whether batches wait for every earlier result.
    pub fn reproducible(&self) -> bool {
        self.reproducible
    }

    /// Stops proposing before the budget (the reason shows in `status`).
    pub fn stop(&mut self, reason: String) {
        self.stop_reason = Some(reason);
    }

    /// The batch number the next planning round gets.
    pub fn next_batch(&self) -> u32 {
        self.next_batch
    }

    /// Mean wall time of the successful runs reported since the
    /// coordinator started (ms), if any were.
    pub fn mean_run_ms(&self) -> Option<f64> {
        (self.runs_timed > 0).then(|| self.run_ms as f64 / self.runs_timed as f64)
    }

    /// Slots of the connected workers.
    pub fn slots(&self) -> usize {
        self.workers
            .values()
            .filter(|w| !w.left)
            .map(|w| w.info.slots as usize)
            .sum()
    }

    /// Whether a reproducible sweep will plan its next batch as soon as the
    /// points still running report: a worker offered nothing now will have
    /// work within a planning round.
    pub fn plan_awaits_results(&self) -> bool {
        self.reproducible
            && !self.planning
            && self.stop_reason.is_none()
            && !self.pending.is_empty()
            && (self.spec.budget as usize) > self.points.len()
    }

    /// Whether the planner should propose points now, and how many.
    ///
    /// Reproducible sweeps plan a batch (`batch`, default
    /// [`DEFAULT_REPRODUCIBLE_BATCH`]) when every evaluation so far is final.
    /// Otherwise the planner keeps ahead of the workers: once half the
    /// initial design has results, it plans whenever fewer evaluations wait
    /// in the queue than half the connected workers' slots, so that a worker
    /// finds the next point ready (as many points as fill the queue to the
    /// slots' worth, or `batch`).
    pub fn wants_plan(&self) -> Option<usize> {
        if self.planning || self.stop_reason.is_some() {
            return None;
        }
        let left = u64::from(self.spec.budget).saturating_sub(self.points.len() as u64) as usize;
        if left == 0 {
            return None;
        }
        let reps = self.spec.replicates.max(1) as usize;
        let q = if self.reproducible {
            if !self.pending.is_empty() {
                return None;
            }
            self.spec.batch.unwrap_or(DEFAULT_REPRODUCIBLE_BATCH) as usize
        } else {
            let learned = self
                .points
                .values()
                .filter(|p| !p.replicates.is_empty())
                .count();
            let initial = (self.spec.initial as usize).min(self.points.len());
            let enough = (initial / 2)
                .max(crate::fitter::MIN_POINTS)
                .min(initial.max(1));
            if learned < enough && !self.pending.is_empty() {
                return None;
            }
            let slots = self.slots().max(1);
            // Plan when less than half the slots' worth waits, for as many
            // points as fill the queue to the slots' worth: large batches
            // are cheap to plan, small ones cost a search per point.
            if 2 * self.queue.len() >= slots {
                return None;
            }
            let shortfall = (slots - self.queue.len()).div_ceil(reps);
            self.spec.batch.map_or(shortfall, |b| b as usize)
        };
        Some(q.clamp(1, left))
    }

    /// Whether a planning round is under way.
    pub fn is_planning(&self) -> bool {
        self.planning
    }

    /// Marks a plan as under way (or finished).
    pub fn set_planning(&mut self, on: bool) {
        self.planning = on;
    }

    /// Results per point, in the order points were created.
    pub fn point_results(&self) -> Vec<PointResults> {
        self.point_ids_in_order
            .iter()
            .filter_map(|id| self.points.get(id).cloned())
            .collect()
    }

    /// Values (natural units) of points that still have evaluations to run.
    pub fn unfinished_points(&self) -> Vec<Vec<f64>> {
        let ids: HashSet<i64> = self.pending.values().map(|p| p.point_id).collect();
        ids.iter()
            .filter_map(|id| self.points.get(id).map(|p| p.values.clone()))
            .collect()
    }

    /// The best point so far, by the mean loss of its finished replicates.
    pub fn best(&self) -> Option<BestPoint> {
        best_point(&self.spec, self.points.values())
    }

    /// Where runs fail (see [`crate::status::failure_region`]), cached by
    /// the number of failed evaluations.
    fn failure_region(&self) -> Option<String> {
        if self.failed == 0 {
            return None;
        }
        let mut cache = self
            .failure_region
            .lock()
            .unwrap_or_else(|p| p.into_inner());
        if cache.0 != self.failed {
            *cache = (
                self.failed,
                crate::status::failure_region(&self.spec, &self.point_results()),
            );
        }
        cache.1.clone()
    }

    /// A snapshot for `status`.
    pub fn status(&self, now: Instant) -> SweepStatus {
        let running = self.pending.values().filter(|p| p.lease.is_some()).count() as u64;
        let queued = self.pending.len() as u64 - running;
        let budget_evals = u64::from(self.spec.budget) * u64::from(self.spec.replicates.max(1));
        let mut workers: Vec<WorkerStatus> = self
            .workers
            .iter()
            .map(|(id, w)| {
                let minutes = now.duration_since(w.joined).as_secs_f64() / 60.0;
                WorkerStatus {
                    worker_id: id.clone(),
                    name: w.info.name.clone(),
                    host: w.info.host.clone(),
                    slots: w.info.slots,
                    running: w.running.len() as u32,
                    last_contact_unix_ms: w.last_contact_unix_ms,
                    completed: w.completed,
                    runs_per_minute: if minutes > 0.0 {
                        w.completed as f64 / minutes
                    } else {
                        0.0
                    },
                    connected: !w.left && now.duration_since(w.last_contact) < self.times.lease * 2,
                }
            })
            .collect();
        workers.sort_by(|a, b| a.name.cmp(&b.name).then(a.worker_id.cmp(&b.worker_id)));
        let mut failures: Vec<(String, u64)> =
            self.failures.iter().map(|(k, v)| (k.clone(), *v)).collect();
        failures.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
        SweepStatus {
            sweep: self.spec.name.clone(),
            done: self.done,
            failed: self.failed,
            running,
            queued: queued
                + budget_evals.saturating_sub(self.done + self.failed + self.pending.len() as u64),
            budget: u64::from(self.spec.budget),
            points: self.points.len() as u64,
            replicates: self.spec.replicates,
            evaluations_total: budget_evals,
            workers,
            failures,
            best: self.best(),
            finished: self.finished(),
            objective_label: self.spec.objective_label(),
            failure_region: self.failure_region(),
            stop_reason: self.stop_reason.clone(),
            reproducible: self.reproducible,
            waves: self.waves.clone(),
        }
    }
}

/// The evaluation id a lease id names (its first dot-separated part).
pub fn lease_evaluation(lease_id: &str) -> Option<i64> {
    lease_id.split('.').next()?.parse().ok()
}

/// The status of a sweep from its stored points and evaluations alone (no
/// live workers or leases: what is running counts as queued), counted by
/// the same rules as a running coordinator.
pub fn status_from_records(
    spec: std::sync::Arc<Spec>,
    points: &[PointRecord],
    evaluations: &[EvaluationRecord],
    notes: &FileNotes,
) -> SweepStatus {
    let mut s = Scheduler::new(
        spec,
        LeaseTimes::default(),
        String::new(),
        points,
        evaluations,
    );
    s.set_reproducible(notes.reproducible);
    s.set_waves(notes.waves.clone());
    if let Some(r) = &notes.stop_reason {
        s.stop(r.clone());
    }
    s.status(Instant::now())
}

/// What the coordinator recorded about a sweep beyond its points and
/// evaluations (see `Engine`): read by the file-based status.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct FileNotes {
    /// Batches wait for every earlier result.
    pub reproducible: bool,
    /// Why proposing stopped before the budget.
    pub stop_reason: Option<String>,
    /// Calibration waves so far (note `calibration_waves`, a JSON list).
    pub waves: Vec<crate::status::Wave>,
}

impl FileNotes {
    /// Reads the notes from a store.
    pub fn read(store: &crate::store::Store) -> Result<FileNotes, crate::store::StoreError> {
        Ok(FileNotes {
            reproducible: store.note("reproducible")?.as_deref() == Some("true"),
            stop_reason: store.note("stop_reason")?,
            waves: store
                .note(WAVES_NOTE)?
                .and_then(|t| serde_json::from_str(&t).ok())
                .unwrap_or_default(),
        })
    }
}

/// The note holding the calibration waves (a JSON list of
/// [`crate::status::Wave`]).
pub const WAVES_NOTE: &str = "calibration_waves";
