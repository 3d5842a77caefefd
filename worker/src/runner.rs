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
use std::future::Future;
use std::path::PathBuf;
use std::pin::Pin;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use tokio_util::sync::CancellationToken;

use crate::external::{CommandError, ExternalCommand};
pub use crate::request::{format_duration, RunRequest};
use tessera_models as models;
pub use tessera_models::outcome::{FailureKind, Metrics, RunFailure};

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
    /// Words run before each external command: a supervising process that
    /// cleans up after the run (see [`crate::guard`]); empty for none.
    pub guard: Vec<String>,
}

impl Default for RunnerConfig {
    /// No external commands; run directories under the system temp dir.
    fn default() -> Self {
        RunnerConfig {
            commands: Vec::new(),
            workdir_root: std::env::temp_dir().join("tessera-runs"),
            keep_workdirs: false,
            guard: Vec::new(),
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
    /// earlier one; a command named like a built-in model shadows it. A
    /// command with placeholders where a program runs code is refused (see
    /// [`ExternalCommand::new`]).
    pub fn new(cfg: RunnerConfig) -> Result<Self, CommandError> {
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
                cfg.guard.clone(),
            )?;
            if commands.insert(name.clone(), cmd).is_some() {
                tracing::warn!(model = %name, "command given twice; the last one is used");
            }
        }
        Ok(Runners { commands })
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
