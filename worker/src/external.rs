//! The runner for operator-configured external simulators.
//!
//! The contract (documented for simulator authors in `docs/simulators.md`):
//!
//! - inputs arrive three ways at once: a JSON object on stdin, environment
//!   variables `TESSERA_PARAM_<NAME>` (name upper-cased, other characters than
//!   letters, digits and `_` turned into `_`), and `{name}` placeholders in the
//!   command words; also `{seed}`, `{replicate}`, `{workdir}`, `{metrics}`,
//!   `{launch_dir}` and `TESSERA_SEED`, `TESSERA_REPLICATE`, `TESSERA_WORKDIR`,
//!   `TESSERA_METRICS`, `TESSERA_LAUNCH_DIR`, `TESSERA_MODEL`,
//!   `TESSERA_POINT_ID`, `TESSERA_EVALUATION_ID`. Whole numbers are written
//!   without a decimal point (`6`, not `6.0`) in all three;
//! - values are data, never code: a placeholder becomes part of one argument
//!   word, passed to the program without a shell; a command whose words hand
//!   code to an interpreter (`sh -c SCRIPT`, `python3 -c CODE`, `ssh HOST
//!   CMD`) may not hold placeholders there ([`ExternalCommand::new`] refuses
//!   it): such scripts read the environment variables instead;
//! - relative paths in the command words that name existing files are made
//!   absolute against the directory tessera was started in;
//! - the simulator reports metrics as a JSON object, either in the file
//!   `$TESSERA_METRICS` or on the last non-empty line of stdout (the file wins
//!   when it exists);
//! - each run starts in a fresh working directory `eval-<id>-XXXX` under the
//!   configured root, removed afterwards unless the operator keeps them;
//! - the command runs in its own process group; on timeout or cancel the
//!   whole group is killed, and when the command exits anything it left
//!   running in its group is killed too. What it printed is read when it
//!   exits, even if a detached descendant still holds its output open. With
//!   a guard ([`RunnerConfig`](crate::runner::RunnerConfig)`::guard`), descendants that
//!   left the group are killed too, and so is everything when the worker
//!   itself is killed (see [`crate::guard`]).

use std::collections::BTreeMap;
use std::io::ErrorKind;
use std::os::unix::process::ExitStatusExt;
use std::path::{Path, PathBuf};
use std::process::{ExitStatus, Stdio};
use std::time::Duration;

use serde_json::Value;
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWriteExt};
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;

use crate::request::{format_duration, RunRequest};
use tessera_models::outcome::{FailureKind, Metrics, RunFailure};

/// How much of the end of stderr a failure carries.
pub const STDERR_TAIL_BYTES: usize = 4096;
/// How much of the end of stdout is kept to find the metrics line.
const STDOUT_TAIL_BYTES: usize = 1 << 20;
/// How long to wait for stdout/stderr to close once the simulator has
/// exited and its group is killed; after that, what was read is used (a
/// process that left the group with `setsid` can hold the pipes open).
const PIPE_GRACE: Duration = Duration::from_millis(500);
/// How long a guard may take to clean up after it is asked to stop.
const GUARD_GRACE: Duration = Duration::from_secs(3);

/// One operator-configured command serving one model name.
#[derive(Clone, Debug)]
pub struct ExternalCommand {
    name: String,
    words: Vec<String>,
    workdir_root: PathBuf,
    keep_workdirs: bool,
    launch_dir: PathBuf,
    /// Words put before the command (a supervising process; see `crate::guard`).
    guard: Vec<String>,
}

/// Programs that run a word of their command line as code, the options
/// that introduce it, and the options that take a value (skipped when
/// looking for the code option).
const CODE_OPTIONS: &[(&str, &[&str], &[&str])] = &[
    ("sh", &["-c"], &["-o", "+o"]),
    (
        "bash",
        &["-c"],
        &["-o", "+o", "-O", "+O", "--rcfile", "--init-file"],
    ),
    ("dash", &["-c"], &["-o", "+o"]),
    ("zsh", &["-c"], &["-o", "+o"]),
    ("ksh", &["-c"], &["-o", "+o"]),
    ("mksh", &["-c"], &["-o", "+o"]),
    ("ash", &["-c"], &["-o", "+o"]),
    ("fish", &["-c", "--command"], &[]),
    ("python", &["-c"], &["-W", "-X"]),
    ("perl", &["-e", "-E"], &["-I", "-M"]),
    ("ruby", &["-e"], &["-I", "-r"]),
    (
        "node",
        &["-e", "--eval", "-p", "--print"],
        &["-r", "--require"],
    ),
    ("Rscript", &["-e"], &[]),
    ("julia", &["-e", "--eval"], &[]),
];

/// Programs whose remaining words are all code, or are joined into a
/// command for another shell (on another host, or as another user).
const ALL_CODE: &[&str] = &[
    "awk", "gawk", "mawk", "ssh", "su", "sudo", "srun", "xargs", "eval",
];

