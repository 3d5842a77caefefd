//! Calibration end to end: `tessera run` on a model with a known answer,
//! then `tessera calibrate`, compared with the exact posterior and region
//! computed by quadrature (tests/fixtures/linear_posterior.json, written by
//! scripts/fixtures_calibration.py with numpy 2.4.6 and scipy 1.17.1);
//! and bounded metrics whose predictions must stay inside their bounds.

use crate::harness::*;
use std::path::Path;

fn fixture() -> serde_json::Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/fixtures/linear_posterior.json"
    );
    serde_json::from_str(&std::fs::read_to_string(path).expect("fixture")).expect("json")
}

fn num(v: &serde_json::Value, path: &[&str]) -> f64 {
    let mut x = v;
    for p in path {
        x = &x[*p];
    }
    x.as_f64()
        .unwrap_or_else(|| panic!("{path:?} is not a number in {v}"))
}

fn copy_example(dir: &Path) {
    let src = concat!(env!("CARGO_MANIFEST_DIR"), "/examples/linear-check");
    for f in ["sweep.toml", "linear.py"] {
        std::fs::copy(Path::new(src).join(f), dir.join(f)).expect("copy example");
    }
}

// The linear model y = 2 x1 + x2 (+ small noise), x3 ignored, one target
// y = 1.5 +- 0.15, uniform prior on [0, 1]^3. Monte Carlo error of the means
// is about sd / sqrt(ESS) < 0.005 at ESS >= 400 (the sampler runs until
// ESS >= 400); the surrogate of a linear function from 45 points is exact to
// about 1e-3, far below the target's sd. Tolerances: means 0.02, sds 5%,
// the x1-x2 correlation 0.03, the region's share within 2 standard errors.
#[test]
fn linear_model_posterior_and_region_match_quadrature() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    copy_example(dir);
    let run = run_in(dir, &["run", "sweep.toml", "--workers", "2"]);
    ok(&run, "tessera run");
    // The waves are recorded and shown.
    let st = run_in(dir, &["status", "--db", "sweep.db"]);
    ok(&st, "status");
    assert!(text(&st.stdout).contains("wave 1:"), "{}", text(&st.stdout));

    let out = run_in(
        dir,
        &[
            "calibrate",
            "--db",
            "sweep.db",
            "--json",
            "--samples",
            "post.csv",
            "--out",
            "plots",
        ],
    );
    ok(&out, "tessera calibrate");
    let c: serde_json::Value = serde_json::from_slice(&out.stdout).expect("one JSON object");
    let want = fixture();

    for p in ["x1", "x2", "x3"] {
        let mean = num(&c, &["posterior", p, "mean"]);
        let sd = num(&c, &["posterior", p, "sd"]);
        let (m0, s0) = (num(&want, &[p, "mean"]), num(&want, &[p, "sd"]));
        assert!((mean - m0).abs() < 0.02, "{p}: mean {mean} vs exact {m0}");
        assert!((sd - s0).abs() < 0.05 * s0, "{p}: sd {sd} vs exact {s0}");
        for q in ["q05", "q95"] {
            assert!(c["posterior"][p][q].is_number(), "{p}.{q} present");
        }
    }
    let corr = c["correlations"]
        .as_array()
        .expect("correlations")
        .iter()
        .find(|r| r["a"] == "x1" && r["b"] == "x2")
        .map(|r| num(r, &["r"]))
        .expect("x1-x2 correlation");
    let corr0 = num(&want, &["corr_x1_x2"]);
    assert!((corr - corr0).abs() < 0.03, "corr {corr} vs exact {corr0}");

    let frac = num(&c, &["region", "fraction"]);
    let se = num(&c, &["region", "fraction_se"]);
    let frac0 = num(&want, &["nroy_fraction"]);
    assert!(
        (frac - frac0).abs() <= 2.0 * se,
        "region share {frac} +- {se} vs exact {frac0}"
    );
    assert!(c["region"]["box"]["x1"].is_array());

    // The diagnostics are reported and good enough for the comparison.
    let ess = num(&c, &["diagnostics", "ess"]);
    let rhat = num(&c, &["diagnostics", "rhat"]);
    assert!(ess >= 400.0 && rhat <= 1.01, "ess {ess}, rhat {rhat}");

    // x1 is constrained; x3, which the model ignores, is not.
    assert_eq!(c["identified"]["x1"], true, "{}", c["identified"]);
    assert_eq!(c["identified"]["x3"], false, "{}", c["identified"]);

    // The marginal posterior of x3 is indistinguishable from its uniform
    // prior: a Kolmogorov-Smirnov test (the statistic checked against scipy
    // in surrogate/tests/mcmc.rs) on samples thinned to about the effective
    // sample size, so that they are close to independent.
    let mut r = csv::Reader::from_path(dir.join("post.csv")).expect("samples CSV");
    let header: Vec<String> = r
        .headers()
        .expect("header")
        .iter()
        .map(str::to_string)
        .collect();
    assert_eq!(header, ["x1", "x2", "x3"]);
    let x3: Vec<f64> = r
        .records()
        .map(|row| row.expect("row")[2].parse::<f64>().expect("number"))
        .collect();
    let keep = (ess as usize).clamp(100, 1000);
    let step = (x3.len() / keep).max(1);
    let thinned: Vec<f64> = x3.iter().step_by(step).copied().collect();
    let (d, p) = tessera_surrogate::stats::ks_uniform(&thinned, 0.0, 1.0);
    assert!(
        p > 0.01,
        "x3 posterior differs from uniform: D = {d}, p = {p}"
    );

    for f in ["posterior", "pairs", "implausibility"] {
        for ext in ["svg", "png"] {
            let path = dir.join("plots").join(format!("{f}.{ext}"));
            let len = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
            assert!(len > 1000, "{} missing or empty", path.display());
        }
    }

    // The same answer in words.
    let words = run_in(dir, &["calibrate", "--db", "sweep.db", "--out", "plots"]);
    ok(&words, "tessera calibrate (text)");
    let t = text(&words.stdout);
    assert!(t.contains("x3: not constrained"), "{t}");
    assert!(t.contains("x1 and x2 trade off"), "{t}");
}

