//! The engine: one running sweep, tying the scheduler, the store thread and
//! the planner together. The gRPC service ([`crate::service`]) is a thin
//! layer over it, and `tessera run` uses the same engine through the same
//! gRPC service.

use crate::committer::{CommitError, StoreHandle};
use crate::fitter::{self, MetricFit};
use crate::planner::Planner;
use crate::scheduler::{
    unix_ms, Decided, Grant, JoinInfo, LeaseContext, LeaseTimes, Report, ReportOutcome,
    ScheduleError, Scheduler,
};
use crate::spec::{self, Spec};
use crate::status::SweepStatus;
use crate::store::{NewPoint, Outcome, OutcomeResult, PointOrigin, Store, StoreError};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};
use tokio::sync::Notify;
use tokio_util::sync::CancellationToken;

/// Why a sweep could not be opened.
#[derive(Debug, thiserror::Error)]
pub enum OpenError {
    /// The sweep file is invalid.
    #[error(transparent)]
    Spec(#[from] spec::SpecErrors),
    /// The database could not be opened or written.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The sweep file changes a key that the stored results depend on.
    #[error(
        "{file} changes `{key}` of the sweep stored in {db}, but {why}.\n\
         Keys that only steer what comes next (budget, strategy, batch, stop, retries, timeout, objective, targets) may change.\n\
         To start a new sweep from {file}, give another --db file; to continue the stored sweep unchanged, add --force."
    )]
    Incompatible {
        /// Database path.
        db: String,
        /// Sweep file given now.
        file: String,
        /// The key that changed.
        key: String,
        /// Why that matters.
        why: String,
    },
    /// The stored spec no longer parses (written by another version).
    #[error(
        "the sweep file stored in {db} is no longer valid for this version of tessera:\n{errors}"
    )]
    StoredSpec {
        /// Database path.
        db: String,
        /// The errors.
        errors: spec::SpecErrors,
    },
    /// The store thread could not start.
    #[error("cannot start the store thread: {0}")]
    Thread(#[from] std::io::Error),
}

/// A failure while serving a request.
#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    /// The scheduler refused.
    #[error(transparent)]
    Schedule(#[from] ScheduleError),
    /// The store failed.
    #[error(transparent)]
    Commit(#[from] CommitError),
}

/// How a sweep is opened.
#[derive(Clone, Debug)]
pub struct OpenOptions {
    /// The sweep database.
    pub db: PathBuf,
    /// The sweep file's text and its name (for messages).
    pub spec_text: String,
    /// File name of the sweep file.
    pub spec_file: String,
    /// Resume even if the stored sweep file differs from `spec_text`.
    pub force: bool,
    /// Lease timing.
    pub times: LeaseTimes,
    /// Whether batches wait for every earlier result when the sweep file
    /// does not say (`reproducible`).
    pub reproducible_default: bool,
}

/// A running sweep.
pub struct Engine {
    /// Live state. Locked briefly by each request; never held across an await.
    sched: Mutex<Scheduler>,
    store: StoreHandle,
    /// The sweep; it never changes while the engine runs.
    spec: Arc<Spec>,
    /// What every lease carries besides its grant.
    lease_context: LeaseContext,
    /// Wakes the planner task when results arrive or the queue drains.
    plan_wake: Notify,
    /// Set on shutdown: no new leases are handed out.
    draining: AtomicBool,
    db: PathBuf,
    spec_text: String,
    sweep_id: i64,
    /// The latest surrogate of every metric, for `Predict`; replaced whole by
    /// the refit task.
    fits: Mutex<Vec<MetricFit>>,
}

impl std::fmt::Debug for Engine {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Engine").field("db", &self.db).finish()
    }
}

/// This machine's host name (for the database's holder row and worker names).
pub fn host_name() -> String {
    std::fs::read_to_string("/etc/hostname")
        .ok()
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "localhost".to_string())
}

/// Locks a mutex, recovering the data if a thread panicked while holding it
/// (the scheduler's state stays consistent between calls).
fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|p| p.into_inner())
}

