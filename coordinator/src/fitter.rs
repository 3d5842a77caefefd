//! Fitting the stored surrogates: one Gaussian process per metric the runs
//! report, and one for the calibration discrepancy when the sweep has
//! targets but no objective metric.
//!
//! Each fit is made on per-point means over the finished replicates, with
//! the variance of each mean (sample variance / replicates) as known noise:
//! stochastic kriging (Ankenman, Nelson & Staum 2010). Inputs are mapped to
//! the unit cube by [`Spec::to_unit`]. A fit is stored in the `fits` table
//! with the number of results it used; [`refit_if_stale`] refits only the
//! metrics that have new results since their stored fit, so queries on an
//! unchanged database are fast and give the same answer every time.
//!
//! With an objective (`minimize = "m"` or `maximize = "m"`) the objective is
//! the metric `m` itself, up to its sign, so the fit of `m` serves both.
//!
//! Fitting is CPU work that may take seconds for large sweeps. A running
//! coordinator should read ([`stale_jobs`]) and write ([`save_fits`]) on
//! its store thread and run [`run_jobs`] elsewhere (e.g.
//! `tokio::task::spawn_blocking`), so that results keep being committed
//! while the surrogates are fitted.

use crate::spec::Spec;
use crate::status::PointResults;
use crate::store::{EvalStatus, EvaluationRecord, FitRecord, NewFit, PointRecord, Store};
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, BTreeSet};
use tessera_surrogate::gp::{self, FitOptions, Gp, KernelKind, Observations, Prediction};
use tessera_surrogate::transform::{Natural, Transform};

/// Why fits could not be made, read or stored.
#[derive(Debug, thiserror::Error)]
pub enum FitError {
    /// The database could not be read or written.
    #[error(transparent)]
    Store(#[from] crate::store::StoreError),
    /// A stored fit cannot be read back.
    #[error("the stored surrogate of {metric} cannot be read: {reason}")]
    DamagedFit {
        /// The metric.
        metric: String,
        /// What is wrong.
        reason: String,
    },
    /// A fit cannot be written out (a bug).
    #[error("internal error: {0}")]
    Internal(String),
}

/// Fewest points with results before a metric gets a surrogate
/// (the planner uses the same minimum).
pub const MIN_POINTS: usize = 3;

/// Version of the layout of `model` and `diagnostics` written by [`MetricFit::to_new_fit`].
const LAYOUT: u32 = 1;

/// A fitted surrogate for one metric, with what is needed to judge it.
#[derive(Clone, Debug)]
pub struct MetricFit {
    /// The metric name, or `"calibration discrepancy"` for the objective of
    /// a calibration sweep without an objective metric.
    pub metric: String,
    /// Unit of the metric (`""` if it has none).
    pub unit: String,
    /// Evaluations (finished replicates) the fit used.
    pub n_results: u32,
    /// Points the fit used (each the mean of its replicates).
    pub n_points: u32,
    /// Parameter names the fit's inputs stand for, in order.
    pub params: Vec<String>,
    /// The fitted Gaussian process (inputs in the unit cube).
    pub gp: Gp,
    /// Leave-one-out diagnostics.
    pub loo: LooSummary,
    /// Smallest and largest sampled unit-cube coordinate of each parameter.
    pub sampled_box: Vec<[f64; 2]>,
    /// The scale the GP was fitted on (its inputs are per-point means of
    /// transformed replicate values).
    pub transform: Transform,
    /// Bounds of the metric (`None`: open); predictions are kept inside.
    pub bounds: [Option<f64>; 2],
    /// Whether the log scale was chosen from the data, not declared (see
    /// `Spec::log_scale_from_data`).
    pub log_from_data: bool,
}

impl MetricFit {
    /// Predictions on the metric's own scale: mean, sd and 95% interval of
    /// the surrogate's mean outcome, mapped back through the transform and
    /// kept inside the bounds.
    pub fn predict(&self, xs: &[Vec<f64>]) -> Vec<Natural> {
        self.gp
            .predict(xs)
            .into_iter()
            .map(|p| self.natural(p))
            .collect()
    }

    /// Predicted means only, on the metric's own scale (the back-transformed
    /// fitted-scale mean, i.e. the median, when there is a transform: cheap,
    /// for Monte Carlo averages where the surrogate's variance is handled
    /// separately).
    pub fn predict_median(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        self.gp
            .predict_mean(xs)
            .into_iter()
            .map(|m| self.clamp(self.transform.inverse(m)))
            .collect()
    }

