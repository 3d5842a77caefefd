//! `tessera run`: a whole sweep on this machine: a coordinator on a loopback
//! port plus local workers in the same process, talking the same gRPC as a
//! distributed sweep.

use super::net;
use anyhow::Context;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant};
use tessera::cluster::{ClusterOptions, LocalCluster};
use tessera_coordinator::engine::{Engine, OpenOptions};
use tessera_coordinator::scheduler::LeaseTimes;
use tessera_coordinator::server::ServeOptions;
use tessera_coordinator::status::SweepStatus;
use tessera_worker::runner::{RunnerConfig, Runners};

/// Arguments of `tessera run`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera run sweep.toml                 run the sweep here, results in sweep.db
  tessera run sweep.toml --workers 2     use two parallel runs
  tessera status --db sweep.db           look at it later (also while it runs)

Run the same command again to continue an interrupted sweep.")]
pub struct RunArgs {
    /// The sweep file (TOML).
    pub spec: PathBuf,
    /// The sweep database (default: the sweep file with .db instead of .toml).
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    /// Parallel runs on this machine (default: the number of cores).
    #[arg(long, value_name = "N")]
    pub workers: Option<u32>,
    /// Resume the sweep stored in --db even if the sweep file differs from it.
    #[arg(long)]
    pub force: bool,
    /// Keep each external run's working directory.
    #[arg(long)]
    pub keep_workdirs: bool,
}

/// The database path `tessera run` uses for a sweep file.
pub fn default_db(spec: &Path) -> PathBuf {
    spec.with_extension("db")
}

/// Command words that name a file next to the sweep file become absolute,
/// so a spec's `command = ["python3", "sim.py"]` works from any directory.
fn resolve_command(words: &[String], spec_dir: &Path) -> Vec<String> {
    words
        .iter()
        .enumerate()
        .map(|(i, w)| {
            let p = spec_dir.join(w);
            let looks_like_path = i > 0 || w.contains('/');
            if looks_like_path && !w.starts_with('/') && !w.contains('{') && p.is_file() {
                p.canonicalize().unwrap_or(p).display().to_string()
            } else {
                w.clone()
            }
        })
        .collect()
}

fn progress_line(st: &SweepStatus, started: Instant, done_at_start: u64) -> String {
    let minutes = started.elapsed().as_secs_f64() / 60.0;
    let new = (st.done + st.failed).saturating_sub(done_at_start);
    let rate = if minutes > 0.0 {
        new as f64 / minutes
    } else {
        0.0
    };
    let left = st.evaluations_total.saturating_sub(st.done + st.failed);
    let eta = if rate > 0.0 {
        let secs = (left as f64 / rate * 60.0).round() as u64;
        humantime::format_duration(Duration::from_secs(secs)).to_string()
    } else {
        "?".to_string()
    };
    let best = st
        .best
        .as_ref()
        .map(|b| format!("best {} = {:.4}", st.objective_label, b.objective))
        .unwrap_or_else(|| "no result yet".to_string());
    format!(
        "{} failed · {:.0} runs/min · {best} · ~{eta} left",
        st.failed, rate
    )
}

/// A path or word as one shell word (quoted only when needed).
fn quote(word: &str) -> String {
    shlex::try_quote(word).map_or_else(|_| format!("{word:?}"), |q| q.into_owned())
}

/// The exact command that continues this sweep.
fn rerun_command(args: &RunArgs, db: &Path) -> String {
    let mut cmd = format!(
        "tessera run {} --db {}",
        quote(&args.spec.display().to_string()),
        quote(&db.display().to_string())
    );
    if let Some(n) = args.workers {
        cmd.push_str(&format!(" --workers {n}"));
    }
    if args.force {
        cmd.push_str(" --force");
    }
    cmd
}

