//! A coordinator and workers as separate processes: crashes lose nothing.

use crate::harness::*;
use std::time::Duration;

fn serve(dir: &std::path::Path, spec: &std::path::Path, port: u16, extra: &[&str]) -> Proc {
    let mut cmd = tessera();
    cmd.arg("serve")
        .arg(spec)
        .arg("--db")
        .arg(dir.join("sweep.db"))
        .args(["--listen", &format!("127.0.0.1:{port}"), "--lease", "2s"])
        .args(extra)
        .env("RUST_LOG", "info");
    Proc::start(cmd, dir, "coordinator")
}

fn worker(dir: &std::path::Path, port: u16, name: &str, slots: u32, extra: &[&str]) -> Proc {
    let mut cmd = tessera();
    cmd.args(["--log-level", "info", "worker", "--coordinator"])
        .arg(format!("http://127.0.0.1:{port}"))
        .args(["--slots", &slots.to_string(), "--name", name])
        .arg("--spool")
        .arg(dir.join(format!("{name}.spool")))
        .args(extra);
    Proc::start(cmd, dir, name)
}

/// Nothing lost (docs/architecture.md): a worker killed with SIGKILL mid-run loses nothing;
/// its leases expire and are handed to the other worker.
#[test]
fn worker_killed_mid_run_the_sweep_still_completes_once_each() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 12, 2, 150);
    let db = dir.join("sweep.db");
    let port = free_port();
    let coord = serve(dir, &spec, port, &[]);
    let mut a = worker(dir, port, "alpha", 2, &["--grace", "5s"]);
    let mut b = worker(dir, port, "beta", 2, &["--grace", "5s"]);
    wait_for(
        &db,
        Duration::from_secs(60),
        "some results",
        &[&coord, &a, &b],
        |st| field(st, "done") >= 4,
    );
    a.kill9();
    let st = wait_for(
        &db,
        Duration::from_secs(120),
        "the sweep to finish",
        &[&coord, &b],
        |st| st.get("finished").and_then(|v| v.as_bool()) == Some(true),
    );
    assert_eq!(field(&st, "done"), 24);
    assert_eq!(field(&st, "failed"), 0);
    assert_each_once_all_ok(&db, 24);
    let exit = b.wait_exit(Duration::from_secs(30));
    assert!(
        exit.is_some_and(|s| s.success()),
        "worker beta did not exit cleanly: {}",
        b.output()
    );
}

/// Nothing lost (docs/architecture.md): the coordinator killed with SIGKILL and restarted on
/// the same database resumes; workers that kept running reconnect and deliver.
#[test]
fn coordinator_killed_and_restarted_loses_and_doubles_nothing() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 14, 2, 250);
    let db = dir.join("sweep.db");
    let port = free_port();
    let mut coord = serve(dir, &spec, port, &[]);
    let a = worker(dir, port, "alpha", 2, &[]);
    let b = worker(dir, port, "beta", 2, &[]);
    wait_for(
        &db,
        Duration::from_secs(60),
        "some results",
        &[&coord, &a, &b],
        |st| field(st, "done") >= 6,
    );
    coord.kill9();
    std::thread::sleep(Duration::from_millis(800));
    let coord2 = serve(dir, &spec, port, &[]);
    let st = wait_for(
        &db,
        Duration::from_secs(120),
        "the sweep to finish",
        &[&coord2, &a, &b],
        |st| st.get("finished").and_then(|v| v.as_bool()) == Some(true),
    );
    assert_eq!(field(&st, "done"), 28);
    assert_each_once_all_ok(&db, 28);
    // Results delivered after the restart (the new coordinator never saw
    // the workers' old ids) still carry the workers' names.
    for r in export_rows(&db) {
        let w = r.get("worker").map(String::as_str).unwrap_or("");
        assert!(
            w == "alpha" || w == "beta",
            "result recorded for worker {w:?}"
        );
    }
    let (mut a, mut b) = (a, b);
    for w in [&mut a, &mut b] {
        let exit = w.wait_exit(Duration::from_secs(30));
        assert!(
            exit.is_some_and(|s| s.success()),
            "worker {} did not exit cleanly: {}",
            w.name,
            w.output()
        );
        assert!(w.output().contains("results delivered"), "{}", w.output());
    }
    drop(coord2);
}

