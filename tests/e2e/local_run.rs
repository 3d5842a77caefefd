//! `tessera run`: the all-in-one local mode.

use crate::harness::*;
use std::path::Path;
use std::time::Duration;

/// A local sweep runs to completion and a rerun of the same command finds
/// nothing left to do (it continues, not restarts).
#[test]
fn local_run_completes_and_rerun_continues() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 8, 2, 0);
    let db = dir.join("sweep.db");
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .args(["--workers", "2"])
        .output()
        .expect("run");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_each_once_all_ok(&db, 16);
    let st = status(&db).expect("status");
    assert_eq!(field(&st, "done"), 16);
    assert!(st.get("best").is_some_and(|b| b.get("objective").is_some()));
    let again = tessera().arg("run").arg(&spec).output().expect("rerun");
    assert!(again.status.success());
    assert_each_once_all_ok(&db, 16);
    let _ = Duration::from_secs(0);
}

/// Editing the sweep file of a finished sweep: a comment changes nothing; a
/// raised budget continues it and runs exactly the extra points; a changed
/// range (which the stored results depend on) is refused naming the key.
#[test]
fn a_raised_budget_continues_and_a_moved_range_is_refused() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 4, 1, 0);
    let db = dir.join("sweep.db");
    let first = tessera().arg("run").arg(&spec).output().expect("run");
    assert!(
        first.status.success(),
        "{}",
        String::from_utf8_lossy(&first.stderr)
    );
    let text = std::fs::read_to_string(&spec).expect("spec");
    // A comment is not a different sweep.
    let commented = dir.join("commented.toml");
    std::fs::write(&commented, format!("# lab notebook p. 12\n{text}")).expect("write");
    let same = tessera()
        .arg("run")
        .arg(&commented)
        .arg("--db")
        .arg(&db)
        .output()
        .expect("run");
    assert!(
        same.status.success(),
        "{}",
        String::from_utf8_lossy(&same.stderr)
    );
    // A raised budget continues the stored sweep: exactly the extra points run.
    let raised = dir.join("raised.toml");
    std::fs::write(&raised, text.replace("budget = 4", "budget = 9")).expect("write");
    let out = tessera()
        .arg("run")
        .arg(&raised)
        .arg("--db")
        .arg(&db)
        .output()
        .expect("run");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let st = status(&db).expect("status");
    assert_eq!(field(&st, "budget"), 9);
    assert_eq!(field(&st, "points"), 9);
    assert_eq!(field(&st, "done"), 9);
    let rows = assert_each_once_all_ok(&db, 9);
    assert_eq!(rows, 9);
    // A changed range would not fit the stored results: refused, naming the key.
    let moved = dir.join("moved.toml");
    std::fs::write(
        &moved,
        text.replace("range = [-5.0, 10.0]", "range = [-4.0, 10.0]"),
    )
    .expect("write");
    let out = tessera()
        .arg("run")
        .arg(&moved)
        .arg("--db")
        .arg(&db)
        .output()
        .expect("run");
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("changes `params.x1.range`") && err.contains("--force"),
        "{err}"
    );
    let st = status(&db).expect("status");
    assert_eq!(field(&st, "points"), 9, "nothing ran");
}

/// A sweep file with an error is refused before anything is written.
#[test]
fn an_invalid_sweep_file_is_refused_with_its_line_and_no_database() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = dir.join("bad.toml");
    std::fs::write(&spec, "name = \"x\"\nbudget = 4\nreplicates = 0\n[model]\nname = \"branin\"\n[params.x1]\nrange = [0.0, 1.0]\n[objective]\nminimize = \"value\"\n").expect("write");
    let out = tessera().arg("run").arg(&spec).output().expect("run");
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains(":3:"), "names line 3: {err}");
    assert!(
        !dir.join("bad.db").exists(),
        "no database written for an invalid sweep file"
    );
}

/// Ctrl-C (SIGINT) stops a local sweep with exit code 130 after storing what
/// arrived and prints the exact command that continues it (with its own
/// `--db`); running that command finishes the sweep, each run once.
#[test]
fn an_interrupted_local_run_continues_where_it_stopped() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    // 12 runs of 1 s on 2 workers: about 6 s, ample time to interrupt.
    let spec = branin_spec(dir, 12, 1, 1000);
    let db = dir.join("slow runs.db");
    let mut cmd = tessera();
    cmd.arg("run")
        .arg(&spec)
        .arg("--db")
        .arg(&db)
        .args(["--workers", "2"]);
    let mut first = Proc::start(cmd, dir, "first-run");
    wait_for(
        &db,
        Duration::from_secs(60),
        "a few results",
        &[&first],
        |st| field(st, "done") >= 2,
    );
    let pid = first.child.id().to_string();
    let _ = std::process::Command::new("kill")
        .args(["-INT", &pid])
        .status();
    let exit = first
        .wait_exit(Duration::from_secs(30))
        .expect("stops after Ctrl-C");
    assert_eq!(exit.code(), Some(130), "{}", first.output());
    let said = first.output();
    let command = said
        .lines()
        .find_map(|l| l.strip_prefix("interrupted: run `"))
        .and_then(|l| l.split_once("` again to continue"))
        .map(|(c, _)| c.to_string())
        .unwrap_or_else(|| panic!("no continue command in:\n{said}"));
    let words = shlex::split(&command).expect("a shell command line");
    assert_eq!(words[0], "tessera");
    assert!(
        words.iter().any(|w| Path::new(w) == db),
        "names the database: {command}"
    );
    let st = status(&db).expect("status");
    let done_before = field(&st, "done");
    assert!((2..12).contains(&done_before), "{st}");
    let again = tessera().args(&words[1..]).output().expect("rerun");
    assert!(
        again.status.success(),
        "{}",
        String::from_utf8_lossy(&again.stderr)
    );
    assert_each_once_all_ok(&db, 12);
    assert!(!dir.join("sweep.db").exists(), "no second database");
}

/// A sweep in which every run fails exits non-zero and says so.
#[test]
fn a_sweep_where_every_run_fails_exits_non_zero() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = dir.join("fails.toml");
    std::fs::write(
        &spec,
        "name = \"fails\"\nbudget = 4\ninitial = 4\nretries = 1\n[model]\nname = \"broken\"\ncommand = [\"sh\", \"-c\", \"echo no >&2; exit 3\"]\n[params.x]\nrange = [0.0, 1.0]\n[objective]\nminimize = \"value\"\n",
    )
    .expect("write");
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .args(["--workers", "2"])
        .output()
        .expect("run");
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(err.contains("every run failed (4 of 4)"), "{err}");
    assert!(err.contains("exited with code 3"), "{err}");
}
