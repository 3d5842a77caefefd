//! The answer of `tessera calibrate`: which constants the targets leave
//! plausible (history matching), how plausible (posterior samples on the
//! surrogates), and which constants the targets pin down and which they
//! leave free. The numbers come from [`crate::calibration`]; this module
//! turns them into natural units and plain words.

use super::QueryError;
use crate::calibration::{self, Matcher, PosteriorOptions, CUTOFF};
use crate::fitter::MetricFit;
use crate::spec::{Scale, Spec};
use crate::status::PointResults;
use serde::Serialize;
use std::collections::BTreeMap;
use tessera_models::text::{short, with_unit};
use tessera_surrogate::stats;

/// Share of a parameter's range (on its own scale) outside the posterior's
/// 90% interval, scaled so that a flat posterior gives 0 and a point gives
/// 1, at or above which the parameter is "pinned" (our choice).
pub const PINNED: f64 = 0.5;
/// ... at or above which it is "partly constrained" and counts as
/// identified (our choice).
pub const CONSTRAINED: f64 = 0.2;
/// Correlations at least this strong (in absolute value) are reported (our choice).
pub const STRONG_CORRELATION: f64 = 0.5;
/// R-hat above this says the sampler has not converged (Vehtari et al. 2021, sec. 4.4).
pub const RHAT_WARN: f64 = calibration::RHAT_TARGET;
/// A bulk ESS below this is too small for stable quantiles (Vehtari et al.
/// 2021 recommend at least 100 per chain over 4 chains).
pub const ESS_WARN: f64 = calibration::ESS_TARGET;

/// Options of [`calibrate`].
#[derive(Clone, Debug)]
pub struct CalibrateOptions {
    /// Uniform points for the region's Monte Carlo estimate.
    pub region_samples: usize,
    /// Sampler steps per walker of the first run, burn-in included.
    pub steps: usize,
    /// Most steps per walker when the diagnostics call for more.
    pub max_steps: usize,
    /// Seed of the region estimate and the sampler.
    pub seed: u64,
}

impl Default for CalibrateOptions {
    fn default() -> Self {
        CalibrateOptions {
            region_samples: 20_000,
            steps: 2500,
            max_steps: 20_000,
            seed: 1,
        }
    }
}

/// A target as used.
#[derive(Clone, Debug, Serialize)]
pub struct TargetUse {
    /// Metric.
    pub metric: String,
    /// Unit of the metric.
    pub unit: String,
    /// Measured value.
    pub value: f64,
    /// Measurement sd.
    pub sd: f64,
    /// Model discrepancy sd.
    pub discrepancy_sd: f64,
    /// Weight.
    pub weight: f64,
}

/// The region not ruled out.
#[derive(Clone, Debug, Serialize)]
pub struct RegionAnswer {
    /// Its share of the box (the unit cube: log-scaled parameters count in the logarithm).
    pub fraction: f64,
    /// Monte Carlo standard error of `fraction`.
    pub fraction_se: f64,
    /// Uniform points the estimate used.
    pub samples: usize,
    /// The cutoff on the combined implausibility.
    pub cutoff: f64,
    /// Per parameter, the range of the points not ruled out (natural units);
    /// empty when nothing is left.
    #[serde(rename = "box")]
    pub bounds: BTreeMap<String, [f64; 2]>,
    /// A few points not ruled out, spread over the region (natural units).
    pub representatives: Vec<BTreeMap<String, f64>>,
    /// The least implausible point drawn and its combined implausibility.
    pub least_implausible: (BTreeMap<String, f64>, f64),
}

/// Posterior summary of one parameter (natural units).
#[derive(Clone, Debug, Serialize)]
pub struct Marginal {
    /// Posterior mean.
    pub mean: f64,
    /// Posterior sd.
    pub sd: f64,
    /// 5% quantile.
    pub q05: f64,
    /// Median.
    pub q50: f64,
    /// 95% quantile.
    pub q95: f64,
}

/// A pair of parameters and their posterior correlation.
#[derive(Clone, Debug, Serialize)]
pub struct Correlation {
    /// First parameter (sweep-file order).
    pub a: String,
    /// Second parameter.
    pub b: String,
    /// Pearson correlation of the samples on the parameters' own scales.
    pub r: f64,
}