/// A worker presenting the wrong token is refused, leases nothing, and exits
/// non-zero saying the token was rejected.
#[test]
fn worker_with_wrong_token_is_refused_and_leases_nothing() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 4, 1, 0);
    std::fs::write(dir.join("good.token"), "correct-horse-battery-staple\n").expect("token");
    std::fs::write(dir.join("bad.token"), "not-the-right-token-at-all\n").expect("token");
    let db = dir.join("sweep.db");
    let port = free_port();
    let good = dir.join("good.token");
    let bad = dir.join("bad.token");
    let coord = serve(
        dir,
        &spec,
        port,
        &["--token-file", good.to_str().expect("utf-8 path")],
    );
    let mut w = worker(
        dir,
        port,
        "intruder",
        1,
        &["--token-file", bad.to_str().expect("utf-8 path")],
    );
    let exit = w.wait_exit(Duration::from_secs(30)).expect("worker exits");
    assert!(!exit.success(), "a worker with a wrong token must fail");
    assert!(
        w.output().contains("token was rejected"),
        "message should say the token was rejected: {}",
        w.output()
    );
    let st = wait_for(
        &db,
        Duration::from_secs(10),
        "a readable status",
        &[&coord],
        |_| true,
    );
    assert_eq!(field(&st, "done"), 0);
    assert_eq!(field(&st, "running"), 0);
    // No token at all is refused too.
    let mut none = worker(dir, port, "anonymous", 1, &[]);
    let exit = none
        .wait_exit(Duration::from_secs(30))
        .expect("worker exits");
    assert!(!exit.success());
    assert!(
        none.output().contains("requires a token"),
        "{}",
        none.output()
    );
}

/// The coordinator refuses to listen beyond loopback without a token.
#[test]
fn serve_refuses_a_public_address_without_a_token() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 4, 1, 0);
    let out = tessera()
        .arg("serve")
        .arg(&spec)
        .arg("--db")
        .arg(dir.join("sweep.db"))
        .args(["--listen", "0.0.0.0:0"])
        .output()
        .expect("run serve");
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("without a token") && err.contains("--token-file"),
        "{err}"
    );
}

