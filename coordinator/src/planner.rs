//! The planner: after the initial design, fit the objective's surrogate and
//! propose the next batch of points.
//!
//! The objective's surrogate is the same fit the queries serve: the fitter's
//! data and noise rule ([`fitter::jobs_from_results`]) for the objective
//! metric (or the calibration discrepancy), so what `predict` and
//! `check-fit` show is what chose the points. Refits are warm-started from
//! the previous hyperparameters (one start) and only every
//! [`FULL_SEARCH_EVERY`] rounds, or when the data grew by a quarter, search
//! afresh from six starts.
//!
//! Proposals maximise expected improvement (`strategy = "improve"`) or the
//! reduction of the integrated variance (`strategy = "explore"`), weighted
//! by the probability that a run succeeds once runs have failed (a
//! surrogate of the failure rate, see [`fitter::FAILURE_RATE`]), with
//! points that only failed counted as the worst value seen (for the search
//! only); see `tessera_surrogate::acquisition`. For `improve`, points take
//! turns in three roles (our choice, measured in docs/benchmarks.md): one
//! point at a time, batches numbered 1, 2, 3, 4 go to the surrogate's own
//! minimum, a Thompson sample, expected improvement, a Thompson sample, and
//! so on; a batch of three or more starts at the surrogate's minimum (a
//! batch of two on odd batches), ends with a Thompson sample and fills the
//! rest by expected improvement (from four points, the second is a Thompson
//! sample near the minimum). Before any of that, a design with fewer than
//! [`MIN_DESIGN_PER_PARAM`] points per parameter is extended by space-filling
//! points. With too little data, or if the fit fails, the planner proposes
//! seeded uniform points and says why.

use crate::calibration;
use crate::fitter::{self, MetricFit};
use crate::spec::{Direction, Spec, Strategy, MIN_DESIGN_PER_PARAM};
use crate::status::PointResults;
use crate::store::{NewPoint, PointOrigin, ProposalInfo};
use rand::{Rng, SeedableRng};
use tessera_surrogate::acquisition::{self, Context};
use tessera_surrogate::gp::{FitOptions, Hyper};

/// Fewest points with results before the objective gets a surrogate (the
/// same minimum as every metric's).
pub const MIN_POINTS_FOR_FIT: usize = fitter::MIN_POINTS;

/// A full hyperparameter search (six starts) every this many rounds; warm
/// starts in between (our choice; see docs/benchmarks.md for the cost).
pub const FULL_SEARCH_EVERY: u32 = 8;

/// Most LML evaluations of a warm start, and of each start of a full
/// search (our choice, measured in docs/benchmarks.md): a warm start only
/// follows the optimum as a few points are added, and on smooth
/// deterministic outputs the likelihood is flat within rounding near its
/// optimum, where the line search would otherwise spend hundreds of
/// evaluations.
pub const WARM_EVALUATIONS: usize = 20;
pub const FULL_EVALUATIONS: usize = 100;

/// Above this many points, rounds between full searches keep the
/// hyperparameters instead of warm-starting their search (our choice).
pub const HOLD_ABOVE: usize = 300;

/// What one planning round produced.
#[derive(Debug, Default)]
pub struct Plan {
    /// The new points.
    pub points: Vec<NewPoint>,
    /// The objective's surrogate that chose them (stored and served as the
    /// objective metric's fit).
    pub objective_fit: Option<MetricFit>,
    /// The largest acquisition value of the round (expected improvement in
    /// the objective's unit for `improve`).
    pub best_acquisition: Option<f64>,
    /// For `calibrate`: the region the wave's points were chosen in.
    pub wave: Option<crate::status::Wave>,
}

/// The planner's memory between rounds.
#[derive(Debug, Default)]
pub struct Planner {
    last: Option<Hyper>,
    rounds: u32,
    points_at_full_search: usize,
    waves: u32,
}

impl Planner {
    /// A planner with no history (the first round searches afresh).
    pub fn new() -> Self {
        Planner::default()
    }

