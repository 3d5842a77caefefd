//! One writer per database: a second coordinator is refused and names the
//! holder, a killed holder is replaced, a stalled holder that lost the
//! database stops; queries never write (read-only files and directories,
//! another user, empty files, directories and damaged files given as --db).

use crate::harness::*;
use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

fn serve_on(dir: &Path, spec: &Path, db: &Path, port: u16, name: &str) -> Proc {
    let mut cmd = tessera();
    cmd.arg("serve").arg(spec).arg("--db").arg(db).args([
        "--listen",
        &format!("127.0.0.1:{port}"),
        "--lease",
        "3s",
    ]);
    Proc::start(cmd, dir, name)
}

fn worker_on(dir: &Path, port: u16, name: &str) -> Proc {
    let mut cmd = tessera();
    cmd.args(["worker", "--coordinator"])
        .arg(format!("http://127.0.0.1:{port}"))
        .args(["--slots", "2", "--name", name, "--grace", "2s"])
        .arg("--spool")
        .arg(dir.join(format!("{name}.spool")));
    Proc::start(cmd, dir, name)
}

/// Waits until `p` has printed `needle` (panics with its output after `limit`).
fn wait_output(p: &Proc, needle: &str, limit: Duration) {
    let start = Instant::now();
    while start.elapsed() < limit {
        if p.output().contains(needle) {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("{} never printed {needle:?}:\n{}", p.name, p.output());
}

fn finished(st: &serde_json::Value) -> bool {
    st.get("finished").and_then(|v| v.as_bool()) == Some(true)
}

#[test]
fn a_second_coordinator_is_refused_and_a_killed_holder_is_replaced() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 16, 1, 300);
    let db = dir.join("sweep.db");
    let (p1, p2) = (free_port(), free_port());
    let mut first = serve_on(dir, &spec, &db, p1, "first");
    wait_output(&first, "start workers with", Duration::from_secs(30));
    // A second coordinator on the same database refuses and names the holder.
    let mut second = serve_on(dir, &spec, &db, p2, "second");
    let exit = second
        .wait_exit(Duration::from_secs(20))
        .expect("the second coordinator exits");
    assert!(!exit.success());
    let said = second.output();
    assert!(said.contains("in use by another coordinator"), "{said}");
    assert!(
        said.contains(&format!("process {}", first.child.id())),
        "names the holder's process: {said}"
    );
    assert!(said.contains("since "), "says since when: {said}");
    // `run` on a served database is refused the same way, before running anything.
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .arg("--db")
        .arg(&db)
        .output()
        .expect("run");
    assert!(!out.status.success());
    assert!(text(&out.stderr).contains("in use by another coordinator"));

    let w1 = worker_on(dir, p1, "alpha");
    wait_for(
        &db,
        Duration::from_secs(60),
        "some results",
        &[&first, &w1],
        |st| field(st, "done") >= 3,
    );
    first.kill9();
    drop(w1);
    // The holder is gone: the next coordinator takes over at once, without clean-up.
    let third = serve_on(dir, &spec, &db, p1, "third");
    wait_output(&third, "start workers with", Duration::from_secs(30));
    assert!(third.output().contains("taking over"), "{}", third.output());
    let w2 = worker_on(dir, p1, "beta");
    wait_for(
        &db,
        Duration::from_secs(120),
        "the sweep to finish",
        &[&third, &w2],
        finished,
    );
    assert_each_once_all_ok(&db, 16);
}

/// A coordinator that stalls (SIGSTOP) past the holder's staleness limit
/// loses the database to a new coordinator; when it wakes it stores
/// nothing more and stops, and the sweep completes once each.
#[test]
fn a_stalled_coordinator_that_lost_the_database_stops() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 12, 1, 200);
    let db = dir.join("sweep.db");
    let (p1, p2) = (free_port(), free_port());
    let mut stalled = serve_on(dir, &spec, &db, p1, "stalled");
    wait_output(&stalled, "start workers with", Duration::from_secs(30));
    let w1 = worker_on(dir, p1, "alpha");
    wait_for(
        &db,
        Duration::from_secs(60),
        "some results",
        &[&stalled, &w1],
        |st| field(st, "done") >= 2,
    );
    let pid = stalled.child.id().to_string();
    let _ = Command::new("kill").args(["-STOP", &pid]).status();
    // Refused while the holder's heartbeat is fresh...
    let start = Instant::now();
    let taker = loop {
        let mut p = serve_on(dir, &spec, &db, p2, "taker");
        match p.wait_exit(Duration::from_secs(2)) {
            Some(_) => {
                assert!(
                    p.output().contains("in use by another coordinator"),
                    "{}",
                    p.output()
                );
                assert!(start.elapsed() < Duration::from_secs(40), "never took over");
                std::thread::sleep(Duration::from_secs(2));
            }
            None => break p,
        }
    };
    // ...then taken over once it is stale (15 s without a heartbeat).
    assert!(
        start.elapsed() >= Duration::from_secs(8),
        "took over too early"
    );
    wait_output(&taker, "start workers with", Duration::from_secs(30));
    let _ = Command::new("kill").args(["-CONT", &pid]).status();
    let exit = stalled
        .wait_exit(Duration::from_secs(30))
        .expect("the stalled coordinator stops after waking");
    assert!(!exit.success(), "{}", stalled.output());
    assert!(stalled.output().contains("lost"), "{}", stalled.output());
    drop(w1);
    let w2 = worker_on(dir, p2, "beta");
    wait_for(
        &db,
        Duration::from_secs(120),
        "the sweep to finish",
        &[&taker, &w2],
        finished,
    );
    assert_each_once_all_ok(&db, 12);
}

