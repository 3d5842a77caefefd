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

mod criterion_checks {
    use tessera_surrogate::gp::{Gp, Hyper, KernelKind, Observations};

    fn one_d() -> Gp {
        let x: Vec<Vec<f64>> = [0.05, 0.3, 0.42, 0.8].iter().map(|v| vec![*v]).collect();
        let y = vec![0.3, -0.2, 0.1, 0.7];
        let h = Hyper {
            mean: 0.0,
            signal_var: 1.3,
            lengthscales: vec![0.2],
            nugget: 0.01,
        };
        Gp::with_hyper(&Observations::new(x, y), KernelKind::Matern52, h, false).expect("gp")
    }

    /// Simpson's rule for the integral of the posterior variance of f over [0, 1].
    fn integrated_variance(gp: &Gp) -> f64 {
        let n = 4000;
        let pts: Vec<Vec<f64>> = (0..=n).map(|i| vec![i as f64 / n as f64]).collect();
        let v: Vec<f64> = gp.predict_exact(&pts).iter().map(|p| p.sd * p.sd).collect();
        let h = 1.0 / n as f64;
        let mut s = v[0] + v[n];
        for (i, vi) in v.iter().enumerate().take(n).skip(1) {
            s += if i % 2 == 1 { 4.0 * vi } else { 2.0 * vi };
        }
        s * h / 3.0
    }

    /// The integrated-variance reduction of a new point equals the drop in
    /// the numerically integrated posterior variance (Simpson's rule on 4001
    /// points) when that point is added (with the nugget's noise) to a 1-D GP
    /// with known hyperparameters: GPML eq. 2.26 before and after.
    #[test]
    fn integrated_variance_reduction_matches_numerical_integration() {
        let gp = one_d();
        let before = integrated_variance(&gp);
        let reference: Vec<Vec<f64>> = (0..2000).map(|i| vec![(i as f64 + 0.5) / 2000.0]).collect();
        for x in [0.0, 0.18, 0.6, 0.95] {
            let after = integrated_variance(&gp.update_believer(&[x], 0.0).expect("update"));
            let crit = gp.integrated_variance_reduction(&reference, &[vec![x]])[0];
            let numeric = before - after;
            // The criterion averages over 2000 cell midpoints: the midpoint
            // rule's error, O(h^2) = O(2.5e-7) times the curvature, bounds
            // the agreement.
            assert!(
                (crit - numeric).abs() < 1e-4 * numeric,
                "x = {x}: criterion {crit}, integration {numeric}"
            );
        }
    }

    /// Analytic gradients of the posterior mean and sd match central finite differences.
    #[test]
    fn mean_and_sd_gradients_match_finite_differences() {
        let x: Vec<Vec<f64>> = vec![
            vec![0.1, 0.2],
            vec![0.7, 0.4],
            vec![0.3, 0.9],
            vec![0.5, 0.5],
        ];
        let y = vec![1.0, -0.5, 0.25, 0.0];
        for kind in [KernelKind::Matern52, KernelKind::SquaredExponential] {
            let h = Hyper {
                mean: 0.1,
                signal_var: 0.8,
                lengthscales: vec![0.3, 0.5],
                nugget: 1e-4,
            };
            let gp = Gp::with_hyper(&Observations::new(x.clone(), y.clone()), kind, h, true)
                .expect("gp");
            let at = [0.42, 0.61];
            let g = gp.predict_gradient(&at);
            let p = gp.predict_exact(&[at.to_vec()])[0];
            assert!((g.mean - p.mean).abs() < 1e-12 && (g.sd - p.sd).abs() < 1e-10);
            for j in 0..2 {
                let e = 1e-6;
                let mut hi = at.to_vec();
                let mut lo = at.to_vec();
                hi[j] += e;
                lo[j] -= e;
                let ph = gp.predict_exact(&[hi])[0];
                let pl = gp.predict_exact(&[lo])[0];
                let dm = (ph.mean - pl.mean) / (2.0 * e);
                let ds = (ph.sd - pl.sd) / (2.0 * e);
                assert!(
                    (g.d_mean[j] - dm).abs() < 1e-5 * dm.abs().max(1.0),
                    "{kind:?} mean {j}: {} vs {dm}",
                    g.d_mean[j]
                );
                assert!(
                    (g.d_sd[j] - ds).abs() < 1e-5 * ds.abs().max(1.0),
                    "{kind:?} sd {j}: {} vs {ds}",
                    g.d_sd[j]
                );
            }
        }
    }
}
