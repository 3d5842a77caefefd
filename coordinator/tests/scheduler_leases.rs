//! Lease rules of the scheduler, with a controlled clock (no I/O, no sleeps).
//! The rules are the project's "nothing lost" invariant (docs/architecture.md; a requirement, not an outside
//! reference): expired leases are handed out again, the first result wins,
//! failures are retried `retries` times.

use std::collections::BTreeMap;
use std::time::{Duration, Instant};
use tessera_coordinator::scheduler::{
    JoinInfo, LeaseTimes, Report, ReportOutcome, ScheduleError, Scheduler,
};
use tessera_coordinator::spec;
use tessera_coordinator::store::{
    CommitResult, EvalStatus, EvaluationRecord, PointOrigin, PointRecord,
};

const SPEC: &str = r#"
name = "t"
seed = 1
budget = 2
initial = 2
replicates = 2
retries = 1
[model]
name = "branin"
[params.x1]
range = [-5.0, 10.0]
[params.x2]
range = [0.0, 15.0]
[objective]
minimize = "value"
"#;

fn scheduler() -> Scheduler {
    scheduler_for(SPEC)
}

fn scheduler_for(text: &str) -> Scheduler {
    let spec = spec::parse(text, "t.toml").expect("valid spec");
    let points: Vec<PointRecord> = (0..2)
        .map(|i| PointRecord {
            id: i + 1,
            idx: i as u64,
            values: vec![i as f64, 1.0],
            origin: PointOrigin::Design,
            batch: 0,
            proposal: None,
        })
        .collect();
    let evals: Vec<EvaluationRecord> = (0..4)
        .map(|i| EvaluationRecord {
            id: 10 + i,
            point_id: i / 2 + 1,
            point_idx: (i / 2) as u64,
            replicate: (i % 2) as u32,
            seed: 100 + i as u64,
            status: EvalStatus::Queued,
            attempts: 0,
            worker: None,
            started_unix_ms: None,
            ended_unix_ms: None,
            metrics: BTreeMap::new(),
            failure_kind: None,
            failure_reason: None,
            stderr_tail: None,
        })
        .collect();
    let times = LeaseTimes {
        lease: Duration::from_secs(10),
        renew_every: Duration::from_secs(3),
    };
    Scheduler::new(
        std::sync::Arc::new(spec),
        times,
        "n1".into(),
        &points,
        &evals,
    )
}

fn info(models: &[&str]) -> JoinInfo {
    JoinInfo {
        name: "w".into(),
        host: "h".into(),
        slots: 4,
        models: models.iter().map(|s| s.to_string()).collect(),
        version: "test".into(),
    }
}

fn ok(eid: i64, lease: &str, v: f64) -> Report {
    Report {
        evaluation_id: eid,
        lease_id: lease.into(),
        outcome: ReportOutcome::Metrics(BTreeMap::from([("value".to_string(), v)])),
        started_unix_ms: 0,
        ended_unix_ms: 1,
    }
}

#[test]
fn a_worker_without_the_model_is_refused_at_join() {
    let mut s = scheduler();
    let err = s
        .join(info(&["hartmann3"]), Instant::now())
        .expect_err("refused");
    assert!(matches!(err, ScheduleError::ModelNotOffered { .. }));
    assert!(err.to_string().contains("--command branin="), "{err}");
}

#[test]
fn an_expired_lease_is_handed_out_again_and_a_late_first_result_is_accepted() {
    let mut s = scheduler();
    let t0 = Instant::now();
    let a = s.join(info(&["branin"]), t0).expect("join");
    let b = s.join(info(&["branin"]), t0).expect("join");
    let ga = s.request_work(&a, 1, t0).expect("work");
    assert_eq!(ga.len(), 1);
    let first = ga[0].clone();
    // Renewed in time: still held.
    let lost = s
        .renew(
            &a,
            std::slice::from_ref(&first.lease_id),
            t0 + Duration::from_secs(8),
        )
        .expect("renew");
    assert!(lost.is_empty());
    // Not renewed for longer than the lease: expired, queued at the front.
    let t1 = t0 + Duration::from_secs(19);
    assert_eq!(s.expire(t1), 1);
    let gb = s.request_work(&b, 1, t1).expect("work");
    assert_eq!(
        gb[0].evaluation_id, first.evaluation_id,
        "expired work goes first"
    );
    // The old holder learns it lost the lease.
    let lost = s
        .renew(&a, std::slice::from_ref(&first.lease_id), t1)
        .expect("renew");
    assert_eq!(lost, vec![first.lease_id.clone()]);
    // Its late result is still accepted if it comes first (the store decides).
    let d = s.decide(vec![ok(first.evaluation_id, &first.lease_id, 1.0)]);
    s.apply_committed(&a, &d, &[CommitResult::Stored], t1);
    // The second worker's result is then a duplicate: counted once.
    let d = s.decide(vec![ok(first.evaluation_id, &gb[0].lease_id, 2.0)]);
    s.apply_committed(&b, &d, &[CommitResult::Duplicate], t1);
    let st = s.status(t1);
    assert_eq!(st.done, 1);
    assert_eq!(st.running, 0);
}

