//! Checks of batched prediction at many points (the single-precision solve
//! with double-precision correction of `gp::Gp::predict`) against
//! scikit-learn (scripts/fixtures_surrogate.py writes
//! tests/fixtures/gp_bulk_sklearn.json; versions inside) and against the
//! all-f64 path `predict_exact`, which the scikit-learn fixtures check too.

use serde_json::Value;
use tessera_surrogate::gp::{Gp, Hyper, KernelKind, Observations, Prediction};

fn vec_f(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

/// x_ik = frac(0.5 + i a_k), a_k = frac(sqrt(p_k)) for the first six primes:
/// the same operations as `kronecker` in the fixture script.
fn kronecker(n: usize, offset: usize) -> Vec<Vec<f64>> {
    let a: Vec<f64> = [2.0f64, 3.0, 5.0, 7.0, 11.0, 13.0]
        .iter()
        .map(|p| p.sqrt() - p.sqrt().floor())
        .collect();
    (offset..offset + n)
        .map(|i| {
            a.iter()
                .map(|ak| {
                    let v = 0.5 + i as f64 * ak;
                    v - v.floor()
                })
                .collect()
        })
        .collect()
}

fn largest_sd_difference(a: &[Prediction], b: &[Prediction]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(p, q)| rel(p.sd, q.sd))
        .fold(0.0, f64::max)
}

#[test]
fn many_points_match_sklearn() {
    // scikit-learn GaussianProcessRegressor, ConstantKernel * Matern(nu=2.5, ARD),
    // alpha = nugget, normalize_y=True, optimizer=None; n = 300 observations,
    // 740 points (640 new, 100 of the training inputs), so `predict` takes its
    // f32 path. Means are f64 in both paths: 1e-6 relative. sd: 1e-6 for the f64
    // path; 1e-3 for `predict`, the accuracy the batch module promises.
    let f: Value =
        serde_json::from_str(include_str!("fixtures/gp_bulk_sklearn.json")).expect("fixture JSON");
    let n = f["n"].as_u64().expect("n") as usize;
    let x = kronecker(n, 0);
    let mut xs = kronecker(
        f["test_new"].as_u64().expect("m") as usize,
        f["test_offset"].as_u64().expect("offset") as usize,
    );
    xs.extend_from_slice(&x[..f["test_train"].as_u64().expect("k") as usize]);
    let sum = |v: &[Vec<f64>]| v.iter().flatten().sum::<f64>();
    assert!(
        rel(sum(&x), f["x_sum"].as_f64().expect("x_sum")) < 1e-12,
        "inputs differ from the script's"
    );
    assert!(rel(sum(&xs), f["x_star_sum"].as_f64().expect("sum")) < 1e-12);
    let obs = Observations::new(x, vec_f(&f["y"]));
    let hyper = Hyper {
        mean: 0.0,
        signal_var: f["signal_var"].as_f64().expect("signal_var"),
        lengthscales: vec_f(&f["lengthscales"]),
        nugget: f["nugget"].as_f64().expect("nugget"),
    };
    let gp = Gp::with_hyper(&obs, KernelKind::Matern52, hyper, true).expect("gp");
    assert_eq!(gp.jitter(), 0.0);
    let (mean, sd) = (vec_f(&f["mean"]), vec_f(&f["sd"]));
    let exact = gp.predict_exact(&xs);
    let fast = gp.predict(&xs);
    for i in 0..xs.len() {
        assert!(
            rel(exact[i].mean, mean[i]) < 1e-6,
            "mean {i}: {} vs {}",
            exact[i].mean,
            mean[i]
        );
        assert_eq!(fast[i].mean, exact[i].mean, "means are f64 in both paths");
        assert!(
            rel(exact[i].sd, sd[i]) < 1e-6,
            "exact sd {i}: {} vs {}",
            exact[i].sd,
            sd[i]
        );
        assert!(
            rel(fast[i].sd, sd[i]) < 1e-3,
            "sd {i}: {} vs {}",
            fast[i].sd,
            sd[i]
        );
    }
    // The training inputs have sd far below the prior's: they must have been redone in f64.
    let tiny = (640..xs.len())
        .filter(|&i| sd[i] < 1e-2 * gp.prior_sd())
        .count();
    assert!(tiny > 50, "only {tiny} points near the data");
}

