//! The sweep file: what to vary, how to run the model, what to optimise.
//!
//! [`parse`] reads the TOML text and validates it in one pass, collecting
//! every problem (with file, line, column, key and what would be valid)
//! instead of stopping at the first. The layout of the file is documented key
//! by key in `docs/sweep-file.md`.
//!
//! A [`Spec`] also owns the mapping between the unit cube, where the
//! surrogate crate works, and the natural units of the parameters (log
//! scales, integers), and turns a run's metrics into the single number the
//! planner minimises ([`Spec::loss`]).

mod builtin;
mod error;
mod reader;
mod toml_access;
mod unit_cube;

use std::collections::BTreeMap;
use std::time::Duration;
use tessera_surrogate::transform::Transform;

pub use error::{SpecError, SpecErrors};

/// A validated sweep file.
#[derive(Clone, Debug, PartialEq)]
pub struct Spec {
    /// Short free-text name of the sweep.
    pub name: String,
    /// Free-text description (empty if not given).
    pub description: String,
    /// Fixes the initial design and every replicate seed.
    pub seed: u64,
    /// Points to evaluate in total, the initial design included.
    pub budget: u32,
    /// Points in the space-filling initial design (at most `budget`).
    pub initial: u32,
    /// Runs per point, each with its own derived seed.
    pub replicates: u32,
    /// Points proposed at once after the design; `None`: as many as there are free worker slots.
    pub batch: Option<u32>,
    /// How points after the initial design are chosen.
    pub strategy: Strategy,
    /// Re-runs of a failed evaluation before it counts as failed.
    pub retries: u32,
    /// Each batch of proposals waits for every result before it (same
    /// points on any number of workers); `None`: the command's default
    /// (`tessera run`: yes, `tessera serve`: no).
    pub reproducible: Option<bool>,
    /// Stop before the budget when expected improvement stays small.
    pub stop: Option<StopRule>,
    /// The model and how to run it.
    pub model: ModelSpec,
    /// The swept parameters, in the order they appear in the file.
    pub params: Vec<ParamSpec>,
    /// The metric to minimise or maximise, if any.
    pub objective: Option<Objective>,
    /// Observed values to calibrate against, in file order.
    pub targets: Vec<Target>,
    /// Units of metrics (from `[metrics.NAME]` and `[[target]]` `unit`); a metric not listed has no unit.
    pub metric_units: BTreeMap<String, String>,
    /// Bounds of metrics and the scale they are fitted on (from
    /// `[metrics.NAME]`, or declared by a built-in model); a metric not
    /// listed is unbounded and fitted as it is.
    pub metric_bounds: BTreeMap<String, MetricBounds>,
}

/// What is known of a metric's possible values.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct MetricBounds {
    /// Smallest possible value (`None`: unbounded below).
    pub lo: Option<f64>,
    /// Largest possible value (`None`: unbounded above).
    pub hi: Option<f64>,
    /// The scale the metric's surrogate is fitted on.
    pub fit: FitScale,
}

/// The scale a metric's surrogate is fitted on (`transform` in `[metrics.NAME]`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum FitScale {
    /// Chosen by the bounds: logit for two, log for one, as it is for none.
    Auto,
    /// As it is (predictions are still clamped into the bounds).
    Natural,
    /// The logarithm of the distance to the one finite bound (0 if none is given).
    Log,
    /// The logit between the two bounds.
    Logit,
}

impl FitScale {
    /// The word used in the sweep file.
    pub fn as_str(self) -> &'static str {
        match self {
            FitScale::Auto => "auto",
            FitScale::Natural => "none",
            FitScale::Log => "log",
            FitScale::Logit => "logit",
        }
    }
}

/// When to stop before the budget is spent.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct StopRule {
    /// The largest expected improvement (objective units) below which a
    /// planning round counts as small.
    pub improvement_below: f64,
    /// Small rounds in a row that stop the sweep.
    pub rounds: u32,
}