/// Programs that run the rest of the command line as a new command: their
/// options that take a value, and how many plain words they take before the
/// command (`timeout DURATION`, `taskset MASK`, `chrt PRIORITY`).
const WRAPPERS: &[(&str, &[&str], usize)] = &[
    ("env", &["-u", "--unset", "-C", "--chdir", "-S"], 0),
    ("nice", &["-n", "--adjustment"], 0),
    ("nohup", &[], 0),
    ("setsid", &[], 0),
    ("stdbuf", &["-i", "-o", "-e"], 0),
    ("time", &["-f", "-o"], 0),
    ("timeout", &["-s", "-k", "--signal", "--kill-after"], 1),
    ("ionice", &["-c", "-n", "-p"], 0),
    ("taskset", &[], 1),
    ("chrt", &[], 1),
    ("exec", &["-a"], 0),
];

/// Placeholders the worker fills in besides the inputs.
const BUILT_IN_FIELDS: &[&str] = &["seed", "replicate", "workdir", "metrics", "launch_dir"];

/// The `{name}` placeholders in a word (names of letters, digits, `_`; a
/// shell's own `${name}` is not one).
fn placeholders(word: &str) -> Vec<String> {
    let mut out = Vec::new();
    let bytes = word.as_bytes();
    let mut at = 0;
    while let Some(open) = word[at..].find('{').map(|o| o + at) {
        let after = &word[open + 1..];
        if let Some(close) = after.find('}') {
            let name = &after[..close];
            let preceded_by_dollar = open > 0 && bytes[open - 1] == b'$';
            if !name.is_empty()
                && !preceded_by_dollar
                && name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_')
            {
                out.push(name.to_string());
            }
        }
        at = open + 1;
    }
    out
}

/// A program word's name without directories and version digits
/// (`/usr/bin/python3.11` -> `python`).
fn program_name(word: &str) -> String {
    let file = Path::new(word)
        .file_name()
        .map_or_else(|| word.to_string(), |f| f.to_string_lossy().into_owned());
    file.trim_end_matches(|c: char| c.is_ascii_digit() || c == '.')
        .to_string()
}

/// The indices of the words that a program of `words` runs as code (or
/// hands to another shell), where placeholders are refused.
fn code_words(words: &[String]) -> Vec<usize> {
    let mut i = 0;
    // Wrappers run the rest as a new command line.
    while let Some((name, valued, plain)) = words
        .get(i)
        .and_then(|w| WRAPPERS.iter().find(|(n, _, _)| *n == program_name(w)))
    {
        i += 1;
        while let Some(w) = words.get(i) {
            if valued.contains(&w.as_str()) {
                i += 2;
            } else if w.starts_with('-') || (*name == "env" && w.contains('=')) {
                i += 1;
            } else {
                break;
            }
        }
        i += plain;
    }
    if i >= words.len() {
        return Vec::new();
    }
    let prog = program_name(&words[i]);
    if ALL_CODE.contains(&prog.as_str()) {
        return (i + 1..words.len()).collect();
    }
    let Some((_, code_opts, valued)) = CODE_OPTIONS.iter().find(|(p, _, _)| *p == prog) else {
        return Vec::new();
    };
    let mut j = i + 1;
    while j < words.len() {
        let w = words[j].as_str();
        if code_opts.contains(&w)
            || (w.starts_with('-')
                && !w.starts_with("--")
                && code_opts
                    .iter()
                    .any(|o| o.len() == 2 && w.len() > 2 && w.ends_with(&o[1..])))
        {
            // The code; words after it reach the script as $0, $1, ...: data.
            return if j + 1 < words.len() {
                vec![j + 1]
            } else {
                Vec::new()
            };
        }
        if valued.contains(&w) {
            j += 2;
            continue;
        }
        if !w.starts_with('-') && !w.starts_with('+') {
            // A script file: its arguments are data.
            break;
        }
        j += 1;
    }
    Vec::new()
}

/// Why an operator's command cannot be used.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("command for model {model:?}: {message}")]
pub struct CommandError {
    /// The model name the command serves.
    pub model: String,
    /// What is wrong and what to do instead.
    pub message: String,
}

/// Kills a process group when dropped (the run future was dropped, or the
/// run ended), so no simulator outlives its run.
struct GroupKill {
    pgid: Option<rustix::process::Pid>,
}

impl GroupKill {
    fn kill(&mut self) {
        if let Some(pid) = self.pgid.take() {
            // ESRCH (nothing left in the group) is the normal case after a
            // clean exit.
            let _ = rustix::process::kill_process_group(pid, rustix::process::Signal::KILL);
        }
    }
}

impl Drop for GroupKill {
    fn drop(&mut self) {
        self.kill();
    }
}

/// How the wait for the process ended.
enum Ending {
    Exited(ExitStatus),
    TimedOut(Duration),
    Cancelled,
}

