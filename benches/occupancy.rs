//! Slot occupancy of a distributed adaptive sweep: one coordinator
//! (`tessera serve`), four worker processes with 50 slots each, runs of
//! one second (`branin` with `delay_ms = 1000`), `strategy = "improve"`,
//! budget 800 with 200 initial points, proposals made as results arrive.
//! Prints the share of slot-time spent running simulations, and the
//! planning rounds from the coordinator's log.
//!
//! Run: `cargo bench --bench occupancy` (takes about half a minute).

use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn main() {
    let bin = env!("CARGO_BIN_EXE_tessera");
    let dir = tempfile::tempdir().expect("temp dir");
    let spec = dir.path().join("occupancy.toml");
    std::fs::write(
        &spec,
        "name = \"occupancy\"\nseed = 1\nbudget = 800\ninitial = 200\nstrategy = \"improve\"\n\
         reproducible = false\n[model]\nname = \"branin\"\n[model.fixed]\ndelay_ms = 1000\n\
         [params.x1]\nrange = [-5.0, 10.0]\n[params.x2]\nrange = [0.0, 15.0]\n\
         [objective]\nminimize = \"value\"\n",
    )
    .expect("write");
    let db = dir.path().join("occupancy.db");
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .map(|a| a.port())
        .expect("a free port");
    let log = std::fs::File::create(dir.path().join("serve.log")).expect("log");
    let start = Instant::now();
    let mut serve = Command::new(bin)
        .args(["--log-level", "info", "serve"])
        .arg(&spec)
        .arg("--db")
        .arg(&db)
        .args(["--listen", &format!("127.0.0.1:{port}"), "--exit-when-done"])
        .stdout(Stdio::null())
        .stderr(log)
        .spawn()
        .expect("start the coordinator");
    std::thread::sleep(Duration::from_millis(300));
    let workers: Vec<_> = (0..4)
        .map(|i| {
            Command::new(bin)
                .args(["worker", "--slots", "50", "--name", &format!("w{i}")])
                .arg("--coordinator")
                .arg(format!("http://127.0.0.1:{port}"))
                .arg("--spool")
                .arg(dir.path().join(format!("w{i}.spool")))
                .stdout(Stdio::null())
                .stderr(Stdio::null())
                .spawn()
                .expect("start a worker")
        })
        .collect();
    let _ = serve.wait();
    let wall = start.elapsed().as_secs_f64();
    for mut w in workers {
        let _ = w.wait();
    }
    let out = Command::new(bin)
        .args(["export", "--format", "jsonl", "--db"])
        .arg(&db)
        .output()
        .expect("export");
    let mut busy_ms = 0u64;
    let (mut first, mut last) = (u64::MAX, 0u64);
    let mut rows = 0;
    for line in String::from_utf8_lossy(&out.stdout).lines() {
        let v: serde_json::Value = serde_json::from_str(line).expect("JSON");
        let (s, e) = (
            v["started_unix_ms"].as_u64().unwrap_or(0),
            v["ended_unix_ms"].as_u64().unwrap_or(0),
        );
        busy_ms += e.saturating_sub(s);
        first = first.min(s);
        last = last.max(e);
        rows += 1;
    }
    let span = (last - first) as f64 / 1000.0;
    let text = std::fs::read_to_string(dir.path().join("serve.log")).unwrap_or_default();
    let rounds: Vec<&str> = text
        .lines()
        .filter(|l| l.contains("proposed new points"))
        .collect();
    println!("| runs | slots | wall time, s (first to last run) | ideal, s | slot-time busy | planning rounds |");
    println!("|---:|---:|---:|---:|---:|---:|");
    println!(
        "| {rows} | 200 | {span:.1} (process {wall:.1}) | 4.0 | {:.1}% | {} |",
        100.0 * busy_ms as f64 / 1000.0 / (200.0 * span),
        rounds.len()
    );
    for r in rounds {
        eprintln!("{r}");
    }
}