impl Engine {
    /// Opens (or creates) the sweep in `opts.db` and rebuilds its state.
    /// A new sweep gets its initial Latin-hypercube design stored before any
    /// lease is handed out.
    pub fn open(opts: OpenOptions) -> Result<Arc<Engine>, OpenError> {
        let given = spec::parse(&opts.spec_text, &opts.spec_file)?;
        let mut store = Store::open(&opts.db)?;
        let nonce = format!("{:x}", unix_ms() ^ (u64::from(std::process::id()) << 40));
        store.acquire(&nonce, &host_name(), std::process::id())?;
        let db_name = opts.db.display().to_string();
        let (sweep, spec_text, spec) = match store.sweep()? {
            Some(sw) => {
                let stored = spec::parse(&sw.spec_text, &sw.spec_file).map_err(|errors| {
                    OpenError::StoredSpec {
                        db: db_name.clone(),
                        errors,
                    }
                })?;
                // Edits that change nothing (comments, spacing, key order)
                // are not a different sweep; edits that only steer what
                // happens next (a raised budget, another strategy) continue
                // it with the new file; others are refused.
                let same = sw.spec_text == opts.spec_text || stored == given;
                if same {
                    let text = sw.spec_text.clone();
                    (sw, text, stored)
                } else if opts.force {
                    tracing::warn!(db = %db_name, "the sweep file differs from the stored one; resuming the stored sweep (--force)");
                    let text = sw.spec_text.clone();
                    (sw, text, stored)
                } else {
                    given
                        .continues(&stored)
                        .map_err(|inc| OpenError::Incompatible {
                            db: db_name.clone(),
                            file: opts.spec_file.clone(),
                            key: inc.key,
                            why: inc.why,
                        })?;
                    store.update_spec_text(sw.id, &opts.spec_text, &opts.spec_file)?;
                    tracing::info!(db = %db_name, budget = given.budget, "continuing the stored sweep with the edited sweep file");
                    (sw, opts.spec_text.clone(), given)
                }
            }
            None => {
                let sw = store.create_sweep(
                    &given.name,
                    &opts.spec_text,
                    &opts.spec_file,
                    given.seed,
                )?;
                (sw, opts.spec_text.clone(), given)
            }
        };
        if store.points(sweep.id)?.is_empty() {
            let design: Vec<NewPoint> = spec
                .initial_design()
                .into_iter()
                .map(|values| NewPoint {
                    values,
                    origin: PointOrigin::Design,
                    batch: 0,
                    proposal: None,
                })
                .collect();
            store.insert_points(sweep.id, &design, spec.replicates.max(1), spec.seed)?;
            tracing::info!(points = design.len(), "stored the initial design");
        }
        let points = store.points(sweep.id)?;
        let evaluations = store.evaluations(sweep.id)?;
        let fits = match fitter::stale_jobs(&store, sweep.id, &spec) {
            Ok(plan) => {
                let mut f = plan.current;
                f.extend(plan.outdated);
                f
            }
            Err(e) => {
                tracing::warn!(error = %e, "stored surrogates cannot be read; they will be refitted");
                Vec::new()
            }
        };
        let lease_context = LeaseContext {
            model: spec.model.name.clone(),
            fixed_json: serde_json::to_string(&spec.model.fixed)
                .unwrap_or_else(|_| "{}".to_string()),
            timeout_ms: spec.model.timeout.as_millis() as u64,
            expected_metrics: spec.metrics_needed(),
        };
        let replicates = spec.replicates.max(1);
        let seed = spec.seed;
        let spec = Arc::new(spec);
        let mut sched = Scheduler::new(spec.clone(), opts.times, nonce, &points, &evaluations);
        let reproducible = spec.reproducible.unwrap_or(opts.reproducible_default);
        sched.set_reproducible(reproducible);
        sched.set_waves(crate::scheduler::FileNotes::read(&store)?.waves);
        store.set_note(
            "reproducible",
            Some(if reproducible { "true" } else { "false" }),
        )?;
        // A sweep stopped early stays stopped unless its file was edited
        // (a raised budget or another stop rule continues it).
        match store.note("stop_reason")? {
            Some(r) if spec_text == opts.spec_text || opts.force => sched.stop(r),
            Some(_) => store.set_note("stop_reason", None)?,
            None => {}
        }
        let (store, _join) = StoreHandle::spawn(store, sweep.id, replicates, seed)?;
        Ok(Arc::new(Engine {
            sched: Mutex::new(sched),
            store,
            spec,
            lease_context,
            plan_wake: Notify::new(),
            draining: AtomicBool::new(false),
            db: opts.db,
            spec_text,
            sweep_id: sweep.id,
            fits: Mutex::new(fits),
        }))
    }