impl ExternalCommand {
    /// A command serving model `name`; `words[0]` is the program.
    ///
    /// The run starts in its own directory, so relative paths in the words
    /// are resolved against `launch_dir` (the directory the operator started
    /// tessera in) now: see [`resolve_relative_words`].
    ///
    /// Refuses placeholders in a word that a program runs as code (the
    /// script of `sh -c`, the code of `python3 -c`, everything after
    /// `ssh HOST`): a value pasted there could run as a command. Such
    /// scripts read `$TESSERA_PARAM_<NAME>` (quoted) instead.
    pub fn new(
        name: String,
        words: Vec<String>,
        workdir_root: PathBuf,
        keep_workdirs: bool,
        launch_dir: PathBuf,
        guard: Vec<String>,
    ) -> Result<Self, CommandError> {
        if words.first().is_none_or(|w| w.trim().is_empty()) {
            return Err(CommandError {
                model: name,
                message: "the command is empty; give the program and its arguments".into(),
            });
        }
        for i in code_words(&words) {
            let found = placeholders(&words[i]);
            if let Some(p) = found.first() {
                let var = if BUILT_IN_FIELDS.contains(&p.as_str()) {
                    format!("\"$TESSERA_{}\"", p.to_ascii_uppercase())
                } else {
                    format!("\"${}\"", env_name(p))
                };
                return Err(CommandError {
                    model: name,
                    message: format!(
                        "{{{p}}} appears in {:?}, which {} runs as code: a value put there could run as a command. \
                         Use the environment variable instead, quoted: {var} (every input is also in TESSERA_PARAM_<NAME>)",
                        words[i], words[0]
                    ),
                });
            }
        }
        let words = resolve_relative_words(&words, &launch_dir);
        // The simulator runs elsewhere: paths handed to it must be absolute.
        let workdir_root = launch_dir.join(workdir_root);
        Ok(ExternalCommand {
            name,
            words,
            workdir_root,
            keep_workdirs,
            launch_dir,
            guard,
        })
    }

    /// The model name this command serves.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// The command words, before placeholders are filled in.
    pub fn words(&self) -> &[String] {
        &self.words
    }

    /// Runs the command once for `req`; see the module docs for the contract.
    pub async fn run(
        &self,
        req: &RunRequest,
        cancel: &CancellationToken,
    ) -> Result<Metrics, RunFailure> {
        let inputs = merged_inputs(req)?;
        if self.words.is_empty() {
            return Err(RunFailure::new(
                FailureKind::Spawn,
                format!("command for model {:?} is empty", self.name),
            ));
        }
        std::fs::create_dir_all(&self.workdir_root).map_err(|e| {
            RunFailure::new(
                FailureKind::Spawn,
                format!(
                    "cannot create the run directory root {}: {e}",
                    self.workdir_root.display()
                ),
            )
        })?;
        let dir = tempfile::Builder::new()
            .prefix(&format!("eval-{}-", req.evaluation_id))
            .tempdir_in(&self.workdir_root)
            .map_err(|e| {
                RunFailure::new(
                    FailureKind::Spawn,
                    format!(
                        "cannot create a run directory under {}: {e}",
                        self.workdir_root.display()
                    ),
                )
            })?;
        let result = self.run_in(req, &inputs, dir.path(), cancel).await;
        if self.keep_workdirs {
            let kept = dir.keep();
            tracing::info!(model = %self.name, dir = %kept.display(), "kept run directory");
        } else if let Err(e) = dir.close() {
            tracing::warn!(model = %self.name, error = %e, "could not remove run directory");
        }
        result
    }

