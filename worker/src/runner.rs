//! The `Runner` trait: one simulation run in, metrics or a typed failure out.
//!
//! [`Runners`] is the runner a worker uses: it offers the built-in models
//! ([`crate::models`]) plus the external commands its operator configured
//! ([`crate::external`]) and dispatches each request by model name. When an
//! operator command has the same name as a built-in model, **the operator's
//! command wins** (the operator configured it on purpose, e.g. to try a
//! modified copy of a built-in model under the same sweep file); the built-in
//! is then not reachable from that worker and a warning is logged.

use std::collections::BTreeMap;
use std::fmt;
use std::future::Future;
use std::path::PathBuf;
use std::pin::Pin;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use tokio_util::sync::CancellationToken;

use crate::external::ExternalCommand;
use crate::models;

/// Metric name to value, as produced by one run.
pub type Metrics = BTreeMap<String, f64>;

/// One run of one model at one point, as the coordinator asked for it.
#[derive(Clone, Debug, PartialEq)]
pub struct RunRequest {
    /// Model name: a built-in model or an operator-configured command.
    pub model: String,
    /// Swept parameter values, in the units of the sweep file.
    pub params: BTreeMap<String, f64>,
    /// Fixed inputs (the same at every point). Numbers are merged into the
    /// inputs of built-in models; external commands receive all of them.
    pub fixed: BTreeMap<String, serde_json::Value>,
    /// Seed of this replicate (derived by the coordinator).
    pub seed: u64,
    /// Replicate index at this point, from 0.
    pub replicate: u32,
    /// Design point the run belongs to.
    pub point_id: u64,
    /// Unique id of this evaluation (point, replicate, attempt).
    pub evaluation_id: u64,
    /// Wall-clock limit for the run; `None` waits forever.
    pub timeout: Option<Duration>,
    /// Metrics the sweep needs; a run that does not report one of them fails
    /// with [`FailureKind::MissingMetric`].
    pub expected_metrics: Vec<String>,
}

impl RunRequest {
    /// A request for `model` with no parameters, seed 0 and no timeout;
    /// convenient for tests and `tessera simulate`.
    pub fn new(model: impl Into<String>) -> Self {
        RunRequest {
            model: model.into(),
            params: BTreeMap::new(),
            fixed: BTreeMap::new(),
            seed: 0,
            replicate: 0,
            point_id: 0,
            evaluation_id: 0,
            timeout: None,
            expected_metrics: Vec::new(),
        }
    }
}

/// Why a run produced no usable metrics.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum FailureKind {
    /// The simulator exited with a non-zero code or was killed by a signal.
    Exit,
    /// The run took longer than its timeout and was killed.
    Timeout,
    /// The run was cancelled (worker shutting down, lease lost) and killed.
    Cancelled,
    /// The run finished but reported no metrics object.
    NoMetrics,
    /// A metric the sweep expects was not reported.
    MissingMetric,
    /// A metric was NaN, infinite or null.
    NonFinite,
    /// The inputs were rejected (unknown name, out of range, wrong type).
    BadInput,
    /// The simulator could not be started (command not found, not executable).
    Spawn,
    /// This worker offers no model of that name.
    UnknownModel,
}

impl FailureKind {
    /// Every kind, in declaration order.
    pub const ALL: [FailureKind; 9] = [
        FailureKind::Exit,
        FailureKind::Timeout,
        FailureKind::Cancelled,
        FailureKind::NoMetrics,
        FailureKind::MissingMetric,
        FailureKind::NonFinite,
        FailureKind::BadInput,
        FailureKind::Spawn,
        FailureKind::UnknownModel,
    ];