/// The same result delivered twice is stored once (first result wins).
#[test]
fn a_result_sent_twice_is_stored_once() {
    use tessera_proto::v1 as pb;
    use tessera_proto::v1::coordinator_client::CoordinatorClient;
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 2, 1, 0);
    let db = dir.join("sweep.db");
    let port = free_port();
    let coord = serve(dir, &spec, port, &[]);
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    rt.block_on(async {
        let url = format!("http://127.0.0.1:{port}");
        let mut client = None;
        for _ in 0..100 {
            if let Ok(c) = CoordinatorClient::connect(url.clone()).await {
                client = Some(c);
                break;
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        let mut c =
            client.unwrap_or_else(|| panic!("coordinator did not start: {}", coord.output()));
        let join = c
            .join(pb::JoinRequest {
                protocol: tessera_proto::PROTOCOL_VERSION,
                name: "hand".into(),
                host: "test".into(),
                slots: 1,
                models: vec!["branin".into()],
                version: "test".into(),
            })
            .await
            .expect("join")
            .into_inner();
        let work = c
            .request_work(pb::WorkRequest {
                worker_id: join.worker_id.clone(),
                free_slots: 1,
            })
            .await
            .expect("work")
            .into_inner();
        let lease = work.leases.first().expect("one lease").clone();
        let result = |v: f64| pb::RunResult {
            lease_id: lease.lease_id.clone(),
            evaluation_id: lease.evaluation_id,
            started_unix_ms: 1,
            ended_unix_ms: 2,
            attempt: 1,
            outcome: Some(pb::run_result::Outcome::Metrics(pb::Metrics {
                bits: [("value".to_string(), f64::to_bits(v))]
                    .into_iter()
                    .collect(),
            })),
        };
        for v in [1.5, 1.5, 99.0] {
            let ack = c
                .report(pb::ReportRequest {
                    worker_id: join.worker_id.clone(),
                    results: vec![result(v)],
                    worker_name: "raw-client".into(),
                })
                .await
                .expect("report")
                .into_inner();
            assert_eq!(ack.acknowledged, vec![lease.evaluation_id]);
        }
        // A wrong protocol version is refused with a clear message.
        let err = c
            .join(pb::JoinRequest {
                protocol: tessera_proto::PROTOCOL_VERSION + 1,
                name: "future".into(),
                host: "test".into(),
                slots: 1,
                models: vec!["branin".into()],
                version: "9.9.9".into(),
            })
            .await
            .expect_err("version mismatch refused");
        assert!(
            err.message().contains("protocol mismatch"),
            "{}",
            err.message()
        );
    });
    let st = status(&db).expect("status");
    assert_eq!(field(&st, "done"), 1);
    let rows = export_rows(&db);
    let done: Vec<_> = rows
        .iter()
        .filter(|r| r.get("status").map(String::as_str) == Some("done"))
        .collect();
    assert_eq!(done.len(), 1, "{rows:?}");
    assert_eq!(
        done[0]
            .get("value")
            .map(String::as_str)
            .and_then(|v| v.parse::<f64>().ok()),
        Some(1.5)
    );
}

/// SIGTERM to a worker: running work that cannot finish within the grace
/// period is handed back at once (not left to expire), and the worker exits 0.
/// SIGTERM to the coordinator: it exits 0 and the sweep resumes from the file.
#[test]
fn sigterm_hands_work_back_and_both_exit_cleanly() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 3, 1, 4000);
    let db = dir.join("sweep.db");
    let port = free_port();
    // Long leases: handed-back work must be re-queued without waiting for expiry.
    let mut cmd = tessera();
    cmd.arg("serve").arg(&spec).arg("--db").arg(&db).args([
        "--listen",
        &format!("127.0.0.1:{port}"),
        "--lease",
        "60s",
    ]);
    let mut coord = Proc::start(cmd, dir, "coordinator");
    let mut w = worker(dir, port, "slow", 2, &["--grace", "1s"]);
    // Wait until the coordinator itself reports both slots busy.
    let url = format!("http://127.0.0.1:{port}");
    let start = std::time::Instant::now();
    loop {
        let out = tessera()
            .args(["status", "--json", "--coordinator", &url])
            .output()
            .expect("status");
        if out.status.success() {
            let st: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
            if field(&st, "running") == 2 {
                break;
            }
        }
        assert!(
            start.elapsed() < Duration::from_secs(30),
            "the worker never ran two evaluations: {}\n{}",
            w.output(),
            coord.output()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    w.term();
    let exit = w
        .wait_exit(Duration::from_secs(20))
        .expect("worker exits after SIGTERM");
    assert!(exit.success(), "{}", w.output());
    assert!(w.output().contains("2 handed back"), "{}", w.output());
    coord.term();
    let exit = coord
        .wait_exit(Duration::from_secs(20))
        .expect("coordinator exits after SIGTERM");
    assert!(exit.success(), "{}", coord.output());
    let st = status(&db).expect("status");
    assert_eq!(field(&st, "done"), 0);
    assert_eq!(field(&st, "queued"), 3);
}

/// The running coordinator answers `Predict` over gRPC once its background
/// refit has seen the results, with the same numbers as the offline query
/// from the database file.
#[test]
fn running_coordinator_answers_predict_like_the_database() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 12, 1, 0);
    let db = dir.join("sweep.db");
    let port = free_port();
    let coord = serve(dir, &spec, port, &[]);
    let w = worker(dir, port, "alpha", 2, &[]);
    wait_for(
        &db,
        Duration::from_secs(60),
        "the sweep to finish",
        &[&coord, &w],
        |st| st.get("finished").and_then(|v| v.as_bool()) == Some(true),
    );
    let url = format!("http://127.0.0.1:{port}");
    // The live status knows the workers, too.
    let live = tessera()
        .args(["status", "--json", "--coordinator", &url])
        .output()
        .expect("status");
    assert!(
        live.status.success(),
        "{}",
        String::from_utf8_lossy(&live.stderr)
    );
    let live: serde_json::Value = serde_json::from_slice(&live.stdout).expect("json");
    assert_eq!(field(&live, "done"), 12);
    let workers = live["workers"].as_array().expect("workers");
    assert_eq!(workers.len(), 1);
    assert_eq!(workers[0]["name"], "alpha");
    assert_eq!(workers[0]["completed"], 12);
    let ask = |source: &[&str]| {
        tessera()
            .arg("predict")
            .args(source)
            .args(["x1=3.14", "x2=2.27", "--json"])
            .output()
            .expect("predict")
    };
    let start = std::time::Instant::now();
    let online = loop {
        let out = ask(&["--coordinator", &url]);
        if out.status.success() {
            break out;
        }
        assert!(
            start.elapsed() < Duration::from_secs(40),
            "predict over gRPC kept failing: {}\n{}",
            String::from_utf8_lossy(&out.stderr),
            coord.output()
        );
        std::thread::sleep(Duration::from_millis(500));
    };
    let offline = ask(&["--db", db.to_str().expect("utf-8 path")]);
    assert!(
        offline.status.success(),
        "{}",
        String::from_utf8_lossy(&offline.stderr)
    );
    let a: serde_json::Value = serde_json::from_slice(&online.stdout).expect("json");
    let b: serde_json::Value = serde_json::from_slice(&offline.stdout).expect("json");
    let mean = |v: &serde_json::Value| v[0]["value"]["mean"].as_f64().expect("mean of value");
    let sd = |v: &serde_json::Value| v[0]["value"]["sd"].as_f64().expect("sd of value");
    assert!(mean(&a).is_finite() && sd(&a) >= 0.0);
    assert!(
        (mean(&a) - mean(&b)).abs() < 1e-9 * (1.0 + mean(&b).abs()),
        "{a} vs {b}"
    );
    assert!(
        (sd(&a) - sd(&b)).abs() < 1e-9 * (1.0 + sd(&b)),
        "{a} vs {b}"
    );
}

