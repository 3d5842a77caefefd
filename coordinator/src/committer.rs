//! The store thread: the only writer of the SQLite file while a coordinator
//! runs, with group commit.
//!
//! Reports from many workers arrive concurrently; the thread takes every
//! request waiting in its channel and commits all their results in one
//! transaction (one fsync), then answers each caller. A caller acknowledges
//! results to its worker only after that answer, so an acknowledged result
//! is always durable (invariant 1).

use crate::store::{
    CommitResult, EvaluationRecord, NewPoint, Outcome, PointRecord, Store, StoreError,
};
use tokio::sync::{mpsc, oneshot};
use tokio_util::sync::CancellationToken;

/// Most requests folded into one transaction.
const MAX_GROUP: usize = 256;

/// Reply channel of a commit request.
type CommitReply = oneshot::Sender<Result<Vec<CommitResult>, String>>;
/// Reply channel of an insert request: the new points and their evaluations.
type InsertReply = oneshot::Sender<Result<(Vec<PointRecord>, Vec<EvaluationRecord>), String>>;

/// A request to the store thread.
enum Request {
    Commit {
        outcomes: Vec<Outcome>,
        reply: CommitReply,
    },
    InsertPoints {
        points: Vec<NewPoint>,
        reply: InsertReply,
    },
    Call {
        job: Box<dyn FnOnce(&mut Store) + Send>,
    },
    /// Close the database (SQLite then checkpoints and removes the `-wal`
    /// and `-shm` files) and end the thread.
    Close { reply: oneshot::Sender<()> },
}

/// Handle to the store thread; cheap to clone.
#[derive(Clone)]
pub struct StoreHandle {
    /// Requests to the store thread. The thread ends when every handle is
    /// dropped (the channel closes), after finishing what it holds.
    tx: mpsc::Sender<Request>,
    /// Cancelled when a write finds that another coordinator has taken the
    /// database: nothing more may be written or handed out.
    lost: CancellationToken,
}

impl std::fmt::Debug for StoreHandle {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("StoreHandle")
    }
}

/// The store thread has stopped (it failed or the coordinator is shutting down).
#[derive(Debug, thiserror::Error)]
pub enum CommitError {
    /// The store thread is gone.
    #[error("the store thread has stopped")]
    Stopped,
    /// SQLite refused the write.
    #[error("store: {0}")]
    Store(String),
}

impl StoreHandle {
    /// Starts the store thread, which takes ownership of `store`. The
    /// returned join handle ends when all handles are dropped.
    pub fn spawn(
        store: Store,
        sweep_id: i64,
        replicates: u32,
        sweep_seed: u64,
    ) -> std::io::Result<(StoreHandle, std::thread::JoinHandle<()>)> {
        let (tx, rx) = mpsc::channel(1024);
        let lost = CancellationToken::new();
        let thread_lost = lost.clone();
        let join = std::thread::Builder::new()
            .name("tessera-store".into())
            .spawn(move || {
                store_thread(store, rx, sweep_id, replicates, sweep_seed, thread_lost)
            })?;
        Ok((StoreHandle { tx, lost }, join))
    }

    /// Cancelled once a write found the database taken by another coordinator.
    pub fn lost(&self) -> &CancellationToken {
        &self.lost
    }

    /// Commits results; returns after they are durable.
    pub async fn commit(&self, outcomes: Vec<Outcome>) -> Result<Vec<CommitResult>, CommitError> {
        let (reply, rx) = oneshot::channel();
        self.tx
            .send(Request::Commit { outcomes, reply })
            .await
            .map_err(|_| CommitError::Stopped)?;
        rx.await
            .map_err(|_| CommitError::Stopped)?
            .map_err(CommitError::Store)
    }

    /// Stores new points (and their queued evaluations).
    pub async fn insert_points(
        &self,
        points: Vec<NewPoint>,
    ) -> Result<(Vec<PointRecord>, Vec<EvaluationRecord>), CommitError> {
        let (reply, rx) = oneshot::channel();
        self.tx
            .send(Request::InsertPoints { points, reply })
            .await
            .map_err(|_| CommitError::Stopped)?;
        rx.await
            .map_err(|_| CommitError::Stopped)?
            .map_err(CommitError::Store)
    }

