//! Starting, stopping and reading `tessera` processes for the tests.

use std::io::Read;
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Output, Stdio};
use std::time::{Duration, Instant};

/// The `tessera` binary built for these tests.
pub fn tessera() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tessera"))
}

/// Runs `tessera ARGS` in `dir` to completion and returns what it printed.
pub fn run_in(dir: &Path, args: &[&str]) -> Output {
    tessera()
        .args(args)
        .current_dir(dir)
        .output()
        .expect("start tessera")
}

/// Captured output as text.
pub fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

/// Asserts that a command succeeded, showing everything it printed if not.
pub fn ok(out: &Output, what: &str) {
    assert!(
        out.status.success(),
        "{what} failed ({}):\nstdout:\n{}\nstderr:\n{}",
        out.status,
        text(&out.stdout),
        text(&out.stderr)
    );
}

/// A free loopback port (bound, read, released).
pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free loopback port")
}

/// A child process whose stderr goes to a file, killed when dropped.
pub struct Proc {
    pub child: Child,
    pub log: PathBuf,
    pub name: String,
}

impl Proc {
    /// Starts `cmd` with stderr (and stdout) captured in `dir/name.log`.
    pub fn start(mut cmd: Command, dir: &Path, name: &str) -> Proc {
        let log = dir.join(format!("{name}.log"));
        let file = std::fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&log)
            .expect("log file");
        let out = file.try_clone().expect("log file clone");
        cmd.stdout(Stdio::from(out))
            .stderr(Stdio::from(file))
            .stdin(Stdio::null());
        let child = cmd.spawn().expect("start tessera");
        Proc {
            child,
            log,
            name: name.to_string(),
        }
    }

    /// Sends SIGKILL and waits for the process.
    pub fn kill9(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// Sends SIGTERM.
    pub fn term(&mut self) {
        let pid = self.child.id().to_string();
        let _ = Command::new("kill").args(["-TERM", &pid]).status();
    }

    /// Waits for the process to exit, at most `limit`.
    pub fn wait_exit(&mut self, limit: Duration) -> Option<ExitStatus> {
        let start = Instant::now();
        while start.elapsed() < limit {
            if let Ok(Some(s)) = self.child.try_wait() {
                return Some(s);
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        None
    }

    /// What the process wrote so far.
    pub fn output(&self) -> String {
        let mut s = String::new();
        if let Ok(mut f) = std::fs::File::open(&self.log) {
            let _ = f.read_to_string(&mut s);
        }
        s
    }
}

impl Drop for Proc {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// `tessera status --db DB --json`, parsed (None while the file is not readable yet).
pub fn status(db: &Path) -> Option<serde_json::Value> {
    let out = tessera()
        .args(["status", "--json", "--db"])
        .arg(db)
        .output()
        .ok()?;
    if !out.status.success() {
        return None;
    }
    serde_json::from_slice(&out.stdout).ok()
}

/// An integer field of a status object.
pub fn field(st: &serde_json::Value, name: &str) -> u64 {
    st.get(name).and_then(|v| v.as_u64()).unwrap_or(0)
}

/// Polls the status until `pred` holds; panics with the logs after `limit`.
pub fn wait_for(
    db: &Path,
    limit: Duration,
    what: &str,
    procs: &[&Proc],
    pred: impl Fn(&serde_json::Value) -> bool,
) -> serde_json::Value {
    let start = Instant::now();
    let mut last = None;
    while start.elapsed() < limit {
        if let Some(st) = status(db) {
            if pred(&st) {
                return st;
            }
            last = Some(st);
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let logs: Vec<String> = procs
        .iter()
        .map(|p| format!("--- {} ---\n{}", p.name, p.output()))
        .collect();
    panic!(
        "timed out after {limit:?} waiting for {what}; last status: {last:?}\n{}",
        logs.join("\n")
    );
}

/// Exported rows as maps from column name to value.
pub fn export_rows(db: &Path) -> Vec<std::collections::BTreeMap<String, String>> {
    let out = tessera()
        .args(["export", "--format", "csv", "--db"])
        .arg(db)
        .output()
        .expect("run export");
    assert!(
        out.status.success(),
        "export failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let mut reader = csv::Reader::from_reader(out.stdout.as_slice());
    let header: Vec<String> = reader
        .headers()
        .expect("CSV header")
        .iter()
        .map(str::to_string)
        .collect();
    reader
        .records()
        .map(|r| {
            let r = r.expect("CSV row");
            header
                .iter()
                .cloned()
                .zip(r.iter().map(str::to_string))
                .collect()
        })
        .collect()
}

/// Asserts every (point, replicate) of a finished sweep appears exactly once,
/// with status ok, and returns the row count.
pub fn assert_each_once_all_ok(db: &Path, expected: usize) -> usize {
    let rows = export_rows(db);
    let mut seen = std::collections::BTreeSet::new();
    for r in &rows {
        let key = (
            r.get("point").cloned().unwrap_or_default(),
            r.get("replicate").cloned().unwrap_or_default(),
        );
        assert!(
            seen.insert(key.clone()),
            "evaluation {key:?} exported twice"
        );
        assert_eq!(
            r.get("status").map(String::as_str),
            Some("done"),
            "evaluation {key:?} is not done: {r:?}"
        );
    }
    assert_eq!(
        rows.len(),
        expected,
        "expected {expected} evaluations, got {}",
        rows.len()
    );
    rows.len()
}

/// Writes a sweep file for the zero-cost Branin function with a per-run delay.
pub fn branin_spec(dir: &Path, budget: u32, replicates: u32, delay_ms: u32) -> PathBuf {
    let path = dir.join("sweep.toml");
    std::fs::write(
        &path,
        format!(
            r#"name = "branin-e2e"
seed = 11
budget = {budget}
initial = {budget}
replicates = {replicates}
retries = 1

[model]
name = "branin"
timeout = "30s"

[model.fixed]
delay_ms = {delay_ms}

[params.x1]
range = [-5.0, 10.0]

[params.x2]
range = [0.0, 15.0]

[objective]
minimize = "value"
"#
        ),
    )
    .expect("write spec");
    path
}

/// Whether checks that need outside tools (a browser, an HTML parser,
/// Slurm, systemd-analyze, schema validators) must run rather than be
/// skipped: `.ci/run` sets `TESSERA_REQUIRE_TOOLS=1` after installing them.
pub fn tools_required() -> bool {
    std::env::var_os("TESSERA_REQUIRE_TOOLS").is_some()
}