    async fn run_in(
        &self,
        req: &RunRequest,
        inputs: &BTreeMap<String, Value>,
        workdir: &Path,
        cancel: &CancellationToken,
    ) -> Result<Metrics, RunFailure> {
        let metrics_path = workdir.join("metrics.json");
        let mut fields: BTreeMap<String, String> = inputs
            .iter()
            .map(|(k, v)| (k.clone(), value_text(v)))
            .collect();
        fields.insert("seed".into(), req.seed.to_string());
        fields.insert("replicate".into(), req.replicate.to_string());
        fields.insert("workdir".into(), workdir.display().to_string());
        fields.insert("metrics".into(), metrics_path.display().to_string());
        fields.insert("launch_dir".into(), self.launch_dir.display().to_string());
        let code = code_words(&self.words);
        let words: Vec<String> = self
            .words
            .iter()
            .enumerate()
            .map(|(i, w)| {
                if code.contains(&i) {
                    w.clone()
                } else {
                    fill(w, &fields)
                }
            })
            .collect();
        let argv: Vec<&String> = self.guard.iter().chain(words.iter()).collect();

        let mut cmd = tokio::process::Command::new(argv[0]);
        cmd.args(&argv[1..])
            .current_dir(workdir)
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .process_group(0)
            .kill_on_drop(true)
            .env("TESSERA_MODEL", &req.model)
            .env("TESSERA_SEED", req.seed.to_string())
            .env("TESSERA_REPLICATE", req.replicate.to_string())
            .env("TESSERA_POINT_ID", req.point_id.to_string())
            .env("TESSERA_EVALUATION_ID", req.evaluation_id.to_string())
            .env("TESSERA_WORKDIR", workdir)
            .env("TESSERA_METRICS", &metrics_path)
            .env("TESSERA_LAUNCH_DIR", &self.launch_dir);
        for (k, v) in inputs {
            cmd.env(env_name(k), value_text(v));
        }
        let stdin_json = serde_json::json!({
            "model": req.model,
            "inputs": inputs_json(inputs),
            "seed": req.seed,
            "replicate": req.replicate,
            "point_id": req.point_id,
            "evaluation_id": req.evaluation_id,
            "workdir": workdir.display().to_string(),
            "metrics_file": metrics_path.display().to_string(),
        });

        let mut child = cmd.spawn().map_err(|e| spawn_failure(&words[0], &e))?;
        let mut group = GroupKill {
            pgid: child
                .id()
                .and_then(|id| i32::try_from(id).ok())
                .and_then(rustix::process::Pid::from_raw),
        };

        // Feeds the JSON inputs to stdin and closes it; ends when written or
        // when the simulator closes its stdin (a broken pipe is not an error:
        // many simulators never read stdin).
        let stdin_task: Option<JoinHandle<()>> = child.stdin.take().map(|mut stdin| {
            let mut bytes = stdin_json.to_string().into_bytes();
            bytes.push(b'\n');
            tokio::spawn(async move {
                let _ = stdin.write_all(&bytes).await;
                let _ = stdin.shutdown().await;
            })
        });
        // Drain stdout and stderr concurrently so a chatty simulator never
        // blocks on a full pipe; each ends at end-of-file.
        let stdout_buf = Tail::new(STDOUT_TAIL_BYTES);
        let stderr_buf = Tail::new(STDERR_TAIL_BYTES);
        let stdout_task = child
            .stdout
            .take()
            .map(|s| tokio::spawn(read_tail(s, stdout_buf.clone())));
        let stderr_task = child
            .stderr
            .take()
            .map(|s| tokio::spawn(read_tail(s, stderr_buf.clone())));

        let timeout = async {
            match req.timeout {
                Some(t) => {
                    tokio::time::sleep(t).await;
                    t
                }
                None => std::future::pending().await,
            }
        };
        let ending = tokio::select! {
            status = child.wait() => match status {
                Ok(s) => Ending::Exited(s),
                Err(e) => {
                    group.kill();
                    return Err(RunFailure::new(FailureKind::Exit, format!("lost track of the simulator process: {e}")));
                }
            },
            t = timeout => Ending::TimedOut(t),
            () = cancel.cancelled() => Ending::Cancelled,
        };
        // Whatever happened, nothing of this run may keep running. A guard
        // is first asked to stop (it kills the run's detached descendants
        // too), then the group is killed.
        if !matches!(ending, Ending::Exited(_)) && !self.guard.is_empty() {
            if let Some(pid) = group.pgid {
                let _ = rustix::process::kill_process(pid, rustix::process::Signal::TERM);
                let _ = tokio::time::timeout(GUARD_GRACE, child.wait()).await;
            }
        }
        group.kill();
        if !matches!(ending, Ending::Exited(_)) {
            // The group kill covers the child; this covers a failed group kill.
            let _ = child.start_kill();
            let _ = child.wait().await;
        }
        if let Some(t) = stdin_task {
            t.abort();
        }
        // Wait briefly for end of output; a detached descendant may hold the
        // pipes open, so after that what was read so far is used.
        let stdout = collect(stdout_task, &stdout_buf).await;
        let stderr_bytes = collect(stderr_task, &stderr_buf).await;
        let stderr_tail = tail_text(&stderr_bytes, STDERR_TAIL_BYTES);
        let fail = |kind, reason: String| RunFailure {
            kind,
            reason,
            stderr_tail: stderr_tail.clone(),
        };

        let status = match ending {
            Ending::TimedOut(t) => {
                return Err(fail(
                    FailureKind::Timeout,
                    format!(
                        "{:?} did not finish within {}; its process group was killed",
                        self.name,
                        format_duration(t)
                    ),
                ))
            }
            Ending::Cancelled => {
                return Err(fail(
                    FailureKind::Cancelled,
                    format!(
                        "run of {:?} was cancelled; its process group was killed",
                        self.name
                    ),
                ))
            }
            Ending::Exited(s) => s,
        };
        if !status.success() {
            let guard_said = String::from_utf8_lossy(&stderr_bytes)
                .lines()
                .find(|l| l.starts_with(crate::guard::CANNOT_START))
                .map(str::to_string);
            if let (false, Some(line), Some(126 | 127)) =
                (self.guard.is_empty(), guard_said, status.code())
            {
                let e = std::io::Error::new(
                    if status.code() == Some(127) {
                        ErrorKind::NotFound
                    } else {
                        ErrorKind::PermissionDenied
                    },
                    line,
                );
                return Err(RunFailure {
                    stderr_tail: stderr_tail.clone(),
                    ..spawn_failure(&words[0], &e)
                });
            }
            return Err(fail(FailureKind::Exit, describe_exit(&words[0], status)));
        }
        let (source, text) = match std::fs::read_to_string(&metrics_path) {
            Ok(t) => (format!("metrics file {}", metrics_path.display()), t),
            Err(e) if e.kind() == ErrorKind::NotFound => {
                let out = String::from_utf8_lossy(&stdout);
                match out.lines().rev().find(|l| !l.trim().is_empty()) {
                    Some(line) => ("last line of stdout".to_string(), line.to_string()),
                    None => {
                        return Err(fail(
                            FailureKind::NoMetrics,
                            format!(
                                "{:?} exited normally but printed nothing on stdout and wrote no metrics file; \
                                 print a JSON object such as {{\"score\": 1.5}} as the last line",
                                self.name
                            ),
                        ))
                    }
                }
            }
            Err(e) => {
                return Err(fail(
                    FailureKind::NoMetrics,
                    format!("cannot read metrics file {}: {e}", metrics_path.display()),
                ))
            }
        };
        parse_metrics(&text).map_err(|(kind, why)| fail(kind, format!("{source}: {why}")))
    }
}

