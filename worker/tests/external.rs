//! The external-command runner against real processes: the contract of
//! docs/simulators.md, each failure kind, and that no process outlives its run.
//!
//! The checks here are against the contract we publish (our own document) and
//! against what the operating system reports (process table, exit codes).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use tessera_worker::runner::{FailureKind, RunFailure, RunRequest, Runner, RunnerConfig, Runners};
use tokio_util::sync::CancellationToken;

fn runners(dir: &Path, commands: &[(&str, &[&str])], keep: bool) -> Runners {
    Runners::new(RunnerConfig {
        commands: commands
            .iter()
            .map(|(n, w)| (n.to_string(), w.iter().map(|s| s.to_string()).collect()))
            .collect(),
        workdir_root: dir.join("runs"),
        keep_workdirs: keep,
        guard: Vec::new(),
    })
    .expect("valid commands")
}

fn sh(script: &str) -> Vec<&str> {
    vec!["sh", "-c", script]
}

async fn run(r: &Runners, req: RunRequest) -> Result<BTreeMap<String, f64>, RunFailure> {
    r.run(req, CancellationToken::new()).await
}

/// True while `pid` is a live (not zombie) process.
fn alive(pid: u32) -> bool {
    match std::fs::read_to_string(format!("/proc/{pid}/stat")) {
        // Field 3 is the state; a zombie (Z) or dead (X) process runs nothing.
        Ok(stat) => match stat.rsplit_once(')') {
            Some((_, rest)) => !matches!(rest.trim_start().chars().next(), Some('Z' | 'X')),
            None => true,
        },
        Err(_) => false,
    }
}

/// The pid the script wrote to `file`, waiting up to 10 s for it. Panics if
/// none appears: the test would otherwise check nothing.
fn background_pid(file: &Path) -> u32 {
    let t0 = Instant::now();
    loop {
        if let Some(pid) = std::fs::read_to_string(file)
            .ok()
            .and_then(|t| t.trim().parse().ok())
        {
            return pid;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(10),
            "the script never wrote its background pid to {}",
            file.display()
        );
        std::thread::sleep(Duration::from_millis(10));
    }
}

/// Waits (up to 5 s) for the background process whose pid a script wrote to
/// `file` to be gone; returns its pid if it is still alive.
fn still_running(file: &Path) -> Option<u32> {
    let pid = background_pid(file);
    let t0 = Instant::now();
    while alive(pid) && t0.elapsed() < Duration::from_secs(5) {
        std::thread::sleep(Duration::from_millis(20));
    }
    alive(pid).then_some(pid)
}

fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default()
}

#[tokio::test]
async fn python_example_follows_the_contract() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let script = repo_root().join("examples/simulators/python/colony.py");
    let script = script.to_string_lossy().to_string();
    let r = runners(tmp.path(), &[("colony", &["python3", &script])], false);
    let mut req = RunRequest::new("colony");
    req.params.insert("division_rate".into(), 0.05);
    req.fixed.insert("duration_h".into(), serde_json::json!(24));
    req.seed = 11;
    req.expected_metrics = vec!["final_cells".into(), "net_growth_per_h".into()];
    let a = run(&r, req.clone()).await.expect("example runs");
    // The reported growth rate is log(final/start)/duration by the script's
    // own definition: check the two metrics agree.
    let expected = (a["final_cells"] / 10.0).ln() / 24.0;
    assert!((a["net_growth_per_h"] - expected).abs() < 1e-12, "{a:?}");
    // Same seed, same result; the script is deterministic given its seed.
    assert_eq!(run(&r, req.clone()).await.expect("again"), a);
    // A wrong input name is the script's own error: exit code 2 with stderr.
    req.params.insert("bogus".into(), 1.0);
    let e = run(&r, req).await.expect_err("bogus input");
    assert_eq!(e.kind, FailureKind::Exit);
    assert!(e.reason.contains("code 2"), "{}", e.reason);
    assert!(e.stderr_tail.contains("unknown input 'bogus'"), "{e:?}");
}

