//! `tessera worker`: runs simulations for a coordinator until told to stop.

use super::net;
use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use tessera_worker::runner::{parse_command_arg, RunnerConfig, Runners};
use tessera_worker::session::{self, Ending, WorkerError, WorkerOptions};
use tessera_worker::spool::Spool;

/// Arguments of `tessera worker`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera worker --coordinator http://10.0.0.5:7300 --token-file lab.token
      run the built-in models on every core of this machine
  tessera worker --coordinator http://10.0.0.5:7300 --slots 4 \\
      --command 'mymodel=python3 /opt/sim/run.py --seed {seed}'
      also offer an external simulator under the name the sweep file uses

The worker runs only the built-in models and the commands given here: the
coordinator sends a model name and values, never a command line.
Ctrl-C (or SIGTERM) lets running work finish within --grace, hands the rest
back, and exits; results not yet delivered wait in the spool file.")]
pub struct WorkerArgs {
    /// Coordinator address, for example http://10.0.0.5:7300 (https:// with TLS).
    #[arg(long, value_name = "URL")]
    pub coordinator: String,
    /// Parallel runs (default: the number of cores).
    #[arg(long, value_name = "N")]
    pub slots: Option<u32>,
    /// Name shown in `tessera status` (default: host name and process id).
    #[arg(long)]
    pub name: Option<String>,
    /// File holding the coordinator's token.
    #[arg(long, value_name = "FILE")]
    pub token_file: Option<PathBuf>,
    /// CA certificate (PEM) to trust when the coordinator uses TLS.
    #[arg(long, value_name = "FILE")]
    pub ca: Option<PathBuf>,
    /// Offer an external simulator: NAME=COMMAND LINE (repeatable).
    #[arg(long = "command", value_name = "NAME=CMDLINE")]
    pub commands: Vec<String>,
    /// Directory for per-run working directories (default: the system temp dir).
    #[arg(long, value_name = "DIR")]
    pub workdir: Option<PathBuf>,
    /// Keep each run's working directory (to debug a simulator).
    #[arg(long)]
    pub keep_workdirs: bool,
    /// File for results not yet delivered (default: ~/.local/state/tessera/spool-NAME.jsonl).
    #[arg(long, value_name = "FILE")]
    pub spool: Option<PathBuf>,
    /// On shutdown, how long running work may take to finish.
    #[arg(long, default_value = "60s", value_name = "DURATION")]
    pub grace: humantime::Duration,
    /// Keep running after the sweep is finished (wait for more work).
    #[arg(long)]
    pub stay: bool,
    /// Exit after this long with nothing running and no work offered (e.g. 10m).
    #[arg(long, value_name = "DURATION")]
    pub idle_exit: Option<humantime::Duration>,
}

fn default_spool(name: &str) -> Option<PathBuf> {
    let base = std::env::var_os("XDG_STATE_HOME")
        .map(PathBuf::from)
        .or_else(|| std::env::var_os("HOME").map(|h| PathBuf::from(h).join(".local/state")))?;
    let safe: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect();
    Some(base.join("tessera").join(format!("spool-{safe}.jsonl")))
}

/// Runs `tessera worker`.
pub fn run(args: WorkerArgs) -> anyhow::Result<ExitCode> {
    let mut commands = Vec::new();
    for c in &args.commands {
        commands.push(parse_command_arg(c).map_err(|e| anyhow::anyhow!("--command {c:?}: {e}"))?);
    }
    let dial = net::dial(
        &args.coordinator,
        args.token_file.as_deref(),
        args.ca.as_deref(),
    )?;
    let slots = match args.slots {
        Some(0) => anyhow::bail!("--slots must be at least 1"),
        Some(n) => n,
        None => std::thread::available_parallelism().map_or(1, |n| n.get() as u32),
    };
    let host = net::host_name();
    let name = args
        .name
        .clone()
        .unwrap_or_else(|| format!("{host}-{}", std::process::id()));
    let spool = args.spool.clone().or_else(|| default_spool(&name));
    let mut cfg = RunnerConfig {
        commands,
        keep_workdirs: args.keep_workdirs,
        ..RunnerConfig::default()
    };
    if let Some(w) = &args.workdir {
        cfg.workdir_root = w.clone();
    }
    cfg.guard = super::guard::words();
    let runners = Arc::new(Runners::new(cfg)?);
    let opts = WorkerOptions {
        dial,
        name: name.clone(),
        host,
        slots,
        spool: Spool::new(spool),
        grace: args.grace.into(),
        exit_when_finished: !args.stay,
        idle_exit: args.idle_exit.map(Into::into),
        max_backoff: std::time::Duration::from_secs(30),
    };
    let rt = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
    eprintln!(
        "tessera worker {name} with {slots} slots, coordinator {}",
        args.coordinator
    );
    let result = rt.block_on(session::run(opts, runners, net::stop_signal()));
    match result {
        Ok(s) => {
            eprintln!(
                "worker stopped: {} results delivered, {} handed back, {} undelivered ({})",
                s.delivered,
                s.handed_back,
                s.undelivered,
                match s.ending {
                    Ending::SweepFinished => "sweep finished",
                    Ending::Stopped => "told to stop",
                    Ending::Idle => "idle",
                }
            );
            Ok(ExitCode::SUCCESS)
        }
        Err(e @ WorkerError::Refused(_)) => {
            eprintln!("error: {e}");
            Ok(ExitCode::from(3))
        }
        Err(e) => Err(e.into()),
    }
}