    /// Maps a fitted-scale prediction to the metric's own scale.
    pub fn natural(&self, p: Prediction) -> Natural {
        let n = self.transform.natural(p.mean, p.sd);
        Natural {
            mean: self.clamp(n.mean),
            sd: n.sd,
            lower95: self.clamp(n.lower95),
            upper95: self.clamp(n.upper95),
            median: self.clamp(n.median),
        }
    }

    /// Clamps a value into the metric's bounds.
    pub fn clamp(&self, v: f64) -> f64 {
        let v = match self.bounds[0] {
            Some(lo) if v < lo => lo,
            _ => v,
        };
        match self.bounds[1] {
            Some(hi) if v > hi => hi,
            _ => v,
        }
    }

    /// The observed per-point means on the metric's own scale (the inverse
    /// transform of the fitted values).
    pub fn observed_natural(&self) -> Vec<f64> {
        self.gp
            .observed_y()
            .into_iter()
            .map(|y| self.transform.inverse(y))
            .collect()
    }
}

/// Leave-one-out diagnostics of a fit (closed form, GPML sec. 5.4.2;
/// Bastos & O'Hagan 2009), in the metric's units.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LooSummary {
    /// Root mean squared error of each point predicted from the others.
    pub rmse: f64,
    /// 1 - (sum of squared LOO errors) / (sum of squares about the mean).
    pub q2: f64,
    /// Fraction of points inside their own 95% LOO interval.
    pub coverage95: f64,
    /// Mean of the standardised LOO residuals (about 0 for a good fit).
    pub standardized_mean: f64,
    /// Standard deviation of the standardised LOO residuals (about 1 for a good fit).
    pub standardized_sd: f64,
    /// The standardised LOO residual of each point, in the order of the fit's points.
    pub standardized: Vec<f64>,
    /// Point index (within the sweep) of each of the fit's points.
    pub point_idx: Vec<u64>,
}

impl LooSummary {
    /// Summarises the GP's closed-form leave-one-out predictions. The
    /// standardised residuals, Q2 and coverage are those of the fitted
    /// scale; the RMSE is in the metric's own units (the leave-one-out
    /// medians mapped back through `transform`).
    pub fn of(gp: &Gp, point_idx: Vec<u64>, transform: &Transform) -> LooSummary {
        let mut loo = gp.loo();
        if !transform.is_identity() {
            let y = gp.observed_y();
            let n = y.len().max(1) as f64;
            let sq: f64 = y
                .iter()
                .zip(&loo.mean)
                .map(|(yi, mi)| (transform.inverse(*yi) - transform.inverse(*mi)).powi(2))
                .sum();
            loo.rmse = (sq / n).sqrt();
        }
        let z: Vec<f64> = loo.standardized.clone();
        let n = z.len() as f64;
        let mean = if z.is_empty() {
            f64::NAN
        } else {
            z.iter().sum::<f64>() / n
        };
        let sd = if z.len() < 2 {
            f64::NAN
        } else {
            (z.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0)).sqrt()
        };
        LooSummary {
            rmse: loo.rmse,
            q2: loo.q2,
            coverage95: loo.coverage95,
            standardized_mean: mean,
            standardized_sd: sd,
            standardized: z,
            point_idx,
        }
    }
}

/// What is stored in the `diagnostics` column of a fit.
#[derive(Serialize, Deserialize)]
struct Diagnostics {
    layout: u32,
    unit: String,
    n_points: u32,
    params: Vec<String>,
    sampled_box: Vec<[f64; 2]>,
    loo: LooSummary,
    log_marginal_likelihood: f64,
    #[serde(default)]
    transform: Transform,
    #[serde(default)]
    bounds: [Option<f64>; 2],
    #[serde(default)]
    log_from_data: bool,
}

fn kernel_name(k: KernelKind) -> &'static str {
    match k {
        KernelKind::Matern52 => "matern52",
        KernelKind::SquaredExponential => "squared_exponential",
    }
}