    /// The sweep being run.
    pub fn spec(&self) -> &Arc<Spec> {
        &self.spec
    }

    /// The sweep file text stored in the database.
    pub fn spec_text(&self) -> &str {
        &self.spec_text
    }

    /// The database path.
    pub fn db(&self) -> &Path {
        &self.db
    }

    /// Lease timing.
    pub fn times(&self) -> LeaseTimes {
        lock(&self.sched).times()
    }

    /// What every lease carries besides its grant.
    pub fn lease_context(&self) -> &LeaseContext {
        &self.lease_context
    }

    /// The store thread, for queries that must see committed data.
    pub fn store(&self) -> &StoreHandle {
        &self.store
    }

    /// Registers a worker.
    pub fn join(&self, info: JoinInfo) -> Result<String, EngineError> {
        Ok(lock(&self.sched).join(info, Instant::now())?)
    }

    /// Leases up to `free` evaluations; `finished` is true when the sweep is done.
    pub fn request_work(
        &self,
        worker_id: &str,
        free: u32,
    ) -> Result<(Vec<Grant>, bool), EngineError> {
        let mut s = lock(&self.sched);
        if self.draining.load(Ordering::SeqCst) || self.store.lost().is_cancelled() {
            s.renew(worker_id, &[], Instant::now())?;
            return Ok((Vec::new(), false));
        }
        let grants = s.request_work(worker_id, free, Instant::now())?;
        let finished = s.finished();
        if grants.len() < free as usize && s.wants_plan().is_some() {
            self.plan_wake.notify_one();
        }
        Ok((grants, finished))
    }

    /// Whether new points are being planned, or will be as soon as the
    /// planner task wakes or the running points of a reproducible batch
    /// report: a worker offered nothing should ask again soon.
    pub fn plan_under_way(&self) -> bool {
        let s = lock(&self.sched);
        s.is_planning() || s.wants_plan().is_some() || s.plan_awaits_results()
    }

    /// Renews leases; returns those the worker lost.
    pub fn renew(&self, worker_id: &str, lease_ids: &[String]) -> Result<Vec<String>, EngineError> {
        Ok(lock(&self.sched).renew(worker_id, lease_ids, Instant::now())?)
    }

    /// Hands leases back.
    pub fn hand_back(&self, worker_id: &str, lease_ids: &[String]) -> Result<(), EngineError> {
        Ok(lock(&self.sched).hand_back(worker_id, lease_ids, Instant::now())?)
    }

    /// A worker leaves.
    pub fn leave(&self, worker_id: &str) -> Result<(), EngineError> {
        Ok(lock(&self.sched).leave(worker_id, Instant::now())?)
    }

    /// Commits results and returns the evaluation ids that are now durable.
    ///
    /// Reports from a worker id the coordinator does not know (it joined
    /// before a restart) are accepted too: results are keyed by evaluation,
    /// and the first result for an evaluation wins.
    pub async fn report(
        &self,
        worker_id: &str,
        worker_name: &str,
        reports: Vec<Report>,
    ) -> Result<Vec<i64>, EngineError> {
        let decided: Vec<Decided> = lock(&self.sched).decide(reports);
        let outcomes: Vec<Outcome> = decided
            .iter()
            .map(|d| Outcome {
                evaluation_id: d.report.evaluation_id,
                worker: worker_name.to_string(),
                started_unix_ms: d.report.started_unix_ms,
                ended_unix_ms: d.report.ended_unix_ms,
                result: match &d.report.outcome {
                    ReportOutcome::Metrics(m) => OutcomeResult::Done(m.clone()),
                    ReportOutcome::Failure {
                        kind,
                        reason,
                        stderr_tail,
                    } => OutcomeResult::Failed {
                        kind: kind.clone(),
                        reason: reason.clone(),
                        stderr_tail: stderr_tail.clone(),
                        final_attempt: d.final_attempt,
                    },
                },
            })
            .collect();
        let committed = self.store.commit(outcomes).await?;
        let acked =
            lock(&self.sched).apply_committed(worker_id, &decided, &committed, Instant::now());
        self.plan_wake.notify_one();
        Ok(acked)
    }