/// Makes relative paths in command words absolute against `base`, because
/// the command runs in a fresh directory of its own. A word is resolved when
/// `base/word` exists and the word is not absolute, not an option (`-x`) and
/// holds no placeholder; the program word (the first) only when it contains a
/// `/`, as a shell would look a bare name up on `PATH`. Paths inside a
/// `sh -c '...'` script are not seen: use `{launch_dir}` or
/// `$TESSERA_LAUNCH_DIR` there.
pub fn resolve_relative_words(words: &[String], base: &Path) -> Vec<String> {
    words
        .iter()
        .enumerate()
        .map(|(i, w)| {
            let eligible = !w.is_empty()
                && !w.starts_with('/')
                && !w.starts_with('-')
                && !w.contains('{')
                && (i > 0 || w.contains('/'));
            if eligible && base.join(w).exists() {
                base.join(w).display().to_string()
            } else {
                w.clone()
            }
        })
        .collect()
}

/// Params and fixed inputs in one map; a name in both is a bad input.
fn merged_inputs(req: &RunRequest) -> Result<BTreeMap<String, Value>, RunFailure> {
    let mut inputs: BTreeMap<String, Value> = BTreeMap::new();
    for (k, v) in &req.params {
        let value = serde_json::Number::from_f64(*v)
            .map(Value::Number)
            .ok_or_else(|| {
                RunFailure::new(
                    FailureKind::BadInput,
                    format!("parameter {k:?} is {v}, not a finite number"),
                )
            })?;
        inputs.insert(k.clone(), value);
    }
    for (k, v) in &req.fixed {
        if inputs.insert(k.clone(), v.clone()).is_some() {
            return Err(RunFailure::new(
                FailureKind::BadInput,
                format!("input {k:?} is given both as a swept parameter and as a fixed input"),
            ));
        }
    }
    Ok(inputs)
}

/// `TESSERA_PARAM_` + the name upper-cased, other characters than ASCII
/// letters, digits and `_` replaced by `_`.
pub fn env_name(name: &str) -> String {
    let tail: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' {
                c.to_ascii_uppercase()
            } else {
                '_'
            }
        })
        .collect();
    format!("TESSERA_PARAM_{tail}")
}

/// How a value is written into an environment variable or a command word:
/// numbers in plain or exponent notation that every language parses (whole
/// numbers without a decimal point), strings as they are, anything else as
/// JSON text.
fn value_text(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        Value::Number(n) => match n.as_f64() {
            Some(x) if n.is_f64() => format_number(x),
            _ => n.to_string(),
        },
        other => other.to_string(),
    }
}

/// Largest whole number written as an integer: beyond 2^53 not every
/// whole double is exactly an integer in every language.
const MAX_EXACT_WHOLE: f64 = 9_007_199_254_740_992.0;

/// A number as JSON: whole numbers as integers (`6`, like the environment
/// variables and placeholders), others as the shortest exact decimal.
fn number_json(x: f64) -> Value {
    if x.fract() == 0.0 && x.abs() <= MAX_EXACT_WHOLE {
        Value::from(x as i64)
    } else {
        serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)
    }
}

/// The inputs for the stdin JSON, whole numbers written as integers.
fn inputs_json(inputs: &BTreeMap<String, Value>) -> Value {
    Value::Object(
        inputs
            .iter()
            .map(|(k, v)| {
                let v = match v {
                    Value::Number(n) if n.is_f64() => n.as_f64().map_or(Value::Null, number_json),
                    other => other.clone(),
                };
                (k.clone(), v)
            })
            .collect(),
    )
}

/// How a number is written for a simulator: exactly, in a form every
/// language parses (see [`tessera_models::text::exact`]).
pub fn format_number(x: f64) -> String {
    tessera_models::text::exact(x)
}

/// Replaces `{key}` by its value for every known key; other braces stay.
fn fill(word: &str, fields: &BTreeMap<String, String>) -> String {
    let mut out = String::with_capacity(word.len());
    let mut rest = word;
    while let Some(open) = rest.find('{') {
        out.push_str(&rest[..open]);
        let after = &rest[open + 1..];
        match after.find('}') {
            Some(close) if fields.contains_key(&after[..close]) => {
                out.push_str(&fields[&after[..close]]);
                rest = &after[close + 1..];
            }
            _ => {
                out.push('{');
                rest = after;
            }
        }
    }
    out.push_str(rest);
    out
}