    /// Stable snake_case name, as stored and sent over the wire.
    pub fn as_str(&self) -> &'static str {
        match self {
            FailureKind::Exit => "exit",
            FailureKind::Timeout => "timeout",
            FailureKind::Cancelled => "cancelled",
            FailureKind::NoMetrics => "no_metrics",
            FailureKind::MissingMetric => "missing_metric",
            FailureKind::NonFinite => "non_finite",
            FailureKind::BadInput => "bad_input",
            FailureKind::Spawn => "spawn",
            FailureKind::UnknownModel => "unknown_model",
        }
    }

    /// The kind whose [`as_str`](Self::as_str) is `s`.
    pub fn parse(s: &str) -> Option<FailureKind> {
        FailureKind::ALL.into_iter().find(|k| k.as_str() == s)
    }
}

impl fmt::Display for FailureKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// A failed run: what kind of failure, a sentence saying why, and the last
/// part of the simulator's stderr (empty for built-in models).
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{kind}: {reason}")]
pub struct RunFailure {
    /// Failure class.
    pub kind: FailureKind,
    /// One or two sentences for a person.
    pub reason: String,
    /// At most the last 4 KiB of stderr.
    pub stderr_tail: String,
}

impl RunFailure {
    /// A failure with no stderr.
    pub fn new(kind: FailureKind, reason: impl Into<String>) -> Self {
        RunFailure {
            kind,
            reason: reason.into(),
            stderr_tail: String::new(),
        }
    }
}

/// The future a [`Runner`] returns.
pub type RunFuture<'a> = Pin<Box<dyn Future<Output = Result<Metrics, RunFailure>> + Send + 'a>>;

/// Something that can run simulations by model name.
pub trait Runner: Send + Sync {
    /// Names of the models this runner offers, sorted.
    fn models(&self) -> Vec<String>;
    /// Runs one request. Cancelling `cancel` stops the run (killing any
    /// process it started) and yields [`FailureKind::Cancelled`].
    fn run(&self, req: RunRequest, cancel: CancellationToken) -> RunFuture<'_>;
}

/// What a worker's operator configured.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct RunnerConfig {
    /// External commands: model name and the command words (see
    /// [`parse_command_arg`]).
    pub commands: Vec<(String, Vec<String>)>,
    /// Each external run gets a fresh directory under this one.
    pub workdir_root: PathBuf,
    /// Keep run directories after the run (for debugging a simulator).
    pub keep_workdirs: bool,
}

impl Default for RunnerConfig {
    /// No external commands; run directories under the system temp dir.
    fn default() -> Self {
        RunnerConfig {
            commands: Vec::new(),
            workdir_root: std::env::temp_dir().join("tessera-runs"),
            keep_workdirs: false,
        }
    }
}

/// Built-in models plus operator commands, dispatched by model name.
#[derive(Debug)]
pub struct Runners {
    commands: BTreeMap<String, ExternalCommand>,
}

impl Runners {
    /// Builds the runner set. A later command of the same name replaces an
    /// earlier one; a command named like a built-in model shadows it.
    pub fn new(cfg: RunnerConfig) -> Self {
        // Relative paths in commands are relative to where tessera started.
        let launch_dir = std::env::current_dir().unwrap_or_default();
        let mut commands = BTreeMap::new();
        for (name, words) in cfg.commands {
            if models::find(&name).is_some() {
                tracing::warn!(model = %name, "operator command shadows the built-in model of the same name");
            }
            let cmd = ExternalCommand::new(
                name.clone(),
                words,
                cfg.workdir_root.clone(),
                cfg.keep_workdirs,
                launch_dir.clone(),
            );
            if commands.insert(name.clone(), cmd).is_some() {
                tracing::warn!(model = %name, "command given twice; the last one is used");
            }
        }
        Runners { commands }
    }

    /// True if `model` is served by an operator command (not a built-in).
    pub fn is_external(&self, model: &str) -> bool {
        self.commands.contains_key(model)
    }
}

impl Runner for Runners {
    fn models(&self) -> Vec<String> {
        let mut names: Vec<String> = models::catalogue()
            .iter()
            .map(|m| m.name.to_string())
            .chain(self.commands.keys().cloned())
            .collect();
        names.sort();
        names.dedup();
        names
    }

