//! A worker cut off from a live coordinator by a test-controlled TCP relay
//! on loopback: the link stops forwarding for longer than the lease time and
//! then resumes, or delays every message. Nothing is lost, nothing counted twice.

use crate::harness::*;
use std::io::{Read, Write};
use std::net::{Shutdown, TcpListener, TcpStream};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

/// A TCP relay from a loopback port to `127.0.0.1:upstream`. While paused it
/// holds every byte (the connections stay open, as in a network partition);
/// every chunk can be delayed. Its threads end when the test process ends.
struct Relay {
    port: u16,
    paused: Arc<AtomicBool>,
}

impl Relay {
    fn start(upstream: u16, delay: Duration) -> Relay {
        let listener = TcpListener::bind("127.0.0.1:0").expect("bind relay");
        let port = listener.local_addr().expect("addr").port();
        let paused = Arc::new(AtomicBool::new(false));
        let p = paused.clone();
        std::thread::spawn(move || {
            for client in listener.incoming().flatten() {
                let Ok(server) = TcpStream::connect(("127.0.0.1", upstream)) else {
                    let _ = client.shutdown(Shutdown::Both);
                    continue;
                };
                let (c2, s2) = match (client.try_clone(), server.try_clone()) {
                    (Ok(c), Ok(s)) => (c, s),
                    _ => continue,
                };
                let (pa, pb) = (p.clone(), p.clone());
                std::thread::spawn(move || pipe(client, server, &pa, delay));
                std::thread::spawn(move || pipe(s2, c2, &pb, delay));
            }
        });
        Relay { port, paused }
    }

    fn pause(&self, on: bool) {
        self.paused.store(on, Ordering::SeqCst);
    }
}

/// Copies `from` to `to`, holding data while `paused` and delaying each chunk.
fn pipe(mut from: TcpStream, mut to: TcpStream, paused: &AtomicBool, delay: Duration) {
    let mut buf = vec![0u8; 64 * 1024];
    loop {
        let n = match from.read(&mut buf) {
            Ok(0) | Err(_) => break,
            Ok(n) => n,
        };
        if !delay.is_zero() {
            std::thread::sleep(delay);
        }
        while paused.load(Ordering::SeqCst) {
            std::thread::sleep(Duration::from_millis(10));
        }
        if to.write_all(&buf[..n]).is_err() {
            break;
        }
    }
    let _ = to.shutdown(Shutdown::Write);
}

fn coordinator(dir: &std::path::Path, spec: &std::path::Path, port: u16, lease: &str) -> Proc {
    let mut cmd = tessera();
    cmd.args(["--log-level", "info", "serve"])
        .arg(spec)
        .arg("--db")
        .arg(dir.join("sweep.db"))
        .args(["--listen", &format!("127.0.0.1:{port}"), "--lease", lease]);
    Proc::start(cmd, dir, "coordinator")
}

fn worker(dir: &std::path::Path, port: u16, name: &str) -> Proc {
    let mut cmd = tessera();
    cmd.args(["--log-level", "info", "worker", "--coordinator"])
        .arg(format!("http://127.0.0.1:{port}"))
        .args(["--slots", "2", "--name", name])
        .arg("--spool")
        .arg(dir.join(format!("{name}.spool")));
    Proc::start(cmd, dir, name)
}

fn finished(st: &serde_json::Value) -> bool {
    st.get("finished").and_then(|v| v.as_bool()) == Some(true)
}

#[test]
fn a_partitioned_worker_delivers_late_and_nothing_is_counted_twice() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    // 16 runs of 1.5 s; leases of 2 s: a 7 s partition expires every lease
    // the cut-off worker holds.
    let spec = branin_spec(dir, 16, 1, 1500);
    let db = dir.join("sweep.db");
    let port = free_port();
    let coord = coordinator(dir, &spec, port, "2s");
    let relay = Relay::start(port, Duration::ZERO);
    let cut = worker(dir, relay.port, "cut-off");
    wait_for(
        &db,
        Duration::from_secs(60),
        "first results",
        &[&coord, &cut],
        |st| field(st, "done") >= 2,
    );
    relay.pause(true);
    let direct = worker(dir, port, "direct");
    std::thread::sleep(Duration::from_secs(7));
    relay.pause(false);
    let st = wait_for(
        &db,
        Duration::from_secs(120),
        "the sweep to finish",
        &[&coord, &cut, &direct],
        finished,
    );
    assert_eq!(field(&st, "done"), 16);
    assert_each_once_all_ok(&db, 16);
    assert!(
        coord.output().contains("leases expired"),
        "the cut-off worker's leases expired:\n{}",
        coord.output()
    );
    let (mut cut, mut direct) = (cut, direct);
    for w in [&mut cut, &mut direct] {
        let exit = w.wait_exit(Duration::from_secs(60));
        assert!(
            exit.is_some_and(|s| s.success()),
            "{} did not exit cleanly:\n{}",
            w.name,
            w.output()
        );
    }
    // The cut-off worker kept running its work and delivered it late.
    assert!(
        cut.output().contains("cannot reach the coordinator")
            || cut.output().contains("lease lost"),
        "{}",
        cut.output()
    );
    assert!(
        !cut.output().contains(" 0 results delivered"),
        "{}",
        cut.output()
    );
}

#[test]
fn a_slow_link_delays_every_message_and_the_sweep_still_completes_once_each() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 10, 1, 200);
    let db = dir.join("sweep.db");
    let port = free_port();
    let coord = coordinator(dir, &spec, port, "6s");
    let relay = Relay::start(port, Duration::from_secs(1));
    let slow = worker(dir, relay.port, "slow-link");
    let fast = worker(dir, port, "fast-link");
    wait_for(
        &db,
        Duration::from_secs(120),
        "the sweep to finish",
        &[&coord, &slow, &fast],
        finished,
    );
    assert_each_once_all_ok(&db, 10);
}
