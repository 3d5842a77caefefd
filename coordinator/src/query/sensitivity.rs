//! Which constants matter: Sobol first-order and total indices of every
//! parameter for every metric, computed on the surrogates (Oakley &
//! O'Hagan 2004 on emulators standing in for the simulator), over the box
//! with each parameter on its own scale (log-scaled parameters uniform in
//! the logarithm).
//!
//! Point estimates use the surrogate's mean (its median on the metric's own
//! scale for a bounded metric) on a pick-and-freeze sample of
//! [`BASE_ROWS`] rows (`tessera_surrogate::sobol`), with the total
//! variance in their denominators taken as the GP's posterior expectation
//! (the variance of the mean plus what the surrogate is unsure of, from
//! sample paths; Oakley & O'Hagan 2004 give the same correction in closed
//! form). The interval of each index adds two independent errors in
//! quadrature:
//!
//! - Monte Carlo: the sd of the index over bootstrap resamples of the rows;
//! - surrogate: the sd of the index recomputed on joint posterior sample
//!   paths of the GP over a smaller sample, as Marrel, Iooss, Laurent &
//!   Roustant (2009, Reliab. Eng. Syst. Saf. 94:742-751) do (the rows are
//!   fixed across paths, so this spread is the surrogate's alone), and the
//!   difference between the paths' average index and the index of the
//!   surrogate's mean on those rows: two estimates of one index that differ
//!   by how much the surrogate smooths what it is unsure of (our choice).

use super::QueryError;
use crate::fitter::MetricFit;
use crate::spec::Spec;
use serde::Serialize;
use std::collections::BTreeMap;
use tessera_surrogate::{sobol, stats};

/// Base rows of the point estimate (`rows x (d + 2)` surrogate means).
pub const BASE_ROWS: usize = 8192;
/// Bootstrap resamples for the Monte Carlo error.
pub const BOOTSTRAP: usize = 200;
/// Sample paths for the surrogate's error.
pub const PATHS: usize = 64;
/// Most points in one joint path draw (the posterior covariance is
/// factorised once: O(m^3)).
pub const PATH_POINTS: usize = 1600;

/// One index with its 95% interval.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Index {
    /// The estimate.
    pub value: f64,
    /// Lower end of the 95% interval (at least 0).
    pub lower: f64,
    /// Upper end (at most 1).
    pub upper: f64,
    /// Its Monte Carlo sd.
    pub mc_sd: f64,
    /// Its sd from the surrogate's uncertainty.
    pub surrogate_sd: f64,
}

/// The indices of one parameter for one metric.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ParamIndices {
    /// First order: the share of the metric's variance due to the parameter alone.
    pub first: Index,
    /// Total: the share due to the parameter with all its interactions.
    pub total: Index,
}

/// The indices of every parameter for one metric.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct MetricSensitivity {
    /// Metric.
    pub metric: String,
    /// Unit.
    pub unit: String,
    /// Variance of the metric over the box (surrogate mean).
    pub variance: f64,
    /// Per parameter, in sweep-file order.
    pub params: Vec<(String, ParamIndices)>,
    /// Leave-one-out Q2 of the surrogate (how far to trust all this).
    pub q2: f64,
}

impl MetricSensitivity {
    /// The parameters by name.
    pub fn by_name(&self) -> BTreeMap<String, ParamIndices> {
        self.params.iter().cloned().collect()
    }
}

/// An index with its interval: `smoothing` is the difference between the
/// posterior mean of the index (over the paths) and the index of the
/// surrogate's mean on the same rows, counted as surrogate error.
fn index(value: f64, mc: &[f64], paths: &[f64], smoothing: f64) -> Index {
    let mc_sd = stats::mean_sd(mc).1;
    let spread = if paths.len() >= 2 {
        stats::mean_sd(paths).1
    } else {
        0.0
    };
    let smoothing = if smoothing.is_finite() {
        smoothing
    } else {
        0.0
    };
    let surrogate_sd = (spread.powi(2) + smoothing.powi(2)).sqrt();
    let sd = (mc_sd.powi(2) + surrogate_sd.powi(2)).sqrt();
    let half = 1.959_963_984_540_054 * if sd.is_finite() { sd } else { 0.0 };
    // An index is a share of variance: estimates outside [0, 1] (Monte
    // Carlo error) are shown at the nearest end.
    Index {
        value: value.clamp(0.0, 1.0),
        lower: (value - half).clamp(0.0, 1.0),
        upper: (value + half).clamp(0.0, 1.0),
        mc_sd,
        surrogate_sd,
    }
}

