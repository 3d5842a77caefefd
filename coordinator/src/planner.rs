//! The planner: after the initial design, fit a Gaussian process to the
//! objective and propose the next batch of points.
//!
//! Each point's objective is the mean loss over its finished replicates
//! (see `Spec::loss`), with the variance of that mean as known noise
//! (stochastic kriging). Proposals maximise expected improvement
//! (`strategy = "improve"`) or the predictive sd (`strategy = "explore"`),
//! in batches by kriging believer, away from points already in the sweep.
//! With too little data, or if the fit fails, the planner falls back to
//! seeded uniform points and logs why.

use crate::spec::{Spec, Strategy};
use crate::status::PointResults;
use rand::{Rng, SeedableRng};
use tessera_surrogate::acquisition;
use tessera_surrogate::gp::{self, FitOptions, Observations};

/// Fewest points with results before a surrogate is fitted.
pub const MIN_POINTS_FOR_FIT: usize = 3;

/// Per-point objective data in the unit cube.
pub fn objective_observations(spec: &Spec, results: &[PointResults]) -> Observations {
    let mut obs = Observations {
        x: Vec::new(),
        y: Vec::new(),
        noise_var: Vec::new(),
    };
    for p in results {
        let losses: Vec<f64> = p
            .replicates
            .iter()
            .filter_map(|m| spec.loss(m))
            .filter(|v| v.is_finite())
            .collect();
        if losses.is_empty() {
            continue;
        }
        let (mean, var_of_mean) = mean_and_var_of_mean(&losses);
        obs.x.push(spec.to_unit(&p.values));
        obs.y.push(mean);
        obs.noise_var.push(var_of_mean);
    }
    obs
}

/// Mean of `v` and the variance of that mean (sample variance / n; 0 for one value).
pub fn mean_and_var_of_mean(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    if v.len() < 2 {
        return (mean, 0.0);
    }
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, var / n)
}

/// Proposes `q` new points (natural units).
pub fn propose(
    spec: &Spec,
    results: &[PointResults],
    unfinished: &[Vec<f64>],
    q: usize,
    seed: u64,
) -> Vec<Vec<f64>> {
    let obs = objective_observations(spec, results);
    let d = spec.params.len();
    let mut avoid: Vec<Vec<f64>> = results.iter().map(|p| spec.to_unit(&p.values)).collect();
    avoid.extend(unfinished.iter().map(|v| spec.to_unit(v)));
    if obs.y.len() < MIN_POINTS_FOR_FIT {
        tracing::info!(
            points = obs.y.len(),
            "too few results for a surrogate; proposing uniform points"
        );
        return uniform(spec, d, q, seed);
    }
    let opts = FitOptions {
        seed,
        ..FitOptions::default()
    };
    let fitted = match gp::fit(&obs, &opts) {
        Ok(g) => g,
        Err(e) => {
            tracing::warn!(error = %e, "surrogate fit failed; proposing uniform points");
            return uniform(spec, d, q, seed);
        }
    };
    let strategy = match spec.strategy {
        Strategy::Improve => acquisition::Strategy::Improve,
        Strategy::Explore => acquisition::Strategy::Explore,
    };
    acquisition::propose(&fitted, strategy, q, &avoid, seed)
        .iter()
        .map(|u| spec.to_natural(u))
        .collect()
}

fn uniform(spec: &Spec, d: usize, q: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    (0..q)
        .map(|_| {
            let u: Vec<f64> = (0..d).map(|_| rng.random::<f64>()).collect();
            spec.to_natural(&u)
        })
        .collect()
}