fn spawn_failure(program: &str, e: &std::io::Error) -> RunFailure {
    let reason = match e.kind() {
        ErrorKind::NotFound => format!(
            "command not found: {program:?} (not on PATH and not an existing file; give the full path)"
        ),
        ErrorKind::PermissionDenied => {
            format!("cannot start {program:?}: permission denied (is it executable? chmod +x)")
        }
        _ => format!("cannot start {program:?}: {e}"),
    };
    RunFailure::new(FailureKind::Spawn, reason)
}

fn describe_exit(program: &str, status: ExitStatus) -> String {
    if let Some(code) = status.code() {
        format!("{program:?} exited with code {code}")
    } else if let Some(sig) = status.signal() {
        format!(
            "{program:?} was killed by signal {sig}{}",
            signal_name(sig)
                .map(|n| format!(" ({n})"))
                .unwrap_or_default()
        )
    } else {
        format!("{program:?} ended abnormally: {status}")
    }
}

fn signal_name(sig: i32) -> Option<&'static str> {
    Some(match sig {
        1 => "SIGHUP",
        2 => "SIGINT",
        3 => "SIGQUIT",
        4 => "SIGILL",
        6 => "SIGABRT",
        7 => "SIGBUS",
        8 => "SIGFPE",
        9 => "SIGKILL",
        11 => "SIGSEGV",
        13 => "SIGPIPE",
        14 => "SIGALRM",
        15 => "SIGTERM",
        _ => return None,
    })
}

/// The last bytes read from a pipe, shared between the reading task and the
/// run, so that what was read is available even if the pipe never closes.
#[derive(Clone, Debug)]
struct Tail {
    cap: usize,
    /// Locked briefly by the reader per chunk and once by the run at the end.
    buf: std::sync::Arc<std::sync::Mutex<Vec<u8>>>,
}

impl Tail {
    fn new(cap: usize) -> Self {
        Tail {
            cap,
            buf: std::sync::Arc::new(std::sync::Mutex::new(Vec::new())),
        }
    }

    fn push(&self, chunk: &[u8]) {
        let mut b = self.buf.lock().unwrap_or_else(|p| p.into_inner());
        b.extend_from_slice(chunk);
        if b.len() > 2 * self.cap {
            let cut = b.len() - self.cap;
            b.drain(..cut);
        }
    }

    fn take(&self) -> Vec<u8> {
        let mut b = std::mem::take(&mut *self.buf.lock().unwrap_or_else(|p| p.into_inner()));
        if b.len() > self.cap {
            let cut = b.len() - self.cap;
            b.drain(..cut);
        }
        b
    }
}

/// Reads `r` to its end into `tail`.
async fn read_tail<R: AsyncRead + Unpin>(mut r: R, tail: Tail) {
    let mut chunk = vec![0u8; 8192];
    loop {
        match r.read(&mut chunk).await {
            Ok(0) | Err(_) => break,
            Ok(n) => tail.push(&chunk[..n]),
        }
    }
}

/// What a reader collected: after end of output, or after [`PIPE_GRACE`].
async fn collect(task: Option<JoinHandle<()>>, tail: &Tail) -> Vec<u8> {
    if let Some(mut task) = task {
        if tokio::time::timeout(PIPE_GRACE, &mut task).await.is_err() {
            task.abort();
        }
    }
    tail.take()
}

/// The last `cap` bytes as text, cut at a character boundary.
fn tail_text(bytes: &[u8], cap: usize) -> String {
    let start = bytes.len().saturating_sub(cap);
    let text = String::from_utf8_lossy(&bytes[start..]);
    // A cut through a multi-byte character shows as U+FFFD at the start.
    text.trim_start_matches('\u{FFFD}').to_string()
}

/// A JSON object's entries in order, duplicates kept (serde_json's own map
/// would keep only the last of two equal keys).
struct Entries(Vec<(String, Value)>);

impl<'de> serde::Deserialize<'de> for Entries {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Visit;
        impl<'de> serde::de::Visitor<'de> for Visit {
            type Value = Entries;
            fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("a JSON object of metrics")
            }
            fn visit_map<A: serde::de::MapAccess<'de>>(
                self,
                mut m: A,
            ) -> Result<Entries, A::Error> {
                let mut out = Vec::new();
                while let Some((k, v)) = m.next_entry::<String, Value>()? {
                    out.push((k, v));
                }
                Ok(Entries(out))
            }
        }
        d.deserialize_map(Visit)
    }
}