    fn run(&self, req: RunRequest, cancel: CancellationToken) -> RunFuture<'_> {
        Box::pin(async move {
            let expected = req.expected_metrics.clone();
            let metrics = if let Some(cmd) = self.commands.get(&req.model) {
                cmd.run(&req, &cancel).await?
            } else if models::find(&req.model).is_some() {
                run_builtin_async(req, cancel).await?
            } else {
                return Err(RunFailure::new(
                    FailureKind::UnknownModel,
                    format!(
                        "this worker offers no model {:?}; it offers: {}",
                        req.model,
                        self.models().join(", ")
                    ),
                ));
            };
            check_metrics(&metrics, &expected)?;
            Ok(metrics)
        })
    }
}

/// Checks that every value is finite and every expected metric is present.
pub fn check_metrics(metrics: &Metrics, expected: &[String]) -> Result<(), RunFailure> {
    if let Some((name, v)) = metrics.iter().find(|(_, v)| !v.is_finite()) {
        return Err(RunFailure::new(
            FailureKind::NonFinite,
            format!("metric {name:?} is {v}, not a finite number"),
        ));
    }
    let missing: Vec<&str> = expected
        .iter()
        .filter(|m| !metrics.contains_key(m.as_str()))
        .map(String::as_str)
        .collect();
    if !missing.is_empty() {
        let got: Vec<&str> = metrics.keys().map(String::as_str).collect();
        return Err(RunFailure::new(
            FailureKind::MissingMetric,
            format!(
                "expected metric(s) {} not reported; the run reported: {}",
                missing.join(", "),
                if got.is_empty() {
                    "(none)".to_string()
                } else {
                    got.join(", ")
                }
            ),
        ));
    }
    Ok(())
}

/// Merges swept parameters and numeric fixed inputs for a built-in model.
fn builtin_inputs(req: &RunRequest) -> Result<BTreeMap<String, f64>, RunFailure> {
    let mut inputs = req.params.clone();
    for (name, value) in &req.fixed {
        if inputs.contains_key(name) {
            return Err(RunFailure::new(
                FailureKind::BadInput,
                format!("input {name:?} is given both as a swept parameter and as a fixed input"),
            ));
        }
        let Some(x) = value.as_f64() else {
            return Err(RunFailure::new(
                FailureKind::BadInput,
                format!(
                    "fixed input {name:?} is {value}; built-in model {:?} takes only numbers",
                    req.model
                ),
            ));
        };
        inputs.insert(name.clone(), x);
    }
    Ok(inputs)
}

/// Runs a built-in model on the blocking pool, honouring timeout and cancel
/// through a cooperative stop flag that the model checks as it runs.
async fn run_builtin_async(
    req: RunRequest,
    cancel: CancellationToken,
) -> Result<Metrics, RunFailure> {
    let inputs = builtin_inputs(&req)?;
    let stop = Arc::new(AtomicBool::new(false));
    let stop_in_task = Arc::clone(&stop);
    let model = req.model.clone();
    let seed = req.seed;
    // The model run itself; ends when the model returns, which it does soon
    // after `stop` is set.
    let mut task = tokio::task::spawn_blocking(move || {
        models::run_builtin_with_stop(&model, &inputs, seed, &stop_in_task)
    });
    let timeout = async {
        match req.timeout {
            Some(t) => tokio::time::sleep(t).await,
            None => std::future::pending().await,
        }
    };
    let failure = tokio::select! {
        joined = &mut task => return flatten_join(joined),
        () = timeout => RunFailure::new(
            FailureKind::Timeout,
            format!(
                "built-in model {:?} did not finish within {}",
                req.model,
                format_duration(req.timeout.unwrap_or_default())
            ),
        ),
        () = cancel.cancelled() => RunFailure::new(
            FailureKind::Cancelled,
            format!("run of built-in model {:?} was cancelled", req.model),
        ),
    };
    stop.store(true, Ordering::Relaxed);
    // Wait for the model to notice the flag so the CPU is free before we
    // report; its own result is discarded.
    let _ = task.await;
    Err(failure)
}