/// A token shorter than 16 characters is refused with the reason.
#[test]
fn a_short_token_is_refused_with_the_reason() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 2, 1, 0);
    std::fs::write(dir.join("short.token"), "abc\n").expect("token");
    let out = tessera()
        .arg("serve")
        .arg(&spec)
        .args(["--db", "s.db", "--token-file", "short.token"])
        .current_dir(dir)
        .output()
        .expect("serve");
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr);
    assert!(
        err.contains("at least 16") && err.contains("guessed"),
        "{err}"
    );
    assert!(!dir.join("s.db").exists());
}

/// A worker with nothing running stops at once on SIGTERM, not after its grace period.
#[test]
fn an_idle_worker_stops_at_once_on_sigterm() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 2, 1, 0);
    let port = free_port();
    let coord = serve(dir, &spec, port, &[]);
    let mut w = worker(dir, port, "idle", 1, &["--grace", "60s", "--stay"]);
    wait_for(
        &dir.join("sweep.db"),
        Duration::from_secs(60),
        "the sweep to finish",
        &[&coord, &w],
        |st| st.get("finished").and_then(|v| v.as_bool()) == Some(true),
    );
    std::thread::sleep(Duration::from_millis(500));
    let started = std::time::Instant::now();
    w.term();
    let exit = w.wait_exit(Duration::from_secs(20)).expect("exits");
    assert!(exit.success(), "{}", w.output());
    assert!(
        started.elapsed() < Duration::from_secs(5),
        "took {:?}",
        started.elapsed()
    );
}

/// `--idle-exit`: a worker offered no work (another worker holds every run)
/// stops by itself, exit 0, while the sweep goes on; the busy worker is not
/// affected and the sweep completes once each.
#[test]
fn an_idle_worker_exits_after_its_idle_period() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 2, 1, 4000);
    let port = free_port();
    let coord = serve(dir, &spec, port, &[]);
    let mut busy = worker(dir, port, "busy", 2, &[]);
    // Give the busy worker both runs first (it has joined and asked for work).
    let start = std::time::Instant::now();
    while !busy.output().contains("joined") {
        assert!(
            start.elapsed() < Duration::from_secs(20),
            "the busy worker did not join:\n{}\n{}",
            busy.output(),
            coord.output()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    std::thread::sleep(Duration::from_millis(800));
    let mut idle = worker(dir, port, "idle", 2, &["--idle-exit", "1s"]);
    let status = idle
        .wait_exit(Duration::from_secs(15))
        .unwrap_or_else(|| panic!("the idle worker did not stop:\n{}", idle.output()));
    assert!(
        status.success(),
        "idle exit is a normal exit:\n{}",
        idle.output()
    );
    assert!(idle.output().contains("idle"), "{}", idle.output());
    assert!(
        busy.child.try_wait().ok().flatten().is_none(),
        "the busy worker is still working"
    );
    let st = busy.wait_exit(Duration::from_secs(30));
    assert!(st.is_some_and(|s| s.success()), "{}", busy.output());
    assert_each_once_all_ok(&dir.join("sweep.db"), 2);
}
