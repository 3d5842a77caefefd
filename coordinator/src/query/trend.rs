//! Trends: how one metric's predicted mean and its uncertainty change along
//! one parameter, next to the observed per-point means. `tessera trend`
//! draws it. The default is the main effect (the metric averaged over the
//! other parameters, [`super::effects`]); a slice holds the others at
//! chosen values.

use super::{predict, QueryError};
use crate::fitter::MetricFit;
use crate::spec::{Scale, Spec};
use crate::store::{EvalStatus, EvaluationRecord, PointRecord};
use std::collections::BTreeMap;

/// One step of the curve.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct TrendStep {
    /// Parameter value (natural units).
    pub x: f64,
    /// Predicted mean of the metric.
    pub mean: f64,
    /// Predictive sd of that mean.
    pub sd: f64,
    /// mean - 1.96 sd.
    pub lower95: f64,
    /// mean + 1.96 sd.
    pub upper95: f64,
    /// sd / prior sd (near 1: the surrogate knows little here).
    pub sd_ratio: f64,
}

/// An observed point: its parameter value and the mean of its finished replicates.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct Observed {
    /// Parameter value.
    pub x: f64,
    /// Mean of the metric over finished replicates.
    pub mean: f64,
    /// How many replicates.
    pub replicates: u32,
}

/// What a curve shows.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum TrendKind {
    /// The metric averaged over the other parameters (partial dependence).
    MainEffect,
    /// The metric with the other parameters held at fixed values.
    Slice,
}

/// A trend of `metric` along `param`.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct Trend {
    /// Main effect or slice.
    pub kind: TrendKind,
    /// The parameter varied.
    pub param: String,
    /// Whether the parameter is on a log scale (its axis is logarithmic).
    pub log_scale: bool,
    /// Its unit.
    pub param_unit: String,
    /// The metric shown.
    pub metric: String,
    /// Its unit.
    pub metric_unit: String,
    /// Values of the other parameters along a slice (empty for a main effect).
    pub held: BTreeMap<String, f64>,
    /// The curve, from the low to the high end of the range.
    pub curve: Vec<TrendStep>,
    /// Every point with results (at whatever values of the other parameters).
    pub observed: Vec<Observed>,
    /// The target on this metric, if any: `(value, sd)`.
    pub target: Option<(f64, f64)>,
    /// Stretches of the parameter where the surrogate knows little.
    pub unsure: Vec<(f64, f64)>,
    /// Plain warnings (values outside the sampled range, little knowledge).
    pub warnings: Vec<String>,
}