    /// Numbers the next calibration wave after `done` earlier ones (a
    /// continued sweep).
    pub fn continue_waves(&mut self, done: u32) {
        self.waves = done;
    }

    /// Proposes `q` new points (natural units) after the points in `results`
    /// (finished replicates per point) and `pending` (points still running,
    /// natural units). `batch` is stored with the points; `seed` fixes the
    /// search.
    pub fn plan(
        &mut self,
        spec: &Spec,
        results: &[PointResults],
        pending: &[Vec<f64>],
        q: usize,
        batch: u32,
        seed: u64,
    ) -> Plan {
        let origin = match spec.strategy {
            Strategy::Improve => PointOrigin::Improve,
            Strategy::Explore => PointOrigin::Explore,
            Strategy::Calibrate => {
                return self.calibrate(spec, results, pending, q, batch, seed);
            }
        };
        // A design with fewer than [`MIN_DESIGN_PER_PARAM`] points per parameter
        // is first extended by space-filling points: on so few points the
        // fitted length scales can call a parameter irrelevant that only
        // matters elsewhere in the box, and the search then never looks
        // along it (measured on Hartmann-6 in docs/benchmarks.md).
        let d = spec.dimension();
        let issued = results.len() + pending.len();
        let enough = MIN_DESIGN_PER_PARAM as usize * d;
        if origin == PointOrigin::Improve && d >= 2 && issued < enough {
            return top_up(spec, results, pending, q.min(enough - issued), batch, seed);
        }
        let objective = spec.objective_metric();
        let jobs = fitter::jobs_from_results(spec, results, spec.seed);
        let Some(job) = jobs.iter().find(|j| j.metric == objective) else {
            tracing::info!(
                points = results.iter().filter(|p| !p.replicates.is_empty()).count(),
                "too few results for a surrogate of the objective; proposing uniform points"
            );
            return uniform(
                spec,
                q,
                origin,
                batch,
                seed,
                "too few results for a surrogate",
            );
        };
        let n = job.obs.y.len();
        // Afresh at first, every few rounds, and while the data are small
        // whenever they grew by a quarter.
        let full = self.last.is_none()
            || self.rounds.is_multiple_of(FULL_SEARCH_EVERY)
            || (n <= HOLD_ABOVE && n * 4 >= self.points_at_full_search * 5);
        // Between full searches: a warm start (one L-BFGS run) on small
        // data; on large data only the new factorisation (the length scales
        // hardly move between rounds, and one LML evaluation costs O(n^3)).
        let opts = FitOptions {
            seed: job.seed,
            restarts: if full { 5 } else { 0 },
            start: if full { None } else { self.last.clone() },
            hold: !full && n > HOLD_ABOVE,
            // A full search on a subset: about a second even at thousands
            // of points (the posterior still uses every point).
            max_hyper_points: HOLD_ABOVE,
            max_evaluations: Some(if full {
                FULL_EVALUATIONS
            } else {
                WARM_EVALUATIONS
            }),
            ..FitOptions::default()
        };
        self.rounds += 1;
        let Some(fit) = fitter::run_job_with(job, &opts) else {
            return uniform(spec, q, origin, batch, seed, "the surrogate fit failed");
        };
        if full {
            self.points_at_full_search = n;
        }
        self.last = Some(fit.gp.hyper().clone());
        let maximise = matches!(&spec.objective, Some(o) if o.direction == Direction::Maximize);
        let mut loss_gp = if maximise {
            fit.gp.negated()
        } else {
            fit.gp.clone()
        };
        // Points whose runs all failed count, for the search only, as the
        // worst value seen: penalised imputation (Forrester, Sobester & Keane
        // 2006, "Optimization with missing data", Proc. R. Soc. A 462:935-945),
        // so the search does not return to where runs fail. The served
        // surrogate is not changed.
        let worst = loss_gp
            .observed_y()
            .into_iter()
            .fold(f64::NEG_INFINITY, f64::max);
        if worst.is_finite() {
            for p in results
                .iter()
                .filter(|p| p.replicates.is_empty() && p.failed > 0)
            {
                if let Ok(g) = loss_gp.update_believer(&spec.to_unit(&p.values), worst) {
                    loss_gp = g;
                }
            }
        }
        let failure = jobs
            .iter()
            .find(|j| j.metric == fitter::FAILURE_RATE)
            .and_then(|j| {
                fitter::run_job_with(
                    j,
                    &FitOptions {
                        seed: j.seed,
                        restarts: 1,
                        ..FitOptions::default()
                    },
                )
            });
        // Points that only failed are kept away from; running ones are believed.
        let avoid: Vec<Vec<f64>> = results
            .iter()
            .filter(|p| p.replicates.is_empty() && p.failed > 0)
            .map(|p| spec.to_unit(&p.values))
            .collect();
        let running: Vec<Vec<f64>> = pending.iter().map(|v| spec.to_unit(v)).collect();
        let snap = |u: &[f64]| spec.to_unit(&spec.to_natural(u));
        let ctx = Context {
            avoid: &avoid,
            pending: &running,
            failure: failure.as_ref().map(|f| &f.gp),
            snap: Some(&snap),
            // The turns of the roles (see the module docs).
            thompson: q == 1 && batch.is_multiple_of(2),
            exploit: if q == 1 {
                batch % 4 == 1
            } else {
                q >= 3 || batch % 2 == 1
            },
        };
        let strategy = match spec.strategy {
            Strategy::Explore => acquisition::Strategy::Explore,
            Strategy::Improve | Strategy::Calibrate => acquisition::Strategy::Improve,
        };
        let proposals = acquisition::propose(&loss_gp, strategy, q, &ctx, seed);
        let surrogate = format!(
            "{} from {} results at {} points ({}; round {})",
            fit.metric,
            fit.n_results,
            fit.n_points,
            if full {
                "full search"
            } else if opts.hold {
                "hyperparameters kept"
            } else {
                "warm start"
            },
            self.rounds
        );
        let best_acquisition = proposals
            .iter()
            .map(|p| p.acquisition)
            .fold(None, |m: Option<f64>, a| Some(m.map_or(a, |b| b.max(a))));
        let points = proposals
            .into_iter()
            .map(|p| NewPoint {
                values: spec.to_natural(&p.x),
                origin,
                batch,
                proposal: Some(ProposalInfo {
                    acquisition: p.acquisition,
                    predicted_mean: if maximise { -p.mean } else { p.mean },
                    predicted_sd: p.sd,
                    surrogate: surrogate.clone(),
                }),
            })
            .collect();
        Plan {
            points,
            objective_fit: Some(fit),
            best_acquisition,
            wave: None,
        }
    }