    /// A status snapshot.
    pub fn status(&self) -> SweepStatus {
        lock(&self.sched).status(Instant::now())
    }

    /// True when every evaluation of the budget is final.
    pub fn finished(&self) -> bool {
        lock(&self.sched).finished()
    }

    /// Stops handing out leases (shutdown has begun).
    pub fn drain(&self) {
        self.draining.store(true, Ordering::SeqCst);
    }

    /// Runs the planner and lease-expiry loop until `stop` is cancelled.
    pub async fn run_planner(self: Arc<Self>, stop: CancellationToken) {
        let mut tick = tokio::time::interval(Duration::from_millis(200));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        // The planner's memory (warm starts); owned by this task alone.
        let mut planner = Planner::new();
        planner.continue_waves(self.status().waves.len() as u32);
        let mut small_rounds = 0u32;
        let mut pace = PlanningPace::default();
        loop {
            tokio::select! {
                _ = stop.cancelled() => break,
                _ = tick.tick() => {}
                _ = self.plan_wake.notified() => {}
            }
            let job = {
                let mut s = lock(&self.sched);
                s.expire(Instant::now());
                match s.wants_plan() {
                    Some(q) if !self.draining.load(Ordering::SeqCst) => {
                        s.set_planning(true);
                        Some((s.point_results(), s.unfinished_points(), q, s.next_batch()))
                    }
                    _ => None,
                }
            };
            let Some((results, unfinished, q, batch)) = job else {
                continue;
            };
            // Each round's search is fixed by the sweep seed and its batch number.
            let seed = crate::seed::replicate_seed(self.spec.seed, u64::from(batch), u32::MAX);
            let spec = self.spec.clone();
            let started = Instant::now();
            let planned = tokio::task::spawn_blocking(move || {
                let plan = planner.plan(&spec, &results, &unfinished, q, batch, seed);
                (planner, plan)
            })
            .await;
            let plan = match planned {
                Ok((p, plan)) => {
                    planner = p;
                    plan
                }
                Err(e) => {
                    tracing::error!(error = %e, "planner task failed");
                    planner = Planner::new();
                    lock(&self.sched).set_planning(false);
                    continue;
                }
            };
            let n = plan.points.len();
            let ms = started.elapsed().as_millis() as u64;
            match self.store.insert_points(plan.points).await {
                Ok((points, evals)) => {
                    let mut s = lock(&self.sched);
                    s.add_points(&points);
                    for e in &evals {
                        s.add_evaluation(e);
                    }
                    s.set_planning(false);
                    tracing::info!(points = n, batch, ms, "proposed new points");
                    if let Some(text) = pace.add(ms, n, s.mean_run_ms(), s.slots()) {
                        tracing::warn!("{text}");
                    }
                }
                Err(e) => {
                    tracing::error!(error = %e, "storing proposed points failed");
                    lock(&self.sched).set_planning(false);
                    continue;
                }
            }
            if let Some(wave) = plan.wave.clone() {
                tracing::info!(
                    wave = wave.wave,
                    fraction = wave.fraction,
                    "calibration wave: share of the box not ruled out"
                );
                let all = {
                    let mut s = lock(&self.sched);
                    s.push_wave(wave);
                    s.status(Instant::now()).waves
                };
                if let Ok(text) = serde_json::to_string(&all) {
                    let _ = self
                        .store
                        .call(move |st| st.set_note(crate::scheduler::WAVES_NOTE, Some(&text)))
                        .await;
                }
            }
            // The objective's surrogate that chose the points is the one served.
            if let Some(fit) = plan.objective_fit {
                let sweep_id = self.sweep_id;
                let to_save = vec![fit.clone()];
                if let Ok(Err(e)) = self
                    .store
                    .call(move |st| fitter::save_fits(st, sweep_id, &to_save))
                    .await
                {
                    tracing::warn!(error = %e, "cannot store the objective's surrogate");
                }
                if let Ok(stored) = fitter::as_stored(&fit) {
                    let mut fits = lock(&self.fits);
                    fits.retain(|f| f.metric != stored.metric);
                    fits.push(stored);
                    fits.sort_by(|a, b| a.metric.cmp(&b.metric));
                }
            }
            // Stopping early: the largest expected improvement stayed small.
            if let (Some(rule), spec::Strategy::Improve, Some(best)) =
                (self.spec.stop, self.spec.strategy, plan.best_acquisition)
            {
                small_rounds = if best < rule.improvement_below {
                    small_rounds + 1
                } else {
                    0
                };
                if small_rounds >= rule.rounds {
                    let reason = format!(
                        "stopped early: the largest expected improvement stayed below {} for {} planning rounds",
                        tessera_models::text::exact(rule.improvement_below),
                        rule.rounds
                    );
                    tracing::info!("{reason}");
                    let note = reason.clone();
                    let _ = self
                        .store
                        .call(move |st| st.set_note("stop_reason", Some(&note)))
                        .await;
                    lock(&self.sched).stop(reason);
                }
            }
        }
    }

