//! `tessera run`: the all-in-one local mode.

use crate::harness::*;
use std::time::Duration;

/// A local sweep runs to completion and a rerun of the same command finds
/// nothing left to do (it continues, not restarts).
#[test]
fn local_run_completes_and_rerun_continues() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let spec = branin_spec(dir, 8, 2, 0);
    let db = dir.join("sweep.db");
    let out = tessera()
        .arg("run")
        .arg(&spec)
        .args(["--workers", "2"])
        .output()
        .expect("run");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_each_once_all_ok(&db, 16);
    let st = status(&db).expect("status");
    assert_eq!(field(&st, "done"), 16);
    assert!(st.get("best").is_some_and(|b| b.get("objective").is_some()));
    let again = tessera().arg("run").arg(&spec).output().expect("rerun");
    assert!(again.status.success());
    assert_each_once_all_ok(&db, 16);
    let _ = Duration::from_secs(0);
}