/// How points after the initial design are chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Strategy {
    /// Expected improvement: look for the best value of the objective.
    Improve,
    /// Largest predictive standard deviation: map trends over the whole range.
    Explore,
    /// History matching: space-filling points inside the region of
    /// constants not yet ruled out by the targets, refitting between waves.
    Calibrate,
}

impl Strategy {
    /// The word used in the sweep file.
    pub fn as_str(self) -> &'static str {
        match self {
            Strategy::Improve => "improve",
            Strategy::Explore => "explore",
            Strategy::Calibrate => "calibrate",
        }
    }
}

/// The batch size of reproducible sweeps that give no `batch` (our choice:
/// batches of 4 cost little against one point at a time; see
/// docs/benchmarks.md).
pub const DEFAULT_REPRODUCIBLE_BATCH: u32 = 4;

/// Why a sweep file cannot continue a stored sweep: the key that changed and
/// why that matters.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Incompatible {
    /// The sweep-file key.
    pub key: String,
    /// Why the stored results would not fit the new value.
    pub why: String,
}

impl Spec {
    /// Whether this sweep file may continue `stored`: keys that only steer
    /// what happens next (budget, strategy, batch, stop, retries, timeout,
    /// objective, targets, names, units, descriptions) may change; keys that
    /// the stored points and results depend on may not.
    pub fn continues(&self, stored: &Spec) -> Result<(), Incompatible> {
        let refuse = |key: &str, why: &str| {
            Err(Incompatible {
                key: key.to_string(),
                why: why.to_string(),
            })
        };
        if self.seed != stored.seed {
            return refuse(
                "seed",
                "the design and every run's seed were derived from the stored seed",
            );
        }
        if self.initial != stored.initial {
            return refuse(
                "initial",
                "the initial design was already made with the stored size",
            );
        }
        if self.replicates != stored.replicates {
            return refuse(
                "replicates",
                "every stored point has the stored number of runs",
            );
        }
        if self.model.name != stored.model.name {
            return refuse(
                "model.name",
                "the stored results come from the stored model",
            );
        }
        if self.model.command != stored.model.command {
            return refuse(
                "model.command",
                "the stored results come from the stored command",
            );
        }
        if self.model.fixed != stored.model.fixed {
            return refuse(
                "model.fixed",
                "the stored results were run with the stored fixed inputs",
            );
        }
        let names = |s: &Spec| s.params.iter().map(|p| p.name.clone()).collect::<Vec<_>>();
        if names(self) != names(stored) {
            return refuse(
                "params",
                "the stored points have values for the stored parameters",
            );
        }
        for (a, b) in self.params.iter().zip(&stored.params) {
            let key = format!("params.{}", a.name);
            if a.lo != b.lo || a.hi != b.hi {
                return refuse(
                    &format!("{key}.range"),
                    "the design and the surrogates are laid out on the stored range",
                );
            }
            if a.scale != b.scale {
                return refuse(
                    &format!("{key}.scale"),
                    "the design and the surrogates are laid out on the stored scale",
                );
            }
            if a.integer != b.integer {
                return refuse(
                    &format!("{key}.integer"),
                    "the stored points were made with the stored setting",
                );
            }
        }
        Ok(())
    }
}

/// How a parameter's range is spread over the unit interval.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Scale {
    /// Evenly in the natural units.
    Linear,
    /// Evenly in the logarithm (for quantities spanning orders of magnitude).
    Log,
}

impl Scale {
    /// The word used in the sweep file.
    pub fn as_str(self) -> &'static str {
        match self {
            Scale::Linear => "linear",
            Scale::Log => "log",
        }
    }
}

/// Whether the objective metric should be small or large.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Direction {
    /// Smaller is better.
    Minimize,
    /// Larger is better.
    Maximize,
}

/// The model and how to run it.
#[derive(Clone, Debug, PartialEq)]
pub struct ModelSpec {
    /// A built-in model, or a name that workers map to a command.
    pub name: String,
    /// Longest a single run may take before it counts as failed.
    pub timeout: Duration,
    /// Command for workers started by `tessera run` on this machine (never sent over the network).
    pub command: Option<Vec<String>>,
    /// Inputs passed unchanged to every run.
    pub fixed: BTreeMap<String, serde_json::Value>,
}

