//! Built-in models through `Runners`: fixed inputs, timeouts, cancellation,
//! expected metrics.

use std::time::{Duration, Instant};

use tessera_worker::models::run_builtin;
use tessera_worker::runner::{FailureKind, RunRequest, Runner, RunnerConfig, Runners};
use tokio_util::sync::CancellationToken;

fn runners() -> Runners {
    Runners::new(RunnerConfig::default()).expect("no commands")
}

#[tokio::test]
async fn numeric_fixed_inputs_merge_with_params() {
    let r = runners();
    let mut req = RunRequest::new("branin");
    req.params.insert("x1".into(), std::f64::consts::PI);
    req.fixed.insert("x2".into(), serde_json::json!(2.275));
    req.expected_metrics = vec!["value".into()];
    let m = r.run(req, CancellationToken::new()).await.expect("runs");
    // Branin minimum 5/(4 pi) at (pi, 2.275) (Surjanovic & Bingham VLSE).
    assert!((m["value"] - 5.0 / (4.0 * std::f64::consts::PI)).abs() < 1e-12);
}

#[tokio::test]
async fn bad_fixed_inputs_are_bad_input() {
    let r = runners();
    let mut req = RunRequest::new("branin");
    req.fixed.insert("x1".into(), serde_json::json!("fast"));
    let e = r
        .run(req, CancellationToken::new())
        .await
        .expect_err("string");
    assert_eq!(e.kind, FailureKind::BadInput);

    let mut req = RunRequest::new("branin");
    req.params.insert("x1".into(), 1.0);
    req.fixed.insert("x1".into(), serde_json::json!(2.0));
    let e = r
        .run(req, CancellationToken::new())
        .await
        .expect_err("twice");
    assert_eq!(e.kind, FailureKind::BadInput);
    assert!(e.reason.contains("both"), "{}", e.reason);
}

#[tokio::test]
async fn a_metric_the_model_does_not_report_is_missing() {
    let mut req = RunRequest::new("hartmann3");
    req.expected_metrics = vec!["value".into(), "territory_cv".into()];
    let e = runners()
        .run(req, CancellationToken::new())
        .await
        .expect_err("missing");
    assert_eq!(e.kind, FailureKind::MissingMetric);
    assert!(e.reason.contains("territory_cv"), "{}", e.reason);
}

#[tokio::test]
async fn timeout_stops_a_slow_built_in_run() {
    let mut req = RunRequest::new("hartmann6");
    req.fixed
        .insert("delay_ms".into(), serde_json::json!(60_000));
    req.timeout = Some(Duration::from_millis(200));
    let t0 = Instant::now();
    let e = runners()
        .run(req, CancellationToken::new())
        .await
        .expect_err("times out");
    assert_eq!(e.kind, FailureKind::Timeout);
    // The blocking thread noticed the stop flag: the run did not sleep 60 s.
    assert!(t0.elapsed() < Duration::from_secs(20), "{:?}", t0.elapsed());
}

#[tokio::test]
async fn cancel_stops_a_tiling_run() {
    let mut req = RunRequest::new("tiling");
    // A big, slow layer (10,000 cells, 5 M voxels: seconds of work).
    req.params.insert("layer_width".into(), 2000.0);
    req.params.insert("layer_thickness".into(), 10.0);
    req.params.insert("exclusion".into(), 0.0);
    let cancel = CancellationToken::new();
    let c = cancel.clone();
    tokio::spawn(async move {
        tokio::time::sleep(Duration::from_millis(100)).await;
        c.cancel();
    });
    let e = runners().run(req, cancel).await.expect_err("cancelled");
    assert_eq!(e.kind, FailureKind::Cancelled);
}

#[tokio::test]
async fn the_worker_offers_every_built_in_model() {
    let names = runners().models();
    for m in [
        "branin",
        "goldstein_price",
        "hartmann3",
        "hartmann6",
        "ishigami",
        "tiling",
    ] {
        assert!(names.iter().any(|n| n == m), "{m} in {names:?}");
    }
    // And the synchronous entry point agrees with the runner.
    let direct = run_builtin("ishigami", &Default::default(), 3).expect("runs");
    let via = runners()
        .run(
            RunRequest {
                seed: 3,
                ..RunRequest::new("ishigami")
            },
            CancellationToken::new(),
        )
        .await
        .expect("runs");
    assert_eq!(direct, via);
}