#[tokio::test]
async fn java_example_follows_the_contract_when_java_is_installed() {
    if std::process::Command::new("java")
        .arg("-version")
        .output()
        .is_err()
    {
        eprintln!("java not installed: Java example not run");
        return;
    }
    let tmp = tempfile::tempdir().expect("tempdir");
    let src = repo_root().join("examples/simulators/java/Colony.java");
    let src = src.to_string_lossy().to_string();
    let r = runners(tmp.path(), &[("colony", &["java", &src])], false);
    let mut req = RunRequest::new("colony");
    req.params.insert("division_rate".into(), 0.05);
    req.seed = 5;
    req.timeout = Some(Duration::from_secs(120));
    let m = run(&r, req).await.expect("java example runs");
    let expected = (m["final_cells"] / 10.0).ln() / 48.0;
    assert!((m["net_growth_per_h"] - expected).abs() < 1e-12, "{m:?}");
}

#[tokio::test]
async fn inputs_arrive_on_stdin_in_env_and_in_placeholders() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let py = r#"
import json, os, sys
d = json.load(sys.stdin)
print(json.dumps({
  "stdin_x": d["inputs"]["x"], "stdin_mode_ok": float(d["inputs"]["mode"] == "fast"),
  "stdin_seed": d["seed"], "stdin_rep": d["replicate"],
  "env_x": float(os.environ["TESSERA_PARAM_X"]), "env_k": float(os.environ["TESSERA_PARAM_K_RATE"]),
  "env_seed": float(os.environ["TESSERA_SEED"]), "env_rep": float(os.environ["TESSERA_REPLICATE"]),
  "arg_x": float(sys.argv[1]), "arg_seed": float(sys.argv[2]), "arg_rep": float(sys.argv[3]),
  "cwd_ok": float(os.getcwd() == os.path.realpath(sys.argv[4]) == os.path.realpath(os.environ["TESSERA_WORKDIR"])),
}))
"#;
    let r = runners(
        tmp.path(),
        &[(
            "probe",
            &[
                "python3",
                "-c",
                py,
                "{x}",
                "{seed}",
                "{replicate}",
                "{workdir}",
            ],
        )],
        false,
    );
    let mut req = RunRequest::new("probe");
    req.params.insert("x".into(), 0.125);
    req.params.insert("k.rate".into(), 3.0);
    req.fixed.insert("mode".into(), serde_json::json!("fast"));
    req.seed = 123_456_789;
    req.replicate = 4;
    let m = run(&r, req).await.expect("probe runs");
    for k in ["stdin_x", "env_x", "arg_x"] {
        assert_eq!(m[k], 0.125, "{k}");
    }
    for k in ["stdin_seed", "env_seed", "arg_seed"] {
        assert_eq!(m[k], 123_456_789.0, "{k}");
    }
    for k in ["stdin_rep", "env_rep", "arg_rep"] {
        assert_eq!(m[k], 4.0, "{k}");
    }
    assert_eq!(m["env_k"], 3.0);
    assert_eq!(m["stdin_mode_ok"], 1.0);
    assert_eq!(m["cwd_ok"], 1.0);
}

#[tokio::test]
async fn metrics_file_wins_over_stdout() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let r = runners(
        tmp.path(),
        &[(
            "f",
            &sh(r#"echo '{"a": 1}'; echo '{"a": 2, "b": 3}' > "$TESSERA_METRICS""#),
        )],
        false,
    );
    let m = run(&r, RunRequest::new("f")).await.expect("runs");
    assert_eq!(m.get("a"), Some(&2.0));
    assert_eq!(m.get("b"), Some(&3.0));
}

#[tokio::test]
async fn metrics_come_from_the_last_non_empty_stdout_line() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let r = runners(
        tmp.path(),
        &[(
            "s",
            &sh(r#"echo 'step 1'; echo '{"a": 1}'; echo '{"a": 5}'; echo"#),
        )],
        false,
    );
    let m = run(&r, RunRequest::new("s")).await.expect("runs");
    assert_eq!(m.get("a"), Some(&5.0));
}

