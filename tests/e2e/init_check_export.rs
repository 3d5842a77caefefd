//! End to end: `tessera init`, `tessera check` and `tessera export` run as
//! real processes in a fresh temporary folder.

use std::collections::BTreeMap;
use std::path::Path;
use std::process::Output;

use super::harness::{run_in, text};
use tessera_coordinator::spec;
use tessera_coordinator::store::{NewPoint, Outcome, OutcomeResult, PointOrigin, Store};

fn tessera(args: &[&str], dir: &Path) -> Output {
    run_in(dir, args)
}

#[test]
fn init_then_check_succeed_for_every_built_in_model() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out = tessera(&["init"], dir.path());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let spec_text = std::fs::read_to_string(dir.path().join("sweep.toml")).expect("written");
    assert!(spec_text.contains("name = \"tiling\""));
    let out = tessera(&["check", "sweep.toml"], dir.path());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let summary = text(&out.stdout);
    assert!(summary.contains("sweep.toml: valid"), "{summary}");
    assert!(summary.contains("height_sd"), "{summary}");
    // No `batch` and no `reproducible`: the size depends on the command.
    assert!(summary.contains("batch 4 with `tessera run`"), "{summary}");
    assert!(
        text(&out.stderr).is_empty(),
        "no warnings: {}",
        text(&out.stderr)
    );
    for model in tessera_worker::models::catalogue() {
        let sub = dir.path().join(model.name);
        let out = tessera(
            &["init", "--dir", model.name, "--model", model.name],
            dir.path(),
        );
        assert!(
            out.status.success(),
            "{}: {}",
            model.name,
            text(&out.stderr)
        );
        let out = tessera(&["check", "sweep.toml"], &sub);
        assert!(
            out.status.success(),
            "{}: {}",
            model.name,
            text(&out.stderr)
        );
        assert!(
            text(&out.stderr).is_empty(),
            "{}: {}",
            model.name,
            text(&out.stderr)
        );
    }
}

#[test]
fn init_refuses_to_overwrite_without_force() {
    let dir = tempfile::tempdir().expect("tempdir");
    std::fs::write(dir.path().join("sweep.toml"), "# mine\n").expect("write");
    let out = tessera(&["init"], dir.path());
    assert!(!out.status.success());
    assert!(
        text(&out.stderr).contains("already exists"),
        "{}",
        text(&out.stderr)
    );
    assert!(text(&out.stderr).contains("--force"));
    let kept = std::fs::read_to_string(dir.path().join("sweep.toml")).expect("read");
    assert_eq!(kept, "# mine\n");
    let out = tessera(&["init", "--force", "--model", "branin"], dir.path());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let replaced = std::fs::read_to_string(dir.path().join("sweep.toml")).expect("read");
    assert!(replaced.contains("name = \"branin\""));
}

#[test]
fn init_with_unknown_model_lists_the_built_in_ones() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out = tessera(&["init", "--model", "tilling"], dir.path());
    assert!(!out.status.success());
    let err = text(&out.stderr);
    assert!(err.contains("tiling, branin"), "{err}");
    assert!(!dir.path().join("sweep.toml").exists());
}

#[test]
fn an_error_on_line_three_is_reported_with_line_three() {
    let dir = tempfile::tempdir().expect("tempdir");
    let file = "name = \"t\"\nbudget = 20\nreplicates = 0\n[model]\nname = \"branin\"\n\
                [params.x1]\nrange = [-5.0, 10.0]\n[objective]\nminimize = \"value\"\n";
    std::fs::write(dir.path().join("bad.toml"), file).expect("write");
    let out = tessera(&["check", "bad.toml"], dir.path());
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr);
    assert!(err.contains("bad.toml:3:14: replicates:"), "{err}");
    assert!(text(&out.stdout).is_empty());
}

