//! The gRPC server: the `Coordinator` service behind bearer-token checks,
//! optional TLS, the standard health service (grpc.health.v1) and server
//! reflection.
//!
//! [`serve`] takes a bound listener and a shutdown future, so `main` binds
//! the address it was given and tests bind `127.0.0.1:0`.

use crate::engine::Engine;
use crate::service::CoordinatorService;
use std::future::Future;
use std::sync::Arc;
use subtle::ConstantTimeEq;
use tessera_proto::v1::coordinator_server::CoordinatorServer;
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::server::TcpIncoming;
use tonic::transport::{Identity, Server, ServerTlsConfig};
use tonic::{Request, Status};

/// How the server protects itself.
#[derive(Clone, Debug)]
pub struct ServeOptions {
    /// Every RPC (except health checks) must carry `authorization: Bearer <token>`.
    pub token: Option<String>,
    /// PEM certificate chain and private key for TLS.
    pub tls: Option<(Vec<u8>, Vec<u8>)>,
    /// How often to check for new results and refit the metric surrogates.
    pub refit_every: std::time::Duration,
}

impl Default for ServeOptions {
    fn default() -> Self {
        ServeOptions {
            token: None,
            tls: None,
            refit_every: std::time::Duration::from_secs(5),
        }
    }
}

/// Why the server stopped with an error.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    /// TLS or transport setup failed.
    #[error("gRPC transport: {0}")]
    Transport(#[from] tonic::transport::Error),
    /// Reflection setup failed.
    #[error("gRPC reflection: {0}")]
    Reflection(#[from] tonic_reflection::server::Error),
    /// Another coordinator took the database; this one stopped.
    #[error("another coordinator took over the database; this one stopped handing out work and stored nothing more (see the log for who holds it)")]
    Lost,
}

/// Checks the bearer token of each request in constant time.
#[derive(Clone)]
pub struct TokenCheck {
    token: Option<Arc<Vec<u8>>>,
}

impl std::fmt::Debug for TokenCheck {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("TokenCheck")
            .field("enabled", &self.token.is_some())
            .finish()
    }
}

impl TokenCheck {
    /// A check for `token` (none: every request passes).
    pub fn new(token: Option<&str>) -> Self {
        TokenCheck {
            token: token.map(|t| Arc::new(t.as_bytes().to_vec())),
        }
    }

    /// Whether `req` carries the token.
    pub fn check(&self, req: Request<()>) -> Result<Request<()>, Status> {
        let Some(want) = &self.token else {
            return Ok(req);
        };
        let got = req
            .metadata()
            .get("authorization")
            .and_then(|v| v.to_str().ok())
            .and_then(|v| v.strip_prefix("Bearer "))
            .map(|v| v.as_bytes().to_vec());
        match got {
            Some(g) if bool::from(g.ct_eq(want.as_slice())) => Ok(req),
            Some(_) => Err(Status::unauthenticated(
                "the token was rejected: it does not match the coordinator's --token-file",
            )),
            None => Err(Status::unauthenticated(
                "this coordinator requires a token: start the worker with --token-file",
            )),
        }
    }
}

impl tonic::service::Interceptor for TokenCheck {
    fn call(&mut self, req: Request<()>) -> Result<Request<()>, Status> {
        self.check(req)
    }
}

/// Serves `engine` on `listener` until `shutdown` completes, then stops
/// leasing, lets running calls finish, and waits until every result the
/// store received is committed.
pub async fn serve(
    engine: Arc<Engine>,
    service: CoordinatorService,
    listener: TcpListener,
    opts: ServeOptions,
    shutdown: impl Future<Output = ()> + Send,
) -> Result<(), ServeError> {
    let stop = CancellationToken::new();
    // The planner and lease-expiry loop; ends when `stop` is cancelled below.
    let planner = tokio::spawn(engine.clone().run_planner(stop.clone()));
    // Background surrogate refits for `Predict`; ends when `stop` is cancelled.
    let refits = tokio::spawn(engine.clone().run_refits(stop.clone(), opts.refit_every));
    // The holder's heartbeat; ends when `stop` is cancelled or the database is lost.
    let heartbeat = tokio::spawn(engine.clone().run_heartbeat(stop.clone()));

    let (health, health_service) = tonic_health::server::health_reporter();
    health
        .set_service_status(
            "tessera.v1.Coordinator",
            tonic_health::ServingStatus::Serving,
        )
        .await;
    health
        .set_service_status("", tonic_health::ServingStatus::Serving)
        .await;
    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(tessera_proto::FILE_DESCRIPTOR_SET)
        .build_v1()?;
    let check = TokenCheck::new(opts.token.as_deref());

    // Dead peers are noticed (HTTP/2 pings unanswered, TCP keepalive) and
    // their connections closed; a call may not take longer than a minute.
    let mut builder = Server::builder()
        .http2_keepalive_interval(Some(std::time::Duration::from_secs(30)))
        .http2_keepalive_timeout(Some(std::time::Duration::from_secs(20)))
        .tcp_keepalive(Some(std::time::Duration::from_secs(60)))
        .timeout(std::time::Duration::from_secs(60));
    if let Some((cert, key)) = &opts.tls {
        builder =
            builder.tls_config(ServerTlsConfig::new().identity(Identity::from_pem(cert, key)))?;
    }
    let drain_engine = engine.clone();
    let lost = engine.lost().clone();
    let shutdown = async move {
        tokio::select! {
            _ = shutdown => {}
            _ = lost.cancelled() => {}
        }
        tracing::info!("shutting down: no new leases; finishing calls under way");
        drain_engine.drain();
    };
    let result = builder
        .add_service(health_service)
        .add_service(InterceptedService::new(reflection, check.clone()))
        .add_service(CoordinatorServer::with_interceptor(service, check))
        .serve_with_incoming_shutdown(
            // No Nagle delay: small request/response messages go out at once.
            TcpIncoming::from(listener).with_nodelay(Some(true)),
            shutdown,
        )
        .await;
    stop.cancel();
    let _ = planner.await;
    let _ = refits.await;
    let _ = heartbeat.await;
    engine.flush().await;
    if engine.lost().is_cancelled() {
        result?;
        return Err(ServeError::Lost);
    }
    // Store current surrogates, so queries on the file need not fit.
    let _ = engine.refit_once().await;
    engine.flush().await;
    engine.release().await;
    engine.close().await;
    result?;
    Ok(())
}
