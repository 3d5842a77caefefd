//! The sweep database: data survives reopening, the first result wins,
//! failures are retried, and files that are not ours (or are newer) are refused.

use std::collections::BTreeMap;
use std::path::Path;

use tessera_coordinator::seed::replicate_seed;
use tessera_coordinator::store::{
    CommitResult, EvalStatus, NewFit, NewPoint, Outcome, OutcomeResult, PointOrigin, Store,
    StoreError, SCHEMA_VERSION,
};

const SPEC: &str = "name = \"t\"\n# the text is stored verbatim\n";

fn points(n: usize, origin: PointOrigin, batch: u32) -> Vec<NewPoint> {
    (0..n)
        .map(|i| NewPoint {
            values: vec![i as f64 + 0.25, 10.0 * i as f64],
            origin,
            batch,
            proposal: None,
        })
        .collect()
}

fn done(id: i64, worker: &str, value: f64) -> Outcome {
    Outcome {
        evaluation_id: id,
        worker: worker.to_string(),
        started_unix_ms: 1_000,
        ended_unix_ms: 2_000,
        result: OutcomeResult::Done(BTreeMap::from([("cv".to_string(), value)])),
    }
}

fn failed(id: i64, final_attempt: bool) -> Outcome {
    Outcome {
        evaluation_id: id,
        worker: "w1".to_string(),
        started_unix_ms: 1_000,
        ended_unix_ms: 1_500,
        result: OutcomeResult::Failed {
            kind: "exit".to_string(),
            reason: "exit status 3".to_string(),
            stderr_tail: "Traceback ...".to_string(),
            final_attempt,
        },
    }
}

fn new_sweep(path: &Path) -> (Store, i64) {
    let mut store = Store::open(path).expect("open");
    let sweep = store.create_sweep("t", SPEC, "t.toml", 7).expect("create");
    (store, sweep.id)
}

#[test]
fn reopening_keeps_sweep_points_and_results() {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join("sweep.db");
    {
        let (mut store, id) = new_sweep(&path);
        store
            .insert_points(id, &points(3, PointOrigin::Design, 0), 2, 7)
            .expect("insert");
        let evals = store.evaluations(id).expect("evals");
        let r = store
            .commit_outcomes(&[done(evals[0].id, "w1", 0.5)])
            .expect("commit");
        assert_eq!(r, [CommitResult::Stored]);
    }
    let store = Store::open_read_only(&path).expect("reopen");
    let sweep = store.sweep().expect("read").expect("a sweep");
    assert_eq!(
        (sweep.name.as_str(), sweep.spec_text.as_str(), sweep.seed),
        ("t", SPEC, 7)
    );
    assert_eq!(sweep.spec_file, "t.toml");
    let pts = store.points(sweep.id).expect("points");
    assert_eq!(pts.len(), 3);
    assert_eq!(pts[2].values, [2.25, 20.0]);
    assert_eq!(
        (pts[2].idx, pts[2].origin, pts[2].batch),
        (2, PointOrigin::Design, 0)
    );
    let evals = store.evaluations(sweep.id).expect("evals");
    assert_eq!(evals.len(), 6, "3 points x 2 replicates");
    assert_eq!(evals[0].status, EvalStatus::Done);
    assert_eq!(evals[0].metrics["cv"], 0.5);
    assert_eq!(evals[0].worker.as_deref(), Some("w1"));
    assert_eq!(
        (evals[0].started_unix_ms, evals[0].ended_unix_ms),
        (Some(1000), Some(2000))
    );
    assert!(evals[1..].iter().all(|e| e.status == EvalStatus::Queued));
}

#[test]
fn replicate_seeds_follow_the_sweep_seed() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, id) = new_sweep(&dir.path().join("s.db"));
    store
        .insert_points(id, &points(2, PointOrigin::Design, 0), 3, 7)
        .expect("insert");
    let more = store
        .insert_points(id, &points(1, PointOrigin::Improve, 1), 3, 7)
        .expect("insert");
    assert_eq!(more[0].idx, 2, "indices continue after existing points");
    for e in store.evaluations(id).expect("evals") {
        assert_eq!(e.seed, replicate_seed(7, e.point_idx, e.replicate));
    }
}

#[test]
fn a_second_result_is_stored_once() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, id) = new_sweep(&dir.path().join("s.db"));
    store
        .insert_points(id, &points(1, PointOrigin::Design, 0), 1, 7)
        .expect("insert");
    let eid = store.evaluations(id).expect("evals")[0].id;
    let r = store
        .commit_outcomes(&[
            done(eid, "w1", 0.5),
            done(eid, "w2", 0.9),
            done(9999, "w1", 1.0),
        ])
        .expect("commit");
    assert_eq!(
        r,
        [
            CommitResult::Stored,
            CommitResult::Duplicate,
            CommitResult::Unknown
        ]
    );
    let r = store
        .commit_outcomes(&[done(eid, "w3", 0.1)])
        .expect("commit");
    assert_eq!(r, [CommitResult::Duplicate]);
    let e = &store.evaluations(id).expect("evals")[0];
    assert_eq!(
        (e.metrics["cv"], e.worker.as_deref(), e.attempts),
        (0.5, Some("w1"), 1)
    );
}