/// Parses a metrics object: every value must be a finite number, every
/// name given once. `NaN`, `Infinity` and `-Infinity` (which Python's `json`
/// writes although JSON has no such tokens) and `null` are reported as
/// non-finite. Numbers are read to the nearest double, so a value comes back
/// out of the store bit for bit.
pub fn parse_metrics(text: &str) -> Result<Metrics, (FailureKind, String)> {
    let cleaned = non_finite_to_null(text.trim());
    let entries: Entries = serde_json::from_str(&cleaned).map_err(|e| {
        (
            FailureKind::NoMetrics,
            format!(
                "not a JSON object of metrics ({e}): {:?}",
                shorten(text.trim(), 200)
            ),
        )
    })?;
    let mut metrics = Metrics::new();
    for (k, v) in entries.0 {
        let x = match v {
            Value::Number(n) => match n.as_f64() {
                Some(x) if x.is_finite() => x,
                _ => {
                    return Err((
                        FailureKind::NonFinite,
                        format!("metric {k:?} is {n}, not a finite number"),
                    ))
                }
            },
            Value::Null => {
                return Err((
                    FailureKind::NonFinite,
                    format!("metric {k:?} is NaN, Infinity or null, not a finite number"),
                ))
            }
            other => {
                return Err((
                    FailureKind::NoMetrics,
                    format!("metric {k:?} is {other}; metrics must be numbers"),
                ))
            }
        };
        if metrics.insert(k.clone(), x).is_some() {
            return Err((
                FailureKind::NoMetrics,
                format!("metric {k:?} is given twice; give each metric once"),
            ));
        }
    }
    Ok(metrics)
}

/// Replaces the bare tokens `NaN`, `Infinity`, `-Infinity` outside string
/// literals by `null`. Hand-written: serde_json rejects these tokens and no
/// maintained crate accepts exactly this extension.
fn non_finite_to_null(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    let mut in_string = false;
    let mut escaped = false;
    let mut i = 0;
    let bytes = text.as_bytes();
    while i < bytes.len() {
        let c = bytes[i];
        if in_string {
            if escaped {
                escaped = false;
            } else if c == b'\\' {
                escaped = true;
            } else if c == b'"' {
                in_string = false;
            }
        } else if c == b'"' {
            in_string = true;
        } else {
            let rest = &text[i..];
            let token = ["-Infinity", "Infinity", "NaN"]
                .into_iter()
                .find(|t| rest.starts_with(t));
            if let Some(t) = token {
                out.push_str("null");
                i += t.len();
                continue;
            }
        }
        // Copy one whole character (the text is valid UTF-8).
        let len = utf8_len(c);
        out.push_str(&text[i..i + len]);
        i += len;
    }
    out
}

fn utf8_len(first: u8) -> usize {
    match first {
        0x00..=0x7F => 1,
        0xC0..=0xDF => 2,
        0xE0..=0xEF => 3,
        _ => 4,
    }
}

