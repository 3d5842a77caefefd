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
//! only); see `tessera_surrogate::acquisition`. With too little data, or if the fit
//! fails, the planner proposes seeded uniform points and says why.

use crate::fitter::{self, MetricFit};
use crate::spec::{Direction, Spec, Strategy};
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
}

/// The planner's memory between rounds.
#[derive(Debug, Default)]
pub struct Planner {
    last: Option<Hyper>,
    rounds: u32,
    points_at_full_search: usize,
}

impl Planner {
    /// A planner with no history (the first round searches afresh).
    pub fn new() -> Self {
        Planner::default()
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
        };
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
        };
        let strategy = match spec.strategy {
            Strategy::Improve => acquisition::Strategy::Improve,
            Strategy::Explore => acquisition::Strategy::Explore,
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
        }
    }
}

fn uniform(spec: &Spec, q: usize, origin: PointOrigin, batch: u32, seed: u64, why: &str) -> Plan {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let d = spec.dimension();
    let points = (0..q)
        .map(|_| {
            let u: Vec<f64> = (0..d).map(|_| rng.random::<f64>()).collect();
            NewPoint {
                values: spec.to_natural(&u),
                origin,
                batch,
                proposal: Some(ProposalInfo {
                    acquisition: f64::NAN,
                    predicted_mean: f64::NAN,
                    predicted_sd: f64::NAN,
                    surrogate: format!("none ({why}): a uniform random point"),
                }),
            }
        })
        .collect();
    Plan {
        points,
        objective_fit: None,
        best_acquisition: None,
    }
}
