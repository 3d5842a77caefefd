//! `tessera serve`: the coordinator alone, for workers on other machines.

use super::net;
use anyhow::{bail, Context};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;
use tessera_coordinator::engine::{Engine, OpenOptions};
use tessera_coordinator::scheduler::LeaseTimes;
use tessera_coordinator::server::{self, ServeOptions};
use tessera_coordinator::service::CoordinatorService;

/// Arguments of `tessera serve`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera serve sweep.toml --db sweep.db
      coordinator for workers on this machine only (127.0.0.1:7300)
  tessera serve sweep.toml --db sweep.db --listen 0.0.0.0:7300 --token-file lab.token
      coordinator for the lab network; start workers with the same --token-file

Restarting with the same --db continues the sweep where it stood.
Ctrl-C (or SIGTERM) stops handing out work, stores what has arrived, and exits.")]
pub struct ServeArgs {
    /// The sweep file (TOML).
    pub spec: PathBuf,
    /// The sweep database (SQLite); created if missing, resumed if it exists.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Address to listen on, HOST:PORT.
    #[arg(long, default_value = "127.0.0.1:7300", value_name = "ADDR")]
    pub listen: String,
    /// File holding the token every worker and query must present.
    #[arg(long, value_name = "FILE")]
    pub token_file: Option<PathBuf>,
    /// TLS certificate chain (PEM); needs --tls-key.
    #[arg(long, value_name = "FILE", requires = "tls_key")]
    pub tls_cert: Option<PathBuf>,
    /// TLS private key (PEM); needs --tls-cert.
    #[arg(long, value_name = "FILE", requires = "tls_cert")]
    pub tls_key: Option<PathBuf>,
    /// Allow listening beyond this machine without a token (trusted networks only).
    #[arg(long)]
    pub insecure: bool,
    /// Resume the sweep stored in --db even if SPEC differs from it.
    #[arg(long)]
    pub force: bool,
    /// How long a worker may go without renewing a lease before its work is handed out again.
    #[arg(long, default_value = "30s", value_name = "DURATION")]
    pub lease: humantime::Duration,
    /// Exit once every evaluation of the sweep is final.
    #[arg(long)]
    pub exit_when_done: bool,
}

/// Runs `tessera serve`.
pub fn run(args: ServeArgs) -> anyhow::Result<ExitCode> {
    let addr = net::listen_addr(&args.listen)?;
    let token = args
        .token_file
        .as_deref()
        .map(net::read_token)
        .transpose()?;
    if !addr.ip().is_loopback() && token.is_none() && !args.insecure {
        bail!(
            "refusing to listen on {addr} without a token: anyone who can reach this port could take work, \
             send false results and read your sweep.\n\
             Give --token-file FILE (and the same file to every worker), or add --insecure if this network is private and trusted."
        );
    }
    let tls = match (&args.tls_cert, &args.tls_key) {
        (Some(c), Some(k)) => Some((
            std::fs::read(c).with_context(|| format!("cannot read --tls-cert {}", c.display()))?,
            std::fs::read(k).with_context(|| format!("cannot read --tls-key {}", k.display()))?,
        )),
        _ => None,
    };
    if !addr.ip().is_loopback() && token.is_some() && tls.is_none() {
        eprintln!(
            "warning: without --tls-cert/--tls-key the token and all results cross the network unencrypted"
        );
    }
    if !addr.ip().is_loopback() && token.is_none() {
        eprintln!(
            "warning: --insecure: any machine that can reach {addr} can take work and send results"
        );
    }
    let spec_text = match super::check::load(&args.spec)? {
        Ok(c) => {
            for w in &c.warnings {
                eprintln!("warning: {w}");
            }
            c.text
        }
        Err(code) => return Ok(code),
    };
    let lease: Duration = args.lease.into();
    if lease < Duration::from_secs(1) {
        bail!(
            "--lease {} is too short; use at least 1s (30s is a good default)",
            args.lease
        );
    }
    let engine = Engine::open(OpenOptions {
        db: args.db.clone(),
        spec_text,
        spec_file: args.spec.display().to_string(),
        force: args.force,
        times: LeaseTimes {
            lease,
            renew_every: lease / 3,
        },
        reproducible_default: false,
    })?;
    let rt = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
    rt.block_on(async move {
        let listener = tokio::net::TcpListener::bind(addr)
            .await
            .with_context(|| format!("cannot listen on {addr}"))?;
        let local = listener.local_addr()?;
        let spec = engine.spec();
        eprintln!(
            "tessera coordinator for sweep {:?} on {local} ({} points x {} replicates, database {})",
            spec.name,
            spec.budget,
            spec.replicates,
            args.db.display()
        );
        let scheme = if tls.is_some() { "https" } else { "http" };
        eprintln!("start workers with: tessera worker --coordinator {scheme}://{local}");
        let done_engine = engine.clone();
        let exit_when_done = args.exit_when_done;
        let shutdown = async move {
            if exit_when_done {
                let wait_done = async {
                    while !done_engine.finished() {
                        tokio::time::sleep(Duration::from_millis(500)).await;
                    }
                    eprintln!("sweep finished");
                    // Workers learn that the sweep is finished when they next
                    // ask for work; wait (up to 10 s) until they have left,
                    // so none is left retrying a coordinator that is gone.
                    let since = std::time::Instant::now();
                    while since.elapsed() < Duration::from_secs(10)
                        && done_engine.status().workers.iter().any(|w| w.connected)
                    {
                        tokio::time::sleep(Duration::from_millis(100)).await;
                    }
                };
                tokio::select! {
                    _ = net::stop_signal() => {}
                    _ = wait_done => {}
                }
            } else {
                net::stop_signal().await;
            }
        };
        let service = CoordinatorService::new(engine.clone());
        server::serve(
            engine.clone(),
            service,
            listener,
            ServeOptions {
                token,
                tls,
                ..ServeOptions::default()
            },
            shutdown,
        )
        .await?;
        let st = engine.status();
        eprintln!(
            "stopped: {} done, {} failed, {} still to run; restart with the same --db to continue",
            st.done,
            st.failed,
            st.evaluations_total.saturating_sub(st.done + st.failed)
        );
        anyhow::Ok(())
    })?;
    Ok(ExitCode::SUCCESS)
}