#[test]
fn several_errors_are_all_reported() {
    let dir = tempfile::tempdir().expect("tempdir");
    let file = "name = \"t\"\nbudget = 0\n[model]\nname = \"branin\"\ntimeout = \"soon\"\n\
                [params.x1]\nrange = [10.0, -5.0]\n";
    std::fs::write(dir.path().join("bad.toml"), file).expect("write");
    let out = tessera(&["check", "bad.toml"], dir.path());
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr);
    for needle in [
        "bad.toml:2:10: budget:",
        "bad.toml:5:11: model.timeout:",
        "bad.toml:7:9: params.x1.range:",
        "4 problems found",
    ] {
        assert!(err.contains(needle), "missing {needle:?} in\n{err}");
    }
}

const DESIGN_SPEC: &str = r#"name = "design"
seed = 7
budget = 40
initial = 13
[model]
name = "tiling"
[params.height_mean]
range = [20.0, 60.0]
unit = "um"
[params.density]
range = [5.0, 50.0]
scale = "log"
[params.reach]
range = [5, 12]
integer = true
[objective]
minimize = "territory_cv"
"#;

fn design(dir: &Path, spec_text: &str) -> String {
    std::fs::write(dir.join("d.toml"), spec_text).expect("write");
    let out = tessera(&["check", "d.toml", "--design"], dir);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).contains("d.toml: valid"),
        "summary on stderr"
    );
    text(&out.stdout)
}

#[test]
fn check_design_prints_a_latin_hypercube_and_is_reproducible() {
    let dir = tempfile::tempdir().expect("tempdir");
    let csv = design(dir.path(), DESIGN_SPEC);
    let mut lines = csv.lines();
    assert_eq!(lines.next(), Some("height_mean,density,reach"));
    let rows: Vec<Vec<f64>> = lines
        .map(|l| l.split(',').map(|x| x.parse().expect("a number")).collect())
        .collect();
    assert_eq!(rows.len(), 13);
    let spec = spec::parse(DESIGN_SPEC, "d.toml").expect("valid");
    let n = rows.len();
    // LHS property (McKay, Beckman & Conover 1979): on the unit-scaled values
    // (log scale undone), each of the n strata of a continuous column holds
    // exactly one point.
    let unit: Vec<Vec<f64>> = rows.iter().map(|r| spec.to_unit(r)).collect();
    for col in 0..2 {
        let mut strata: Vec<usize> = unit
            .iter()
            .map(|u| ((u[col] * n as f64).floor() as usize).min(n - 1))
            .collect();
        strata.sort_unstable();
        assert_eq!(strata, (0..n).collect::<Vec<_>>(), "column {col}");
    }
    // Integer column: 13 strata over 8 values (5..=12), 13/8 = 1.6 strata per
    // value, so each value holds 1 to 3 points (counting argument), printed
    // without decimals.
    let mut counts = BTreeMap::new();
    for line in csv.lines().skip(1) {
        let reach = line.rsplit(',').next().expect("column");
        assert!(!reach.contains('.'), "{reach}");
        *counts.entry(reach.to_string()).or_insert(0) += 1;
    }
    assert_eq!(counts.len(), 8, "{counts:?}");
    assert!(counts.values().all(|&c| (1..=3).contains(&c)), "{counts:?}");
    assert_eq!(
        design(dir.path(), DESIGN_SPEC),
        csv,
        "same seed, same design"
    );
    let other = design(dir.path(), &DESIGN_SPEC.replace("seed = 7", "seed = 8"));
    assert_ne!(other, csv, "another seed, another design");
}