/// The indices of `fit`'s metric (`seed` fixes the samples).
pub fn sensitivity_of(fit: &MetricFit, spec: &Spec, seed: u64) -> MetricSensitivity {
    let d = spec.dimension();
    let big = sobol::design(BASE_ROWS, d, seed);
    let f = fit.predict_median(&big.points);
    let est = sobol::indices(&f, big.n, d);
    let boots = sobol::bootstrap(&f, big.n, d, BOOTSTRAP, seed ^ 0xb007);
    // Surrogate paths on a smaller sample.
    let small_n = (PATH_POINTS / (d + 2)).clamp(16, 512);
    let small = sobol::design(small_n, d, seed ^ 0x5a11);
    // The surrogate's mean is smoother than the function it stands for: its
    // variance over the box misses the part the surrogate is unsure of. The
    // paths carry that part; the ratio of their variance to the mean's, on
    // the same small sample, scales the variance in the indices'
    // denominators (numerators of first-order indices average the
    // uncertainty out, so they keep the mean's).
    let f_small = fit.predict_median(&small.points);
    let mean_small = sobol::indices(&f_small, small.n, d);
    let paths: Vec<sobol::Indices> = fit
        .gp
        .sample_paths(&small.points, PATHS, seed ^ 0x9a7e)
        .into_iter()
        .map(|latent| {
            let natural: Vec<f64> = latent
                .into_iter()
                .map(|z| fit.clamp(fit.transform.inverse(z)))
                .collect();
            sobol::indices(&natural, small.n, d)
        })
        .collect();
    // The variance the surrogate's mean misses: the paths' average variance
    // over the small sample against the mean's on the same rows.
    let path_var = paths.iter().map(|p| p.variance).sum::<f64>() / paths.len().max(1) as f64;
    let inflation = if mean_small.variance > 0.0 && path_var.is_finite() && !paths.is_empty() {
        (path_var / mean_small.variance).max(1.0)
    } else {
        1.0
    };
    let params = spec
        .params
        .iter()
        .enumerate()
        .map(|(i, p)| {
            let mc_first: Vec<f64> = boots.iter().map(|b| b.first[i]).collect();
            let mc_total: Vec<f64> = boots.iter().map(|b| b.total[i]).collect();
            let gp_first: Vec<f64> = paths.iter().map(|b| b.first[i]).collect();
            let gp_total: Vec<f64> = paths.iter().map(|b| b.total[i]).collect();
            let first = est.first[i] / inflation;
            let total = est.total[i] / inflation;
            let avg = |v: &[f64]| v.iter().sum::<f64>() / v.len().max(1) as f64;
            let smooth_first = avg(&gp_first) - mean_small.first[i] / inflation;
            let smooth_total = avg(&gp_total) - mean_small.total[i] / inflation;
            (
                p.name.clone(),
                ParamIndices {
                    first: index(first, &mc_first, &gp_first, smooth_first),
                    total: index(total, &mc_total, &gp_total, smooth_total),
                },
            )
        })
        .collect();
    MetricSensitivity {
        metric: fit.metric.clone(),
        unit: fit.unit.clone(),
        variance: est.variance,
        params,
        q2: fit.loo.q2,
    }
}

/// The indices of every fitted metric, or of `metric` alone.
pub fn sensitivity(
    fits: &[MetricFit],
    spec: &Spec,
    metric: Option<&str>,
    seed: u64,
) -> Result<Vec<MetricSensitivity>, QueryError> {
    let chosen: Vec<&MetricFit> = match metric {
        Some(m) => {
            let Some(f) = fits.iter().find(|f| f.metric == m) else {
                return Err(QueryError::NoSuchMetric {
                    metric: m.to_string(),
                    fitted: fits
                        .iter()
                        .map(|f| f.metric.as_str())
                        .collect::<Vec<_>>()
                        .join(", "),
                });
            };
            vec![f]
        }
        None => fits
            .iter()
            .filter(|f| f.metric != crate::fitter::FAILURE_RATE)
            .collect(),
    };
    Ok(chosen
        .into_iter()
        .map(|f| sensitivity_of(f, spec, seed))
        .collect())
}