impl MetricFit {
    /// The row to store with [`Store::save_fit`].
    pub fn to_new_fit(&self) -> Result<NewFit, FitError> {
        let model = serde_json::to_value(&self.gp).map_err(|e| {
            FitError::Internal(format!("cannot serialise the fit of {}: {e}", self.metric))
        })?;
        let diagnostics = serde_json::to_value(Diagnostics {
            layout: LAYOUT,
            unit: self.unit.clone(),
            n_points: self.n_points,
            params: self.params.clone(),
            sampled_box: self.sampled_box.clone(),
            loo: self.loo.clone(),
            log_marginal_likelihood: self.gp.log_marginal_likelihood(),
            transform: self.transform,
            bounds: self.bounds,
            log_from_data: self.log_from_data,
        })
        .map_err(|e| {
            FitError::Internal(format!(
                "cannot serialise the diagnostics of {}: {e}",
                self.metric
            ))
        })?;
        Ok(NewFit {
            metric: self.metric.clone(),
            n_results: self.n_results,
            kernel: kernel_name(self.gp.kernel()).to_string(),
            model,
            diagnostics,
        })
    }

    /// Reads a stored fit back (refactorising the GP).
    pub fn from_record(r: &FitRecord) -> Result<MetricFit, FitError> {
        let damaged = |what: &str, e: &dyn std::fmt::Display| FitError::DamagedFit {
            metric: r.metric.clone(),
            reason: format!("{what}: {e}"),
        };
        let d: Diagnostics = serde_json::from_value(r.diagnostics.clone())
            .map_err(|e| damaged("diagnostics", &e))?;
        if d.layout != LAYOUT {
            return Err(damaged(
                "diagnostics",
                &format!("layout {} is not {LAYOUT}", d.layout),
            ));
        }
        let gp: Gp = serde_json::from_value(r.model.clone()).map_err(|e| damaged("model", &e))?;
        if gp.dim() != d.params.len() || d.sampled_box.len() != d.params.len() {
            return Err(damaged(
                "model",
                &format!("{} inputs for {} parameters", gp.dim(), d.params.len()),
            ));
        }
        Ok(MetricFit {
            metric: r.metric.clone(),
            unit: d.unit,
            n_results: r.n_results,
            n_points: d.n_points,
            params: d.params,
            gp,
            loo: d.loo,
            sampled_box: d.sampled_box,
            transform: d.transform,
            bounds: d.bounds,
            log_from_data: d.log_from_data,
        })
    }
}

/// The data of one surrogate still to be fitted: pure input for [`run_jobs`].
#[derive(Clone, Debug)]
pub struct FitJob {
    /// Metric name (see [`MetricFit::metric`]).
    pub metric: String,
    /// Unit of the metric.
    pub unit: String,
    /// Evaluations used.
    pub n_results: u32,
    /// Parameter names.
    pub params: Vec<String>,
    /// Per-point means, unit-cube inputs, variances of the means.
    pub obs: Observations,
    /// Sweep index of each observation's point.
    pub point_idx: Vec<u64>,
    /// Seed of the hyperparameter search.
    pub seed: u64,
    /// The scale the observations are on.
    pub transform: Transform,
    /// Bounds of the metric.
    pub bounds: [Option<f64>; 2],
    /// Whether the log scale was chosen from the data.
    pub log_from_data: bool,
}

/// Per-point sample of one quantity: (point index, unit-cube input, replicate values).
type Samples = Vec<(u64, Vec<f64>, Vec<f64>)>;

/// The name of the surrogate of the failure rate: the share of a point's
/// runs that failed for good (fitted once any run has failed).
pub const FAILURE_RATE: &str = "failure rate";

/// Per-point results from the stored points and evaluations, in point order.
pub fn point_results(points: &[PointRecord], evals: &[EvaluationRecord]) -> Vec<PointResults> {
    let mut by_id: BTreeMap<i64, PointResults> = points
        .iter()
        .map(|p| {
            (
                p.id,
                PointResults {
                    point_id: p.id,
                    idx: p.idx,
                    values: p.values.clone(),
                    replicates: Vec::new(),
                    failed: 0,
                },
            )
        })
        .collect();
    for e in evals {
        let Some(p) = by_id.get_mut(&e.point_id) else {
            continue;
        };
        match e.status {
            EvalStatus::Done => p.replicates.push(e.metrics.clone()),
            EvalStatus::Failed => p.failed += 1,
            EvalStatus::Queued => {}
        }
    }
    let mut out: Vec<PointResults> = by_id.into_values().collect();
    out.sort_by_key(|p| p.idx);
    out
}

