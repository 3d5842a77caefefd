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
