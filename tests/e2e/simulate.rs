//! `tessera simulate` as a real process: metrics out, bad inputs refused,
//! failures reported with the simulator's own error output.

use std::path::Path;
use std::process::Output;

use super::harness::{run_in, text};

fn tessera(args: &[&str]) -> Output {
    run_in(Path::new(env!("CARGO_MANIFEST_DIR")), args)
}

#[test]
fn tiling_json_prints_every_metric_finite_and_in_range() {
    let out = tessera(&["simulate", "tiling", "--json"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    let v: serde_json::Value = serde_json::from_str(stdout.trim()).expect("one JSON object");
    let obj = v.as_object().expect("an object");
    let info = tessera_worker::models::find("tiling").expect("built in");
    assert_eq!(obj.len(), info.metrics.len(), "{stdout}");
    for m in &info.metrics {
        let x = obj
            .get(m.name)
            .and_then(serde_json::Value::as_f64)
            .unwrap_or(f64::NAN);
        assert!(x.is_finite() && x >= m.lo && x <= m.hi, "{} = {x}", m.name);
    }
    // Same seed (the default), same numbers.
    let again = tessera(&["simulate", "tiling", "--json", "--seed", "1"]);
    assert_eq!(text(&again.stdout), stdout);
}

#[test]
fn a_bad_input_name_is_refused_naming_the_valid_inputs() {
    let out = tessera(&["simulate", "tiling", "hight_sd=3"]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("hight_sd"), "{err}");
    for name in [
        "height_sd",
        "density",
        "exclusion",
        "growth_rate",
        "duration_h",
    ] {
        assert!(err.contains(name), "{name} missing from: {err}");
    }
    assert!(out.stdout.is_empty());
}

#[test]
fn an_out_of_range_value_is_refused_with_its_range() {
    let out = tessera(&["simulate", "branin", "x1=11"]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("[-5, 10]"), "{err}");
}

#[test]
fn a_test_function_prints_a_table_with_its_published_minimum() {
    // Branin minimum 5/(4 pi) = 0.397887 at (pi, 2.275) (Surjanovic & Bingham VLSE).
    let out = tessera(&["simulate", "branin", "x1=3.141592653589793", "x2=2.275"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    let row = stdout
        .lines()
        .find(|l| l.starts_with("value"))
        .unwrap_or_default();
    assert!(row.contains("0.397887"), "{stdout}");
}

#[test]
fn tiling_table_shows_units() {
    let out = tessera(&["simulate", "tiling", "duration_h=6"]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let stdout = text(&out.stdout);
    let row = stdout
        .lines()
        .find(|l| l.starts_with("mean_territory"))
        .unwrap_or_default();
    assert!(row.contains("um^3"), "{stdout}");
}

#[test]
fn an_unknown_model_lists_the_built_in_ones() {
    let out = tessera(&["simulate", "tilling"]);
    assert_eq!(out.status.code(), Some(2));
    let err = text(&out.stderr);
    assert!(err.contains("tiling") && err.contains("--command"), "{err}");
}

#[test]
fn an_external_simulator_runs_and_its_failure_is_reported() {
    let script = "examples/simulators/python/colony.py";
    let cmd = format!("colony=python3 {script}");
    let out = tessera(&[
        "simulate",
        "colony",
        "division_rate=0.05",
        "--json",
        "--command",
        &cmd,
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: serde_json::Value = serde_json::from_str(text(&out.stdout).trim()).expect("JSON");
    assert!(v.get("final_cells").and_then(|x| x.as_f64()).is_some());

    let out = tessera(&["simulate", "colony", "bogus=1", "--command", &cmd]);
    assert_eq!(out.status.code(), Some(1));
    let err = text(&out.stderr);
    assert!(err.contains("exited with code 2"), "{err}");
    assert!(err.contains("unknown input 'bogus'"), "{err}");
}

#[test]
fn a_slow_simulator_is_stopped_by_the_timeout() {
    let out = tessera(&[
        "simulate",
        "slow",
        "--timeout",
        "300ms",
        "--command",
        "slow=sh -c 'sleep 30'",
    ]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        text(&out.stderr).contains("timeout"),
        "{}",
        text(&out.stderr)
    );
}

#[test]
fn describe_lists_inputs_with_ranges_and_units() {
    let out = tessera(&["simulate", "tiling", "--describe"]);
    assert!(out.status.success());
    let stdout = text(&out.stdout);
    assert!(
        stdout.contains("height_sd") && stdout.contains("um/h"),
        "{stdout}"
    );
    assert!(stdout.contains("clark_evans"), "{stdout}");
}