// A metric declared in [0, 1] is fitted on the logit scale: its predicted
// mean and 95% interval stay inside [0, 1] everywhere, far outside the
// sampled range included (where the surrogate is least sure).
#[test]
fn bounded_metric_predictions_stay_inside_bounds() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    std::fs::write(
        dir.join("frac.py"),
        "import json, random, sys\n\
         run = json.loads(sys.stdin.readline())\n\
         x = run['inputs']['x']\n\
         v = 0.9 + 0.1 * x + random.Random(run['seed']).gauss(0.0, 0.03)\n\
         print(json.dumps({'coverage': min(1.0, max(0.0, v))}))\n",
    )
    .expect("script");
    std::fs::write(
        dir.join("sweep.toml"),
        r#"name = "bounded"
seed = 3
budget = 12
initial = 12
replicates = 2

[model]
name = "frac"
timeout = "30s"
command = ["python3", "frac.py"]

[params.x]
range = [0.0, 1.0]

[metrics.coverage]
bounds = [0, 1]

[objective]
maximize = "coverage"
"#,
    )
    .expect("sweep");
    ok(&run_in(dir, &["run", "sweep.toml"]), "tessera run");
    let mut grid = String::from("x\n");
    for k in 0..=40 {
        grid.push_str(&format!("{}\n", -1.0 + 0.1 * f64::from(k)));
    }
    std::fs::write(dir.join("grid.csv"), grid).expect("grid");
    let out = run_in(
        dir,
        &[
            "predict", "--db", "sweep.db", "--points", "grid.csv", "--json",
        ],
    );
    ok(&out, "tessera predict");
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    let points = v.as_array().expect("one entry per point");
    assert_eq!(points.len(), 41);
    let mut widest = 0.0f64;
    for p in points {
        let m = &p["coverage"];
        let (mean, lo, hi) = (
            num(m, &["mean"]),
            num(m, &["lower95"]),
            num(m, &["upper95"]),
        );
        for x in [mean, lo, hi] {
            assert!((0.0..=1.0).contains(&x), "outside [0, 1]: {m}");
        }
        assert!(lo <= mean && mean <= hi, "{m}");
        widest = widest.max(hi - lo);
    }
    // Far from the data the interval is wide (so the bound is what keeps it inside).
    assert!(widest > 0.1, "widest interval {widest}");
}

// The example calibration of the built-in model: with its invented targets,
// at least one constant comes out pinned and at least one not constrained.
#[test]
fn tiling_example_names_pinned_and_free_constants() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let src = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/examples/tiling-calibration.toml"
    );
    std::fs::copy(src, dir.join("tiling-calibration.toml")).expect("copy example");
    ok(
        &run_in(dir, &["run", "tiling-calibration.toml", "--workers", "2"]),
        "tessera run",
    );
    let out = run_in(
        dir,
        &[
            "calibrate",
            "--db",
            "tiling-calibration.db",
            "--json",
            "--out",
            "plots",
        ],
    );
    ok(&out, "tessera calibrate");
    let c: serde_json::Value = serde_json::from_slice(&out.stdout).expect("json");
    let verdicts: Vec<&str> = c["findings"]
        .as_array()
        .expect("findings")
        .iter()
        .filter_map(|f| f["verdict"].as_str())
        .collect();
    assert!(verdicts.contains(&"pinned"), "{verdicts:?}");
    assert!(verdicts.contains(&"not constrained"), "{verdicts:?}");
    let frac = num(&c, &["region", "fraction"]);
    assert!(frac > 0.0 && frac < 0.5, "region share {frac}");
}
