//! TLS between workers and the coordinator, and the standard gRPC health
//! service (grpc.health.v1) that ordinary tooling probes.

use crate::harness::*;
use std::path::Path;
use std::process::Command;
use std::time::Duration;

/// A throwaway CA and a server certificate for localhost / 127.0.0.1, made
/// with the openssl command-line tool.
fn make_certs(dir: &Path) {
    let run = |args: &[&str]| {
        let out = Command::new("openssl")
            .args(args)
            .current_dir(dir)
            .output()
            .expect("openssl is installed (.ci/run installs it)");
        assert!(
            out.status.success(),
            "openssl {args:?}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    };
    std::fs::write(
        dir.join("ext.cnf"),
        "subjectAltName=DNS:localhost,IP:127.0.0.1\n",
    )
    .expect("ext");
    run(&[
        "req",
        "-x509",
        "-newkey",
        "ec",
        "-pkeyopt",
        "ec_paramgen_curve:prime256v1",
        "-nodes",
        "-keyout",
        "ca.key",
        "-out",
        "ca.pem",
        "-days",
        "2",
        "-subj",
        "/CN=tessera test CA",
    ]);
    run(&[
        "req",
        "-newkey",
        "ec",
        "-pkeyopt",
        "ec_paramgen_curve:prime256v1",
        "-nodes",
        "-keyout",
        "server.key",
        "-out",
        "server.csr",
        "-subj",
        "/CN=localhost",
    ]);
    run(&[
        "x509",
        "-req",
        "-in",
        "server.csr",
        "-CA",
        "ca.pem",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        "server.pem",
        "-days",
        "2",
        "-extfile",
        "ext.cnf",
    ]);
}

#[test]
fn a_sweep_runs_over_tls_and_a_worker_without_the_ca_is_refused() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    make_certs(dir);
    let spec = branin_spec(dir, 6, 1, 0);
    let db = dir.join("sweep.db");
    let port = free_port();
    let mut cmd = tessera();
    cmd.arg("serve")
        .arg(&spec)
        .arg("--db")
        .arg(&db)
        .args(["--listen", &format!("127.0.0.1:{port}")])
        .arg("--tls-cert")
        .arg(dir.join("server.pem"))
        .arg("--tls-key")
        .arg(dir.join("server.key"));
    let coord = Proc::start(cmd, dir, "coordinator");
    // Without the CA the certificate cannot be verified: no work is done.
    let mut plain = tessera();
    plain
        .args([
            "worker",
            "--coordinator",
            &format!("https://localhost:{port}"),
            "--slots",
            "1",
        ])
        .arg("--spool")
        .arg(dir.join("plain.spool"));
    let mut untrusting = Proc::start(plain, dir, "untrusting");
    let exit = untrusting
        .wait_exit(Duration::from_secs(20))
        .expect("exits");
    assert!(!exit.success());
    assert!(
        untrusting.output().contains("no --ca was given"),
        "{}",
        untrusting.output()
    );
    // A CA that did not sign the server's certificate: the handshake fails and no work is done.
    std::fs::copy(dir.join("server.pem"), dir.join("wrong-ca.pem")).expect("copy");
    let mut wrong = tessera();
    wrong
        .args([
            "worker",
            "--coordinator",
            &format!("https://localhost:{port}"),
            "--slots",
            "1",
        ])
        .arg("--ca")
        .arg(dir.join("wrong-ca.pem"))
        .arg("--spool")
        .arg(dir.join("wrong.spool"));
    let mut wrong = Proc::start(wrong, dir, "wrong-ca");
    let exit = wrong.wait_exit(Duration::from_secs(20)).expect("exits");
    assert!(!exit.success());
    assert!(
        wrong
            .output()
            .contains("cannot verify the coordinator's TLS certificate"),
        "{}",
        wrong.output()
    );
    let st = status(&db).expect("status");
    assert_eq!(
        field(&st, "done"),
        0,
        "a worker that cannot verify the server must not run work"
    );
    let mut w = tessera();
    w.args([
        "worker",
        "--coordinator",
        &format!("https://localhost:{port}"),
        "--slots",
        "2",
    ])
    .arg("--ca")
    .arg(dir.join("ca.pem"))
    .arg("--spool")
    .arg(dir.join("w.spool"));
    let mut worker = Proc::start(w, dir, "worker");
    let st = wait_for(
        &db,
        Duration::from_secs(60),
        "the sweep to finish over TLS",
        &[&coord, &worker],
        |st| st.get("finished").and_then(|v| v.as_bool()) == Some(true),
    );
    assert_eq!(field(&st, "done"), 6);
    assert!(
        worker
            .wait_exit(Duration::from_secs(20))
            .is_some_and(|s| s.success()),
        "{}",
        worker.output()
    );
    // The query commands reach the same TLS coordinator with --ca.
    let url = format!("https://localhost:{port}");
    let ca = dir.join("ca.pem");
    let out = tessera()
        .args(["status", "--json", "--coordinator", &url, "--ca"])
        .arg(&ca)
        .output()
        .expect("status");
    ok(&out, "status over TLS");
    let live: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON");
    assert_eq!(field(&live, "done"), 6, "{live}");
    let out = tessera()
        .args(["status", "--coordinator", &url])
        .output()
        .expect("status");
    assert!(!out.status.success());
    assert!(
        text(&out.stderr).contains("no --ca was given"),
        "{}",
        text(&out.stderr)
    );
    // The coordinator refits its surrogates every few seconds; ask until it has one.
    let started = std::time::Instant::now();
    let answer = loop {
        let out = tessera()
            .args(["predict", "--json", "--coordinator", &url, "--ca"])
            .arg(&ca)
            .args(["x1=3.0", "x2=2.5"])
            .output()
            .expect("predict");
        if out.status.success() {
            break text(&out.stdout);
        }
        assert!(
            text(&out.stderr).contains("no surrogate yet")
                && started.elapsed() < Duration::from_secs(30),
            "{}",
            text(&out.stderr)
        );
        std::thread::sleep(Duration::from_millis(500));
    };
    let preds: serde_json::Value = serde_json::from_str(&answer).expect("JSON");
    assert!(
        preds[0]["value"]["mean"]
            .as_f64()
            .is_some_and(f64::is_finite),
        "{preds}"
    );
}

/// The standard health service answers without a token; server reflection
/// (which describes the whole API) needs the token like every other call.
#[test]
fn the_health_service_reports_serving_and_reflection_lists_the_api() {
    use tonic_health::pb::health_client::HealthClient;
    use tonic_health::pb::{health_check_response::ServingStatus, HealthCheckRequest};
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 2, 1, 0);
    std::fs::write(dir.join("t.token"), "s3cret-token-value\n").expect("token");
    let port = free_port();
    let mut cmd = tessera();
    cmd.arg("serve")
        .arg(&spec)
        .arg("--db")
        .arg(dir.join("sweep.db"))
        .args(["--listen", &format!("127.0.0.1:{port}")])
        .arg("--token-file")
        .arg(dir.join("t.token"));
    let coord = Proc::start(cmd, dir, "coordinator");
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    rt.block_on(async {
        let url = format!("http://127.0.0.1:{port}");
        let mut client = None;
        for _ in 0..100 {
            if let Ok(ch) = tonic::transport::Endpoint::from_shared(url.clone())
                .expect("url")
                .connect()
                .await
            {
                client = Some(HealthClient::new(ch));
                break;
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        let mut c =
            client.unwrap_or_else(|| panic!("coordinator did not start: {}", coord.output()));
        // Health probes need no token (load balancers and Kubernetes use them).
        for service in ["", "tessera.v1.Coordinator"] {
            let r = c
                .check(HealthCheckRequest {
                    service: service.into(),
                })
                .await
                .expect("health check")
                .into_inner();
            assert_eq!(
                r.status,
                ServingStatus::Serving as i32,
                "service {service:?}"
            );
        }
    });
}
