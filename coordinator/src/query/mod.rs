//! Queries on the fitted surrogates: predicted outcomes with uncertainty at
//! chosen parameter values ([`predict`]), and how far each surrogate can be
//! trusted ([`check_fit`]).
//!
//! Queries read fits made by [`crate::fitter`]; they never run simulations.
//! The same answers are given offline from the database file
//! (`tessera predict --db`) and online by the coordinator's `Predict` call
//! (through [`crate::wire`]).

mod calibrate;
pub mod effects;
mod predict;
mod sensitivity;
mod trend;
mod verdict;

pub use sensitivity::{sensitivity, Index, MetricSensitivity, ParamIndices};

pub use calibrate::{
    calibrate, CalibrateOptions, Calibration, Correlation, Diagnostics, Finding, Marginal, Match,
    RegionAnswer, TargetUse, CONSTRAINED, ESS_WARN, PINNED, RHAT_WARN,
};

pub use predict::{
    natural_to_unit, parse_assignment, predict, short as short_number, MetricPrediction,
    PointPrediction, SD_RATIO_WARN, Z95,
};
pub use trend::{trend, Observed, Trend, TrendKind, TrendStep};
pub use verdict::{
    check_fit, FitVerdict, Verdict, MAX_COVERAGE, MIN_COVERAGE, MIN_Q2, POINTS_PER_PARAM,
};

use crate::spec::{self, Spec};
use crate::store::{Store, StoreError};
use std::path::Path;

/// Why a query could not be answered.
#[derive(Debug, thiserror::Error)]
pub enum QueryError {
    /// The database could not be read or written.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The database holds no sweep.
    #[error("{db} holds no sweep yet; start one with tessera run or tessera serve")]
    NoSweep {
        /// Database path.
        db: String,
    },
    /// The sweep file stored in the database does not parse with this version.
    #[error("the sweep file stored in {db} is not valid for this version of tessera:\n{errors}")]
    StoredSpec {
        /// Database path.
        db: String,
        /// The problems.
        errors: spec::SpecErrors,
    },
    /// A point names a parameter the sweep does not have.
    #[error("point {point}: the sweep has no parameter {name:?}; its parameters are {valid}")]
    UnknownParameter {
        /// 1-based number of the point.
        point: usize,
        /// The unknown name.
        name: String,
        /// The valid parameters with ranges and units.
        valid: String,
    },
    /// A point leaves out some parameters.
    #[error("point {point}: no value for {missing}; give every parameter: {valid}")]
    MissingParameters {
        /// 1-based number of the point.
        point: usize,
        /// The missing names, comma separated.
        missing: String,
        /// The valid parameters with ranges and units.
        valid: String,
    },
    /// A value that cannot be used.
    #[error("point {point}: {name} = {value} {reason}")]
    BadValue {
        /// 1-based number of the point.
        point: usize,
        /// Parameter name.
        name: String,
        /// The value given.
        value: f64,
        /// What is wrong with it.
        reason: String,
    },
    /// A `NAME=VALUE` argument that does not parse.
    #[error("{arg:?} is not NAME=VALUE with a number as VALUE (for example x1=3.5); {reason}")]
    BadAssignment {
        /// The argument.
        arg: String,
        /// What is wrong.
        reason: String,
    },
    /// No point was given.
    #[error("no point given; give NAME=VALUE for every parameter ({valid}) or --points FILE.csv")]
    NoPoints {
        /// The valid parameters with ranges and units.
        valid: String,
    },
    /// Nothing to predict with yet.
    #[error("no surrogate yet: {reason}")]
    NoFits {
        /// Why.
        reason: String,
    },
    /// A stored fit cannot be read back.
    #[error("the stored surrogate of {metric} cannot be read: {reason}")]
    DamagedFit {
        /// The metric.
        metric: String,
        /// What is wrong.
        reason: String,
    },
    /// A trend asked for a parameter the sweep does not have.
    #[error("the sweep has no parameter {name:?}; its parameters are {valid}")]
    NotAParameter {
        /// The name given.
        name: String,
        /// The valid parameters with ranges and units.
        valid: String,
    },
    /// A trend asked for a metric with no surrogate.
    #[error("no surrogate for metric {metric:?}; fitted metrics: {fitted}")]
    NoSuchMetric {
        /// The name given.
        metric: String,
        /// The fitted metrics, comma separated.
        fitted: String,
    },
    /// Calibration was asked of a sweep without targets.
    #[error("the sweep has no [[target]] tables, so there is nothing to calibrate against; add one per measured metric (metric, value, sd) to the sweep file and continue the sweep")]
    NoTargets,
    /// A bug or an impossible state.
    #[error("internal error: {0}")]
    Internal(String),
}