/// Every quantity to fit: each metric seen in a finished evaluation, the
/// calibration discrepancy when there is no objective metric, and the
/// failure rate once a run has failed.
fn samples(spec: &Spec, results: &[PointResults]) -> BTreeMap<String, Samples> {
    let mut names: BTreeSet<String> = BTreeSet::new();
    for p in results {
        for m in &p.replicates {
            names.extend(m.keys().cloned());
        }
    }
    let discrepancy = spec.objective.is_none() && !spec.targets.is_empty();
    let any_failed = results.iter().any(|p| p.failed > 0);
    let mut out: BTreeMap<String, Samples> = BTreeMap::new();
    for p in results {
        if p.values.len() != spec.dimension() {
            continue;
        }
        let u = spec.to_unit(&p.values);
        for name in &names {
            let v: Vec<f64> = p
                .replicates
                .iter()
                .filter_map(|m| m.get(name).copied())
                .filter(|v| v.is_finite())
                .collect();
            if !v.is_empty() {
                out.entry(name.clone())
                    .or_default()
                    .push((p.idx, u.clone(), v));
            }
        }
        if discrepancy {
            let v: Vec<f64> = p
                .replicates
                .iter()
                .filter_map(|m| spec.loss(m))
                .filter(|v| v.is_finite())
                .collect();
            if !v.is_empty() {
                out.entry(spec.objective_label())
                    .or_default()
                    .push((p.idx, u.clone(), v));
            }
        }
        let finals = p.replicates.len() as u32 + p.failed;
        if any_failed && finals > 0 {
            out.entry(FAILURE_RATE.to_string()).or_default().push((
                p.idx,
                u.clone(),
                vec![f64::from(p.failed) / f64::from(finals)],
            ));
        }
    }
    out
}

/// Sample mean and sample variance (n - 1 denominator; 0 for one value).
fn mean_var(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    if v.len() < 2 {
        return (mean, 0.0);
    }
    (
        mean,
        v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0),
    )
}

/// Stochastic-kriging observations from per-point replicate values: the
/// mean of each point and the variance of that mean (sample variance / r).
///
/// A point with a single finished replicate in a sweep where other points
/// have several gets the pooled within-point variance (the average of the
/// other points' sample variances) divided by 1, instead of 0; a sweep with
/// one replicate per point leaves all noise to the fitted nugget.
/// (Pooling is common practice, no source.)
fn observations(s: &Samples) -> (Observations, Vec<u64>, u32) {
    let stats: Vec<(f64, f64, usize)> = s
        .iter()
        .map(|(_, _, v)| {
            let (m, var) = mean_var(v);
            (m, var, v.len())
        })
        .collect();
    let multi: Vec<f64> = stats.iter().filter(|t| t.2 >= 2).map(|t| t.1).collect();
    let pooled = if multi.is_empty() {
        0.0
    } else {
        multi.iter().sum::<f64>() / multi.len() as f64
    };
    let mut obs = Observations::default();
    let mut idx = Vec::with_capacity(s.len());
    let mut n_results = 0u32;
    for ((i, u, v), (mean, var, r)) in s.iter().zip(stats) {
        obs.x.push(u.clone());
        obs.y.push(mean);
        obs.noise_var
            .push(if r >= 2 { var / r as f64 } else { pooled });
        idx.push(*i);
        n_results += v.len() as u32;
    }
    (obs, idx, n_results)
}

/// The seed of a fit: fixed by the sweep seed, the metric and the data size,
/// so the same database always gives the same surrogate.
fn fit_seed(seed: u64, metric: &str, n_results: u32) -> u64 {
    // FNV-1a over the metric name, mixed with the seed and the count.
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in metric.bytes() {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0100_0000_01b3);
    }
    seed ^ h ^ u64::from(n_results).wrapping_mul(0x9E37_79B9_7F4A_7C15)
}

/// The fits that the data call for (every metric with at least
/// [`MIN_POINTS`] points), whether stale or not.
pub fn jobs(
    spec: &Spec,
    points: &[PointRecord],
    evals: &[EvaluationRecord],
    seed: u64,
) -> Vec<FitJob> {
    jobs_from_results(spec, &point_results(points, evals), seed)
}