/// One swept parameter.
#[derive(Clone, Debug, PartialEq)]
pub struct ParamSpec {
    /// The model input this parameter sets.
    pub name: String,
    /// Lowest value (inclusive).
    pub lo: f64,
    /// Highest value (inclusive).
    pub hi: f64,
    /// How the range is spread over the unit interval.
    pub scale: Scale,
    /// Only whole numbers between `lo` and `hi`.
    pub integer: bool,
    /// Unit shown in tables and plots (empty: none).
    pub unit: String,
    /// Free-text description (empty if not given).
    pub description: String,
}

/// The metric to minimise or maximise.
#[derive(Clone, Debug, PartialEq)]
pub struct Objective {
    /// Metric name, as reported by the model.
    pub metric: String,
    /// Whether smaller or larger is better.
    pub direction: Direction,
}

/// An observed value of a metric, for calibration.
#[derive(Clone, Debug, PartialEq)]
pub struct Target {
    /// Metric name, as reported by the model.
    pub metric: String,
    /// The observed value.
    pub value: f64,
    /// Standard deviation of the observation (> 0): the measurement's own uncertainty.
    pub sd: f64,
    /// Standard deviation of the model discrepancy (>= 0): how far the
    /// model's average may differ from the real tissue even at the best
    /// constants.
    pub discrepancy_sd: f64,
    /// Weight of the target in the posterior and the discrepancy score (>= 0; default 1).
    pub weight: f64,
}

impl Target {
    /// The variance of the observation and the model discrepancy together:
    /// `sd^2 + discrepancy_sd^2` (the surrogate's variance is added where it is known).
    pub fn variance(&self) -> f64 {
        self.sd * self.sd + self.discrepancy_sd * self.discrepancy_sd
    }
}

/// Points per parameter below which an `improve` search first extends its
/// design by space-filling points, and `tessera check` warns (our choice,
/// measured on Hartmann-6 in docs/benchmarks.md; Jones, Schonlau & Welch
/// 1998 began with 10 per parameter).
pub const MIN_DESIGN_PER_PARAM: u32 = 5;

/// Parses and validates a sweep file. `file` is only used in error messages.
///
/// Returns every problem found, not only the first. For a built-in model
/// (no `command`), parameters, fixed inputs and metrics are checked against
/// the model's description and units it leaves out are filled in from it.
pub fn parse(text: &str, file: &str) -> Result<Spec, SpecErrors> {
    reader::read(text, file).map(|(spec, _)| spec)
}

/// As [`parse`], also returning the warnings: problems that do not stop a
/// sweep (a box crossing a built-in model's documented limit, a unit that
/// differs from the model's), in file order.
pub fn parse_with_warnings(text: &str, file: &str) -> Result<(Spec, Vec<SpecError>), SpecErrors> {
    reader::read(text, file)
}

/// Largest sweep file accepted (16 MiB): a sweep file is a page of text;
/// anything larger is a mistake (or `/dev/zero`).
pub const MAX_FILE_BYTES: u64 = 16 << 20;

/// Why a sweep file could not be read.
#[derive(Debug, thiserror::Error)]
pub enum ReadError {
    /// The file could not be opened or read.
    #[error("cannot read the sweep file {path}: {error}")]
    Io {
        /// The path given.
        path: String,
        /// What went wrong (part of the message, not a separate source).
        error: std::io::Error,
    },
    /// The file is larger than [`MAX_FILE_BYTES`].
    #[error(
        "{path} is larger than 16 MiB; a sweep file is a short text file (is this the right file?)"
    )]
    TooLarge {
        /// The path given.
        path: String,
    },
    /// The file is not UTF-8 text.
    #[error("{path} is not a text file (not valid UTF-8 at byte {at}); a sweep file is TOML text")]
    NotText {
        /// The path given.
        path: String,
        /// Offset of the first invalid byte.
        at: usize,
    },
}

