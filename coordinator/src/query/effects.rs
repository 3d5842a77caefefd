//! Main effects and maps: how a metric moves with one or two parameters
//! *on average over the others* (partial dependence; the main effect
//! E[f | x_i] of Sobol's decomposition), with a band that carries the
//! surrogate's uncertainty.
//!
//! At each grid value the other parameters take the rows of one random
//! Latin hypercube over the box ([`OTHERS`] rows, the same rows at every
//! grid value, so the curve's shape is not Monte Carlo noise). The estimate
//! is the average of the surrogate's predictive mean (on the metric's own
//! scale) over those rows. Its sd adds in quadrature:
//!
//! - the surrogate's: the sd of that average over [`PATHS`] joint posterior
//!   sample paths of the GP at the rows (mapped back through the metric's
//!   transform before averaging);
//! - the Monte Carlo: the sd of the per-row means over sqrt(rows) (cautious
//!   for a Latin hypercube, which averages better than independent rows).
//!
//! Maps over two parameters use fewer rows and no paths: their sd is the
//! average of the per-row predictive sds, an upper bound on the sd of the
//! average (the rows' errors are at most perfectly correlated).

use super::{predict::SD_RATIO_WARN, QueryError, TrendStep};
use crate::fitter::MetricFit;
use crate::spec::{Scale, Spec};
use serde::Serialize;
use tessera_surrogate::design::latin_hypercube;
use tessera_surrogate::stats;

/// Rows of the other parameters averaged over at each grid value of a curve.
pub const OTHERS: usize = 128;
/// Rows averaged over at each cell of a map.
pub const MAP_OTHERS: usize = 48;
/// Posterior sample paths per grid value.
pub const PATHS: usize = 100;

/// The grid of `steps` values over a parameter's range, evenly on its
/// scale (whole numbers for integer parameters), as unit-cube coordinates
/// and natural values.
pub fn grid(spec: &Spec, k: usize, steps: usize) -> Vec<(f64, f64)> {
    let p = &spec.params[k];
    let steps = steps.max(2);
    (0..steps)
        .map(|i| {
            let t = i as f64 / (steps - 1) as f64;
            let x = match p.scale {
                Scale::Linear => p.lo + t * (p.hi - p.lo),
                Scale::Log => (p.lo.ln() + t * (p.hi.ln() - p.lo.ln())).exp(),
            };
            let x = if p.integer { x.round() } else { x };
            (p.to_unit(x), x)
        })
        .collect()
}

/// The main effect of parameter `k` on `fit`'s metric along `steps` grid values.
pub fn main_effect(
    fit: &MetricFit,
    spec: &Spec,
    k: usize,
    steps: usize,
    seed: u64,
) -> Vec<TrendStep> {
    let d = spec.dimension();
    let rows = if d == 1 { 1 } else { OTHERS };
    let base = latin_hypercube(rows, d, seed);
    let prior = fit.gp.prior_sd();
    grid(spec, k, steps)
        .into_iter()
        .enumerate()
        .map(|(g, (u, x))| {
            let pts: Vec<Vec<f64>> = base
                .iter()
                .map(|r| {
                    let mut p = r.clone();
                    p[k] = u;
                    p
                })
                .collect();
            let preds = fit.gp.predict(&pts);
            let natural: Vec<f64> = preds.iter().map(|p| fit.natural(*p).mean).collect();
            let (mean, row_sd) = stats::mean_sd(&natural);
            let mc_sd = if natural.len() > 1 {
                row_sd / (natural.len() as f64).sqrt()
            } else {
                0.0
            };
            let averages: Vec<f64> = fit
                .gp
                .sample_paths(&pts, PATHS, seed ^ (g as u64).wrapping_mul(0x9E37_79B9))
                .into_iter()
                .map(|path| {
                    path.iter()
                        .map(|z| fit.clamp(fit.transform.inverse(*z)))
                        .sum::<f64>()
                        / path.len().max(1) as f64
                })
                .collect();
            let gp_sd = stats::mean_sd(&averages).1;
            let sd = (gp_sd.powi(2) + mc_sd.powi(2)).sqrt();
            let ratio = preds.iter().map(|p| p.sd).sum::<f64>() / preds.len().max(1) as f64;
            TrendStep {
                x,
                mean,
                sd,
                lower95: fit.clamp(mean - super::Z95 * sd),
                upper95: fit.clamp(mean + super::Z95 * sd),
                sd_ratio: if prior > 0.0 { ratio / prior } else { f64::NAN },
            }
        })
        .collect()
}

