//! Checks of expected improvement against published worked values and
//! 50-digit mpmath values.

use serde_json::Value;
use tessera_surrogate::acquisition::{expected_improvement, normal_cdf};

#[test]
fn expected_improvement_worked_values() {
    // Jones, Schonlau & Welch 1998 EI formula; worked values verified by quadrature to 1e-12,
    // Jones, Schonlau & Welch (1998) formula.
    let cases = [
        (0.0, 0.5, 1.0, 0.197796557401),
        (0.0, 0.0, 1.0, 0.398942280401),
        (0.0, -1.0, 1.0, 1.083315470588),
        (0.0, 1.0, 1.0, 0.083315470588),
        (0.0, 0.5, 2.0, 0.572689396447),
    ];
    for (f, mu, s, want) in cases {
        let got = expected_improvement(f, mu, s);
        assert!(
            (got - want).abs() < 1e-11,
            "EI({f},{mu},{s}) = {got}, want {want}"
        );
    }
    // Quadrature gives 3.572629e-6 (7 digits) for (0, 2, 0.5).
    let got = expected_improvement(0.0, 2.0, 0.5);
    assert!((got - 3.572629e-6).abs() < 1e-12, "{got}");
}

#[test]
fn expected_improvement_with_zero_sigma() {
    // Definition (Jones, Schonlau & Welch 1998): EI = max(f_best - mu, 0) when sigma = 0.
    assert_eq!(expected_improvement(1.0, 0.25, 0.0), 0.75);
    assert_eq!(expected_improvement(1.0, 2.0, 0.0), 0.0);
}

#[test]
fn expected_improvement_identity() {
    // Identity from Phi(z) + Phi(-z) = 1: EI at mean f_best - d minus EI at mean f_best + d equals d,
    // for any sigma (follows from Phi(z) + Phi(-z) = 1).
    for &(f, s) in &[(0.0, 1.0), (2.0, 0.2), (-1.0, 3.0), (5.0, 1e-3)] {
        for &d in &[0.1, 0.7, 2.5] {
            let identity = expected_improvement(f, f - d, s) - expected_improvement(f, f + d, s);
            assert!(
                (identity - d).abs() < 1e-12,
                "f={f} s={s} d={d}: {identity}"
            );
        }
    }
}

#[test]
fn expected_improvement_matches_mpmath_including_far_tail() {
    // 50-digit mpmath values from scripts/fixtures_surrogate.py (ei_mpmath.json).
    let v: Value = serde_json::from_str(include_str!("fixtures/ei_mpmath.json")).expect("json");
    for c in v["cases"].as_array().expect("cases") {
        let f = c["f_best"].as_f64().expect("f");
        let mu = c["mu"].as_f64().expect("mu");
        let s = c["sigma"].as_f64().expect("s");
        let want = c["ei"].as_f64().expect("ei");
        let got = expected_improvement(f, mu, s);
        // Relative 1e-13 in the body; in the tail (|z| > 5) erfc's relative error (~1e-13 at
        // z = -30) is amplified by about z^2 through cancellation: allow 1e-10 there.
        let z = (f - mu) / s;
        let rel = if z.abs() > 5.0 { 1e-10 } else { 1e-13 };
        let tol = rel * want.abs() + if want == 0.0 { 1e-300 } else { 0.0 };
        assert!(
            (got - want).abs() <= tol,
            "EI({f},{mu},{s}) = {got:e}, want {want:e}"
        );
    }
}

#[test]
fn normal_cdf_known_values() {
    // Phi(0) = 1/2 (symmetry); other values in 50-digit mpmath (ei_mpmath.json,
    // scripts/fixtures_surrogate.py).
    assert_eq!(normal_cdf(0.0), 0.5);
    let v: Value = serde_json::from_str(include_str!("fixtures/ei_mpmath.json")).expect("json");
    for c in v["normal_cdf"].as_array().expect("normal_cdf") {
        let z = c["z"].as_f64().expect("z");
        let want = c["cdf"].as_f64().expect("cdf");
        let got = normal_cdf(z);
        // libm's erfc is about 1e-13 relative at z = -30.
        assert!(
            (got / want - 1.0).abs() < 1e-12,
            "Phi({z}) = {got:e}, want {want:e}"
        );
    }
}