/// [`jobs`] from per-point results (as the scheduler keeps them).
pub fn jobs_from_results(spec: &Spec, results: &[PointResults], seed: u64) -> Vec<FitJob> {
    let params: Vec<String> = spec.params.iter().map(|p| p.name.clone()).collect();
    samples(spec, results)
        .into_iter()
        .filter_map(|(metric, mut s)| {
            if s.len() < MIN_POINTS {
                tracing::info!(metric = %metric, points = s.len(), "too few points with results for a surrogate (need {MIN_POINTS})");
                return None;
            }
            let (transform, bounds, log_from_data) = if metric == FAILURE_RATE {
                (Transform::Identity, [Some(0.0), Some(1.0)], false)
            } else {
                let all: Vec<f64> = s.iter().flat_map(|(_, _, v)| v.iter().copied()).collect();
                (
                    spec.transform_for(&metric, &all),
                    spec.bounds_of(&metric),
                    spec.log_scale_from_data(&metric, &all),
                )
            };
            if !transform.is_identity() {
                for (_, _, v) in &mut s {
                    for y in v.iter_mut() {
                        *y = transform.forward(*y);
                    }
                }
            }
            let (obs, point_idx, n_results) = observations(&s);
            Some(FitJob {
                transform,
                bounds,
                log_from_data,
                unit: spec.metric_unit(&metric).to_string(),
                seed: fit_seed(seed, &metric, n_results),
                metric,
                n_results,
                params: params.clone(),
                obs,
                point_idx,
            })
        })
        .collect()
}

/// Fits one job with the default options (its own seed, 1 + 5 starts). A
/// failed fit is logged and gives `None`.
pub fn run_job(job: &FitJob) -> Option<MetricFit> {
    run_job_with(
        job,
        &FitOptions {
            seed: job.seed,
            ..FitOptions::default()
        },
    )
}

/// Fits one job with `opts` (for example warm-started from a previous fit).
pub fn run_job_with(job: &FitJob, opts: &FitOptions) -> Option<MetricFit> {
    let gp = match gp::fit(&job.obs, opts) {
        Ok(g) => g,
        Err(e) => {
            tracing::warn!(metric = %job.metric, error = %e, "surrogate fit failed");
            return None;
        }
    };
    let d = job.params.len();
    let mut sampled_box = vec![[f64::INFINITY, f64::NEG_INFINITY]; d];
    for x in &job.obs.x {
        for (b, &v) in sampled_box.iter_mut().zip(x) {
            b[0] = b[0].min(v);
            b[1] = b[1].max(v);
        }
    }
    let loo = LooSummary::of(&gp, job.point_idx.clone(), &job.transform);
    Some(MetricFit {
        transform: job.transform,
        bounds: job.bounds,
        log_from_data: job.log_from_data,
        metric: job.metric.clone(),
        unit: job.unit.clone(),
        n_results: job.n_results,
        n_points: job.obs.y.len() as u32,
        params: job.params.clone(),
        gp,
        loo,
        sampled_box,
    })
}

/// Fits every job (pure CPU work; no store access).
pub fn run_jobs(jobs: &[FitJob]) -> Vec<MetricFit> {
    jobs.iter().filter_map(run_job).collect()
}

/// One GP per metric the runs report (and for the calibration discrepancy
/// when there is no objective metric), without looking at stored fits.
pub fn fit_metrics(
    spec: &Spec,
    points: &[PointRecord],
    evals: &[EvaluationRecord],
    seed: u64,
) -> Vec<MetricFit> {
    run_jobs(&jobs(spec, points, evals, seed))
}

/// The latest stored fit of each metric that can still be read for this
/// sweep's parameters. Fits that cannot be read are logged and left out.
pub fn stored_fits(store: &Store, sweep_id: i64, spec: &Spec) -> Result<Vec<MetricFit>, FitError> {
    let names: Vec<String> = spec.params.iter().map(|p| p.name.clone()).collect();
    let mut out = Vec::new();
    for r in store.latest_fits(sweep_id)? {
        match MetricFit::from_record(&r) {
            Ok(f) if f.params == names => out.push(f),
            Ok(f) => {
                tracing::warn!(metric = %f.metric, "stored fit is for other parameters; it will be refitted")
            }
            Err(e) => tracing::warn!(error = %e, "stored fit cannot be read; it will be refitted"),
        }
    }
    Ok(out)
}

/// What [`stale_jobs`] found: fits to make, and stored fits.
#[derive(Clone, Debug, Default)]
pub struct StalePlan {
    /// Metrics with new results (or no stored fit): to fit with [`run_jobs`].
    pub todo: Vec<FitJob>,
    /// Stored fits that saw every result: still current.
    pub current: Vec<MetricFit>,
    /// Stored fits of the metrics in `todo`: used if their refit fails.
    pub outdated: Vec<MetricFit>,
}

