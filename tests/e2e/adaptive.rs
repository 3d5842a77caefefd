//! The adaptive search through `tessera run`: published minima found,
//! failing regions avoided and named, the same points on any number of
//! workers, early stopping.

use crate::harness::*;
use std::path::Path;

/// Known Branin minimum 5/(4 pi) (Surjanovic & Bingham VLSE; Dixon & Szegő 1978).
const BRANIN_MIN: f64 = 0.397_887_357_729_738;

fn run_ok(dir: &Path, args: &[&str]) {
    let out = run_in(dir, args);
    ok(&out, &format!("{args:?}"));
}

/// The best objective value in a finished sweep's status.
fn best(db: &Path) -> f64 {
    let st = status(db).expect("status");
    st["best"]["objective"].as_f64().expect("a best point")
}

fn branin_file(dir: &Path, seed: u32) -> std::path::PathBuf {
    let p = dir.join(format!("branin-{seed}.toml"));
    std::fs::write(
        &p,
        format!(
            "name = \"branin\"\nseed = {seed}\nbudget = 40\ninitial = 10\n\
             [model]\nname = \"branin\"\n[params.x1]\nrange = [-5.0, 10.0]\n\
             [params.x2]\nrange = [0.0, 15.0]\n[objective]\nminimize = \"value\"\n"
        ),
    )
    .expect("write");
    p
}

/// Branin, budget 40 with 10 initial points: within 0.01 of the published
/// minimum for at least 4 of 5 seeds (the 0.01 and 4 of 5 are our targets).
#[test]
fn branin_minimum_is_found_within_forty_runs() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let mut found = Vec::new();
    for seed in 1..=5 {
        let f = branin_file(dir, seed);
        run_ok(dir, &["run", f.to_str().expect("path"), "--workers", "2"]);
        found.push(best(&f.with_extension("db")));
    }
    let close = found.iter().filter(|v| **v - BRANIN_MIN < 0.01).count();
    assert!(close >= 4, "best values {found:?}");
}

/// When planning a round takes longer than running its points (the
/// built-in Branin returns at once), `tessera run` says so once and names
/// the cheaper alternatives; with runs of 300 ms (a round of 4 points on 2
/// slots: 600 ms) it stays quiet.
#[test]
fn planning_slower_than_the_runs_is_said_plainly() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let sweep = |name: &str, budget: u32, fixed: &str| {
        let p = dir.join(format!("{name}.toml"));
        std::fs::write(
            &p,
            format!(
                "name = \"{name}\"\nseed = 3\nbudget = {budget}\ninitial = 10\n\
                 [model]\nname = \"branin\"\n{fixed}[params.x1]\nrange = [-5.0, 10.0]\n\
                 [params.x2]\nrange = [0.0, 15.0]\n[objective]\nminimize = \"value\"\n"
            ),
        )
        .expect("write");
        p
    };
    let fast = sweep("fast", 60, "");
    let out = run_in(
        dir,
        &["run", fast.to_str().expect("path"), "--workers", "2"],
    );
    ok(&out, "fast sweep");
    let err = text(&out.stderr);
    assert_eq!(
        err.matches("planning takes longer than the runs it plans")
            .count(),
        1,
        "{err}"
    );
    assert!(err.contains("`initial` = `budget`"), "{err}");
    let slow = sweep("slow", 46, "[model.fixed]\ndelay_ms = 300\n");
    let out = run_in(
        dir,
        &["run", slow.to_str().expect("path"), "--workers", "2"],
    );
    ok(&out, "slow sweep");
    let err = text(&out.stderr);
    assert!(!err.contains("planning takes longer"), "{err}");
}

/// Published Hartmann-6 minimum (Surjanovic & Bingham VLSE; Dixon & Szegő 1978).
const HARTMANN6_MIN: f64 = -3.322_368_011_415_51;

/// Hartmann-6 through `tessera run`, budget 120 with 20 initial points
/// (reproducible batches of 4): the median best value of seeds 1 to 3 is
/// within 1% of the published minimum. (Over seeds 1 to 12, 4 of 12 reach
/// it; the others stop in the local minimum near -3.20: docs/benchmarks.md.)
#[test]
fn hartmann6_median_of_three_seeds_is_within_one_percent() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let mut found = Vec::new();
    for seed in 1..=3 {
        let p = dir.join(format!("h6-{seed}.toml"));
        let mut text = format!("name = \"h6\"\nseed = {seed}\nbudget = 120\ninitial = 20\n[model]\nname = \"hartmann6\"\n");
        for k in 1..=6 {
            text.push_str(&format!("[params.x{k}]\nrange = [0.0, 1.0]\n"));
        }
        text.push_str("[objective]\nminimize = \"value\"\n");
        std::fs::write(&p, text).expect("write");
        run_ok(dir, &["run", p.to_str().expect("path"), "--workers", "2"]);
        found.push(best(&p.with_extension("db")));
    }
    found.sort_by(f64::total_cmp);
    let median = found[1];
    assert!(
        median <= HARTMANN6_MIN * 0.99,
        "median {median} of {found:?} is not within 1% of {HARTMANN6_MIN}"
    );
}

