//! The built-in models: the `tiling` tissue model and published test
//! functions, each with its description (inputs with ranges, defaults and
//! units; metrics with units and bounds).
//!
//! The worker runs these models; the coordinator reads only their
//! descriptions, to check sweep files and to give parameters and metrics
//! their units. [`text`] writes numbers (with their units) the same way for
//! every crate. This crate must not do I/O, networking or anything async:
//! a model is a pure function of its inputs and seed.
//!
//! [`run_builtin`] validates the inputs against the description before
//! running, so a wrong name or an out-of-range value is a
//! [`FailureKind::BadInput`] that lists the valid names and ranges.
//!
//! ```
//! use std::collections::BTreeMap;
//! let inputs = BTreeMap::from([("x1".to_string(), std::f64::consts::PI), ("x2".to_string(), 2.275)]);
//! let m = tessera_models::run_builtin("branin", &inputs, 1).expect("valid inputs");
//! assert!((m["value"] - 0.397887357729738).abs() < 1e-9);
//! ```

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::sync::atomic::{AtomicBool, Ordering};

pub mod outcome;
pub mod test_functions;
pub mod text;
pub mod tiling;

use crate::outcome::{FailureKind, Metrics, RunFailure};

/// One input of a built-in model.
#[derive(Clone, Debug, PartialEq)]
pub struct InputInfo {
    /// Name, as written in sweep files and on the command line.
    pub name: &'static str,
    /// Smallest accepted value.
    pub lo: f64,
    /// Largest accepted value.
    pub hi: f64,
    /// Value used when the input is not given.
    pub default: f64,
    /// Unit ("um", "h", "" for dimensionless).
    pub unit: &'static str,
    /// Only whole numbers are accepted.
    pub integer: bool,
    /// What the input means, in a sentence.
    pub description: &'static str,
}

/// One metric of a built-in model.
#[derive(Clone, Debug, PartialEq)]
pub struct MetricInfo {
    /// Name, as reported.
    pub name: &'static str,
    /// Unit ("um^3", "" for dimensionless).
    pub unit: &'static str,
    /// Smallest possible value (without added noise).
    pub lo: f64,
    /// Largest possible value (without added noise).
    pub hi: f64,
    /// Hard bounds that no run can cross, noise included (`None`: open on
    /// that side): surrogates of bounded metrics are fitted on a scale
    /// where predictions stay inside them.
    pub bounds: [Option<f64>; 2],
    /// What the metric measures, in a sentence.
    pub description: &'static str,
}

/// A built-in model: what it is, what it takes, what it reports.
#[derive(Clone, Debug, PartialEq)]
pub struct ModelInfo {
    /// Model name.
    pub name: &'static str,
    /// One or two sentences.
    pub description: &'static str,
    /// Accepted inputs.
    pub inputs: Vec<InputInfo>,
    /// Reported metrics.
    pub metrics: Vec<MetricInfo>,
    /// Combinations of inputs beyond which the model measures something
    /// other than it is meant to (each input may be valid on its own).
    pub limits: Vec<Limit>,
}

/// Looks up an input's value by name.
pub type InputLookup<'a> = &'a dyn Fn(&str) -> f64;

/// A documented limit on a combination of inputs: `value(inputs) <= max`.
#[derive(Clone, Debug)]
pub struct Limit {
    /// What is limited, for messages ("packing fraction of the cell bodies").
    pub what: &'static str,
    /// The inputs `value` reads (the others do not change it).
    pub inputs: &'static [&'static str],
    /// The limited quantity, from a lookup of input values by name.
    pub value: fn(InputLookup<'_>) -> f64,
    /// The largest value at which the model still does what it is meant to.
    pub max: f64,
    /// What happens beyond it and where it is documented.
    pub beyond: &'static str,
}

impl PartialEq for Limit {
    /// Limits are equal when they say the same (function pointers are not compared).
    fn eq(&self, other: &Self) -> bool {
        self.what == other.what
            && self.inputs == other.inputs
            && self.max == other.max
            && self.beyond == other.beyond
    }
}

impl ModelInfo {
    /// The input called `name`.
    pub fn input(&self, name: &str) -> Option<&InputInfo> {
        self.inputs.iter().find(|i| i.name == name)
    }

    /// The metric called `name`.
    pub fn metric(&self, name: &str) -> Option<&MetricInfo> {
        self.metrics.iter().find(|m| m.name == name)
    }

    /// A table of the inputs: "name  [lo, hi] unit  (default d)" per line.
    pub fn describe_inputs(&self) -> String {
        let width = self.inputs.iter().map(|i| i.name.len()).max().unwrap_or(0);
        let mut s = String::new();
        for i in &self.inputs {
            let unit = if i.unit.is_empty() {
                String::new()
            } else {
                format!(" {}", i.unit)
            };
            let _ = writeln!(
                s,
                "  {:width$}  [{}, {}]{unit}  (default {}{})",
                i.name,
                i.lo,
                i.hi,
                i.default,
                if i.integer { ", whole numbers" } else { "" },
            );
        }
        s
    }

