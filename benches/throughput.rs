//! Coordinator throughput over loopback gRPC with the zero-cost `branin`
//! model: evaluations per second with 1, 8 and 64 worker slots, and the
//! per-evaluation overhead. Every result is committed to SQLite (WAL,
//! synchronous=FULL) before it is acknowledged.
//!
//! Run: `cargo bench --bench throughput` (prints a Markdown table).

use std::sync::Arc;
use std::time::{Duration, Instant};
use tessera::cluster::{ClusterOptions, LocalCluster};
use tessera_coordinator::engine::{Engine, OpenOptions};
use tessera_coordinator::scheduler::LeaseTimes;
use tessera_coordinator::server::ServeOptions;
use tessera_worker::runner::{RunnerConfig, Runners};

fn spec(evaluations: u32) -> String {
    // initial = budget: the whole sweep is the design, so the bench measures
    // leasing and committing, not surrogate fitting.
    let replicates = 10;
    let budget = evaluations / replicates;
    format!(
        "name = \"throughput\"\nseed = 1\nbudget = {budget}\ninitial = {budget}\nreplicates = {replicates}\n\
         [model]\nname = \"branin\"\ntimeout = \"1m\"\n\
         [params.x1]\nrange = [-5.0, 10.0]\n[params.x2]\nrange = [0.0, 15.0]\n\
         [objective]\nminimize = \"value\"\n"
    )
}

async fn one(slots: u32, workers: u32, evaluations: u32) -> (f64, Duration) {
    let dir = tempfile::tempdir().expect("temp dir");
    let engine = Engine::open(OpenOptions {
        db: dir.path().join("bench.db"),
        spec_text: spec(evaluations),
        spec_file: "bench.toml".into(),
        force: false,
        times: LeaseTimes::default(),
        reproducible_default: false,
    })
    .expect("open");
    let runner = Arc::new(Runners::new(RunnerConfig::default()).expect("no commands"));
    let start = Instant::now();
    let mut cluster = LocalCluster::start(
        engine.clone(),
        ClusterOptions {
            workers,
            slots_per_worker: slots / workers,
            runner,
            serve: ServeOptions::default(),
            name: "bench".into(),
            host: "bench".into(),
            grace: Duration::from_secs(1),
        },
    )
    .await
    .expect("start the cluster");
    while !cluster.workers_done() {
        let _ = cluster.next_worker_end().await;
    }
    let elapsed = start.elapsed();
    let st = engine.status();
    assert_eq!(
        st.done,
        u64::from(evaluations),
        "not every evaluation finished"
    );
    cluster.stop().await.expect("stop the cluster");
    (f64::from(evaluations) / elapsed.as_secs_f64(), elapsed)
}

fn main() {
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .expect("runtime");
    println!("| worker slots | workers | evaluations | seconds | evaluations/s | overhead per evaluation |");
    println!("|---:|---:|---:|---:|---:|---:|");
    for (slots, workers, n) in [
        (1, 1, 2_000),
        (8, 1, 10_000),
        (8, 8, 10_000),
        (64, 1, 20_000),
        (64, 8, 20_000),
    ] {
        let (rate, t) = rt.block_on(one(slots, workers, n));
        println!(
            "| {slots} | {workers} | {n} | {:.2} | {rate:.0} | {:.0} us |",
            t.as_secs_f64(),
            1e6 / rate
        );
    }
}