/// What the targets say about one parameter.
#[derive(Clone, Debug, Serialize)]
pub struct Finding {
    /// Parameter.
    pub param: String,
    /// Share of its range the data rule out: 1 - (width of the 90%
    /// interval) / (0.9 x range), on the parameter's own scale, in [0, 1].
    pub ruled_out: f64,
    /// `"pinned"`, `"partly constrained"` or `"not constrained"`.
    pub verdict: String,
    /// The sentence shown.
    pub words: String,
}

/// Sampler diagnostics.
#[derive(Clone, Debug, Serialize)]
pub struct Diagnostics {
    /// Smallest bulk effective sample size over the parameters.
    pub ess: f64,
    /// Largest rank-normalised split R-hat over the parameters.
    pub rhat: f64,
    /// Per parameter.
    pub ess_by_param: BTreeMap<String, f64>,
    /// Per parameter.
    pub rhat_by_param: BTreeMap<String, f64>,
    /// Share of proposals accepted.
    pub acceptance: f64,
    /// Walkers in the ensemble.
    pub walkers: usize,
    /// Steps kept per walker.
    pub steps: usize,
    /// Plain warnings when the diagnostics are poor.
    pub warnings: Vec<String>,
}

/// An observed point and how well it matches the targets.
#[derive(Clone, Debug, Serialize)]
pub struct Match {
    /// Point index in the sweep.
    pub point: u64,
    /// The point (natural units).
    pub values: BTreeMap<String, f64>,
    /// Weighted sum of squared standardised differences of the point's mean
    /// metrics from the targets (measurement and discrepancy variances).
    pub score: f64,
    /// The point's mean of each target metric.
    pub means: BTreeMap<String, f64>,
}

/// Everything `tessera calibrate` reports.
#[derive(Clone, Debug, Serialize)]
pub struct Calibration {
    /// The targets.
    pub targets: Vec<TargetUse>,
    /// History matching.
    pub region: RegionAnswer,
    /// Posterior summary per parameter.
    pub posterior: BTreeMap<String, Marginal>,
    /// Pairwise correlations, strongest first.
    pub correlations: Vec<Correlation>,
    /// Whether each parameter is at least partly constrained.
    pub identified: BTreeMap<String, bool>,
    /// Per parameter, in sweep-file order.
    pub findings: Vec<Finding>,
    /// Sentences about strongly correlated pairs.
    pub trade_offs: Vec<String>,
    /// Sampler diagnostics.
    pub diagnostics: Diagnostics,
    /// Observed points closest to the targets, best first.
    pub best_points: Vec<Match>,
    /// Cautions in plain words.
    pub cautions: Vec<String>,
    /// Posterior samples (natural units, sweep-file parameter order).
    #[serde(skip)]
    pub samples: Vec<Vec<f64>>,
    /// Uniform points of the region estimate with their combined
    /// implausibility (natural units), at most a few thousand, for plots.
    #[serde(skip)]
    pub implausibility_sample: Vec<(Vec<f64>, f64)>,
}

/// Points of the implausibility sample kept for plots.
const PLOT_POINTS: usize = 3000;

fn natural_map(spec: &Spec, u: &[f64]) -> BTreeMap<String, f64> {
    spec.params
        .iter()
        .zip(spec.to_natural(u))
        .map(|(p, v)| (p.name.clone(), v))
        .collect()
}

/// A parameter's value on its own scale (the logarithm for log scales).
fn own_scale(p: &crate::spec::ParamSpec, v: f64) -> f64 {
    match p.scale {
        Scale::Log => v.ln(),
        Scale::Linear => v,
    }
}