/// Reads a sweep file, refusing anything larger than [`MAX_FILE_BYTES`]
/// without reading more than that (so `/dev/zero` ends at once).
pub fn read_file(path: &std::path::Path) -> Result<String, ReadError> {
    use std::io::Read;
    let name = path.display().to_string();
    let io = |error| ReadError::Io {
        path: name.clone(),
        error,
    };
    if path.is_dir() {
        return Err(io(std::io::Error::other("it is a directory")));
    }
    let file = std::fs::File::open(path).map_err(io)?;
    let mut bytes = Vec::new();
    file.take(MAX_FILE_BYTES + 1)
        .read_to_end(&mut bytes)
        .map_err(io)?;
    if bytes.len() as u64 > MAX_FILE_BYTES {
        return Err(ReadError::TooLarge { path: name });
    }
    String::from_utf8(bytes).map_err(|e| ReadError::NotText {
        path: name,
        at: e.utf8_error().valid_up_to(),
    })
}

impl Spec {
    /// Number of swept parameters.
    pub fn dimension(&self) -> usize {
        self.params.len()
    }

    /// Parameter names in file order.
    pub fn param_names(&self) -> Vec<&str> {
        self.params.iter().map(|p| p.name.as_str()).collect()
    }

    /// Maps a point of the unit cube to natural units (see [`ParamSpec::to_natural`]).
    #[track_caller]
    pub fn to_natural(&self, unit: &[f64]) -> Vec<f64> {
        assert_eq!(
            unit.len(),
            self.params.len(),
            "point has {} coordinates, the sweep has {} parameters",
            unit.len(),
            self.params.len()
        );
        self.params
            .iter()
            .zip(unit)
            .map(|(p, &u)| p.to_natural(u))
            .collect()
    }

    /// Maps a point in natural units to the unit cube (see [`ParamSpec::to_unit`]).
    #[track_caller]
    pub fn to_unit(&self, natural: &[f64]) -> Vec<f64> {
        assert_eq!(
            natural.len(),
            self.params.len(),
            "point has {} coordinates, the sweep has {} parameters",
            natural.len(),
            self.params.len()
        );
        self.params
            .iter()
            .zip(natural)
            .map(|(p, &x)| p.to_unit(x))
            .collect()
    }

    /// The initial design in natural units: `initial` points of a maximin
    /// Latin hypercube (McKay, Beckman & Conover 1979; Morris & Mitchell 1995)
    /// drawn with the sweep seed, mapped through [`Spec::to_natural`].
    pub fn initial_design(&self) -> Vec<Vec<f64>> {
        let unit = tessera_surrogate::design::maximin_lhs(
            self.initial as usize,
            self.params.len(),
            self.seed,
        );
        unit.iter().map(|u| self.to_natural(u)).collect()
    }

    /// The metrics the planner needs from every run: the objective metric,
    /// then the target metrics, without repeats.
    pub fn metrics_needed(&self) -> Vec<String> {
        let mut out: Vec<String> = Vec::new();
        let names = self
            .objective
            .iter()
            .map(|o| &o.metric)
            .chain(self.targets.iter().map(|t| &t.metric));
        for m in names {
            if !out.contains(m) {
                out.push(m.clone());
            }
        }
        out
    }

    /// The number the planner minimises, from one run's (or one point's mean) metrics.
    ///
    /// With an objective: the metric itself (minimize) or its negative
    /// (maximize); targets then serve `tessera calibrate` only.
    /// With targets only: the standardised discrepancy
    /// `sum ((m - value) / sd)^2` over the targets (the squared form of the
    /// implausibility of Craig et al. 1997). `None` if a needed metric is
    /// missing or not finite.
    pub fn loss(&self, metrics: &BTreeMap<String, f64>) -> Option<f64> {
        let finite = |name: &str| metrics.get(name).copied().filter(|v| v.is_finite());
        match &self.objective {
            Some(o) => {
                let m = finite(&o.metric)?;
                Some(match o.direction {
                    Direction::Minimize => m,
                    Direction::Maximize => -m,
                })
            }
            None => {
                if self.targets.is_empty() {
                    return None;
                }
                let mut sum = 0.0;
                for t in &self.targets {
                    let m = finite(&t.metric)?;
                    let z = (m - t.value) / t.sd;
                    sum += z * z;
                }
                Some(sum)
            }
        }
    }