/// A map of a metric over two parameters.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Map {
    /// Horizontal parameter.
    pub x_param: String,
    /// Vertical parameter.
    pub y_param: String,
    /// Grid values of the horizontal parameter.
    pub xs: Vec<f64>,
    /// Grid values of the vertical parameter.
    pub ys: Vec<f64>,
    /// `mean[j][i]` at `(xs[i], ys[j])`: averaged over the other parameters.
    pub mean: Vec<Vec<f64>>,
    /// The matching sd (an upper bound when averaged; exact with two parameters).
    pub sd: Vec<Vec<f64>>,
    /// `sd / prior sd` on the fitted scale: near 1 where the surrogate knows little.
    pub sd_ratio: Vec<Vec<f64>>,
}

/// The map of `fit`'s metric over parameters `kx` and `ky`, `steps` x `steps`.
pub fn map(
    fit: &MetricFit,
    spec: &Spec,
    kx: usize,
    ky: usize,
    steps: usize,
    seed: u64,
) -> Result<Map, QueryError> {
    if kx == ky {
        return Err(QueryError::Internal(
            "a map needs two different parameters".to_string(),
        ));
    }
    let d = spec.dimension();
    let rows = if d == 2 { 1 } else { MAP_OTHERS };
    let base = latin_hypercube(rows, d, seed);
    let gx = grid(spec, kx, steps);
    let gy = grid(spec, ky, steps);
    let prior = fit.gp.prior_sd();
    let mut pts = Vec::with_capacity(gx.len() * gy.len() * rows);
    for (uy, _) in &gy {
        for (ux, _) in &gx {
            for r in &base {
                let mut p = r.clone();
                p[kx] = *ux;
                p[ky] = *uy;
                pts.push(p);
            }
        }
    }
    let preds = fit.gp.predict(&pts);
    let mut mean = vec![vec![0.0; gx.len()]; gy.len()];
    let mut sd = vec![vec![0.0; gx.len()]; gy.len()];
    let mut ratio = vec![vec![0.0; gx.len()]; gy.len()];
    for (c, chunk) in preds.chunks(rows).enumerate() {
        let (j, i) = (c / gx.len(), c % gx.len());
        let nat: Vec<_> = chunk.iter().map(|p| fit.natural(*p)).collect();
        let n = nat.len() as f64;
        mean[j][i] = nat.iter().map(|p| p.mean).sum::<f64>() / n;
        sd[j][i] = nat.iter().map(|p| p.sd).sum::<f64>() / n;
        let r = chunk.iter().map(|p| p.sd).sum::<f64>() / n;
        ratio[j][i] = if prior > 0.0 { r / prior } else { f64::NAN };
    }
    Ok(Map {
        x_param: spec.params[kx].name.clone(),
        y_param: spec.params[ky].name.clone(),
        xs: gx.iter().map(|g| g.1).collect(),
        ys: gy.iter().map(|g| g.1).collect(),
        mean,
        sd,
        sd_ratio: ratio,
    })
}

/// Stretches of a curve where the surrogate knows little (sd / prior sd
/// above [`SD_RATIO_WARN`]), as `(from, to)` in the parameter's units.
pub fn unsure_stretches(curve: &[TrendStep]) -> Vec<(f64, f64)> {
    let mut out = Vec::new();
    let mut start: Option<f64> = None;
    for (i, s) in curve.iter().enumerate() {
        let bad = s.sd_ratio > SD_RATIO_WARN;
        match (bad, start) {
            (true, None) => {
                start = Some(if i == 0 {
                    s.x
                } else {
                    0.5 * (curve[i - 1].x + s.x)
                })
            }
            (false, Some(a)) => {
                out.push((a, 0.5 * (curve[i - 1].x + s.x)));
                start = None;
            }
            _ => {}
        }
    }
    if let (Some(a), Some(last)) = (start, curve.last()) {
        out.push((a, last.x));
    }
    out
}