#[test]
fn failures_are_retried_then_recorded_as_failed() {
    let mut s = scheduler();
    let t = Instant::now();
    let w = s.join(info(&["branin"]), t).expect("join");
    let fail = |eid: i64, lease: &str| Report {
        evaluation_id: eid,
        lease_id: lease.into(),
        outcome: ReportOutcome::Failure {
            kind: "exit".into(),
            reason: "exit status 1".into(),
            stderr_tail: String::new(),
        },
        started_unix_ms: 0,
        ended_unix_ms: 1,
    };
    let g = s.request_work(&w, 1, t).expect("work").remove(0);
    let d = s.decide(vec![fail(g.evaluation_id, &g.lease_id)]);
    assert!(
        !d[0].final_attempt,
        "retries = 1: the first failure is retried"
    );
    s.apply_committed(&w, &d, &[CommitResult::Stored], t);
    // Requeued at the back: the other three come first.
    let again: Vec<_> = s.request_work(&w, 4, t).expect("work");
    assert_eq!(again.len(), 4);
    let retry = again
        .iter()
        .find(|x| x.evaluation_id == g.evaluation_id)
        .expect("retried");
    assert_eq!(retry.attempt, 2);
    let d = s.decide(vec![fail(retry.evaluation_id, &retry.lease_id)]);
    assert!(d[0].final_attempt);
    s.apply_committed(&w, &d, &[CommitResult::Stored], t);
    let st = s.status(t);
    assert_eq!(st.failed, 1);
    assert_eq!(st.failures, vec![("exit status 1".to_string(), 1)]);
}

#[test]
fn after_a_restart_a_worker_renewing_an_old_lease_re_adopts_it() {
    let mut s = scheduler();
    let t = Instant::now();
    let w = s.join(info(&["branin"]), t).expect("join");
    // A lease id from a previous coordinator (another nonce) for evaluation 12.
    let old = "12.oldnonce.7".to_string();
    let lost = s.renew(&w, std::slice::from_ref(&old), t).expect("renew");
    assert!(lost.is_empty(), "still queued: re-adopted");
    let granted = s.request_work(&w, 4, t).expect("work");
    assert_eq!(granted.len(), 3, "evaluation 12 is not handed out twice");
    assert!(granted.iter().all(|g| g.evaluation_id != 12));
}

#[test]
fn hand_back_requeues_at_once() {
    let mut s = scheduler();
    let t = Instant::now();
    let w = s.join(info(&["branin"]), t).expect("join");
    let g = s.request_work(&w, 2, t).expect("work");
    s.hand_back(&w, &[g[0].lease_id.clone()], t)
        .expect("hand back");
    let st = s.status(t);
    assert_eq!(st.running, 1);
    assert_eq!(st.queued, 3);
    let next = s.request_work(&w, 1, t).expect("work");
    assert_eq!(next[0].evaluation_id, g[0].evaluation_id);
}

#[test]
fn unknown_worker_must_join_again() {
    let mut s = scheduler();
    let err = s
        .request_work("w9-gone", 1, Instant::now())
        .expect_err("unknown");
    assert_eq!(err, ScheduleError::UnknownWorker("w9-gone".into()));
}

/// A reproducible sweep plans its next batch only when every result is in;
/// while the last runs are under way, a worker offered nothing is told that
/// a plan is due (so it asks again within a planning round instead of
/// idling for the long retry), and not once the budget is spent.
#[test]
fn a_reproducible_sweep_awaiting_results_says_a_plan_is_due() {
    let text = SPEC.replace("budget = 2", "budget = 6");
    let mut s = scheduler_for(&text);
    s.set_reproducible(true);
    let t0 = Instant::now();
    let a = s.join(info(&["branin"]), t0).expect("join");
    let g = s.request_work(&a, 4, t0).expect("work");
    assert_eq!(g.len(), 4);
    assert!(s.wants_plan().is_none(), "results still running");
    assert!(s.plan_awaits_results());
    for (i, l) in g.iter().enumerate() {
        let d = s.decide(vec![ok(l.evaluation_id, &l.lease_id, i as f64)]);
        s.apply_committed(&a, &d, &[CommitResult::Stored], t0);
    }
    assert!(!s.plan_awaits_results(), "nothing running");
    assert!(s.wants_plan().is_some(), "every result in: plan now");

    // The budget of the original file is spent: no plan is due.
    let mut s = scheduler();
    s.set_reproducible(true);
    let a = s.join(info(&["branin"]), t0).expect("join");
    let g = s.request_work(&a, 4, t0).expect("work");
    assert_eq!(g.len(), 4);
    assert!(!s.plan_awaits_results());
}
