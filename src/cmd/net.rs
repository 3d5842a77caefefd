//! Shared pieces of the networked commands: token files, signals, address checks.

use anyhow::{bail, Context};
use std::net::{SocketAddr, ToSocketAddrs};
use std::path::Path;

/// Reads a token file: the token is the file's content, trimmed.
pub fn read_token(path: &Path) -> anyhow::Result<String> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("cannot read the token file {}", path.display()))?;
    let token = text.trim().to_string();
    if token.is_empty() {
        bail!(
            "the token file {} is empty; put a long random string in it, for example: openssl rand -hex 32 > {}",
            path.display(),
            path.display()
        );
    }
    if token.chars().any(|c| !c.is_ascii_graphic()) {
        bail!(
            "the token in {} contains spaces or non-ASCII characters; use letters, digits and punctuation only",
            path.display()
        );
    }
    Ok(token)
}

/// Resolves `--listen` to one socket address.
pub fn listen_addr(listen: &str) -> anyhow::Result<SocketAddr> {
    let mut addrs = listen.to_socket_addrs().with_context(|| {
        format!("--listen {listen:?} is not an address; use HOST:PORT, for example 127.0.0.1:7300 or 0.0.0.0:7300")
    })?;
    addrs
        .next()
        .with_context(|| format!("--listen {listen:?} resolves to no address"))
}

/// Completes on the first SIGINT (Ctrl-C) or SIGTERM.
pub async fn stop_signal() {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        let term = signal(SignalKind::terminate());
        let int = signal(SignalKind::interrupt());
        match (term, int) {
            (Ok(mut t), Ok(mut i)) => {
                tokio::select! {
                    _ = t.recv() => {}
                    _ = i.recv() => {}
                }
            }
            _ => {
                let _ = tokio::signal::ctrl_c().await;
            }
        }
    }
    #[cfg(not(unix))]
    {
        let _ = tokio::signal::ctrl_c().await;
    }
}

/// This machine's host name, for worker names.
pub fn host_name() -> String {
    std::fs::read_to_string("/etc/hostname")
        .ok()
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "localhost".to_string())
}

/// A gRPC client for a coordinator at `url`, for the query commands.
pub async fn query_client(
    url: &str,
) -> anyhow::Result<
    tessera_proto::v1::coordinator_client::CoordinatorClient<tonic::transport::Channel>,
> {
    let channel = tonic::transport::Endpoint::from_shared(url.to_string())
        .with_context(|| {
            format!("--coordinator {url:?} is not a URL; use for example http://10.0.0.5:7300")
        })?
        .connect_timeout(std::time::Duration::from_secs(5))
        .connect()
        .await
        .with_context(|| format!("cannot reach the coordinator at {url}"))?;
    Ok(tessera_proto::v1::coordinator_client::CoordinatorClient::new(channel))
}

/// Adds `authorization: Bearer <token>` to a request.
pub fn with_token<T>(
    mut req: tonic::Request<T>,
    token: Option<&str>,
) -> anyhow::Result<tonic::Request<T>> {
    if let Some(t) = token {
        let v = format!("Bearer {t}").parse().map_err(|_| {
            anyhow::anyhow!("the token contains characters not allowed in a header")
        })?;
        req.metadata_mut().insert("authorization", v);
    }
    Ok(req)
}