#[test]
fn ill_conditioned_factor_stays_accurate() {
    // Pairs of nearly coincident inputs (1e-6 apart) and a nugget of 1e-12: the
    // covariance matrix is close to singular, the f32 solve loses most digits and
    // the batch must fall back to f64 where it matters. Reference: predict_exact.
    let base = kronecker(200, 7);
    let mut x = Vec::new();
    for p in &base {
        x.push(p.clone());
        x.push(p.iter().map(|v| (v + 1e-6).min(1.0)).collect());
    }
    let y: Vec<f64> = x
        .iter()
        .map(|p| p.iter().map(|v| (3.0 * v).sin()).sum())
        .collect();
    let obs = Observations::new(x.clone(), y);
    let hyper = Hyper {
        mean: 0.0,
        signal_var: 1.0,
        lengthscales: vec![0.6; 6],
        nugget: 1e-12,
    };
    let gp = Gp::with_hyper(&obs, KernelKind::Matern52, hyper, true).expect("gp");
    let mut xs = kronecker(900, 50_000);
    xs.extend_from_slice(&x[..100]);
    let (fast, exact) = (gp.predict(&xs), gp.predict_exact(&xs));
    let worst = largest_sd_difference(&fast, &exact);
    assert!(worst < 1e-3, "largest relative sd difference {worst:e}");
}

#[test]
fn noisy_and_squared_exponential_fits_stay_accurate() {
    // A large nugget (well conditioned) and the SE kernel (smoother, worse
    // conditioned than Matern 5/2 at the same length scale). Reference: predict_exact.
    let x = kronecker(400, 3);
    let y: Vec<f64> = x
        .iter()
        .map(|p| p[0] * p[1] - p[2] + (5.0 * p[3]).cos())
        .collect();
    let obs = Observations::new(x, y);
    for (kernel, nugget) in [
        (KernelKind::Matern52, 0.1),
        (KernelKind::SquaredExponential, 1e-6),
    ] {
        let hyper = Hyper {
            mean: 0.1,
            signal_var: 2.0,
            lengthscales: vec![0.4, 0.5, 0.6, 0.7, 0.8, 0.9],
            nugget,
        };
        let gp = Gp::with_hyper(&obs, kernel, hyper, true).expect("gp");
        let xs = kronecker(1500, 9_000);
        let (fast, exact) = (gp.predict(&xs), gp.predict_exact(&xs));
        let worst = largest_sd_difference(&fast, &exact);
        assert!(
            worst < 1e-3,
            "{kernel:?}: largest relative sd difference {worst:e}"
        );
        for (a, b) in fast.iter().zip(&exact) {
            assert_eq!(a.mean, b.mean);
            assert!(rel(a.sd_obs, b.sd_obs) < 1e-3);
        }
    }
}

#[test]
fn small_batches_are_exact() {
    // Below 512 points (or 256 observations) `predict` is the f64 path itself.
    let x = kronecker(300, 0);
    let y: Vec<f64> = x.iter().map(|p| p.iter().sum()).collect();
    let gp = Gp::with_hyper(
        &Observations::new(x, y),
        KernelKind::Matern52,
        Hyper {
            mean: 0.0,
            signal_var: 1.0,
            lengthscales: vec![0.5; 6],
            nugget: 1e-6,
        },
        true,
    )
    .expect("gp");
    let xs = kronecker(511, 1_000);
    assert_eq!(gp.predict(&xs), gp.predict_exact(&xs));
}
