//! Predicted outcomes at given parameter values, with plain-words warnings.

use super::{describe_params, QueryError};
use crate::fitter::MetricFit;
use crate::spec::{ParamSpec, Scale, Spec};
use std::collections::BTreeMap;

/// The 97.5% quantile of the standard normal distribution: mean +- Z95 sd
/// is the 95% interval.
pub const Z95: f64 = 1.959_963_984_540_054;

/// Above this ratio of predictive sd to prior sd the surrogate "knows little"
/// at a point and a warning is given (common practice, no source).
pub const SD_RATIO_WARN: f64 = 0.8;

/// Above this predicted failure rate a point is said to fail often (our choice).
pub const FAILURE_WARN: f64 = 0.2;

/// Tolerance on the unit-cube box edges (rounding of stored values).
const BOX_TOL: f64 = 1e-9;

/// The prediction of one metric at one point.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct MetricPrediction {
    /// Metric name.
    pub metric: String,
    /// Unit of the metric (`""` if none).
    pub unit: String,
    /// Predicted mean outcome (the average over many replicates).
    pub mean: f64,
    /// Standard deviation of that prediction (uncertainty of the surrogate,
    /// not the spread of single runs).
    pub sd: f64,
    /// Lower end of the 95% interval (mean - 1.96 sd, or the 2.5% quantile
    /// mapped back from the fitted scale of a bounded metric).
    pub lower95: f64,
    /// Upper end of the 95% interval.
    pub upper95: f64,
    /// sd / prior sd: near 1 means the surrogate knows little here.
    pub sd_ratio: f64,
}

/// The predictions at one point.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct PointPrediction {
    /// The point, in natural units.
    pub point: BTreeMap<String, f64>,
    /// One prediction per fitted metric, by metric name.
    pub metrics: Vec<MetricPrediction>,
    /// Plain-words warnings (extrapolation, little knowledge).
    pub warnings: Vec<String>,
}

/// Parses `NAME=VALUE` (as given on the command line).
pub fn parse_assignment(arg: &str) -> Result<(String, f64), QueryError> {
    let bad = |reason: &str| QueryError::BadAssignment {
        arg: arg.to_string(),
        reason: reason.to_string(),
    };
    let (name, value) = arg.split_once('=').ok_or_else(|| bad("there is no '='"))?;
    let name = name.trim();
    if name.is_empty() {
        return Err(bad("the name is empty"));
    }
    let value: f64 = value
        .trim()
        .parse()
        .map_err(|_| bad(&format!("{:?} is not a number", value.trim())))?;
    Ok((name.to_string(), value))
}

/// Unit-cube coordinate of a natural value, continued linearly (in the
/// logarithm for log scales) beyond the parameter's range instead of being
/// clamped, so that a point outside the range is predicted where it is.
/// Inside the range this is exactly [`ParamSpec::to_unit`]. `None` for a
/// value that has no place on the scale (zero or negative on a log scale).
pub fn natural_to_unit(p: &ParamSpec, x: f64) -> Option<f64> {
    if !x.is_finite() {
        return None;
    }
    if (p.lo..=p.hi).contains(&x) {
        return Some(p.to_unit(x));
    }
    let (lo, hi, v) = match p.scale {
        Scale::Linear => (p.lo, p.hi, x),
        Scale::Log => {
            if x <= 0.0 {
                return None;
            }
            (p.lo.ln(), p.hi.ln(), x.ln())
        }
    };
    // Continue from the nearer end, at the slope of the whole range (for
    // integer parameters: the slope between the centres of the end cells).
    let (u_lo, u_hi) = (p.to_unit(p.lo), p.to_unit(p.hi));
    let slope = if hi > lo {
        match (p.scale, p.integer) {
            (_, true) if p.hi > p.lo => (u_hi - u_lo) / (hi - lo),
            (_, true) => 1.0,
            (_, false) => 1.0 / (hi - lo),
        }
    } else {
        1.0
    };
    Some(if v < lo {
        u_lo - (lo - v) * slope
    } else {
        u_hi + (v - hi) * slope
    })
}

