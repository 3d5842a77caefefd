//! Checks of `design` against published values and scipy.stats.qmc.

use serde_json::Value;
use tessera_surrogate::design::{
    centered_l2_discrepancy_sq, is_latin_hypercube, maximin_lhs, min_distance, phi_p, DESIGN_P,
};

const FIXTURE: &str = include_str!("fixtures/design_scipy.json");

fn fixture() -> Value {
    serde_json::from_str(FIXTURE).expect("fixture is valid JSON")
}

fn points(v: &Value) -> Vec<Vec<f64>> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|r| {
            r.as_array()
                .expect("row")
                .iter()
                .map(|x| x.as_f64().expect("number"))
                .collect()
        })
        .collect()
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

#[test]
fn maximin_lhs_is_a_latin_hypercube() {
    // Definition of McKay, Beckman & Conover (1979): one point per stratum per column.
    for &(n, d) in &[(1, 1), (1, 4), (2, 3), (5, 1), (10, 2), (33, 7), (100, 3)] {
        let x = maximin_lhs(n, d, 42);
        assert_eq!(x.len(), n);
        assert!(x.iter().all(|p| p.len() == d));
        assert!(is_latin_hypercube(&x), "n={n} d={d}");
    }
    assert!(maximin_lhs(0, 3, 42).is_empty());
}

#[test]
fn maximin_lhs_is_deterministic_for_a_seed() {
    let a = maximin_lhs(20, 4, 7);
    let b = maximin_lhs(20, 4, 7);
    let c = maximin_lhs(20, 4, 8);
    assert_eq!(a, b);
    assert_ne!(a, c);
}

#[test]
fn six_run_fixture_measures() {
    // Six-run Latin hypercube fixture (values from scipy 1.17), recomputed
    // by scripts/fixtures_surrogate.py into design_scipy.json.
    let f = fixture();
    let six = &f["six_run"];
    let x = points(&six["points"]);
    assert!(is_latin_hypercube(&x));
    // CD^2 = 0.008142039609053 (scipy qmc.discrepancy method='CD', Hickernell 1998).
    assert!(rel(centered_l2_discrepancy_sq(&x), 0.008142039609053) < 1e-12);
    assert!(
        rel(
            centered_l2_discrepancy_sq(&x),
            six["cd2"].as_f64().unwrap_or(0.0)
        ) < 1e-12
    );
    // Minimum distance sqrt(5)/6 (analytic: the closest pairs differ by one rank in one column and two in the other).
    assert!(rel(min_distance(&x), 5f64.sqrt() / 6.0) < 1e-12);
    // phi_2, phi_5, phi_50 (Morris & Mitchell 1995 definition, computed by scipy-based script).
    assert!(rel(phi_p(&x, 2.0), 7.444272601815) < 1e-11);
    assert!(rel(phi_p(&x, 5.0), 3.686469306031) < 1e-11);
    assert!(rel(phi_p(&x, 50.0), 2.758718887247) < 1e-11);
}

#[test]
fn discrepancy_matches_scipy_on_random_points() {
    // scipy.stats.qmc.discrepancy(method='CD') on 25 random points in [0,1]^4
    // (scripts/fixtures_surrogate.py, versions in the JSON).
    let f = fixture();
    let x = points(&f["random_points"]["points"]);
    let want = f["random_points"]["cd2"].as_f64().expect("cd2");
    assert!(rel(centered_l2_discrepancy_sq(&x), want) < 1e-12);
}

#[test]
fn maximin_beats_scipy_optimised_lhs_in_phi_p() {
    // scipy qmc.LatinHypercube(d, optimization="random-cd"), mean over 5 rngs
    // (scripts/fixtures_surrogate.py). Our criterion is phi_50; ours must be no worse.
    let f = fixture();
    for case in f["cases"].as_array().expect("cases") {
        let n = case["n"].as_u64().expect("n") as usize;
        let d = case["d"].as_u64().expect("d") as usize;
        let p = case["p"].as_f64().expect("p");
        assert_eq!(p, DESIGN_P);
        let scipy_cd = case["random_cd"]["phi_p_mean"].as_f64().expect("phi");
        let scipy_plain_cd2 = case["plain"]["cd2_mean"].as_f64().expect("cd2");
        let scipy_plain_min = case["plain"]["min_distance_mean"].as_f64().expect("min");
        let mut ours = 0.0;
        let mut ours_cd2 = 0.0;
        let mut ours_min = 0.0;
        let seeds = [0u64, 1, 2, 3, 4];
        for &s in &seeds {
            let x = maximin_lhs(n, d, s);
            ours += phi_p(&x, p) / seeds.len() as f64;
            ours_cd2 += centered_l2_discrepancy_sq(&x) / seeds.len() as f64;
            ours_min += min_distance(&x) / seeds.len() as f64;
        }
        assert!(
            ours <= scipy_cd,
            "n={n} d={d}: phi_p ours {ours} scipy {scipy_cd}"
        );
        // Also better spread than scipy's unoptimised LHS in both measures.
        assert!(
            ours_min > scipy_plain_min,
            "n={n} d={d}: min distance {ours_min}"
        );
        assert!(ours_cd2 < scipy_plain_cd2, "n={n} d={d}: CD^2 {ours_cd2}");
    }
}
