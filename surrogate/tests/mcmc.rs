//! Convergence diagnostics and the Kolmogorov-Smirnov test against
//! reference implementations, on fixed data written by
//! scripts/fixtures_calibration.py:
//! - rank-normalised split R-hat and bulk ESS (Vehtari et al. 2021) against
//!   ArviZ 0.23.4 (`arviz.rhat(method="rank")`, `arviz.ess(method="bulk")`);
//! - the asymptotic one-sample KS test against U(0, 1) against scipy 1.17.1
//!   (`scipy.stats.kstest(x, "uniform", method="asymp")`).

use serde_json::Value;
use tessera_surrogate::{mcmc, stats};

fn fixture(name: &str) -> Value {
    let path = format!("{}/tests/fixtures/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).expect("fixture file");
    serde_json::from_str(&text).expect("fixture JSON")
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

#[test]
fn rhat_and_ess_match_arviz() {
    let f = fixture("mcmc_arviz.json");
    for case in f["cases"].as_array().expect("cases") {
        let name = case["name"].as_str().unwrap_or("?");
        let chains: Vec<Vec<f64>> = case["chains"]
            .as_array()
            .expect("chains")
            .iter()
            .map(floats)
            .collect();
        let rhat = mcmc::split_rhat(&chains);
        let ess = mcmc::ess_bulk(&chains);
        let want_rhat = case["rhat_rank"].as_f64().expect("rhat");
        let want_ess = case["ess_bulk"].as_f64().expect("ess");
        assert!(
            (rhat - want_rhat).abs() < 1e-9,
            "{name}: R-hat {rhat} vs ArviZ {want_rhat}"
        );
        assert!(
            (ess - want_ess).abs() < 1e-6 * want_ess,
            "{name}: ESS {ess} vs ArviZ {want_ess}"
        );
    }
}

#[test]
fn ks_matches_scipy() {
    let f = fixture("ks_scipy.json");
    for case in f["cases"].as_array().expect("cases") {
        let name = case["name"].as_str().unwrap_or("?");
        let x = floats(&case["x"]);
        let (d, p) = stats::ks_uniform(&x, 0.0, 1.0);
        let want_d = case["d"].as_f64().expect("d");
        let want_p = case["p"].as_f64().expect("p");
        assert!(
            (d - want_d).abs() < 1e-12,
            "{name}: D {d} vs scipy {want_d}"
        );
        assert!(
            (p - want_p).abs() < 1e-9 * want_p.max(1e-3),
            "{name}: p {p} vs scipy {want_p}"
        );
    }
}
