//! The Sobol estimators on the Ishigami function, without a surrogate,
//! against its analytic indices (Ishigami & Homma 1990; the variance
//! decomposition as given by Saltelli et al. 2008, "Global Sensitivity
//! Analysis: The Primer"), derived here from the definition:
//! f = sin x1 + a sin^2 x2 + b x3^4 sin x1 on [-pi, pi]^3, a = 7, b = 0.1.

use tessera_surrogate::sobol;

fn ishigami(u: &[f64]) -> f64 {
    let pi = std::f64::consts::PI;
    let x: Vec<f64> = u.iter().map(|v| -pi + 2.0 * pi * v).collect();
    x[0].sin() + 7.0 * x[1].sin().powi(2) + 0.1 * x[2].powi(4) * x[0].sin()
}

/// Analytic first-order and total indices (Ishigami & Homma 1990):
/// V1 = (1 + b pi^4 / 5)^2 / 2, V2 = a^2 / 8, V3 = 0,
/// V13 = b^2 pi^8 (1/18 - 1/50), V = V1 + V2 + V13.
pub fn analytic() -> ([f64; 3], [f64; 3]) {
    let (a, b) = (7.0f64, 0.1f64);
    let pi = std::f64::consts::PI;
    let v1 = 0.5 * (1.0 + b * pi.powi(4) / 5.0).powi(2);
    let v2 = a * a / 8.0;
    let v13 = b * b * pi.powi(8) * (1.0 / 18.0 - 1.0 / 50.0);
    let v = v1 + v2 + v13;
    ([v1 / v, v2 / v, 0.0], [(v1 + v13) / v, v2 / v, v13 / v])
}

// The analytic values are the published ones (Ishigami & Homma 1990;
// Saltelli et al. 2008), verified by quadrature: V = 13.8445879407,
// S = 0.313905, 0.442411, 0 and ST = 0.557589, 0.442411, 0.243684.
#[test]
fn analytic_values_are_the_published_ones() {
    let (s, t) = analytic();
    for (got, want) in s.iter().zip([0.313905, 0.442411, 0.0]) {
        assert!((got - want).abs() < 1e-6, "{got} vs {want}");
    }
    for (got, want) in t.iter().zip([0.557589, 0.442411, 0.243684]) {
        assert!((got - want).abs() < 1e-6, "{got} vs {want}");
    }
}

// The estimators alone, 2^15 base rows (2^15 x 5 = 163,840 evaluations):
// within 0.02 of the analytic indices.
#[test]
fn estimators_recover_ishigami_indices() {
    let dz = sobol::design(1 << 15, 3, 2026);
    let f: Vec<f64> = dz.points.iter().map(|p| ishigami(p)).collect();
    let ix = sobol::indices(&f, dz.n, dz.d);
    let (s, t) = analytic();
    for i in 0..3 {
        assert!(
            (ix.first[i] - s[i]).abs() < 0.02,
            "S{}: {} vs {}",
            i + 1,
            ix.first[i],
            s[i]
        );
        assert!(
            (ix.total[i] - t[i]).abs() < 0.02,
            "ST{}: {} vs {}",
            i + 1,
            ix.total[i],
            t[i]
        );
    }
    // The bootstrap spread is a sensible Monte Carlo error: small, non-zero.
    let boots = sobol::bootstrap(&f, dz.n, dz.d, 50, 1);
    let sd = |k: usize| {
        let v: Vec<f64> = boots.iter().map(|b| b.first[k]).collect();
        tessera_surrogate::stats::mean_sd(&v).1
    };
    assert!(sd(0) > 1e-4 && sd(0) < 0.02, "bootstrap sd {}", sd(0));
}