#[tokio::test]
async fn each_failure_kind_is_reported_with_its_reason() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let r = runners(
        tmp.path(),
        &[
            ("code3", &sh("echo 'bad mesh' >&2; exit 3")),
            ("signal", &sh("kill -9 $$")),
            ("silent", &sh("true")),
            ("chatty", &sh("echo done")),
            ("nan", &sh(r#"echo '{"a": NaN}'"#)),
            ("partial", &sh(r#"echo '{"a": 1}'"#)),
            ("missing", &["/nonexistent/simulator-binary"]),
            ("notexec", &[tmp.path().to_str().unwrap_or("/")]),
        ],
        false,
    );
    let fail = |name: &'static str| {
        let r = &r;
        async move {
            let mut req = RunRequest::new(name);
            req.expected_metrics = vec!["a".into(), "b".into()];
            run(r, req).await.expect_err(name)
        }
    };
    let e = fail("code3").await;
    assert_eq!(e.kind, FailureKind::Exit);
    assert!(e.reason.contains("exited with code 3"), "{}", e.reason);
    assert_eq!(e.stderr_tail.trim(), "bad mesh");

    let e = fail("signal").await;
    assert_eq!(e.kind, FailureKind::Exit);
    assert!(e.reason.contains("signal 9 (SIGKILL)"), "{}", e.reason);

    assert_eq!(fail("silent").await.kind, FailureKind::NoMetrics);
    let e = fail("chatty").await;
    assert_eq!(e.kind, FailureKind::NoMetrics);
    assert!(e.reason.contains("\"done\""), "{}", e.reason);

    assert_eq!(fail("nan").await.kind, FailureKind::NonFinite);

    let e = fail("partial").await;
    assert_eq!(e.kind, FailureKind::MissingMetric);
    assert!(e.reason.contains('b'), "{}", e.reason);

    let e = fail("missing").await;
    assert_eq!(e.kind, FailureKind::Spawn);
    assert!(e.reason.contains("command not found"), "{}", e.reason);

    let e = fail("notexec").await;
    assert_eq!(e.kind, FailureKind::Spawn);

    let e = run(&r, RunRequest::new("no_such_model"))
        .await
        .expect_err("unknown");
    assert_eq!(e.kind, FailureKind::UnknownModel);
    assert!(
        e.reason.contains("code3") && e.reason.contains("tiling"),
        "{}",
        e.reason
    );
}

/// A script that starts a background `sleep` (writing its pid to a file) and
/// then waits: the kind of wrapper `sh -c 'java ...'` is.
fn sleeper_script(pidfile: &Path) -> String {
    format!(
        "sleep 30 & echo $! > '{}'; echo started >&2; sleep 30",
        pidfile.display()
    )
}

#[tokio::test]
async fn timeout_kills_the_whole_process_group() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let pidfile = tmp.path().join("bg.pid");
    let script = sleeper_script(&pidfile);
    let r = runners(tmp.path(), &[("slow", &sh(&script))], false);
    let mut req = RunRequest::new("slow");
    req.timeout = Some(Duration::from_millis(1500));
    let t0 = Instant::now();
    let e = run(&r, req).await.expect_err("times out");
    assert_eq!(e.kind, FailureKind::Timeout);
    assert!(t0.elapsed() < Duration::from_secs(10));
    assert!(e.stderr_tail.contains("started"), "{e:?}");
    assert_eq!(still_running(&pidfile), None, "background sleep survived");
}

#[tokio::test]
async fn cancel_kills_the_whole_process_group() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let pidfile = tmp.path().join("bg.pid");
    let script = sleeper_script(&pidfile);
    let r = runners(tmp.path(), &[("slow", &sh(&script))], false);
    let cancel = CancellationToken::new();
    let trigger = cancel.clone();
    let pf = pidfile.clone();
    let canceller = tokio::task::spawn_blocking(move || {
        background_pid(&pf);
        trigger.cancel();
    });
    let t0 = Instant::now();
    let e = r
        .run(RunRequest::new("slow"), cancel)
        .await
        .expect_err("cancelled");
    canceller.await.expect("canceller");
    assert_eq!(e.kind, FailureKind::Cancelled);
    assert!(t0.elapsed() < Duration::from_secs(10), "{:?}", t0.elapsed());
    assert_eq!(still_running(&pidfile), None, "background sleep survived");
}

