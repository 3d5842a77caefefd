//! A whole sweep in one process: the coordinator on a loopback port and
//! in-process workers that reach it over gRPC, exactly as remote workers do.

use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use tessera_coordinator::engine::Engine;
use tessera_coordinator::server::{self, ServeError, ServeOptions};
use tessera_coordinator::service::CoordinatorService;
use tessera_proto::channel::Dial;
use tessera_worker::runner::Runner;
use tessera_worker::session::{self, WorkerError, WorkerOptions, WorkerSummary};
use tessera_worker::spool::Spool;
use tokio::task::{JoinError, JoinHandle, JoinSet};
use tokio_util::sync::CancellationToken;

/// How many in-process workers, and what they run.
#[derive(Clone)]
pub struct ClusterOptions {
    /// In-process workers.
    pub workers: u32,
    /// Parallel runs per worker.
    pub slots_per_worker: u32,
    /// What the workers run.
    pub runner: Arc<dyn Runner>,
    /// How the coordinator serves (no token or TLS is needed on loopback).
    pub serve: ServeOptions,
    /// Name prefix of the workers (`local-1`, `local-2`, ...).
    pub name: String,
    /// Host name the workers report.
    pub host: String,
    /// How long running work may take to finish when the cluster stops.
    pub grace: Duration,
}

impl std::fmt::Debug for ClusterOptions {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ClusterOptions")
            .field("workers", &self.workers)
            .field("slots_per_worker", &self.slots_per_worker)
            .finish()
    }
}

/// Why the cluster stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum ClusterError {
    /// The loopback port could not be opened.
    #[error("cannot open a loopback port: {0}")]
    Bind(#[from] std::io::Error),
    /// The coordinator stopped with an error.
    #[error(transparent)]
    Serve(#[from] ServeError),
    /// The coordinator task panicked.
    #[error("the coordinator task failed: {0}")]
    Task(#[from] JoinError),
}

/// A coordinator and its in-process workers.
pub struct LocalCluster {
    engine: Arc<Engine>,
    addr: SocketAddr,
    /// The coordinator; ends when `stop_server` is cancelled (after the workers).
    server: JoinHandle<Result<(), ServeError>>,
    /// The workers; each ends when the sweep is finished or `stop_workers` is cancelled.
    workers: JoinSet<Result<WorkerSummary, WorkerError>>,
    stop_server: CancellationToken,
    stop_workers: CancellationToken,
}

impl std::fmt::Debug for LocalCluster {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("LocalCluster")
            .field("addr", &self.addr)
            .field("workers", &self.workers.len())
            .finish()
    }
}

impl LocalCluster {
    /// Starts serving `engine` on a loopback port and starts the workers.
    pub async fn start(engine: Arc<Engine>, opts: ClusterOptions) -> Result<Self, ClusterError> {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await?;
        let addr = listener.local_addr()?;
        let stop_server = CancellationToken::new();
        let stop_workers = CancellationToken::new();
        let server_stop = stop_server.clone();
        let server = tokio::spawn(server::serve(
            engine.clone(),
            CoordinatorService::new(engine.clone()),
            listener,
            opts.serve.clone(),
            async move { server_stop.cancelled().await },
        ));
        let mut workers = JoinSet::new();
        for i in 0..opts.workers {
            let wopts = WorkerOptions {
                dial: Dial {
                    url: format!("http://{addr}"),
                    token: opts.serve.token.clone(),
                    ca_pem: None,
                },
                name: format!("{}-{}", opts.name, i + 1),
                host: opts.host.clone(),
                slots: opts.slots_per_worker.max(1),
                spool: Spool::new(None),
                grace: opts.grace,
                exit_when_finished: true,
                idle_exit: None,
                max_backoff: Duration::from_secs(2),
            };
            let stop = stop_workers.clone();
            let runner = opts.runner.clone();
            workers.spawn(async move {
                session::run(wopts, runner, async move { stop.cancelled().await }).await
            });
        }
        Ok(LocalCluster {
            engine,
            addr,
            server,
            workers,
            stop_server,
            stop_workers,
        })
    }

    /// The coordinator's address.
    pub fn addr(&self) -> SocketAddr {
        self.addr
    }

    /// The sweep being run.
    pub fn engine(&self) -> &Arc<Engine> {
        &self.engine
    }

    /// True when every worker has ended.
    pub fn workers_done(&self) -> bool {
        self.workers.is_empty()
    }

    /// Waits for the next worker to end (pending forever if none is left).
    pub async fn next_worker_end(&mut self) -> Result<WorkerSummary, WorkerError> {
        loop {
            match self.workers.join_next().await {
                Some(Ok(r)) => return r,
                Some(Err(e)) => {
                    tracing::error!(error = %e, "a local worker task failed");
                }
                None => std::future::pending::<()>().await,
            }
        }
    }

    /// Stops the workers (running work gets their grace period, the rest is
    /// handed back), then the coordinator, which stores what arrived.
    pub async fn stop(mut self) -> Result<(), ClusterError> {
        self.stop_workers.cancel();
        while let Some(r) = self.workers.join_next().await {
            match r {
                Ok(Err(e)) => tracing::error!(error = %e, "a local worker stopped"),
                Err(e) => tracing::error!(error = %e, "a local worker task failed"),
                Ok(Ok(_)) => {}
            }
        }
        self.stop_server.cancel();
        self.server.await??;
        Ok(())
    }
}