/// The same sweep file gives the same points on one worker and on three.
#[test]
fn a_reproducible_sweep_gives_the_same_points_on_any_number_of_workers() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let f = branin_file(dir, 3);
    let f = f.to_str().expect("path");
    run_ok(dir, &["run", f, "--db", "one.db", "--workers", "1"]);
    run_ok(dir, &["run", f, "--db", "three.db", "--workers", "3"]);
    let points = |db: &str| -> Vec<(String, String, String)> {
        export_rows(&dir.join(db))
            .into_iter()
            .map(|r| (r["point"].clone(), r["x1"].clone(), r["x2"].clone()))
            .collect()
    };
    let (a, b) = (points("one.db"), points("three.db"));
    assert_eq!(a.len(), 40);
    assert_eq!(a, b, "different points on one and on three workers");
}

/// A simulator that fails in one corner of the box, where its objective
/// would be best: at most a quarter of the adaptive points go there, and
/// `status` says where runs fail.
#[test]
fn a_failing_corner_is_learned_and_named() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    std::fs::write(
        dir.join("corner.py"),
        "import json, sys\n\
         p = json.load(sys.stdin)['inputs']\n\
         x, y = p['x'], p['y']\n\
         if x > 0.75 and y > 0.75:\n\
         \x20   sys.exit('the solver diverged')\n\
         print(json.dumps({'value': (x - 1) ** 2 + (y - 1) ** 2}))\n",
    )
    .expect("write");
    let spec = dir.join("corner.toml");
    std::fs::write(
        &spec,
        "name = \"corner\"\nseed = 4\nbudget = 40\ninitial = 12\nretries = 0\n\
         [model]\nname = \"corner\"\ncommand = [\"python3\", \"corner.py\"]\n\
         [params.x]\nrange = [0.0, 1.0]\n[params.y]\nrange = [0.0, 1.0]\n\
         [objective]\nminimize = \"value\"\n",
    )
    .expect("write");
    run_ok(dir, &["run", "corner.toml", "--workers", "2"]);
    let rows = export_rows(&dir.join("corner.db"));
    let adaptive: Vec<_> = rows.iter().filter(|r| r["origin"] != "design").collect();
    assert_eq!(adaptive.len(), 28);
    let in_corner = adaptive
        .iter()
        .filter(|r| {
            let x: f64 = r["x"].parse().expect("x");
            let y: f64 = r["y"].parse().expect("y");
            x > 0.75 && y > 0.75
        })
        .count();
    assert!(
        in_corner * 4 <= adaptive.len(),
        "{in_corner} of 28 adaptive points in the failing corner"
    );
    let st = status(&dir.join("corner.db")).expect("status");
    let region = st["failure_region"].as_str().unwrap_or("");
    assert!(
        region.contains("runs fail mostly where")
            && region.contains("x >=")
            && region.contains("y >="),
        "{st}"
    );
}

/// A stop rule ends the sweep before its budget and says why.
#[test]
fn the_stop_rule_ends_a_sweep_early_and_says_why() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let f = dir.join("stop.toml");
    std::fs::write(
        &f,
        "name = \"stop\"\nseed = 2\nbudget = 200\ninitial = 10\n\
         [model]\nname = \"branin\"\n[params.x1]\nrange = [-5.0, 10.0]\n\
         [params.x2]\nrange = [0.0, 15.0]\n[objective]\nminimize = \"value\"\n\
         [stop]\nexpected_improvement_below = 0.001\nfor_rounds = 2\n",
    )
    .expect("write");
    run_ok(dir, &["run", "stop.toml", "--workers", "2"]);
    let st = status(&dir.join("stop.db")).expect("status");
    assert!(st["points"].as_u64().unwrap_or(0) < 200, "{st}");
    assert_eq!(st["finished"].as_bool(), Some(true), "{st}");
    let why = st["stop_reason"].as_str().unwrap_or("");
    assert!(
        why.contains("expected improvement stayed below 0.001"),
        "{st}"
    );
}

/// What the planner believed when it proposed each point is stored and
/// exported; the per-point export gives each metric's mean, sd and count.
#[test]
fn proposals_and_per_point_means_are_exported() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let f = branin_file(dir, 6);
    run_ok(dir, &["run", f.to_str().expect("path"), "--workers", "2"]);
    let db = f.with_extension("db");
    let out = run_in(
        dir,
        &["export", "--proposals", "--db", db.to_str().expect("path")],
    );
    ok(&out, "export --proposals");
    let mut rd = csv::Reader::from_reader(out.stdout.as_slice());
    let rows: Vec<csv::StringRecord> = rd.records().map(|r| r.expect("row")).collect();
    let header = rd.headers().expect("header").clone();
    let col = |name: &str| header.iter().position(|h| h == name).expect(name);
    assert_eq!(rows.len(), 30, "40 points, 10 in the design");
    for r in &rows {
        assert!(r[col("surrogate")].starts_with("value from "), "{r:?}");
        let mean: f64 = r[col("predicted_mean")].parse().expect("a predicted mean");
        let sd: f64 = r[col("predicted_sd")].parse().expect("a predicted sd");
        assert!(mean.is_finite() && sd >= 0.0, "{r:?}");
    }
    let out = run_in(
        dir,
        &[
            "export",
            "--per-point",
            "--format",
            "jsonl",
            "--db",
            db.to_str().expect("path"),
        ],
    );
    ok(&out, "export --per-point");
    let lines: Vec<serde_json::Value> = text(&out.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON"))
        .collect();
    assert_eq!(lines.len(), 40);
    assert!(lines
        .iter()
        .all(|l| l["value_n"] == 1 && l["value_mean"].is_f64()));
}