#[test]
fn check_and_run_refuse_a_misspelled_parameter_of_a_builtin_model() {
    let dir = tempfile::tempdir().expect("tempdir");
    let file = DESIGN_SPEC
        .replace("[params.reach]", "[params.hieght_sd]")
        .replace("range = [5, 12]", "range = [0, 12]");
    std::fs::write(dir.path().join("w.toml"), &file).expect("write");
    for cmd in [&["check", "w.toml"][..], &["run", "w.toml"][..]] {
        let out = tessera(cmd, dir.path());
        assert_eq!(out.status.code(), Some(1), "{cmd:?} fails");
        let err = text(&out.stderr);
        // [params.hieght_sd] is on line 13, its name starts in column 9.
        assert!(
            err.contains("w.toml:13:9: params.hieght_sd: model tiling has no input `hieght_sd`; did you mean `height_sd`?"),
            "{cmd:?}: {err}"
        );
    }
    assert!(!dir.path().join("w.db").exists(), "nothing was run");
    let file = DESIGN_SPEC.replace("\"territory_cv\"", "\"territory_vc\"");
    std::fs::write(dir.path().join("m.toml"), &file).expect("write");
    let out = tessera(&["check", "m.toml"], dir.path());
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr);
    assert!(
        err.contains("m.toml:17:12: objective.minimize: model tiling reports no metric `territory_vc`; did you mean `territory_cv`?"),
        "{err}"
    );
}

fn sample_db(path: &Path) {
    let mut store = Store::open(path).expect("open");
    let sweep = store
        .create_sweep("design", DESIGN_SPEC, "d.toml", 7)
        .expect("create");
    let pts = [vec![20.0, 5.0, 5.0], vec![40.5, 12.25, 9.0]]
        .into_iter()
        .map(|values| NewPoint {
            values,
            origin: PointOrigin::Design,
            batch: 0,
            proposal: None,
        })
        .collect::<Vec<_>>();
    store.insert_points(sweep.id, &pts, 2, 7).expect("insert");
    let evals = store.evaluations(sweep.id).expect("evals");
    let metrics = BTreeMap::from([
        ("territory_cv".to_string(), 0.25),
        ("coverage".to_string(), 0.5),
    ]);
    store
        .commit_outcomes(&[
            Outcome {
                evaluation_id: evals[0].id,
                worker: "bench-1".to_string(),
                started_unix_ms: 10,
                ended_unix_ms: 20,
                result: OutcomeResult::Done(metrics),
            },
            Outcome {
                evaluation_id: evals[3].id,
                worker: "bench-2".to_string(),
                started_unix_ms: 30,
                ended_unix_ms: 40,
                result: OutcomeResult::Failed {
                    kind: "timeout".to_string(),
                    reason: "ran longer than 10m, stopped".to_string(),
                    stderr_tail: String::new(),
                    final_attempt: true,
                },
            },
        ])
        .expect("commit");
}

#[test]
fn export_writes_one_row_per_evaluation() {
    let dir = tempfile::tempdir().expect("tempdir");
    sample_db(&dir.path().join("s.db"));
    let out = tessera(&["export", "--db", "s.db", "--out", "runs.csv"], dir.path());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let csv = std::fs::read_to_string(dir.path().join("runs.csv")).expect("written");
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(
        lines[0],
        "point,origin,replicate,seed,status,height_mean,density,reach,territory_cv,coverage,\
         failure_kind,failure_reason,stderr_tail,worker,attempts,started_unix_ms,ended_unix_ms,started_utc,ended_utc"
    );
    assert_eq!(lines.len(), 5, "2 points x 2 replicates + header");
    let seed = tessera_coordinator::seed::replicate_seed(7, 0, 0);
    assert_eq!(
        lines[1],
        format!("0,design,0,{seed},done,20,5,5,0.25,0.5,,,,bench-1,1,10,20,1970-01-01T00:00:00.010Z,1970-01-01T00:00:00.020Z")
    );
    assert!(lines[2].starts_with("0,design,1,"), "{}", lines[2]);
    assert!(lines[2].contains(",queued,"), "{}", lines[2]);
    assert!(
        lines[4].ends_with(",timeout,\"ran longer than 10m, stopped\",,bench-2,1,30,40,1970-01-01T00:00:00.030Z,1970-01-01T00:00:00.040Z"),
        "{}",
        lines[4]
    );
    let leftovers: Vec<_> = std::fs::read_dir(dir.path())
        .expect("list")
        .filter_map(Result::ok)
        .filter(|e| e.file_name().to_string_lossy().contains(".tmp-"))
        .collect();
    assert!(leftovers.is_empty(), "no temporary file left");

    let out = tessera(&["export", "--db", "s.db", "--units"], dir.path());
    assert!(text(&out.stdout).starts_with(
        "point,origin,replicate,seed,status,height_mean [um],density [cells/10^4 um^2],reach [um],"
    ));

    let out = tessera(&["export", "--db", "s.db", "--format", "jsonl"], dir.path());
    assert!(out.status.success(), "{}", text(&out.stderr));
    let rows: Vec<serde_json::Value> = text(&out.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    assert_eq!(rows.len(), 4);
    assert_eq!(rows[0]["params"]["height_mean"], 20.0);
    assert_eq!(rows[0]["metrics"]["territory_cv"], 0.25);
    assert_eq!(rows[0]["seed"], seed);
    assert_eq!(rows[3]["status"], "failed");
    assert_eq!(rows[3]["params"]["reach"], 9);
}

#[test]
fn export_of_a_missing_database_fails_clearly() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out = tessera(&["export", "--db", "nothing.db"], dir.path());
    assert!(!out.status.success());
    assert!(
        text(&out.stderr).contains("no sweep database at nothing.db"),
        "{}",
        text(&out.stderr)
    );
    assert!(!dir.path().join("nothing.db").exists());
}