pub use tessera_models::text::short;
use tessera_models::text::with_unit;

/// Checks one point against the sweep's parameters and maps it to the unit cube.
fn to_unit_point(
    spec: &Spec,
    k: usize,
    point: &BTreeMap<String, f64>,
) -> Result<Vec<f64>, QueryError> {
    let valid = || describe_params(spec);
    if let Some(name) = point
        .keys()
        .find(|n| !spec.params.iter().any(|p| &p.name == *n))
    {
        return Err(QueryError::UnknownParameter {
            point: k + 1,
            name: name.clone(),
            valid: valid(),
        });
    }
    let missing: Vec<&str> = spec
        .params
        .iter()
        .filter(|p| !point.contains_key(&p.name))
        .map(|p| p.name.as_str())
        .collect();
    if !missing.is_empty() {
        return Err(QueryError::MissingParameters {
            point: k + 1,
            missing: missing.join(", "),
            valid: valid(),
        });
    }
    spec.params
        .iter()
        .map(|p| {
            let x = point[&p.name];
            natural_to_unit(p, x).ok_or_else(|| QueryError::BadValue {
                point: k + 1,
                name: p.name.clone(),
                value: x,
                reason: if x.is_finite() {
                    format!(
                        "cannot be used: {} is on a log scale, so values must be above 0",
                        p.name
                    )
                } else {
                    "is not a finite number".to_string()
                },
            })
        })
        .collect()
}