fn shorten(s: &str, max: usize) -> String {
    if s.len() <= max {
        return s.to_string();
    }
    let mut end = max;
    while !s.is_char_boundary(end) {
        end -= 1;
    }
    format!("{}...", &s[..end])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn placeholders_fill_known_keys_only() {
        let mut f = BTreeMap::new();
        f.insert("seed".to_string(), "7".to_string());
        f.insert("x1".to_string(), "0.5".to_string());
        assert_eq!(fill("--seed={seed}", &f), "--seed=7");
        assert_eq!(fill("{x1}{x1}", &f), "0.50.5");
        assert_eq!(fill("awk '{print $1}' {x2}", &f), "awk '{print $1}' {x2}");
        assert_eq!(fill("{", &f), "{");
        assert_eq!(fill("a{{seed}}", &f), "a{7}");
    }

    fn w(words: &[&str]) -> Vec<String> {
        words.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn code_words_are_found_behind_shells_interpreters_and_wrappers() {
        assert_eq!(
            code_words(&w(&["sh", "-c", "echo {x}", "arg0", "{x}"])),
            [2]
        );
        assert_eq!(code_words(&w(&["/bin/bash", "-ec", "run {x}"])), [2]);
        assert_eq!(
            code_words(&w(&["bash", "-o", "pipefail", "-c", "a | b"])),
            [4]
        );
        assert_eq!(code_words(&w(&["python3.11", "-c", "print({x})"])), [2]);
        assert_eq!(code_words(&w(&["env", "A=1", "-i", "sh", "-c", "x"])), [5]);
        assert_eq!(
            code_words(&w(&["timeout", "60", "nice", "-n", "5", "sh", "-c", "x"])),
            [7]
        );
        assert_eq!(code_words(&w(&["ssh", "node7", "./sim", "{x}"])), [1, 2, 3]);
        assert_eq!(code_words(&w(&["awk", "{print $1}", "{x}"])), [1, 2]);
        // Scripts and programs get their arguments as data.
        assert!(code_words(&w(&["python3", "sim.py", "-c", "{x}"])).is_empty());
        assert!(code_words(&w(&["sh", "run.sh", "{x}"])).is_empty());
        assert!(code_words(&w(&["./mysim", "--mode", "{x}"])).is_empty());
    }

    #[test]
    fn placeholders_in_code_are_refused_with_the_variable_to_use() {
        let new = |words: &[&str]| {
            ExternalCommand::new(
                "sim".into(),
                w(words),
                PathBuf::from("/tmp"),
                false,
                PathBuf::from("/tmp"),
                Vec::new(),
            )
        };
        let e = new(&["sh", "-c", "./sim --mode {mode} > out"]).expect_err("code");
        assert!(
            e.message.contains("\"$TESSERA_PARAM_MODE\""),
            "{}",
            e.message
        );
        let e = new(&["sh", "-c", "./sim --seed {seed}"]).expect_err("code");
        assert!(e.message.contains("\"$TESSERA_SEED\""), "{}", e.message);
        // The shell's own ${VAR} is not a placeholder; data words may hold them.
        assert!(new(&["sh", "-c", "./sim \"${TESSERA_PARAM_MODE}\"", "{mode}"]).is_ok());
        assert!(new(&["./sim", "--mode", "{mode}"]).is_ok());
        assert!(new(&[""]).is_err());
    }

    #[test]
    fn whole_numbers_are_integers_in_every_channel() {
        assert_eq!(number_json(6.0), serde_json::json!(6));
        assert_eq!(number_json(-0.5), serde_json::json!(-0.5));
        assert_eq!(number_json(1e300), serde_json::json!(1e300));
        assert_eq!(value_text(&serde_json::json!(6.0)), "6");
        let inputs = BTreeMap::from([("n".to_string(), serde_json::json!(6.0))]);
        assert_eq!(inputs_json(&inputs).to_string(), r#"{"n":6}"#);
    }

    #[test]
    fn relative_paths_that_exist_are_made_absolute() {
        let dir = tempfile::tempdir().expect("tempdir");
        std::fs::create_dir(dir.path().join("sims")).expect("mkdir");
        std::fs::write(dir.path().join("sims/a.py"), "").expect("write");
        std::fs::write(dir.path().join("run.sh"), "").expect("write");
        let words: Vec<String> = ["python3", "sims/a.py", "-v", "missing.txt", "{x}", "/abs"]
            .map(String::from)
            .to_vec();
        let out = resolve_relative_words(&words, dir.path());
        let abs = dir.path().join("sims/a.py").display().to_string();
        assert_eq!(
            out,
            ["python3", abs.as_str(), "-v", "missing.txt", "{x}", "/abs"]
        );
        // A bare program name is looked up on PATH, as by a shell...
        let out = resolve_relative_words(&["run.sh".to_string()], dir.path());
        assert_eq!(out, ["run.sh"]);
        // ...but ./run.sh names the file.
        let out = resolve_relative_words(&["./run.sh".to_string()], dir.path());
        assert_eq!(out, [dir.path().join("./run.sh").display().to_string()]);
    }

    #[test]
    fn env_names_are_upper_case_and_safe() {
        assert_eq!(env_name("height_sd"), "TESSERA_PARAM_HEIGHT_SD");
        assert_eq!(env_name("k.on-rate"), "TESSERA_PARAM_K_ON_RATE");
    }

    #[test]
    fn numbers_are_written_so_any_language_parses_them() {
        assert_eq!(format_number(0.5), "0.5");
        assert_eq!(format_number(3.0), "3");
        assert_eq!(format_number(-2.25e-9), "-2.25e-9");
        assert_eq!(format_number(1e300), "1e300");
        for x in [0.1, 1.0 / 3.0, 6.02e23, -1e-12] {
            assert_eq!(format_number(x).parse::<f64>().ok(), Some(x));
        }
    }

    #[test]
    fn metrics_parse_numbers_and_flag_the_rest() {
        let m = parse_metrics(r#"{"a": 1, "b": -2.5e3}"#).expect("valid");
        assert_eq!(m["a"], 1.0);
        assert_eq!(m["b"], -2500.0);
        // Python's json.dumps(float('nan')) writes NaN.
        let e = parse_metrics(r#"{"a": NaN, "s": "NaN"}"#).expect_err("NaN");
        assert_eq!(e.0, FailureKind::NonFinite);
        let e = parse_metrics(r#"{"a": -Infinity}"#).expect_err("inf");
        assert_eq!(e.0, FailureKind::NonFinite);
        let e = parse_metrics(r#"{"a": "x"}"#).expect_err("string");
        assert_eq!(e.0, FailureKind::NoMetrics);
        let e = parse_metrics("done").expect_err("not json");
        assert_eq!(e.0, FailureKind::NoMetrics);
        let e = parse_metrics("[1, 2]").expect_err("array");
        assert_eq!(e.0, FailureKind::NoMetrics);
        let e = parse_metrics(r#"{"a": 1, "b": 2, "a": 3}"#).expect_err("duplicate");
        assert_eq!(e.0, FailureKind::NoMetrics);
        assert!(e.1.contains("\"a\" is given twice"), "{}", e.1);
    }

    #[test]
    fn stderr_tail_is_cut_at_a_character_boundary() {
        let s = "é".repeat(3000); // 6000 bytes
        let t = tail_text(s.as_bytes(), STDERR_TAIL_BYTES);
        assert!(t.len() <= STDERR_TAIL_BYTES);
        assert!(t.chars().all(|c| c == 'é'));
        assert_eq!(t.len(), STDERR_TAIL_BYTES);
    }
}