#[test]
fn a_failure_is_retried_then_final() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, id) = new_sweep(&dir.path().join("s.db"));
    store
        .insert_points(id, &points(2, PointOrigin::Design, 0), 1, 7)
        .expect("insert");
    let ids: Vec<i64> = store
        .evaluations(id)
        .expect("evals")
        .iter()
        .map(|e| e.id)
        .collect();
    // First point: fails once, then succeeds on the retry.
    assert_eq!(
        store.commit_outcomes(&[failed(ids[0], false)]).expect("c"),
        [CommitResult::Stored]
    );
    let e = &store.evaluations(id).expect("evals")[0];
    assert_eq!((e.status, e.attempts), (EvalStatus::Queued, 1));
    assert_eq!(e.failure_kind.as_deref(), Some("exit"));
    assert_eq!(e.failure_reason.as_deref(), Some("exit status 3"));
    assert_eq!(e.stderr_tail.as_deref(), Some("Traceback ..."));
    assert_eq!(
        store
            .commit_outcomes(&[done(ids[0], "w2", 0.3)])
            .expect("c"),
        [CommitResult::Stored]
    );
    let e = &store.evaluations(id).expect("evals")[0];
    assert_eq!(
        (e.status, e.attempts, e.metrics["cv"]),
        (EvalStatus::Done, 2, 0.3)
    );
    // Second point: fails twice, the second time for good; a late result is ignored.
    store.commit_outcomes(&[failed(ids[1], false)]).expect("c");
    store.commit_outcomes(&[failed(ids[1], true)]).expect("c");
    let e = &store.evaluations(id).expect("evals")[1];
    assert_eq!((e.status, e.attempts), (EvalStatus::Failed, 2));
    assert_eq!(
        store
            .commit_outcomes(&[done(ids[1], "w1", 1.0)])
            .expect("c"),
        [CommitResult::Duplicate]
    );
    assert!(store.evaluations(id).expect("evals")[1].metrics.is_empty());
}

#[test]
fn non_finite_metrics_read_back_as_missing() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, id) = new_sweep(&dir.path().join("s.db"));
    store
        .insert_points(id, &points(1, PointOrigin::Design, 0), 1, 7)
        .expect("insert");
    let eid = store.evaluations(id).expect("evals")[0].id;
    let mut o = done(eid, "w1", f64::NAN);
    if let OutcomeResult::Done(m) = &mut o.result {
        m.insert("coverage".to_string(), 0.8);
    }
    store.commit_outcomes(&[o]).expect("commit");
    let e = &store.evaluations(id).expect("evals")[0];
    assert_eq!(e.metrics, BTreeMap::from([("coverage".to_string(), 0.8)]));
}

#[test]
fn one_sweep_per_database() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, _) = new_sweep(&dir.path().join("s.db"));
    let err = store
        .create_sweep("other", SPEC, "o.toml", 1)
        .expect_err("second sweep");
    assert!(matches!(err, StoreError::SweepExists { .. }), "{err}");
}

#[test]
fn latest_fit_per_metric() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, id) = new_sweep(&dir.path().join("s.db"));
    for (metric, n) in [("cv", 10), ("coverage", 10), ("cv", 20)] {
        let fit = NewFit {
            metric: metric.to_string(),
            n_results: n,
            kernel: "matern52".to_string(),
            model: serde_json::json!({ "n": n }),
            diagnostics: serde_json::json!({ "lml": -1.5 }),
        };
        store.save_fit(id, &fit).expect("save");
    }
    let fits = store.latest_fits(id).expect("fits");
    let got: Vec<(&str, u32)> = fits
        .iter()
        .map(|f| (f.metric.as_str(), f.n_results))
        .collect();
    assert_eq!(got, [("coverage", 10), ("cv", 20)]);
    assert_eq!(fits[1].model, serde_json::json!({ "n": 20 }));
}

#[test]
fn wal_mode_and_schema_version_are_set() {
    let dir = tempfile::tempdir().expect("tempdir");
    let (store, _) = new_sweep(&dir.path().join("s.db"));
    assert_eq!(store.journal_mode().expect("mode"), "wal");
    assert_eq!(store.schema_version().expect("version"), SCHEMA_VERSION);
    // Checked independently of our connection: SQLite records WAL mode in the
    // file header (bytes 18 and 19, the file format version numbers, are 2 for
    // WAL; sqlite.org/fileformat.html, "The Database Header").
    drop(store);
    let bytes = std::fs::read(dir.path().join("s.db")).expect("read");
    assert_eq!((bytes[18], bytes[19]), (2, 2));
}