/// The fits that are missing or have fewer results than the data now hold,
/// and the stored fits that are still current. Reads the store only.
pub fn stale_jobs(store: &Store, sweep_id: i64, spec: &Spec) -> Result<StalePlan, FitError> {
    let stored = stored_fits(store, sweep_id, spec)?;
    let points = store.points(sweep_id)?;
    let evals = store.evaluations(sweep_id)?;
    let mut plan = StalePlan::default();
    for job in jobs(spec, &points, &evals, spec.seed) {
        match stored.iter().find(|f| f.metric == job.metric) {
            Some(f) if f.n_results == job.n_results && same_scale(&f.transform, &job.transform) => {
                plan.current.push(f.clone())
            }
            Some(f) => {
                plan.outdated.push(f.clone());
                plan.todo.push(job);
            }
            None => plan.todo.push(job),
        }
    }
    Ok(plan)
}

/// Whether two transforms are of the same kind with the same bounds (the
/// shift of a one-sided log follows the data and may differ).
fn same_scale(a: &Transform, b: &Transform) -> bool {
    match (a, b) {
        (Transform::Identity, Transform::Identity) => true,
        (Transform::LogAbove { lo: x, .. }, Transform::LogAbove { lo: y, .. }) => x == y,
        (Transform::LogBelow { hi: x, .. }, Transform::LogBelow { hi: y, .. }) => x == y,
        (Transform::Logit { lo: a, hi: b }, Transform::Logit { lo: c, hi: d }) => a == c && b == d,
        _ => false,
    }
}

/// The fit exactly as it will be read back from the store: through the same
/// JSON text, so that a query answered right after a fit and one answered
/// later from the file agree bit for bit.
pub fn as_stored(f: &MetricFit) -> Result<MetricFit, FitError> {
    let row = f.to_new_fit()?;
    let text = |v: &serde_json::Value| -> Result<serde_json::Value, FitError> {
        serde_json::from_str(&v.to_string())
            .map_err(|e| FitError::Internal(format!("fit of {} does not read back: {e}", f.metric)))
    };
    MetricFit::from_record(&FitRecord {
        id: 0,
        metric: row.metric.clone(),
        n_results: row.n_results,
        kernel: row.kernel.clone(),
        model: text(&row.model)?,
        diagnostics: text(&row.diagnostics)?,
        created_unix_ms: 0,
    })
}

/// Stores new fits.
pub fn save_fits(store: &mut Store, sweep_id: i64, fits: &[MetricFit]) -> Result<(), FitError> {
    for f in fits {
        store.save_fit(sweep_id, &f.to_new_fit()?)?;
    }
    Ok(())
}

/// The fits to answer queries with after [`run_jobs`] on `plan.todo` gave
/// `fresh`: current and fresh fits, and the outdated stored fit of any metric
/// whose refit failed; by metric name.
pub fn merge(plan: StalePlan, fresh: &[MetricFit]) -> Vec<MetricFit> {
    let mut out = plan.current;
    out.extend(fresh.iter().cloned());
    for old in plan.outdated {
        if !fresh.iter().any(|f| f.metric == old.metric) {
            tracing::warn!(metric = %old.metric, results = old.n_results, "refit failed; keeping the previous surrogate");
            out.push(old);
        }
    }
    out.sort_by(|a, b| a.metric.cmp(&b.metric));
    out
}

/// Refits (and stores) every metric whose number of results changed since
/// its stored fit, and returns the current fit of every metric, by name.
/// An unchanged database is not refitted.
///
/// This fits on the calling thread. On a running coordinator's store thread
/// prefer the three steps [`stale_jobs`] (store thread), [`run_jobs`]
/// (a blocking task), [`save_fits`] (store thread).
pub fn refit_if_stale(
    store: &mut Store,
    sweep_id: i64,
    spec: &Spec,
) -> Result<Vec<MetricFit>, FitError> {
    let plan = stale_jobs(store, sweep_id, spec)?;
    if plan.todo.is_empty() {
        return Ok(merge(plan, &[]));
    }
    let fresh = run_jobs(&plan.todo);
    save_fits(store, sweep_id, &fresh)?;
    let fresh = fresh.iter().map(as_stored).collect::<Result<Vec<_>, _>>()?;
    tracing::info!(
        refitted = fresh.len(),
        kept = plan.current.len(),
        "surrogates updated"
    );
    Ok(merge(plan, &fresh))
}
