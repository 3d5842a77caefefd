//! The published test functions against their published optima and
//! variances (each value's source is named beside its check), plus the
//! `delay_ms` / `noise_sd` inputs.

use std::collections::BTreeMap;
use std::f64::consts::PI;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tessera_models::test_functions::{branin, goldstein_price, hartmann3, hartmann6, ishigami};
use tessera_models::{find, run_builtin};

fn inputs(pairs: &[(&str, f64)]) -> BTreeMap<String, f64> {
    pairs.iter().map(|(k, v)| (k.to_string(), *v)).collect()
}

fn value(model: &str, pairs: &[(&str, f64)]) -> f64 {
    run_builtin(model, &inputs(pairs), 0).expect("valid inputs")["value"]
}

/// Smallest value on a regular grid over the model's domain (2-D models).
fn grid_min(model: &str, f: impl Fn(f64, f64) -> f64, n: usize) -> f64 {
    let info = find(model).expect("model exists");
    let (a, b) = (&info.inputs[0], &info.inputs[1]);
    let mut best = f64::INFINITY;
    for i in 0..=n {
        for j in 0..=n {
            let x1 = a.lo + (a.hi - a.lo) * i as f64 / n as f64;
            let x2 = b.lo + (b.hi - b.lo) * j as f64 / n as f64;
            best = best.min(f(x1, x2));
        }
    }
    best
}

#[test]
fn branin_has_three_global_minima_of_5_over_4pi() {
    // Surjanovic & Bingham VLSE; Dixon & Szegő 1978: f* = 5/(4 pi) =
    // 0.397887357729738 at (-pi, 12.275), (pi, 2.275), (3 pi, 2.475).
    let f_star = 5.0 / (4.0 * PI);
    assert!((f_star - 0.397887357729738).abs() < 1e-15);
    for (x1, x2) in [(-PI, 12.275), (PI, 2.275), (3.0 * PI, 2.475)] {
        let v = value("branin", &[("x1", x1), ("x2", x2)]);
        assert!((v - f_star).abs() < 1e-12, "branin({x1}, {x2}) = {v}");
    }
    // Nothing on a fine grid lies below the published minimum.
    let g = grid_min("branin", branin, 600);
    assert!((f_star - 1e-12..f_star + 1e-3).contains(&g), "{g}");
}

#[test]
fn goldstein_price_minimum_is_3_at_0_minus_1() {
    // Goldstein & Price 1971, Math. Comp. 25:569-574; Surjanovic & Bingham VLSE.
    let v = value("goldstein_price", &[("x1", 0.0), ("x2", -1.0)]);
    assert!((v - 3.0).abs() < 1e-12, "{v}");
    let g = grid_min("goldstein_price", goldstein_price, 800);
    assert!((3.0 - 1e-12..3.0 + 1e-2).contains(&g), "{g}");
}

#[test]
fn hartmann3_minimum() {
    // Dixon & Szegő 1978 via Surjanovic & Bingham VLSE: f* = -3.86277978733 at
    // (0.114589, 0.555649, 0.852547) (the library's 0.114614 is off by 2.5e-5).
    let x = [0.114589, 0.555649, 0.852547];
    let v = value("hartmann3", &[("x1", x[0]), ("x2", x[1]), ("x3", x[2])]);
    assert!((v - -3.86277978733).abs() < 1e-8, "{v}");
    // A local check that it is a minimum: every small step goes up.
    for j in 0..3 {
        for h in [-1e-3, 1e-3] {
            let mut y = x;
            y[j] += h;
            assert!(hartmann3(&y) > v, "step {h} along x{}", j + 1);
        }
    }
}

#[test]
fn hartmann6_minimum() {
    // Dixon & Szegő 1978 via Surjanovic & Bingham VLSE: f* = -3.32236801141551.
    let x = [
        0.20168952, 0.15001069, 0.47687397, 0.27533243, 0.31165162, 0.65730054,
    ];
    let names = ["x1", "x2", "x3", "x4", "x5", "x6"];
    let pairs: Vec<(&str, f64)> = names.iter().copied().zip(x).collect();
    let v = value("hartmann6", &pairs);
    assert!((v - -3.32236801141551).abs() < 1e-9, "{v}");
    assert_eq!(v, hartmann6(&x));
    // Random points of the unit cube never go below the minimum.
    let mut rng = ChaCha8Rng::seed_from_u64(6);
    for _ in 0..20_000 {
        let y: [f64; 6] = std::array::from_fn(|_| rng.random());
        assert!(hartmann6(&y) >= v);
    }
}

#[test]
fn ishigami_minimum_and_variance() {
    // Ishigami & Homma 1990, a = 7, b = 0.1: minimum -(1 + b pi^4) =
    // -10.7409091034 at x1 = -pi/2, x2 in {-pi, 0, pi}, x3 = +-pi (derived).
    for x2 in [-PI, 0.0, PI] {
        for x3 in [-PI, PI] {
            let v = value("ishigami", &[("x1", -PI / 2.0), ("x2", x2), ("x3", x3)]);
            assert!((v - -10.7409091034).abs() < 1e-9, "{v}");
        }
    }
    // Variance over the uniform cube V = 1/2 + a^2/8 + b pi^4/5 + b^2 pi^8/18
    // = 13.8445879407 (Saltelli et al. 2008; verified by quadrature). Monte
    // Carlo with 400k seeded points: relative standard error about 0.3%.
    let mut rng = ChaCha8Rng::seed_from_u64(42);
    let n = 400_000;
    let (mut s, mut s2) = (0.0, 0.0);
    for _ in 0..n {
        let u = |r: &mut ChaCha8Rng| -PI + 2.0 * PI * r.random::<f64>();
        let y = ishigami(u(&mut rng), u(&mut rng), u(&mut rng));
        s += y;
        s2 += y * y;
    }
    let mean = s / n as f64;
    let var = s2 / n as f64 - mean * mean;
    // Mean = a/2 = 3.5 (the sin x1 terms integrate to zero; derived).
    assert!((mean - 3.5).abs() < 0.03, "{mean}");
    assert!((var / 13.8445879407 - 1.0).abs() < 0.015, "{var}");
}

#[test]
fn noise_is_gaussian_with_the_given_sd_and_fixed_by_the_seed() {
    let base = value("branin", &[("x1", 1.0), ("x2", 2.0)]);
    let noisy = |seed| {
        run_builtin(
            "branin",
            &inputs(&[("x1", 1.0), ("x2", 2.0), ("noise_sd", 2.0)]),
            seed,
        )
        .expect("valid")["value"]
            - base
    };
    assert_eq!(noisy(7), noisy(7));
    assert_ne!(noisy(7), noisy(8));
    let n = 4000;
    let e: Vec<f64> = (0..n).map(noisy).collect();
    let mean = e.iter().sum::<f64>() / n as f64;
    let sd = (e.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
    // Standard errors of a Gaussian sample (analytic): mean sd/sqrt(n) =
    // 0.032, sd about sd/sqrt(2n) = 0.022; checked within 4 of them.
    assert!(mean.abs() < 0.13, "{mean}");
    assert!((sd - 2.0).abs() < 0.09, "{sd}");
}

#[test]
fn delay_makes_the_run_take_at_least_that_long() {
    let t0 = std::time::Instant::now();
    value("hartmann3", &[("delay_ms", 150.0)]);
    assert!(t0.elapsed() >= std::time::Duration::from_millis(150));
}