#[test]
fn a_newer_schema_is_refused() {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join("s.db");
    drop(new_sweep(&path));
    {
        let conn = rusqlite::Connection::open(&path).expect("raw open");
        conn.pragma_update(None, "user_version", SCHEMA_VERSION + 5)
            .expect("set");
        conn.execute(
            "UPDATE meta SET value = 'tessera 9.0.0' WHERE key = 'written_by'",
            [],
        )
        .expect("set");
    }
    let err = Store::open(&path).expect_err("newer schema");
    assert!(matches!(err, StoreError::NewerSchema { found, .. } if found == SCHEMA_VERSION + 5));
    let msg = err.to_string();
    assert!(msg.contains("newer tessera (tessera 9.0.0"), "{msg}");
    assert!(msg.contains("upgrade tessera"), "{msg}");
}

#[test]
fn files_that_are_not_sweep_databases_are_refused_untouched() {
    let dir = tempfile::tempdir().expect("tempdir");
    let text = dir.path().join("notes.db");
    let content = "height,coverage\n20,0.8\n".repeat(200);
    std::fs::write(&text, &content).expect("write");
    let err = Store::open(&text).expect_err("text file");
    assert!(matches!(err, StoreError::NotADatabase { .. }), "{err}");
    assert!(err.to_string().contains("not a tessera sweep database"));
    assert_eq!(
        std::fs::read_to_string(&text).expect("read"),
        content,
        "left untouched"
    );

    let other = dir.path().join("other.db");
    {
        let conn = rusqlite::Connection::open(&other).expect("raw open");
        conn.execute_batch("CREATE TABLE samples (x REAL);")
            .expect("create");
    }
    let err = Store::open(&other).expect_err("foreign database");
    assert!(matches!(err, StoreError::Foreign { .. }), "{err}");

    let missing = dir.path().join("missing.db");
    let err = Store::open_read_only(&missing).expect_err("missing");
    assert!(
        err.to_string().starts_with("no sweep database at "),
        "{err}"
    );
    assert!(!missing.exists(), "open_existing creates nothing");
}

#[test]
fn an_empty_file_becomes_a_new_database() {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join("empty.db");
    std::fs::write(&path, b"").expect("write");
    let store = Store::open(&path).expect("open");
    assert!(store.sweep().expect("read").is_none());
}

/// Two processes opening a new database at the same moment (a coordinator
/// creating it while `tessera status` reads it) both succeed and the schema
/// is created once. Requirement (docs/architecture.md, "nothing lost"), no outside source.
#[test]
fn concurrent_opens_of_a_new_file_both_succeed() {
    for round in 0..20 {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join(format!("race-{round}.db"));
        let barrier = std::sync::Arc::new(std::sync::Barrier::new(2));
        let handles: Vec<_> = (0..2)
            .map(|_| {
                let p = path.clone();
                let b = barrier.clone();
                std::thread::spawn(move || {
                    b.wait();
                    Store::open(&p).map(|s| s.schema_version().ok())
                })
            })
            .collect();
        for h in handles {
            let opened = h.join().expect("thread");
            assert!(opened.is_ok(), "round {round}: {:?}", opened.err());
        }
        let store = Store::open_read_only(&path).expect("reopen");
        assert_eq!(
            store.schema_version().expect("version"),
            tessera_coordinator::store::SCHEMA_VERSION
        );
    }
}

/// The store thread serves requests in the order they were sent: a call
/// sent after a commit sees the committed result, even when both wait in
/// the same batch (the thread is busy while they arrive). Without this,
/// `Engine::flush` would return before results sent earlier are on disk.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_call_sent_after_a_commit_sees_it() {
    use tessera_coordinator::committer::StoreHandle;
    let dir = tempfile::tempdir().expect("tempdir");
    let (mut store, id) = new_sweep(&dir.path().join("order.db"));
    store
        .insert_points(id, &points(1, PointOrigin::Design, 0), 1, 7)
        .expect("insert");
    let eval = store.evaluations(id).expect("evals")[0].id;
    let (handle, _join) = StoreHandle::spawn(store, id, 1, 7).expect("store thread");
    // Keep the thread busy so the next two requests arrive together.
    let busy = handle.call(|_| std::thread::sleep(std::time::Duration::from_millis(300)));
    let h2 = handle.clone();
    let commit = tokio::spawn(async move { h2.commit(vec![done(eval, "w1", 0.5)]).await });
    let h3 = handle.clone();
    let seen = tokio::spawn(async move {
        // Sent after the commit request (which is queued within 100 ms).
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
        h3.call(move |s| s.evaluations(id).map(|e| e[0].status))
            .await
    });
    busy.await.expect("busy call");
    let status = seen.await.expect("task").expect("call").expect("read");
    assert_eq!(
        status,
        EvalStatus::Done,
        "the call ran before the earlier commit"
    );
    assert_eq!(
        commit.await.expect("task").expect("commit"),
        vec![CommitResult::Stored]
    );
}