/// Predicts every fitted metric at each point (natural units, keyed by
/// parameter name; every parameter must be given).
///
/// Per point and metric: the predicted mean, its sd, the 95% interval
/// mean +- 1.96 sd, the unit and sd / prior sd. Warnings, in plain words,
/// when a coordinate lies outside the range sampled so far (extrapolation)
/// and when the sd exceeds [`SD_RATIO_WARN`] of the prior sd.
pub fn predict(
    fits: &[MetricFit],
    spec: &Spec,
    points: &[BTreeMap<String, f64>],
) -> Result<Vec<PointPrediction>, QueryError> {
    if fits.is_empty() {
        return Err(QueryError::NoFits {
            reason: "no metric has results at enough points yet".to_string(),
        });
    }
    let unit_points: Vec<Vec<f64>> = points
        .iter()
        .enumerate()
        .map(|(k, p)| to_unit_point(spec, k, p))
        .collect::<Result<_, _>>()?;
    let names: Vec<String> = spec.params.iter().map(|p| p.name.clone()).collect();
    for f in fits {
        if f.params != names || f.gp.dim() != names.len() {
            return Err(QueryError::DamagedFit {
                metric: f.metric.clone(),
                reason: format!(
                    "it was fitted for the parameters {:?}, the sweep has {:?}",
                    f.params, names
                ),
            });
        }
    }
    let per_fit: Vec<Vec<tessera_surrogate::gp::Prediction>> =
        fits.iter().map(|f| f.gp.predict(&unit_points)).collect();
    // sd / prior sd is judged on the fitted scale; what is shown is mapped
    // back to the metric's own scale (inside its bounds).
    let mut out = Vec::with_capacity(points.len());
    for (k, (point, u)) in points.iter().zip(&unit_points).enumerate() {
        let mut metrics = Vec::with_capacity(fits.len());
        let mut warnings: Vec<String> = Vec::new();
        let mut add = |w: String| {
            if !warnings.contains(&w) {
                warnings.push(w);
            }
        };
        for (f, preds) in fits.iter().zip(&per_fit) {
            let pr = preds[k];
            let prior = f.gp.prior_sd();
            let sd_ratio = if prior > 0.0 { pr.sd / prior } else { f64::NAN };
            let nat = f.natural(pr);
            metrics.push(MetricPrediction {
                metric: f.metric.clone(),
                unit: f.unit.clone(),
                mean: nat.mean,
                sd: nat.sd,
                lower95: nat.lower95,
                upper95: nat.upper95,
                sd_ratio,
            });
            for ((p, &ui), b) in spec.params.iter().zip(u).zip(&f.sampled_box) {
                if ui < b[0] - BOX_TOL || ui > b[1] + BOX_TOL {
                    let x = point[&p.name];
                    let sampled = with_unit(
                        format!(
                            "[{}, {}]",
                            short(p.to_natural(b[0])),
                            short(p.to_natural(b[1]))
                        ),
                        &p.unit,
                    );
                    let outside_sweep = if x < p.lo || x > p.hi {
                        format!(
                            " (and outside the sweep's range [{}, {}])",
                            short(p.lo),
                            short(p.hi)
                        )
                    } else {
                        String::new()
                    };
                    add(format!(
                        "{} = {} is outside the range sampled so far {sampled}{outside_sweep}: this is extrapolation; do not trust it",
                        p.name,
                        short(x)
                    ));
                }
            }
            if f.metric == crate::fitter::FAILURE_RATE {
                // A rate: shown inside [0, 1].
                if let Some(m) = metrics.last_mut() {
                    m.mean = m.mean.clamp(0.0, 1.0);
                    m.lower95 = m.lower95.clamp(0.0, 1.0);
                    m.upper95 = m.upper95.clamp(0.0, 1.0);
                    if m.mean > FAILURE_WARN {
                        add(format!(
                            "runs fail here about {:.0}% of the time (predicted from the failed runs of the sweep)",
                            100.0 * m.mean
                        ));
                    }
                }
            }
            if sd_ratio > SD_RATIO_WARN {
                add(format!(
                    "{}: the surrogate knows little here: sd is {:.0}% of the prior sd; add points near here",
                    f.metric,
                    100.0 * sd_ratio
                ));
            }
        }
        out.push(PointPrediction {
            point: point.clone(),
            metrics,
            warnings,
        });
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn param(lo: f64, hi: f64, scale: Scale, integer: bool) -> ParamSpec {
        ParamSpec {
            name: "x".into(),
            lo,
            hi,
            scale,
            integer,
            unit: String::new(),
            description: String::new(),
        }
    }

    // Analytic: a linear map continued beyond the range keeps its slope 1/(hi - lo).
    #[test]
    fn linear_continues_beyond_the_range() {
        let p = param(-5.0, 10.0, Scale::Linear, false);
        assert!((natural_to_unit(&p, 25.0).unwrap_or(f64::NAN) - 2.0).abs() < 1e-12);
        assert!((natural_to_unit(&p, -20.0).unwrap_or(f64::NAN) + 1.0).abs() < 1e-12);
        assert_eq!(natural_to_unit(&p, 2.5), Some(p.to_unit(2.5)));
    }

    // Analytic: on a log scale [1, 100], 1000 lies one half-range beyond the top.
    #[test]
    fn log_continues_in_the_logarithm() {
        let p = param(1.0, 100.0, Scale::Log, false);
        assert!((natural_to_unit(&p, 1000.0).unwrap_or(f64::NAN) - 1.5).abs() < 1e-12);
        assert_eq!(natural_to_unit(&p, 0.0), None);
        assert_eq!(natural_to_unit(&p, -3.0), None);
    }

    #[test]
    fn assignments_parse_and_refuse() {
        assert_eq!(
            parse_assignment("x1=3.5").ok(),
            Some(("x1".to_string(), 3.5))
        );
        assert_eq!(
            parse_assignment(" x2 = -1e-3 ").ok(),
            Some(("x2".to_string(), -1e-3))
        );
        assert!(parse_assignment("x1").is_err());
        assert!(parse_assignment("=3").is_err());
        assert!(parse_assignment("x1=abc").is_err());
    }
}
