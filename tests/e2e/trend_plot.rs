//! `tessera trend`: the surrogate's curve along one parameter, drawn as SVG.

use crate::harness::*;

/// Along x1 = pi the Branin function is (x2 - 2.275)^2 + 5/(4 pi): a parabola
/// with its minimum at x2 = 2.275 (analytic, from the Branin formula as given
/// by Surjanovic & Bingham's Virtual Library of Simulation Experiments). The
/// surrogate's trend from a 30-point design must put its minimum there.
#[test]
fn trend_along_x2_at_x1_pi_finds_the_branin_valley() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 30, 1, 0);
    let db = dir.join("sweep.db");
    let run = tessera().arg("run").arg(&spec).output().expect("run");
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let svg = dir.join("valley.svg");
    let out = tessera()
        .args(["trend", "--db"])
        .arg(&db)
        .args([
            "x2",
            "--metric",
            "value",
            "--at",
            "x1=3.141592653589793",
            "--json",
            "--out",
        ])
        .arg(&svg)
        .output()
        .expect("trend");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let t: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    let curve = t["curve"].as_array().expect("curve");
    assert_eq!(curve.len(), 60);
    let (argmin, _) = curve
        .iter()
        .map(|s| {
            (
                s["x"].as_f64().expect("x"),
                s["mean"].as_f64().expect("mean"),
            )
        })
        .fold((f64::NAN, f64::INFINITY), |(bx, by), (x, y)| {
            if y < by {
                (x, y)
            } else {
                (bx, by)
            }
        });
    assert!(
        (argmin - 2.275).abs() < 1.5,
        "minimum of the trend at x2 = {argmin}, expected near 2.275"
    );
    assert_eq!(t["observed"].as_array().map(Vec::len), Some(30));
    let text = std::fs::read_to_string(&svg).expect("svg written");
    assert!(
        text.starts_with("<svg") && text.contains("x2") && text.contains("value"),
        "{}",
        &text[..200.min(text.len())]
    );
    // A parameter the sweep does not have is refused with the valid ones named.
    let bad = tessera()
        .args(["trend", "--db"])
        .arg(&db)
        .arg("x9")
        .output()
        .expect("trend");
    assert!(!bad.status.success());
    let err = String::from_utf8_lossy(&bad.stderr);
    assert!(
        err.contains("x9") && err.contains("x1") && err.contains("x2"),
        "{err}"
    );
}