    /// A calibration wave (history matching): fit every target metric,
    /// estimate the region not yet ruled out, and spread the batch over it,
    /// away from the points already run or running. With no region left,
    /// the batch goes to the least implausible candidates.
    fn calibrate(
        &mut self,
        spec: &Spec,
        results: &[PointResults],
        pending: &[Vec<f64>],
        q: usize,
        batch: u32,
        seed: u64,
    ) -> Plan {
        let origin = PointOrigin::Calibrate;
        let wanted: Vec<&str> = spec.targets.iter().map(|t| t.metric.as_str()).collect();
        let fits: Vec<MetricFit> = fitter::jobs_from_results(spec, results, spec.seed)
            .iter()
            .filter(|j| wanted.contains(&j.metric.as_str()))
            .filter_map(|j| {
                fitter::run_job_with(
                    j,
                    &FitOptions {
                        seed: j.seed,
                        restarts: 2,
                        max_hyper_points: HOLD_ABOVE,
                        ..FitOptions::default()
                    },
                )
            })
            .collect();
        let matcher = match calibration::Matcher::new(spec, &fits) {
            Ok(m) => m,
            Err(missing) => {
                let why = format!("no surrogate yet for {}", missing.join(", "));
                return uniform(spec, q, origin, batch, seed, &why);
            }
        };
        self.waves += 1;
        let region = calibration::region(&matcher, CANDIDATES, seed);
        let existing = in_sweep(spec, results, pending);
        let (pool, where_) = if region.kept.is_empty() {
            // Nothing left: the tenth of the candidates closest to matching.
            let xs = calibration::uniform_points(CANDIDATES, spec.dimension(), seed);
            let imp = matcher.combined(&xs);
            let mut order: Vec<usize> = (0..xs.len()).collect();
            order.sort_by(|&a, &b| imp[a].total_cmp(&imp[b]));
            let pool: Vec<Vec<f64>> = order[..(CANDIDATES / 10).max(q)]
                .iter()
                .map(|&i| xs[i].clone())
                .collect();
            (
                pool,
                "no constants left that match every target; among the least implausible",
            )
        } else {
            (region.kept.clone(), "inside the region not ruled out")
        };
        let snap = |u: &[f64]| spec.to_unit(&spec.to_natural(u));
        let pool: Vec<Vec<f64>> = pool.iter().map(|u| snap(u)).collect();
        let picked = tessera_surrogate::design::spread(&pool, &existing, q);
        let imp = matcher.combined(&picked);
        let n_points = results.iter().filter(|p| !p.replicates.is_empty()).count();
        let surrogate = format!(
            "calibration wave {}: {where_}; {:.1}% +- {:.1}% of the box not ruled out (surrogates of {} from {n_points} points)",
            self.waves,
            100.0 * region.fraction,
            100.0 * region.fraction_se,
            wanted.join(", ")
        );
        let mut points: Vec<NewPoint> = picked
            .iter()
            .zip(&imp)
            .map(|(u, i)| NewPoint {
                values: spec.to_natural(u),
                origin,
                batch,
                proposal: Some(ProposalInfo {
                    acquisition: *i,
                    predicted_mean: f64::NAN,
                    predicted_sd: f64::NAN,
                    surrogate: surrogate.clone(),
                }),
            })
            .collect();
        if points.len() < q {
            // Fewer distinct candidates than slots: fill with uniform points.
            let more = uniform(
                spec,
                q - points.len(),
                origin,
                batch,
                seed ^ 0xfeed,
                "too few candidates",
            );
            points.extend(more.points);
        }
        Plan {
            points,
            objective_fit: None,
            best_acquisition: None,
            wave: Some(crate::status::Wave {
                wave: self.waves,
                points: n_points,
                fraction: region.fraction,
                fraction_se: region.fraction_se,
            }),
        }
    }
}