    /// Checks `given` against the inputs and fills in defaults.
    pub fn resolve(&self, given: &BTreeMap<String, f64>) -> Result<Inputs, RunFailure> {
        let unknown: Vec<&str> = given
            .keys()
            .filter(|k| self.input(k).is_none())
            .map(String::as_str)
            .collect();
        if !unknown.is_empty() {
            return Err(RunFailure::new(
                FailureKind::BadInput,
                format!(
                    "model {:?} has no input {}; valid inputs:\n{}",
                    self.name,
                    unknown
                        .iter()
                        .map(|u| format!("{u:?}"))
                        .collect::<Vec<_>>()
                        .join(", "),
                    self.describe_inputs()
                ),
            ));
        }
        let mut values = Vec::with_capacity(self.inputs.len());
        for info in &self.inputs {
            let v = given.get(info.name).copied().unwrap_or(info.default);
            let bad = if !v.is_finite() {
                Some("is not a finite number")
            } else if v < info.lo || v > info.hi {
                Some("is out of range")
            } else if info.integer && v.fract() != 0.0 {
                Some("must be a whole number")
            } else {
                None
            };
            if let Some(why) = bad {
                return Err(RunFailure::new(
                    FailureKind::BadInput,
                    format!(
                        "input {:?} = {v} {why}: model {:?} accepts {} in [{}, {}]{}; valid inputs:\n{}",
                        info.name,
                        self.name,
                        info.name,
                        info.lo,
                        info.hi,
                        if info.unit.is_empty() {
                            String::new()
                        } else {
                            format!(" {}", info.unit)
                        },
                        self.describe_inputs()
                    ),
                ));
            }
            values.push((info.name, v));
        }
        Ok(Inputs { values })
    }
}

/// Validated inputs of one run, every input present (defaults filled in).
#[derive(Clone, Debug, PartialEq)]
pub struct Inputs {
    values: Vec<(&'static str, f64)>,
}

impl Inputs {
    /// The value of input `name`.
    ///
    /// Panics if the model has no such input: that is a bug in the model's
    /// code (names are static), never a user error.
    #[track_caller]
    pub fn get(&self, name: &str) -> f64 {
        match self.values.iter().find(|(n, _)| *n == name) {
            Some((_, v)) => *v,
            None => panic!("model code asked for undeclared input {name:?}"),
        }
    }
}

/// Every built-in model.
pub fn catalogue() -> Vec<ModelInfo> {
    let mut all = vec![tiling::info()];
    all.extend(test_functions::infos());
    all
}

/// The built-in model called `name`.
pub fn find(name: &str) -> Option<ModelInfo> {
    catalogue().into_iter().find(|m| m.name == name)
}

/// Runs built-in model `name` once. Synchronous and CPU-bound: call it from a
/// blocking thread. Inputs not given take their defaults.
pub fn run_builtin(
    name: &str,
    inputs: &BTreeMap<String, f64>,
    seed: u64,
) -> Result<Metrics, RunFailure> {
    run_builtin_with_stop(name, inputs, seed, &AtomicBool::new(false))
}

/// [`run_builtin`] with a cooperative stop flag: the model checks `stop` as it
/// runs and returns [`FailureKind::Cancelled`] soon after it is set.
pub fn run_builtin_with_stop(
    name: &str,
    inputs: &BTreeMap<String, f64>,
    seed: u64,
    stop: &AtomicBool,
) -> Result<Metrics, RunFailure> {
    let Some(info) = find(name) else {
        let names: Vec<&str> = catalogue().iter().map(|m| m.name).collect();
        return Err(RunFailure::new(
            FailureKind::UnknownModel,
            format!(
                "no built-in model {name:?}; built-in models: {}",
                names.join(", ")
            ),
        ));
    };
    let resolved = info.resolve(inputs)?;
    if name == tiling::NAME {
        tiling::run(&resolved, seed, stop)
    } else {
        test_functions::run(name, &resolved, seed, stop)
    }
}

/// The failure a model returns when its stop flag was set.
pub(crate) fn stopped(name: &str) -> RunFailure {
    RunFailure::new(
        FailureKind::Cancelled,
        format!("run of {name:?} was stopped"),
    )
}

/// True once the stop flag is set.
pub(crate) fn is_stopped(stop: &AtomicBool) -> bool {
    stop.load(Ordering::Relaxed)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_lie_in_their_ranges() {
        for m in catalogue() {
            for i in &m.inputs {
                assert!(
                    i.lo <= i.default && i.default <= i.hi,
                    "{}.{}",
                    m.name,
                    i.name
                );
            }
            for x in &m.metrics {
                assert!(x.lo < x.hi, "{}.{}", m.name, x.name);
            }
        }
    }

    #[test]
    fn unknown_input_is_rejected_listing_valid_names() {
        let mut given = BTreeMap::new();
        given.insert("x9".to_string(), 0.0);
        let e = run_builtin("branin", &given, 1).expect_err("x9 is not an input");
        assert_eq!(e.kind, FailureKind::BadInput);
        assert!(e.reason.contains("\"x9\""), "{}", e.reason);
        assert!(
            e.reason.contains("x1") && e.reason.contains("[-5, 10]"),
            "{}",
            e.reason
        );
    }

    #[test]
    fn out_of_range_input_is_rejected_with_its_range() {
        let mut given = BTreeMap::new();
        given.insert("x2".to_string(), 16.0);
        let e = run_builtin("branin", &given, 1).expect_err("x2 > 15");
        assert_eq!(e.kind, FailureKind::BadInput);
        assert!(e.reason.contains("[0, 15]"), "{}", e.reason);
        given.insert("x2".to_string(), f64::NAN);
        let e = run_builtin("branin", &given, 1).expect_err("NaN");
        assert!(e.reason.contains("not a finite number"), "{}", e.reason);
    }

    #[test]
    fn unknown_model_lists_the_built_ins() {
        let e = run_builtin("nope", &BTreeMap::new(), 1).expect_err("no such model");
        assert_eq!(e.kind, FailureKind::UnknownModel);
        assert!(e.reason.contains("tiling") && e.reason.contains("hartmann6"));
    }
}