/// Calibrates the sweep's targets on the current fits. `results` are the
/// stored points' results (for the best-matching observed points).
pub fn calibrate(
    fits: &[MetricFit],
    spec: &Spec,
    results: &[PointResults],
    opts: &CalibrateOptions,
) -> Result<Calibration, QueryError> {
    if spec.targets.is_empty() {
        return Err(QueryError::NoTargets);
    }
    let matcher = Matcher::new(spec, fits).map_err(|missing| QueryError::NoFits {
        reason: format!(
            "no surrogate yet for the target metric(s) {}: they need results at {} points or more",
            missing.join(", "),
            crate::fitter::MIN_POINTS
        ),
    })?;
    let names: Vec<String> = spec.params.iter().map(|p| p.name.clone()).collect();
    let region = calibration::region(&matcher, opts.region_samples, opts.seed);
    let bounds: BTreeMap<String, [f64; 2]> = match &region.bounds {
        Some(b) => spec
            .params
            .iter()
            .zip(b)
            .map(|(p, [lo, hi])| (p.name.clone(), [p.to_natural(*lo), p.to_natural(*hi)]))
            .collect(),
        None => BTreeMap::new(),
    };
    let reps = tessera_surrogate::design::spread(&region.kept, &[], 5);
    let post = calibration::posterior(
        &matcher,
        &region,
        &PosteriorOptions {
            steps: opts.steps,
            max_steps: opts.max_steps.max(opts.steps),
            seed: opts.seed,
        },
    );
    let samples: Vec<Vec<f64>> = post.samples.iter().map(|u| spec.to_natural(u)).collect();
    let mut posterior = BTreeMap::new();
    let mut findings = Vec::new();
    let mut identified = BTreeMap::new();
    for (k, p) in spec.params.iter().enumerate() {
        let col: Vec<f64> = samples.iter().map(|s| s[k]).collect();
        let (mean, sd) = stats::mean_sd(&col);
        let m = Marginal {
            mean,
            sd,
            q05: stats::quantile(&col, 0.05),
            q50: stats::quantile(&col, 0.5),
            q95: stats::quantile(&col, 0.95),
        };
        let ucol: Vec<f64> = post.samples.iter().map(|u| u[k]).collect();
        let width = stats::quantile(&ucol, 0.95) - stats::quantile(&ucol, 0.05);
        let ruled_out = (1.0 - width / 0.9).clamp(0.0, 1.0);
        let interval = with_unit(format!("{}-{}", short(m.q05), short(m.q95)), &p.unit);
        let range = with_unit(format!("{}-{}", short(p.lo), short(p.hi)), &p.unit);
        let scale_note = if p.scale == Scale::Log {
            " (log scale)"
        } else {
            ""
        };
        let (verdict, words) = if ruled_out >= PINNED {
            (
                "pinned",
                format!(
                    "{}: pinned to {interval} ({:.0}% of its range{scale_note} ruled out)",
                    p.name,
                    100.0 * ruled_out
                ),
            )
        } else if ruled_out >= CONSTRAINED {
            (
                "partly constrained",
                format!(
                    "{}: partly constrained, 90% within {interval} ({:.0}% of its range{scale_note} ruled out)",
                    p.name,
                    100.0 * ruled_out
                ),
            )
        } else {
            (
                "not constrained",
                format!(
                    "{}: not constrained by these targets (90% within {interval}, about as wide as its range {range}); other measurements are needed to fix it",
                    p.name
                ),
            )
        };
        identified.insert(p.name.clone(), ruled_out >= CONSTRAINED);
        findings.push(Finding {
            param: p.name.clone(),
            ruled_out,
            verdict: verdict.to_string(),
            words,
        });
        posterior.insert(p.name.clone(), m);
    }
    let mut correlations = Vec::new();
    for i in 0..names.len() {
        for j in i + 1..names.len() {
            let a: Vec<f64> = samples
                .iter()
                .map(|s| own_scale(&spec.params[i], s[i]))
                .collect();
            let b: Vec<f64> = samples
                .iter()
                .map(|s| own_scale(&spec.params[j], s[j]))
                .collect();
            let r = stats::correlation(&a, &b);
            if r.is_finite() {
                correlations.push(Correlation {
                    a: names[i].clone(),
                    b: names[j].clone(),
                    r,
                });
            }
        }
    }
    correlations.sort_by(|x, y| y.r.abs().total_cmp(&x.r.abs()));
    let trade_offs: Vec<String> = correlations
        .iter()
        .filter(|c| c.r.abs() >= STRONG_CORRELATION)
        .map(|c| {
            if c.r < 0.0 {
                format!(
                    "{} and {} trade off (correlation {:.2}): the data fix a combination of them, not each; raising one can be made up by lowering the other",
                    c.a, c.b, c.r
                )
            } else {
                format!(
                    "{} and {} move together (correlation {:.2}): the data fix a combination of them, not each",
                    c.a, c.b, c.r
                )
            }
        })
        .collect();
    let ess_by_param: BTreeMap<String, f64> = names
        .iter()
        .cloned()
        .zip(post.ess.iter().copied())
        .collect();
    let rhat_by_param: BTreeMap<String, f64> = names
        .iter()
        .cloned()
        .zip(post.rhat.iter().copied())
        .collect();
    let ess = post.ess.iter().copied().fold(f64::INFINITY, f64::min);
    let rhat = post.rhat.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let mut warnings = Vec::new();
    if rhat.is_nan() || rhat > RHAT_WARN {
        warnings.push(format!(
            "the sampler has not converged (R-hat {rhat:.3}, above {RHAT_WARN}): the posterior summaries may be wrong; rerun with a larger --steps"
        ));
    }
    if ess.is_nan() || ess < ESS_WARN {
        warnings.push(format!(
            "few effective samples ({ess:.0}, fewer than {ESS_WARN:.0}): quantiles are rough; rerun with a larger --steps"
        ));
    }
    let mut cautions = Vec::new();
    if region.inside == 0 {
        cautions.push(format!(
            "no constants in the box match every target within {CUTOFF} standard deviations: the targets may be wrong, the model may not be able to produce them, or discrepancy_sd may be too small; the posterior below is then the least bad fit, not a match"
        ));
    }
    for f in fits
        .iter()
        .filter(|f| spec.targets.iter().any(|t| t.metric == f.metric))
    {
        if f.loo.q2 < super::MIN_Q2 {
            cautions.push(format!(
                "the surrogate of {} is not yet trustworthy (leave-one-out Q2 {:.2}): run more points before trusting the region",
                f.metric, f.loo.q2
            ));
        }
    }
    cautions.push(
        "these are statements about the model's surrogate inside the swept box: constants outside the box were never considered, and matching the targets does not show the model is right".to_string(),
    );
    // Observed points closest to the targets.
    let mut best: Vec<Match> = results
        .iter()
        .filter(|p| !p.replicates.is_empty() && p.values.len() == spec.dimension())
        .filter_map(|p| {
            let mut score = 0.0;
            let mut means = BTreeMap::new();
            for t in &spec.targets {
                let v: Vec<f64> = p
                    .replicates
                    .iter()
                    .filter_map(|m| m.get(&t.metric).copied())
                    .filter(|v| v.is_finite())
                    .collect();
                if v.is_empty() {
                    return None;
                }
                let mean = v.iter().sum::<f64>() / v.len() as f64;
                score += t.weight * (mean - t.value).powi(2) / t.variance();
                means.insert(t.metric.clone(), mean);
            }
            Some(Match {
                point: p.idx,
                values: names
                    .iter()
                    .cloned()
                    .zip(p.values.iter().copied())
                    .collect(),
                score,
                means,
            })
        })
        .collect();
    best.sort_by(|a, b| a.score.total_cmp(&b.score));
    best.truncate(5);
    let step = (opts.region_samples / PLOT_POINTS).max(1);
    let xs = calibration::uniform_points(opts.region_samples, spec.dimension(), opts.seed);
    let thinned: Vec<Vec<f64>> = xs.into_iter().step_by(step).collect();
    let imp = matcher.combined(&thinned);
    let implausibility_sample = thinned
        .iter()
        .zip(imp)
        .map(|(u, i)| (spec.to_natural(u), i))
        .collect();
    Ok(Calibration {
        targets: spec
            .targets
            .iter()
            .map(|t| TargetUse {
                metric: t.metric.clone(),
                unit: spec.metric_unit(&t.metric).to_string(),
                value: t.value,
                sd: t.sd,
                discrepancy_sd: t.discrepancy_sd,
                weight: t.weight,
            })
            .collect(),
        region: RegionAnswer {
            fraction: region.fraction,
            fraction_se: region.fraction_se,
            samples: region.samples,
            cutoff: CUTOFF,
            bounds,
            representatives: reps.iter().map(|u| natural_map(spec, u)).collect(),
            least_implausible: (natural_map(spec, &region.lowest.0), region.lowest.1),
        },
        posterior,
        correlations,
        identified,
        findings,
        trade_offs,
        diagnostics: Diagnostics {
            ess,
            rhat,
            ess_by_param,
            rhat_by_param,
            acceptance: post.acceptance,
            walkers: post.walkers,
            steps: post.steps,
            warnings,
        },
        best_points: best,
        cautions,
        samples,
        implausibility_sample,
    })
}