/// Computes the trend of `metric` along `param` in `steps` steps over the
/// parameter's range (log-spaced on a log scale): the main effect, or with
/// `kind` [`TrendKind::Slice`] a slice where parameters not in `held` are
/// held at the middle of their range (in the unit cube).
#[allow(clippy::too_many_arguments)]
pub fn trend(
    fits: &[MetricFit],
    spec: &Spec,
    points: &[PointRecord],
    evals: &[EvaluationRecord],
    param: &str,
    metric: &str,
    held: &BTreeMap<String, f64>,
    steps: usize,
    kind: TrendKind,
    seed: u64,
) -> Result<Trend, QueryError> {
    let Some(pi) = spec.params.iter().position(|p| p.name == param) else {
        return Err(QueryError::NotAParameter {
            name: param.to_string(),
            valid: super::describe_params(spec),
        });
    };
    for name in held.keys() {
        if !spec.params.iter().any(|p| &p.name == name) {
            return Err(QueryError::NotAParameter {
                name: name.clone(),
                valid: super::describe_params(spec),
            });
        }
    }
    let p = &spec.params[pi];
    let steps = steps.max(2);
    let mut base: BTreeMap<String, f64> = spec
        .params
        .iter()
        .map(|q| (q.name.clone(), q.to_natural(0.5)))
        .collect();
    for (k, v) in held {
        base.insert(k.clone(), *v);
    }
    let xs: Vec<f64> = (0..steps)
        .map(|i| {
            let t = i as f64 / (steps - 1) as f64;
            let x = match p.scale {
                Scale::Linear => p.lo + t * (p.hi - p.lo),
                Scale::Log => (p.lo.ln() + t * (p.hi.ln() - p.lo.ln())).exp(),
            };
            if p.integer {
                x.round()
            } else {
                x
            }
        })
        .collect();
    let queries: Vec<BTreeMap<String, f64>> = xs
        .iter()
        .map(|x| {
            let mut q = base.clone();
            q.insert(param.to_string(), *x);
            q
        })
        .collect();
    let Some(fit) = fits.iter().find(|f| f.metric == metric) else {
        return Err(QueryError::NoSuchMetric {
            metric: metric.to_string(),
            fitted: fits
                .iter()
                .map(|f| f.metric.as_str())
                .collect::<Vec<_>>()
                .join(", "),
        });
    };
    let preds = predict(fits, spec, &queries)?;
    let mut warnings: Vec<String> = Vec::new();
    if kind == TrendKind::Slice {
        for w in preds.iter().flat_map(|p| p.warnings.iter()) {
            // Warnings about the held values, not the varied one.
            if !w.starts_with(&format!("{param} ="))
                && !warnings.contains(w)
                && !w.contains("knows little")
            {
                warnings.push(w.clone());
            }
        }
    }
    let mut curve = Vec::with_capacity(steps);
    for (x, pp) in xs.iter().zip(preds.iter()) {
        let Some(m) = pp.metrics.iter().find(|m| m.metric == metric) else {
            let known: Vec<&str> = preds
                .first()
                .map(|p| p.metrics.iter().map(|m| m.metric.as_str()).collect())
                .unwrap_or_default();
            return Err(QueryError::NoSuchMetric {
                metric: metric.to_string(),
                fitted: known.join(", "),
            });
        };
        curve.push(TrendStep {
            x: *x,
            mean: m.mean,
            sd: m.sd,
            lower95: m.lower95,
            upper95: m.upper95,
            sd_ratio: m.sd_ratio,
        });
    }
    let mut per_point: BTreeMap<i64, Vec<f64>> = BTreeMap::new();
    for e in evals {
        if e.status == EvalStatus::Done {
            // The calibration discrepancy is computed from each run's metrics.
            let v = if spec.objective.is_none() && metric == spec.objective_label() {
                spec.loss(&e.metrics)
            } else {
                e.metrics.get(metric).copied()
            };
            if let Some(v) = v.filter(|v| v.is_finite()) {
                per_point.entry(e.point_id).or_default().push(v);
            }
        }
    }
    let observed = points
        .iter()
        .filter_map(|pt| {
            let vals = per_point.get(&pt.id)?;
            let x = *pt.values.get(pi)?;
            Some(Observed {
                x,
                mean: vals.iter().sum::<f64>() / vals.len() as f64,
                replicates: vals.len() as u32,
            })
        })
        .collect();
    if kind == TrendKind::MainEffect {
        curve = super::effects::main_effect(fit, spec, pi, steps, seed);
        base.clear();
    } else {
        base.remove(param);
    }
    let unsure = super::effects::unsure_stretches(&curve);
    if !unsure.is_empty() {
        warnings.push(format!(
            "the surrogate of {metric} knows little over part of the range (shaded in the plot): add points there before trusting the curve"
        ));
    }
    Ok(Trend {
        kind,
        log_scale: p.scale == Scale::Log,
        target: spec
            .targets
            .iter()
            .find(|t| t.metric == metric)
            .map(|t| (t.value, t.sd)),
        unsure,
        warnings,
        param: param.to_string(),
        param_unit: p.unit.clone(),
        metric: metric.to_string(),
        metric_unit: spec.metric_unit(metric).to_string(),
        held: base,
        curve,
        observed,
    })
}
