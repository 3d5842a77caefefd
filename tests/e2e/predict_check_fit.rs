//! End to end: `tessera run` on a small Branin sweep, then `tessera predict`
//! and `tessera check-fit` on its database.
//!
//! Branin (Surjanovic & Bingham, Virtual Library of Simulation Experiments)
//! on x1 in [-5, 10], x2 in [0, 15] has its minimum 5 / (4 pi) = 0.397887 at
//! (pi, 2.275), among others.

use std::path::{Path, PathBuf};

use super::harness::{ok, tessera, text};

/// Writes the sweep file and runs it to completion; returns the database.
fn branin_sweep(dir: &Path) -> PathBuf {
    let spec = dir.join("branin.toml");
    std::fs::write(
        &spec,
        r#"name = "branin-predict"
seed = 5
budget = 20
initial = 20
replicates = 1

[model]
name = "branin"
timeout = "30s"

[params.x1]
range = [-5.0, 10.0]

[params.x2]
range = [0.0, 15.0]

[objective]
minimize = "value"
"#,
    )
    .expect("write sweep file");
    let db = dir.join("branin.db");
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .arg("--db")
        .arg(&db)
        .args(["--workers", "2"])
        .output()
        .expect("start tessera run");
    ok(&out, "tessera run");
    db
}

fn branin(x1: f64, x2: f64) -> f64 {
    use std::f64::consts::PI;
    let b = 5.1 / (4.0 * PI * PI);
    let c = 5.0 / PI;
    let t = 1.0 / (8.0 * PI);
    (x2 - b * x1 * x1 + c * x1 - 6.0).powi(2) + 10.0 * (1.0 - t) * x1.cos() + 10.0
}

#[test]
#[allow(clippy::approx_constant)] // 3.14 and 2.27 are query values near the minimiser, not pi
fn predict_and_check_fit_on_a_finished_branin_sweep() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let db = branin_sweep(dir);

    // Near the minimiser (pi, 2.275) of Branin.
    let out = tessera()
        .args(["predict", "--db"])
        .arg(&db)
        .args(["x1=3.14", "x2=2.27", "--json"])
        .output()
        .expect("predict");
    ok(&out, "tessera predict --json");
    let v: serde_json::Value =
        serde_json::from_slice(&out.stdout).expect("predict --json prints JSON");
    let points = v.as_array().expect("a JSON array");
    assert_eq!(points.len(), 1, "one point asked, one answer");
    let value = &points[0]["value"];
    let mean = value["mean"].as_f64().expect("mean is a number");
    let sd = value["sd"].as_f64().expect("sd is a number");
    assert!(mean.is_finite() && sd.is_finite() && sd >= 0.0, "{value}");
    let (lo, hi) = (
        value["lower95"].as_f64().expect("lower95"),
        value["upper95"].as_f64().expect("upper95"),
    );
    assert!(
        (lo - (mean - 1.96 * sd)).abs() < 1e-3 * sd.max(1e-9) + 1e-9,
        "{value}"
    );
    assert!(
        (hi - (mean + 1.96 * sd)).abs() < 1e-3 * sd.max(1e-9) + 1e-9,
        "{value}"
    );
    // Branin ranges over [0.4, 308] on its domain; 20 points predict it to
    // within a fraction of that (a loose check: within 15% of the range, or
    // inside a widened interval).
    let truth = branin(3.14, 2.27);
    assert!(
        (mean - truth).abs() < 0.15 * 308.0 || (mean - truth).abs() < 3.0 * sd,
        "predicted {mean} +- {sd}, Branin {truth}"
    );

    // Far outside the sampled box: the answer comes with a warning on stderr.
    let out = tessera()
        .args(["predict", "--db"])
        .arg(&db)
        .args(["x1=50", "x2=1"])
        .output()
        .expect("predict");
    ok(&out, "tessera predict far away");
    let err = text(&out.stderr);
    assert!(
        err.contains("x1 = 50 is outside the range sampled so far"),
        "{err}"
    );
    assert!(
        err.contains("this is extrapolation; do not trust it"),
        "{err}"
    );
    let table = text(&out.stdout);
    assert!(
        table.contains("95% interval") && table.contains("value"),
        "{table}"
    );

    // A parameter the sweep does not have: refused, naming the valid ones.
    let out = tessera()
        .args(["predict", "--db"])
        .arg(&db)
        .args(["x1=1", "x3=2"])
        .output()
        .expect("predict");
    assert!(!out.status.success());
    let err = text(&out.stderr);
    assert!(err.contains("x1 in [-5, 10], x2 in [0, 15]"), "{err}");

    // Many points from a CSV file; a bad row is named by its line.
    let csv = dir.join("points.csv");
    std::fs::write(&csv, "x1,x2\n0,5\n9.5,14\n").expect("write csv");
    let out = tessera()
        .args(["predict", "--db"])
        .arg(&db)
        .arg("--points")
        .arg(&csv)
        .arg("--json")
        .output()
        .expect("predict csv");
    ok(&out, "tessera predict --points");
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON");
    assert_eq!(v.as_array().map(Vec::len), Some(2));
    std::fs::write(&csv, "x1,x2\n0,5\n1,oops\n").expect("write csv");
    let out = tessera()
        .args(["predict", "--db"])
        .arg(&db)
        .arg("--points")
        .arg(&csv)
        .output()
        .expect("predict csv");
    assert!(!out.status.success());
    let err = text(&out.stderr);
    assert!(
        err.contains("line 3") && err.contains("\"oops\" is not a number"),
        "{err}"
    );

    // check-fit: one verdict per metric, as JSON.
    let out = tessera()
        .args(["check-fit", "--db"])
        .arg(&db)
        .arg("--json")
        .output()
        .expect("check-fit");
    ok(&out, "tessera check-fit --json");
    let v: serde_json::Value =
        serde_json::from_slice(&out.stdout).expect("check-fit --json prints JSON");
    let verdicts = v.as_array().expect("array");
    let value = verdicts
        .iter()
        .find(|x| x["metric"] == "value")
        .expect("a verdict for value");
    assert_eq!(value["n_points"], 20);
    assert!(
        value["verdict"] == "trustworthy" || value["verdict"] == "needs_more_points",
        "{value}"
    );
    assert!(
        value["reason"].as_str().is_some_and(|r| !r.is_empty()),
        "{value}"
    );
    assert!(value["q2"].as_f64().is_some_and(f64::is_finite), "{value}");
}