/// Every point of the sweep, finished or running, in the unit cube.
fn in_sweep(spec: &Spec, results: &[PointResults], pending: &[Vec<f64>]) -> Vec<Vec<f64>> {
    results
        .iter()
        .map(|p| spec.to_unit(&p.values))
        .chain(pending.iter().map(|v| spec.to_unit(v)))
        .collect()
}

/// Space-filling points that extend the design (see [`MIN_DESIGN_PER_PARAM`]).
fn top_up(
    spec: &Spec,
    results: &[PointResults],
    pending: &[Vec<f64>],
    q: usize,
    batch: u32,
    seed: u64,
) -> Plan {
    let d = spec.dimension();
    let units =
        tessera_surrogate::design::extend_maximin(&in_sweep(spec, results, pending), q, d, seed);
    let why = format!(
        "none yet: a space-filling point, extending the design to {} points ({MIN_DESIGN_PER_PARAM} per parameter) before the search",
        MIN_DESIGN_PER_PARAM as usize * d
    );
    without_surrogate(spec, &units, PointOrigin::Improve, batch, &why)
}

/// A plan of points no surrogate chose, each labelled `why`.
fn without_surrogate(
    spec: &Spec,
    units: &[Vec<f64>],
    origin: PointOrigin,
    batch: u32,
    why: &str,
) -> Plan {
    let points = units
        .iter()
        .map(|u| NewPoint {
            values: spec.to_natural(u),
            origin,
            batch,
            proposal: Some(ProposalInfo {
                acquisition: f64::NAN,
                predicted_mean: f64::NAN,
                predicted_sd: f64::NAN,
                surrogate: why.to_string(),
            }),
        })
        .collect();
    Plan {
        points,
        objective_fit: None,
        best_acquisition: None,
        wave: None,
    }
}