    /// The latest surrogate of every metric (may lag the newest results).
    pub fn fits(&self) -> Vec<MetricFit> {
        lock(&self.fits).clone()
    }

    /// Keeps the metric surrogates current until `stop` is cancelled: when
    /// new results have arrived, refits the stale metrics ([`Engine::refit_once`]).
    pub async fn run_refits(self: Arc<Self>, stop: CancellationToken, every: Duration) {
        let mut seen = u64::MAX;
        loop {
            tokio::select! {
                _ = stop.cancelled() => break,
                _ = tokio::time::sleep(every) => {}
            }
            let done = self.status().done;
            if done == seen || done == 0 {
                continue;
            }
            seen = done;
            tokio::select! {
                _ = stop.cancelled() => break,
                r = self.refit_once() => if r.is_err() { break },
            }
        }
    }

    /// Fits the metrics with new results on a blocking thread (never holding
    /// the scheduler; reads and writes go through the store thread), stores
    /// them and serves them to `Predict`. `Err` when the store thread is gone.
    pub async fn refit_once(&self) -> Result<(), CommitError> {
        let sweep_id = self.sweep_id;
        let plan_spec = self.spec.clone();
        let plan = match self
            .store
            .call(move |s| fitter::stale_jobs(s, sweep_id, &plan_spec))
            .await?
        {
            Ok(p) => p,
            Err(e) => {
                tracing::warn!(error = %e, "cannot read results for refitting");
                return Ok(());
            }
        };
        if plan.todo.is_empty() {
            return Ok(());
        }
        let todo = plan.todo.clone();
        let results: u32 = todo.iter().map(|j| j.n_results).max().unwrap_or(0);
        let fresh = match tokio::task::spawn_blocking(move || fitter::run_jobs(&todo)).await {
            Ok(f) => f,
            Err(e) => {
                tracing::error!(error = %e, "refit task failed");
                return Ok(());
            }
        };
        let to_save = fresh.clone();
        match self
            .store
            .call(move |s| fitter::save_fits(s, sweep_id, &to_save))
            .await?
        {
            Ok(()) => {}
            Err(e) => tracing::warn!(error = %e, "cannot store surrogates"),
        }
        let fresh: Vec<MetricFit> = fresh
            .iter()
            .filter_map(|f| fitter::as_stored(f).ok())
            .collect();
        let merged = fitter::merge(plan, &fresh);
        tracing::info!(metrics = merged.len(), results, "surrogates refitted");
        *lock(&self.fits) = merged;
        Ok(())
    }

    /// Cancelled when another coordinator has taken the database: this one
    /// must stop at once (it hands out nothing more and stores nothing more).
    pub fn lost(&self) -> &CancellationToken {
        self.store.lost()
    }