#[tokio::test]
async fn dropping_the_run_kills_the_whole_process_group() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let pidfile = tmp.path().join("bg.pid");
    let script = sleeper_script(&pidfile);
    let r = runners(tmp.path(), &[("slow", &sh(&script))], false);
    let fut = r.run(RunRequest::new("slow"), CancellationToken::new());
    let pf = pidfile.clone();
    let waiter = tokio::task::spawn_blocking(move || background_pid(&pf));
    tokio::select! {
        _ = fut => panic!("the run should not finish"),
        _ = waiter => {}
    }
    // `fut` is dropped here, as when a worker aborts a run.
    assert_eq!(still_running(&pidfile), None, "background sleep survived");
}

#[tokio::test]
async fn processes_left_behind_after_exit_are_killed_and_not_waited_for() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let pidfile = tmp.path().join("bg.pid");
    // The background sleep keeps stdout open; the run must still end at once.
    let script = format!(
        "sleep 30 & echo $! > '{}'; echo '{{\"a\": 1}}'",
        pidfile.display()
    );
    let r = runners(tmp.path(), &[("leaky", &sh(&script))], false);
    let t0 = Instant::now();
    let m = run(&r, RunRequest::new("leaky")).await.expect("runs");
    assert_eq!(m.get("a"), Some(&1.0));
    assert!(t0.elapsed() < Duration::from_secs(10), "{:?}", t0.elapsed());
    assert_eq!(still_running(&pidfile), None, "background sleep survived");
}

#[tokio::test]
async fn large_output_on_both_pipes_does_not_deadlock() {
    let tmp = tempfile::tempdir().expect("tempdir");
    // 2 MB on each pipe, far more than a pipe buffer (64 KiB on Linux).
    let script = r#"head -c 2000000 /dev/zero | tr '\0' 'e' >&2; head -c 2000000 /dev/zero | tr '\0' 'o'; echo; echo '{"a": 1}'"#;
    let r = runners(tmp.path(), &[("big", &sh(script))], false);
    let mut req = RunRequest::new("big");
    req.timeout = Some(Duration::from_secs(60));
    let m = run(&r, req).await.expect("runs");
    assert_eq!(m.get("a"), Some(&1.0));

    let fail = r#"head -c 100000 /dev/zero | tr '\0' 'e' >&2; echo END >&2; exit 1"#;
    let r = runners(tmp.path(), &[("bigfail", &sh(fail))], false);
    let e = run(&r, RunRequest::new("bigfail"))
        .await
        .expect_err("fails");
    assert!(e.stderr_tail.len() <= 4096, "{}", e.stderr_tail.len());
    assert!(
        e.stderr_tail.ends_with("END\n"),
        "{:?}",
        &e.stderr_tail[e.stderr_tail.len() - 10..]
    );
}

#[tokio::test]
async fn run_directories_are_fresh_named_by_evaluation_and_removed_unless_kept() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let script = r#"test -z "$(ls -A)" || exit 9; touch out.dat; echo "{\"a\": 1}""#;
    for keep in [false, true] {
        let root = tmp.path().join(format!("keep-{keep}"));
        let r = runners(&root, &[("w", &sh(script))], keep);
        let mut req = RunRequest::new("w");
        req.evaluation_id = 4242;
        run(&r, req.clone()).await.expect("fresh, empty directory");
        run(&r, req)
            .await
            .expect("second run gets its own directory");
        let dirs: Vec<_> = std::fs::read_dir(root.join("runs"))
            .expect("runs root exists")
            .filter_map(Result::ok)
            .collect();
        if keep {
            assert_eq!(dirs.len(), 2);
            for d in dirs {
                let name = d.file_name().to_string_lossy().to_string();
                assert!(name.starts_with("eval-4242-"), "{name}");
                assert!(d.path().join("out.dat").exists());
            }
        } else {
            assert!(dirs.is_empty(), "{dirs:?}");
        }
    }
}

#[tokio::test]
async fn an_operator_command_shadows_a_built_in_of_the_same_name() {
    let tmp = tempfile::tempdir().expect("tempdir");
    let r = runners(
        tmp.path(),
        &[("branin", &sh(r#"echo '{"value": -1}'"#))],
        false,
    );
    assert!(r.is_external("branin"));
    let m = run(&r, RunRequest::new("branin")).await.expect("runs");
    assert_eq!(m.get("value"), Some(&-1.0));
}
