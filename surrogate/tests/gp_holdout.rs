//! Out-of-sample accuracy on deterministic data against the reference
//! library: six 40-point Latin hypercubes of Branin (Surjanovic & Bingham,
//! VLSE), 60 held-out points each; scikit-learn 1.9 `GaussianProcessRegressor`
//! (ConstantKernel * Matern 5/2 ARD + WhiteKernel, default bounds,
//! `normalize_y`, 5 restarts) made the reference values
//! (scripts/fixtures_surrogate.py holdout, pinned versions).

use serde_json::Value;
use tessera_surrogate::gp::{fit, FitOptions, Observations};

fn fixture() -> Value {
    let text = include_str!("fixtures/gp_holdout_sklearn.json");
    serde_json::from_str(text).expect("fixture JSON")
}

fn mat(v: &Value) -> Vec<Vec<f64>> {
    v.as_array()
        .expect("rows")
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

fn vec_f(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("numbers")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

/// Our RMSE is at most 1.1 times scikit-learn's, median over the six
/// designs, and our 95% intervals cover 85% to 100% of the held-out points
/// (nominal 95%; the band is common practice, no source).
#[test]
fn branin_holdout_rmse_within_ten_percent_of_sklearn() {
    let f = fixture();
    let mut ratios = Vec::new();
    for (k, c) in f["cases"].as_array().expect("cases").iter().enumerate() {
        let obs = Observations::new(mat(&c["x_train"]), vec_f(&c["y_train"]));
        let xt = mat(&c["x_test"]);
        let yt = vec_f(&c["y_test"]);
        let opts = FitOptions {
            seed: k as u64,
            ..FitOptions::default()
        };
        let gp = fit(&obs, &opts).expect("fit");
        let p = gp.predict(&xt);
        let mut sse = 0.0;
        let mut covered = 0usize;
        for (pi, y) in p.iter().zip(&yt) {
            sse += (pi.mean - y).powi(2);
            if (pi.mean - y).abs() <= 1.959_963_984_540_054 * pi.sd_obs {
                covered += 1;
            }
        }
        let rmse = (sse / yt.len() as f64).sqrt();
        let coverage = covered as f64 / yt.len() as f64;
        let sk = c["sklearn_rmse"].as_f64().expect("rmse");
        eprintln!(
            "seed {}: rmse {rmse:.4} sklearn {sk:.4} ratio {:.3} coverage {coverage:.3} hyper {:?}",
            c["seed"],
            rmse / sk,
            gp.hyper()
        );
        assert!(
            (0.85..=1.0).contains(&coverage),
            "seed {}: coverage {coverage}",
            c["seed"]
        );
        ratios.push(rmse / sk);
    }
    let m = median(ratios.clone());
    assert!(m <= 1.1, "median ratio {m:.3} over {ratios:?}");
}