/// Runs `tessera run`.
pub fn run(args: RunArgs) -> anyhow::Result<ExitCode> {
    let spec_text = match super::check::load(&args.spec)? {
        Ok(c) => {
            for w in &c.warnings {
                eprintln!("warning: {w}");
            }
            c.text
        }
        Err(code) => return Ok(code),
    };
    let db = args.db.clone().unwrap_or_else(|| default_db(&args.spec));
    let engine = Engine::open(OpenOptions {
        db: db.clone(),
        spec_text,
        spec_file: args.spec.display().to_string(),
        force: args.force,
        times: LeaseTimes::default(),
        reproducible_default: true,
    })?;
    let spec = engine.spec().clone();
    let n = match args.workers {
        Some(0) => anyhow::bail!("--workers must be at least 1"),
        Some(n) => n,
        None => std::thread::available_parallelism().map_or(1, |n| n.get() as u32),
    };
    let spec_dir = args
        .spec
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."))
        .to_path_buf();
    let commands = match &spec.model.command {
        Some(words) => vec![(spec.model.name.clone(), resolve_command(words, &spec_dir))],
        None => Vec::new(),
    };
    let runners = Arc::new(Runners::new(RunnerConfig {
        commands,
        keep_workdirs: args.keep_workdirs,
        guard: super::guard::words(),
        ..RunnerConfig::default()
    })?);
    let rt = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
    let outcome = rt.block_on(async move {
        // One in-process worker per slot; each ends when the sweep is
        // finished or the cluster is stopped (Ctrl-C).
        let mut cluster = LocalCluster::start(
            engine.clone(),
            ClusterOptions {
                workers: n,
                slots_per_worker: 1,
                runner: runners,
                serve: ServeOptions::default(),
                name: "local".to_string(),
                host: net::host_name(),
                grace: Duration::from_secs(5),
            },
        )
        .await?;
        let st = engine.status();
        let bar = ProgressBar::new(st.evaluations_total);
        if std::io::stderr().is_terminal() {
            bar.set_draw_target(ProgressDrawTarget::stderr());
        } else {
            bar.set_draw_target(ProgressDrawTarget::hidden());
        }
        bar.set_style(
            ProgressStyle::with_template(if super::colour_stderr() {
                "{bar:30.cyan/blue} {pos}/{len} evaluations · {msg}"
            } else {
                "{bar:30} {pos}/{len} evaluations · {msg}"
            })
                .unwrap_or_else(|_| ProgressStyle::default_bar()),
        );
        eprintln!(
            "sweep {:?}: {} points x {} replicates with {n} local workers, database {}",
            spec.name,
            spec.budget,
            spec.replicates,
            db.display()
        );
        let started = Instant::now();
        let done_at_start = st.done + st.failed;
        let mut interrupted = false;
        let mut last_line = Instant::now();
        let ctrl_c = net::stop_signal();
        tokio::pin!(ctrl_c);
        loop {
            let st = engine.status();
            bar.set_position(st.done + st.failed);
            bar.set_message(progress_line(&st, started, done_at_start));
            if bar.is_hidden() && last_line.elapsed() > Duration::from_secs(10) {
                eprintln!(
                    "{}/{} evaluations · {}",
                    st.done + st.failed,
                    st.evaluations_total,
                    progress_line(&st, started, done_at_start)
                );
                last_line = Instant::now();
            }
            if st.finished || cluster.workers_done() {
                break;
            }
            tokio::select! {
                _ = &mut ctrl_c => {
                    interrupted = true;
                    eprintln!("stopping: letting running work finish (up to 5 s), then storing what arrived");
                    break;
                }
                _ = tokio::time::sleep(Duration::from_millis(200)) => {}
                r = cluster.next_worker_end() => {
                    if let Err(e) = r {
                        tracing::error!(error = %e, "a local worker stopped");
                    }
                }
            }
        }
        cluster.stop().await?;
        bar.finish_and_clear();
        let st = engine.status();
        super::status::print_human(&st, Some(&spec));
        if interrupted || !st.finished {
            eprintln!(
                "interrupted: run `{}` again to continue",
                rerun_command(&args, &db)
            );
            return anyhow::Ok(ExitCode::from(130));
        }
        if st.done == 0 && st.failed > 0 {
            let reason = st
                .failures
                .first()
                .map_or("unknown", |(r, _)| r.as_str());
            eprintln!(
                "every run failed ({} of {}): there is nothing to learn from. Most common reason: {reason}",
                st.failed, st.evaluations_total
            );
            eprintln!(
                "see each failure with its reason and the simulator's stderr: tessera export --db {}",
                quote(&db.display().to_string())
            );
            return anyhow::Ok(ExitCode::from(1));
        }
        let first = spec
            .params
            .iter()
            .map(|p| {
                let mid = p.to_natural(0.5);
                let v = if p.integer {
                    tessera_models::text::value(mid, true)
                } else {
                    tessera_models::text::significant(mid, 3)
                };
                format!("{}={v}", p.name)
            })
            .collect::<Vec<_>>()
            .join(" ");
        let db_q = quote(&db.display().to_string());
        eprintln!("next:");
        if !spec.targets.is_empty() {
            eprintln!("  tessera calibrate --db {db_q}          which constants match the targets, and what they pin down");
        }
        eprintln!("  tessera predict --db {db_q} {first}    predicted metrics with uncertainty");
        eprintln!("  tessera check-fit --db {db_q}          can the surrogate be trusted?");
        if let (Some(p), Some(o)) = (spec.params.first(), spec.objective.as_ref()) {
            eprintln!(
                "  tessera trend --db {db_q} {} --metric {}    the trend as a plot",
                p.name,
                o.metric
            );
        }
        eprintln!("  tessera export --db {db_q}             every run as CSV");
        anyhow::Ok(ExitCode::SUCCESS)
    })?;
    Ok(outcome)
}