    /// Writes the holder's heartbeat every `HOLDER_BEAT` until `stop` is
    /// cancelled or the database is lost.
    pub async fn run_heartbeat(self: Arc<Self>, stop: CancellationToken) {
        let mut tick = tokio::time::interval(crate::store::HOLDER_BEAT);
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = stop.cancelled() => break,
                _ = tick.tick() => {}
            }
            match self.store.call(|s| s.beat()).await {
                Ok(Ok(())) => {}
                Ok(Err(e @ StoreError::Lost { .. })) => {
                    tracing::error!(error = %e, "stopping");
                    self.drain();
                    self.store.lost().cancel();
                    break;
                }
                Ok(Err(e)) => {
                    tracing::warn!(error = %e, "cannot write the heartbeat; trying again")
                }
                Err(_) => break,
            }
        }
    }

    /// Gives the database up at a clean shutdown, after everything is
    /// written, so the next coordinator may start at once.
    pub async fn release(&self) {
        match self.store.call(|s| s.release()).await {
            Ok(Ok(())) => {}
            Ok(Err(e)) => {
                tracing::warn!(error = %e, "cannot release the database; the next coordinator waits for the heartbeat to go stale")
            }
            Err(_) => {}
        }
    }

    /// Closes the database at the end of a shutdown (after [`Engine::flush`]
    /// and [`Engine::release`]): SQLite then folds its write-ahead log into
    /// the file and removes the `-wal` and `-shm` files.
    pub async fn close(&self) {
        self.store.close().await;
    }

    /// Waits until the store thread has finished every request sent before
    /// this call (used at shutdown: nothing is left half-written).
    pub async fn flush(&self) {
        let _ = self.store.call(|_| ()).await;
    }
}

/// Planning rounds before the planning time is compared with the runs'.
const PACE_ROUNDS: u32 = 8;

/// Tracks whether planning outlasts the runs it plans, to say so once.
#[derive(Default)]
struct PlanningPace {
    rounds: u32,
    planning_ms: u64,
    points: u64,
    warned: bool,
}

impl PlanningPace {
    /// Adds a round; after [`PACE_ROUNDS`] rounds, returns the warning (once)
    /// if a round's planning took longer on average than running its points
    /// on the connected slots.
    fn add(&mut self, ms: u64, points: usize, run_ms: Option<f64>, slots: usize) -> Option<String> {
        self.rounds += 1;
        self.planning_ms += ms;
        self.points += points as u64;
        let run_ms = run_ms?;
        if self.warned || self.rounds < PACE_ROUNDS || slots == 0 {
            return None;
        }
        let plan = self.planning_ms as f64 / f64::from(self.rounds);
        let per_round = self.points as f64 / f64::from(self.rounds);
        let run = run_ms * (per_round / slots as f64).ceil().max(1.0);
        if plan <= run {
            return None;
        }
        self.warned = true;
        Some(format!(
            "planning takes longer than the runs it plans: {plan:.0} ms of planning per round against about {run:.0} ms to run the round's points on {slots} slots (over the {} rounds so far); most of this sweep's time goes to the surrogate, not the model. For a model this fast, a plain Latin hypercube of the whole budget (`initial` = `budget`) or larger batches (`batch`) finish sooner.",
            self.rounds
        ))
    }
}

#[cfg(test)]
mod pace_tests {
    use super::PlanningPace;

    /// 4 points a round on 2 slots with 100 ms runs: a round's runs take
    /// 2 x 100 ms (arithmetic). Planning of 150 ms a round stays quiet;
    /// 250 ms warns once, after the eighth round, and not again.
    #[test]
    fn warns_once_when_planning_outlasts_the_runs() {
        let mut quiet = PlanningPace::default();
        for _ in 0..20 {
            assert!(quiet.add(150, 4, Some(100.0), 2).is_none());
        }
        let mut slow = PlanningPace::default();
        let said: Vec<usize> = (0..20)
            .filter_map(|i| slow.add(250, 4, Some(100.0), 2).map(|_| i))
            .collect();
        assert_eq!(said, vec![7], "once, at the eighth round");
        // No run timed yet: nothing to compare with.
        let mut none = PlanningPace::default();
        for _ in 0..10 {
            assert!(none.add(1000, 4, None, 2).is_none());
        }
    }
}