fn flatten_join(
    joined: Result<Result<Metrics, RunFailure>, tokio::task::JoinError>,
) -> Result<Metrics, RunFailure> {
    match joined {
        Ok(r) => r,
        Err(e) => Err(RunFailure::new(
            FailureKind::Exit,
            format!("built-in model stopped abnormally: {e}"),
        )),
    }
}

/// "2.5 s", "120 ms": for failure messages.
pub(crate) fn format_duration(d: Duration) -> String {
    if d < Duration::from_secs(1) {
        format!("{} ms", d.as_millis())
    } else {
        format!("{} s", d.as_secs_f64())
    }
}

/// Parses an operator's `NAME=CMDLINE` argument, splitting the command line
/// into words like a POSIX shell does (quotes and backslashes; no variable
/// expansion, no pipes: use `sh -c '...'` for those).
///
/// ```
/// let (name, words) = tessera_worker::runner::parse_command_arg("cells=python3 sim.py --fast").unwrap();
/// assert_eq!(name, "cells");
/// assert_eq!(words, ["python3", "sim.py", "--fast"]);
/// ```
pub fn parse_command_arg(arg: &str) -> Result<(String, Vec<String>), String> {
    let Some((name, cmdline)) = arg.split_once('=') else {
        return Err(format!(
            "command {arg:?} has no '=': write NAME=CMDLINE, e.g. cells='python3 sim.py'"
        ));
    };
    let name = name.trim();
    if name.is_empty() {
        return Err(format!(
            "command {arg:?} has an empty model name before '=': write NAME=CMDLINE"
        ));
    }
    if let Some(c) = name
        .chars()
        .find(|c| !(c.is_ascii_alphanumeric() || *c == '_' || *c == '-' || *c == '.'))
    {
        return Err(format!(
            "model name {name:?} contains {c:?}; use letters, digits, '_', '-' or '.'"
        ));
    }
    let Some(words) = shlex::split(cmdline) else {
        return Err(format!(
            "command line for {name:?} cannot be split into words (unclosed quote or trailing backslash?): {cmdline:?}"
        ));
    };
    if words.is_empty() {
        return Err(format!(
            "command line for {name:?} is empty: write NAME=CMDLINE, e.g. {name}='python3 sim.py'"
        ));
    }
    Ok((name.to_string(), words))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn failure_kind_names_round_trip() {
        for k in FailureKind::ALL {
            assert_eq!(FailureKind::parse(k.as_str()), Some(k));
        }
        assert_eq!(FailureKind::MissingMetric.as_str(), "missing_metric");
        assert_eq!(FailureKind::parse("nope"), None);
    }

    #[test]
    fn command_arg_splits_like_a_shell() {
        let (n, w) = parse_command_arg(r#"sim=sh -c 'echo "a b"; exit 0' x\ y"#).expect("valid");
        assert_eq!(n, "sim");
        assert_eq!(w, ["sh", "-c", r#"echo "a b"; exit 0"#, "x y"]);
    }

    #[test]
    fn command_arg_rejects_bad_input_with_a_message() {
        for (arg, needle) in [
            ("python3 sim.py", "no '='"),
            ("=python3", "empty model name"),
            ("a b=python3", "contains"),
            ("sim=", "empty"),
            ("sim=python3 'unclosed", "unclosed quote"),
        ] {
            let e = parse_command_arg(arg).expect_err(arg);
            assert!(e.contains(needle), "{arg}: {e}");
        }
    }

    #[test]
    fn check_metrics_names_missing_and_non_finite() {
        let mut m = Metrics::new();
        m.insert("a".into(), 1.0);
        let e = check_metrics(&m, &["a".into(), "b".into()]).expect_err("b missing");
        assert_eq!(e.kind, FailureKind::MissingMetric);
        assert!(e.reason.contains('b'));
        m.insert("c".into(), f64::NAN);
        let e = check_metrics(&m, &[]).expect_err("NaN");
        assert_eq!(e.kind, FailureKind::NonFinite);
        assert!(e.reason.contains("\"c\""));
    }
}