#[test]
fn the_example_sweep_files_check_cleanly() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    for name in ["examples/tiling-height.toml", "examples/branin.toml"] {
        let out = tessera(&["check", name], root);
        assert!(out.status.success(), "{name}: {}", text(&out.stderr));
        assert!(
            text(&out.stderr).is_empty(),
            "{name}: {}",
            text(&out.stderr)
        );
    }
}

/// `check /dev/zero` and a huge initial design end at once with a clear
/// error, reading at most 16 MiB and allocating nothing large.
#[test]
fn check_refuses_endless_and_huge_input_quickly() {
    let dir = tempfile::tempdir().expect("tempdir");
    let started = std::time::Instant::now();
    let out = tessera(&["check", "/dev/zero"], dir.path());
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stderr).contains("larger than 16 MiB"),
        "{}",
        text(&out.stderr)
    );
    assert!(started.elapsed() < std::time::Duration::from_secs(10));
    let huge = DESIGN_SPEC.replace("initial = 13", "initial = 1000000000");
    std::fs::write(dir.path().join("huge.toml"), huge).expect("write");
    for cmd in [
        &["check", "huge.toml", "--design"][..],
        &["run", "huge.toml"][..],
    ] {
        let out = tessera(cmd, dir.path());
        assert_eq!(out.status.code(), Some(1), "{cmd:?}");
        let err = text(&out.stderr);
        assert!(
            err.contains("huge.toml:4:11: initial: must be a whole number from 1 to 10000"),
            "{err}"
        );
    }
    let wide = DESIGN_SPEC.replace("range = [20.0, 60.0]", "range = [-1e308, 1e308]");
    std::fs::write(dir.path().join("wide.toml"), wide).expect("write");
    let out = tessera(&["check", "wide.toml", "--design"], dir.path());
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stderr).contains("too large to represent"),
        "{}",
        text(&out.stderr)
    );
}

/// The complete example of `docs/sweep-file.md` is a valid sweep file
/// without warnings.
#[test]
fn the_documented_example_checks_cleanly() {
    let page =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/sweep-file.md"))
            .expect("docs/sweep-file.md");
    let start = page.find("```toml\n").expect("a TOML example") + "```toml\n".len();
    let end = start + page[start..].find("```").expect("end of the example");
    let dir = tempfile::tempdir().expect("tempdir");
    std::fs::write(dir.path().join("example.toml"), &page[start..end]).expect("write");
    let out = tessera(&["check", "example.toml"], dir.path());
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert!(
        text(&out.stderr).is_empty(),
        "warnings: {}",
        text(&out.stderr)
    );
}