    /// The name of the objective's surrogate: the objective metric, or the
    /// calibration discrepancy for a sweep with targets only.
    pub fn objective_metric(&self) -> String {
        match &self.objective {
            Some(o) => o.metric.clone(),
            None => self.objective_label(),
        }
    }

    /// What [`Spec::loss`] measures, for table headings: `"territory_cv (min)"`,
    /// `"coverage (max)"` or `"calibration discrepancy"`.
    pub fn objective_label(&self) -> String {
        match &self.objective {
            Some(o) => match o.direction {
                Direction::Minimize => format!("{} (min)", o.metric),
                Direction::Maximize => format!("{} (max)", o.metric),
            },
            None => "calibration discrepancy".to_string(),
        }
    }

    /// Turns a loss back into the sweep file's terms (a maximised metric changes sign back).
    pub fn display_objective(&self, loss: f64) -> f64 {
        match &self.objective {
            Some(Objective {
                direction: Direction::Maximize,
                ..
            }) => -loss,
            _ => loss,
        }
    }

    /// Unit of a metric, or `""` if it has none.
    pub fn metric_unit(&self, metric: &str) -> &str {
        self.metric_units.get(metric).map_or("", String::as_str)
    }

    /// The bounds of a metric: `[lo, hi]`, `None` where it is unbounded.
    /// The calibration discrepancy is bounded below by 0.
    pub fn bounds_of(&self, metric: &str) -> [Option<f64>; 2] {
        if self.objective.is_none() && metric == self.objective_label() {
            return [Some(0.0), None];
        }
        self.metric_bounds
            .get(metric)
            .map_or([None, None], |b| [b.lo, b.hi])
    }

    /// The scale a metric's surrogate is fitted on, as declared.
    fn fit_scale(&self, metric: &str) -> FitScale {
        if self.objective.is_none() && metric == self.objective_label() {
            FitScale::Auto
        } else {
            self.metric_bounds
                .get(metric)
                .map_or(FitScale::Auto, |b| b.fit)
        }
    }

    /// For a metric given neither `bounds` nor `transform` (by the sweep
    /// file or the model; an explicit `bounds = [-inf, inf]` says it may
    /// take any value): whether its values are all positive and span at
    /// least `transform::LOG_SCALE_DECADES` orders of magnitude, in which
    /// case it is fitted on a log scale as if `bounds = [0, inf]` were
    /// declared.
    pub fn log_scale_from_data(&self, metric: &str, observed: &[f64]) -> bool {
        use tessera_surrogate::transform::{positive_decades, LOG_SCALE_DECADES};
        !self.metric_bounds.contains_key(metric)
            && self.bounds_of(metric) == [None, None]
            && positive_decades(observed).is_some_and(|d| d >= LOG_SCALE_DECADES)
    }

    /// The transform a metric's surrogate is fitted with, given the values
    /// observed so far (see `tessera_surrogate::transform` and
    /// [`Spec::log_scale_from_data`]).
    pub fn transform_for(&self, metric: &str, observed: &[f64]) -> Transform {
        let [lo, hi] = self.bounds_of(metric);
        if self.log_scale_from_data(metric, observed) {
            return Transform::for_bounds(Some(0.0), None, observed);
        }
        match self.fit_scale(metric) {
            FitScale::Auto => Transform::for_bounds(lo, hi, observed),
            FitScale::Natural => Transform::Identity,
            FitScale::Log => match (lo, hi) {
                (Some(_), _) => Transform::for_bounds(lo, None, observed),
                (None, Some(_)) => Transform::for_bounds(None, hi, observed),
                (None, None) => Transform::for_bounds(Some(0.0), None, observed),
            },
            FitScale::Logit => Transform::for_bounds(lo, hi, observed),
        }
    }
}
