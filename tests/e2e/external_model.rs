//! A sweep whose model is a small Python script, run through `tessera run`:
//! the contract of docs/simulators.md end to end, including failures.

use crate::harness::*;

#[test]
fn python_model_sweep_finishes_and_failures_keep_their_stderr() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    // The script reads its parameters from the environment (one of the three
    // documented ways), fails for x > 0.75 and prints its metrics as JSON on
    // the last line of stdout.
    std::fs::write(
        dir.join("sim.py"),
        "import json, os, sys\n\
         x = float(os.environ['TESSERA_PARAM_X'])\n\
         y = float(os.environ['TESSERA_PARAM_Y'])\n\
         print('starting', flush=True)\n\
         if x > 0.75:\n\
         \x20   sys.stderr.write('diverged: step size too large at x=%.3f\\n' % x)\n\
         \x20   sys.exit(3)\n\
         print(json.dumps({'loss': (x - 0.3) ** 2 + (y - 0.6) ** 2}))\n",
    )
    .expect("script");
    let spec = dir.join("sweep.toml");
    std::fs::write(
        &spec,
        r#"name = "python-model"
seed = 5
budget = 8
initial = 8
replicates = 1
retries = 1

[model]
name = "pysim"
timeout = "30s"
command = ["python3", "sim.py"]

[params.x]
range = [0.0, 1.0]

[params.y]
range = [0.0, 1.0]

[objective]
minimize = "loss"
"#,
    )
    .expect("spec");
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .args(["--workers", "2"])
        .output()
        .expect("run");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    let db = dir.join("sweep.db");
    let st = status(&db).expect("status");
    assert_eq!(
        st.get("finished").and_then(|v| v.as_bool()),
        Some(true),
        "{st}"
    );
    // Which points fail depends on where the design put them: count from the
    // export (a Latin hypercube of 8 has at least one x in [0.875, 1)).
    let rows = export_rows(&db);
    assert_eq!(rows.len(), 8);
    let mut failed = 0;
    for r in &rows {
        let x: f64 = r.get("x").and_then(|v| v.parse().ok()).expect("x column");
        let status = r.get("status").map(String::as_str);
        if x > 0.75 {
            failed += 1;
            assert_eq!(status, Some("failed"), "{r:?}");
            let reason = r.get("failure_reason").cloned().unwrap_or_default();
            assert!(reason.contains('3'), "exit code named: {r:?}");
        } else {
            assert_eq!(status, Some("done"), "{r:?}");
            let loss: f64 = r.get("loss").and_then(|v| v.parse().ok()).expect("loss");
            let y: f64 = r.get("y").and_then(|v| v.parse().ok()).expect("y");
            assert!((loss - ((x - 0.3).powi(2) + (y - 0.6).powi(2))).abs() < 1e-9);
        }
    }
    assert!(failed >= 1, "the design must include x > 0.75");
    assert_eq!(super::harness::field(&st, "failed"), failed);
    // The stderr tail is kept with the failure.
    let jsonl = tessera()
        .args(["export", "--format", "jsonl", "--db"])
        .arg(&db)
        .output()
        .expect("export");
    let text = String::from_utf8_lossy(&jsonl.stdout);
    assert!(text.contains("diverged: step size too large"), "{text}");
}