/// Uniform candidates drawn per calibration wave (our choice: a standard
/// error of the region's share below 0.8 percentage points).
pub const CANDIDATES: usize = 4000;

fn uniform(spec: &Spec, q: usize, origin: PointOrigin, batch: u32, seed: u64, why: &str) -> Plan {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let d = spec.dimension();
    let units: Vec<Vec<f64>> = (0..q)
        .map(|_| (0..d).map(|_| rng.random::<f64>()).collect())
        .collect();
    let why = format!("none ({why}): a uniform random point");
    without_surrogate(spec, &units, origin, batch, &why)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeMap;

    fn sweep(strategy: &str) -> Spec {
        let mut text = format!(
            "name = \"t\"\nseed = 3\nbudget = 40\ninitial = 5\nstrategy = \"{strategy}\"\n[model]\nname = \"hartmann3\"\n"
        );
        for k in 1..=3 {
            text.push_str(&format!("[params.x{k}]\nrange = [0.0, 1.0]\n"));
        }
        text.push_str("[objective]\nminimize = \"value\"\n");
        crate::spec::parse(&text, "t.toml").expect("valid sweep")
    }

    fn with_results(spec: &Spec) -> Vec<PointResults> {
        spec.initial_design()
            .into_iter()
            .enumerate()
            .map(|(i, values)| PointResults {
                point_id: i as i64 + 1,
                idx: i as u64,
                replicates: vec![BTreeMap::from([(
                    "value".to_string(),
                    values.iter().map(|v| (v - 0.5).powi(2)).sum::<f64>(),
                )])],
                values,
                failed: 0,
            })
            .collect()
    }

    /// Fewer than five points per parameter: the planner extends the design
    /// by space-filling points up to 15 (3 parameters), counting the points
    /// still running, then searches.
    #[test]
    fn a_small_design_is_extended_before_the_search() {
        let spec = sweep("improve");
        let results = with_results(&spec);
        let mut planner = Planner::new();
        let plan = planner.plan(&spec, &results, &[], 4, 1, 11);
        assert_eq!(plan.points.len(), 4);
        assert!(plan.objective_fit.is_none());
        for p in &plan.points {
            let info = p.proposal.as_ref().expect("proposal info");
            assert!(
                info.surrogate.contains("space-filling"),
                "{}",
                info.surrogate
            );
        }
        // 5 done and 8 running: two more to reach 15.
        let running: Vec<Vec<f64>> = plan
            .points
            .iter()
            .map(|p| p.values.clone())
            .chain(tessera_surrogate::design::extend_maximin(&[], 4, 3, 2))
            .collect();
        let plan = planner.plan(&spec, &results, &running, 4, 2, 12);
        assert_eq!(plan.points.len(), 2);
        // With 15 points issued the search starts (a surrogate chooses).
        let more = planner.plan(
            &spec,
            &results,
            &[running.clone(), vec![vec![0.5; 3]; 2]].concat(),
            4,
            3,
            13,
        );
        assert!(more.points.iter().all(|p| {
            !p.proposal
                .as_ref()
                .is_some_and(|i| i.surrogate.contains("space-filling"))
        }));
        // `explore` maps the box with its own criterion from the start.
        let spec = sweep("explore");
        let plan = Planner::new().plan(&spec, &results, &[], 4, 1, 11);
        assert!(plan.objective_fit.is_some());
    }
}