/// The files in `dir`, sorted.
fn listing(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .expect("list")
        .filter_map(Result::ok)
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

/// A command run as another user when the tests run as root (so that file
/// permissions apply), else as ourselves. The binary is copied where that
/// user can execute it.
fn as_other_user(bin_dir: &Path) -> Command {
    let is_root = Command::new("id")
        .arg("-u")
        .output()
        .is_ok_and(|o| text(&o.stdout).trim() == "0");
    let bin = bin_dir.join("tessera");
    if !bin.exists() {
        std::fs::copy(env!("CARGO_BIN_EXE_tessera"), &bin).expect("copy the binary");
        std::fs::set_permissions(&bin, std::fs::Permissions::from_mode(0o755)).expect("chmod");
    }
    if is_root {
        let mut c = Command::new("setpriv");
        c.args(["--reuid=65534", "--regid=65534", "--clear-groups", "--"])
            .arg(&bin);
        c
    } else {
        Command::new(bin)
    }
}

#[test]
fn queries_work_on_a_read_only_database_and_leave_no_files() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let top = tmp.path();
    std::fs::set_permissions(top, std::fs::Permissions::from_mode(0o755)).expect("chmod");
    let dir = top.join("sweep");
    std::fs::create_dir(&dir).expect("mkdir");
    let spec = branin_spec(&dir, 12, 1, 0);
    let db = dir.join("sweep.db");
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .args(["--workers", "2"])
        .output()
        .expect("run");
    ok(&out, "run");
    std::fs::set_permissions(&db, std::fs::Permissions::from_mode(0o444)).expect("chmod db");
    std::fs::set_permissions(&spec, std::fs::Permissions::from_mode(0o444)).expect("chmod spec");
    std::fs::set_permissions(&dir, std::fs::Permissions::from_mode(0o555)).expect("chmod dir");
    let before = listing(&dir);
    let db_arg = db.to_str().expect("utf-8 path");
    let bin_dir = top.join("bin");
    std::fs::create_dir(&bin_dir).expect("mkdir");
    std::fs::set_permissions(&bin_dir, std::fs::Permissions::from_mode(0o777)).expect("chmod");
    let plot = bin_dir.join("plot.svg");
    let plot_arg = plot.to_str().expect("utf-8 path");
    for args in [
        vec!["status", "--db", db_arg],
        vec!["export", "--db", db_arg],
        vec!["predict", "--db", db_arg, "x1=3", "x2=2.5"],
        vec!["check-fit", "--db", db_arg],
        vec![
            "trend", "--db", db_arg, "x1", "--metric", "value", "--out", plot_arg,
        ],
    ] {
        let out = as_other_user(&bin_dir)
            .args(&args)
            .current_dir(top)
            .output()
            .expect("query");
        ok(&out, &format!("{args:?} on a read-only database"));
        assert_eq!(listing(&dir), before, "{args:?} left files behind");
    }
    // A writer refuses before running anything.
    let out = as_other_user(&bin_dir)
        .arg("run")
        .arg(&spec)
        .current_dir(top)
        .output()
        .expect("run");
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains("cannot store results in"),
        "{}",
        text(&out.stderr)
    );
    assert_eq!(listing(&dir), before);
    std::fs::set_permissions(&dir, std::fs::Permissions::from_mode(0o755)).expect("chmod back");
}

fn query_fails(dir: &Path, db: &Path, needle: &str) {
    for cmd in ["status", "export", "predict", "check-fit"] {
        let mut c = tessera();
        c.arg(cmd).arg("--db").arg(db).current_dir(dir);
        if cmd == "predict" {
            c.args(["x1=1", "x2=1"]);
        }
        let out = c.output().expect("query");
        let err = text(&out.stderr);
        assert_eq!(
            out.status.code(),
            Some(1),
            "{cmd} {}: {err} / {}",
            db.display(),
            text(&out.stdout)
        );
        assert!(
            err.contains(&db.display().to_string()),
            "{cmd} names the file: {err}"
        );
        assert!(err.contains(needle), "{cmd}: {err}");
    }
}

#[test]
fn empty_files_directories_and_damaged_databases_are_named_and_left_alone() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let empty = dir.join("empty.db");
    std::fs::write(&empty, b"").expect("write");
    query_fails(dir, &empty, "empty file");
    assert_eq!(
        std::fs::metadata(&empty).expect("stat").len(),
        0,
        "left untouched"
    );
    assert_eq!(listing(dir), ["empty.db"], "no files created");

    let folder = dir.join("folder.db");
    std::fs::create_dir(&folder).expect("mkdir");
    query_fails(dir, &folder, "is a directory");

    // A real database with a page overwritten by garbage.
    let spec = branin_spec(dir, 12, 1, 0);
    let db: PathBuf = dir.join("sweep.db");
    ok(
        &tessera().arg("run").arg(&spec).output().expect("run"),
        "run",
    );
    let mut bytes = std::fs::read(&db).expect("read");
    assert!(bytes.len() > 3 * 4096, "a few pages");
    // Page 1 (the schema) stays; every table's pages are garbage.
    for b in &mut bytes[4096..] {
        *b = 0xA5;
    }
    std::fs::write(&db, &bytes).expect("write");
    query_fails(dir, &db, "malformed");
}
