//! Shared pieces of the networked commands: token files, signals, address checks.

use anyhow::{bail, Context};
use std::net::{SocketAddr, ToSocketAddrs};
use std::path::{Path, PathBuf};
pub use tessera_proto::channel::Dial;

/// Fewest characters in a token. 16 hex characters are 64 random bits: too
/// many to try over a network (our choice; `openssl rand -hex 32` gives 64).
pub const MIN_TOKEN_CHARS: usize = 16;

/// Reads a token file: the token is the file's content, trimmed.
pub fn read_token(path: &Path) -> anyhow::Result<String> {
    use std::io::Read;
    let mut bytes = Vec::new();
    std::fs::File::open(path)
        .and_then(|f| f.take(64 * 1024).read_to_end(&mut bytes))
        .with_context(|| format!("cannot read the token file {}", path.display()))?;
    let Ok(text) = String::from_utf8(bytes) else {
        bail!(
            "the token file {} is not text; make one with: openssl rand -hex 32 > {}",
            path.display(),
            path.display()
        );
    };
    let token = text.trim().to_string();
    if token.len() < MIN_TOKEN_CHARS {
        bail!(
            "the token in {} has {} characters; use at least {MIN_TOKEN_CHARS}, because a short token can be guessed by anyone who can reach the port. Make one with: openssl rand -hex 32 > {}",
            path.display(),
            token.len(),
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

/// How to reach a running coordinator (for the query commands).
#[derive(clap::Args, Debug, Clone)]
pub struct CoordinatorArgs {
    /// Ask a running coordinator (http://HOST:PORT, or https:// with --ca).
    #[arg(long, value_name = "URL")]
    pub coordinator: Option<String>,
    /// Token file, for a coordinator that requires one.
    #[arg(long, value_name = "FILE", requires = "coordinator")]
    pub token_file: Option<PathBuf>,
    /// CA certificate (PEM) to trust when the coordinator uses TLS (https://).
    #[arg(long, value_name = "FILE", requires = "coordinator")]
    pub ca: Option<PathBuf>,
}

/// Reads the token and CA files named on the command line.
pub fn dial(url: &str, token_file: Option<&Path>, ca: Option<&Path>) -> anyhow::Result<Dial> {
    let token = token_file.map(read_token).transpose()?;
    let ca_pem = match ca {
        Some(p) => {
            Some(std::fs::read(p).with_context(|| format!("cannot read --ca {}", p.display()))?)
        }
        None => None,
    };
    Ok(Dial {
        url: url.to_string(),
        token,
        ca_pem,
    })
}