    /// Closes the database after every request sent before this one and
    /// ends the store thread; later requests fail with [`CommitError::Stopped`].
    pub async fn close(&self) {
        let (reply, rx) = oneshot::channel();
        if self.tx.send(Request::Close { reply }).await.is_ok() {
            let _ = rx.await;
        }
    }

    /// Runs `f` on the store thread and returns its answer.
    pub async fn call<T: Send + 'static>(
        &self,
        f: impl FnOnce(&mut Store) -> T + Send + 'static,
    ) -> Result<T, CommitError> {
        let (reply, rx) = oneshot::channel();
        let job = Box::new(move |s: &mut Store| {
            let _ = reply.send(f(s));
        });
        self.tx
            .send(Request::Call { job })
            .await
            .map_err(|_| CommitError::Stopped)?;
        rx.await.map_err(|_| CommitError::Stopped)
    }
}

fn store_thread(
    mut store: Store,
    mut rx: mpsc::Receiver<Request>,
    sweep_id: i64,
    replicates: u32,
    sweep_seed: u64,
    lost: CancellationToken,
) {
    let mut closed: Option<oneshot::Sender<()>> = None;
    'serve: while let Some(first) = rx.blocking_recv() {
        let mut batch = vec![first];
        while batch.len() < MAX_GROUP {
            match rx.try_recv() {
                Ok(r) => batch.push(r),
                Err(_) => break,
            }
        }
        // Requests are served in the order they were sent; consecutive
        // commits share one transaction, committed before any later request
        // runs (so a `call` sent after a commit sees it).
        let mut commits: Vec<(Vec<Outcome>, CommitReply)> = Vec::new();
        for r in batch {
            match r {
                Request::Commit { outcomes, reply } => commits.push((outcomes, reply)),
                Request::InsertPoints { points, reply } => {
                    commit_group(&mut store, std::mem::take(&mut commits), &lost);
                    let res = insert(&mut store, sweep_id, &points, replicates, sweep_seed);
                    if matches!(res, Err(StoreError::Lost { .. })) {
                        lost.cancel();
                    }
                    let _ = reply.send(res.map_err(|e| e.to_string()));
                }
                Request::Call { job } => {
                    commit_group(&mut store, std::mem::take(&mut commits), &lost);
                    job(&mut store);
                }
                Request::Close { reply } => {
                    commit_group(&mut store, std::mem::take(&mut commits), &lost);
                    closed = Some(reply);
                    break 'serve;
                }
            }
        }
        commit_group(&mut store, commits, &lost);
    }
    // Requests still queued after a close are dropped: their callers see
    // the thread stopped.
    drop(store);
    if let Some(reply) = closed {
        let _ = reply.send(());
    }
    tracing::debug!("store thread finished");
}

/// Commits the outcomes of several requests in one transaction and answers each.
fn commit_group(
    store: &mut Store,
    commits: Vec<(Vec<Outcome>, CommitReply)>,
    lost: &CancellationToken,
) {
    if commits.is_empty() {
        return;
    }
    let all: Vec<Outcome> = commits
        .iter()
        .flat_map(|(o, _)| o.iter().cloned())
        .collect();
    match store.commit_outcomes(&all) {
        Ok(results) => {
            let mut it = results.into_iter();
            for (outcomes, reply) in commits {
                let part: Vec<CommitResult> = it.by_ref().take(outcomes.len()).collect();
                let _ = reply.send(Ok(part));
            }
        }
        Err(e) => {
            if matches!(e, StoreError::Lost { .. }) {
                lost.cancel();
            }
            tracing::error!(error = %e, "committing results failed; none acknowledged");
            let msg = e.to_string();
            for (_, reply) in commits {
                let _ = reply.send(Err(msg.clone()));
            }
        }
    }
}

fn insert(
    store: &mut Store,
    sweep_id: i64,
    points: &[NewPoint],
    replicates: u32,
    sweep_seed: u64,
) -> Result<(Vec<PointRecord>, Vec<EvaluationRecord>), StoreError> {
    let recs = store.insert_points(sweep_id, points, replicates, sweep_seed)?;
    let ids: std::collections::HashSet<i64> = recs.iter().map(|p| p.id).collect();
    let evals = store
        .evaluations(sweep_id)?
        .into_iter()
        .filter(|e| ids.contains(&e.point_id))
        .collect();
    Ok((recs, evals))
}