impl From<crate::fitter::FitError> for QueryError {
    fn from(e: crate::fitter::FitError) -> Self {
        use crate::fitter::FitError;
        match e {
            FitError::Store(s) => QueryError::Store(s),
            FitError::DamagedFit { metric, reason } => QueryError::DamagedFit { metric, reason },
            FitError::Internal(m) => QueryError::Internal(m),
        }
    }
}

/// The parameters with their ranges and units, for messages:
/// `x1 in [-5, 10] um, x2 in [0, 15]`.
pub fn describe_params(spec: &Spec) -> String {
    spec.params
        .iter()
        .map(|p| {
            let mut s = format!("{} in [{}, {}]", p.name, p.lo, p.hi);
            if !p.unit.is_empty() {
                s.push(' ');
                s.push_str(&p.unit);
            }
            if p.integer {
                s.push_str(" (whole numbers)");
            }
            s
        })
        .collect::<Vec<_>>()
        .join(", ")
}

/// The sweep in a database file: its row id and its validated sweep file.
pub fn open_sweep(store: &Store) -> Result<(i64, Spec), QueryError> {
    let db = store.path().display().to_string();
    let sweep = store
        .sweep()?
        .ok_or(QueryError::NoSweep { db: db.clone() })?;
    let spec = spec::parse(&sweep.spec_text, &sweep.spec_file)
        .map_err(|errors| QueryError::StoredSpec { db, errors })?;
    Ok((sweep.id, spec))
}

/// Opens an existing database read-only and returns the sweep file and the
/// current fits (used by `tessera predict`, `check-fit` and `trend`): the
/// stored fits that saw every result, and fits made now, in memory, for
/// metrics with newer results. Nothing is written: a running coordinator
/// stores its own fits, and a finished one stores them when it stops.
pub fn load_fits(db: &Path) -> Result<(Spec, Vec<crate::fitter::MetricFit>), QueryError> {
    let store = Store::open_read_only(db)?;
    let (sweep_id, spec) = open_sweep(&store)?;
    let plan = crate::fitter::stale_jobs(&store, sweep_id, &spec).map_err(|e| match e {
        crate::fitter::FitError::Store(s) => QueryError::Store(s.at(db)),
        other => other.into(),
    })?;
    drop(store);
    let fresh: Vec<crate::fitter::MetricFit> = crate::fitter::run_jobs(&plan.todo)
        .iter()
        .filter_map(|f| crate::fitter::as_stored(f).ok())
        .collect();
    let fits = crate::fitter::merge(plan, &fresh);
    if fits.is_empty() {
        return Err(QueryError::NoFits {
            reason: format!(
                "{} has fewer than {} points with finished runs; wait for more results",
                db.display(),
                crate::fitter::MIN_POINTS
            ),
        });
    }
    Ok((spec, fits))
}

/// The per-point results stored in a database (read-only), in point order.
pub fn load_results(db: &Path) -> Result<Vec<crate::status::PointResults>, QueryError> {
    let store = Store::open_read_only(db)?;
    let (sweep_id, _) = open_sweep(&store)?;
    let points = store.points(sweep_id)?;
    let evals = store.evaluations(sweep_id)?;
    Ok(crate::fitter::point_results(&points, &evals))
}
