//! What `tessera status` shows: a snapshot of a sweep's progress.
//!
//! The same [`SweepStatus`] comes from a running coordinator (over gRPC,
//! with live workers) or from a database file alone (no workers known); the
//! scheduler counts both (`scheduler::status_from_records` for the file).

use crate::spec::Spec;
use serde::Serialize;
use std::collections::BTreeMap;

/// One worker as the coordinator sees it.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct WorkerStatus {
    /// Id given at join.
    pub worker_id: String,
    /// Operator-given name.
    pub name: String,
    /// Host name.
    pub host: String,
    /// Parallel runs offered.
    pub slots: u32,
    /// Runs under way now.
    pub running: u32,
    /// Last time the worker was heard from (Unix ms).
    pub last_contact_unix_ms: u64,
    /// Evaluations it completed since joining.
    pub completed: u64,
    /// Completed runs per minute since it joined.
    pub runs_per_minute: f64,
    /// Heard from within two lease periods and has not left.
    pub connected: bool,
}

/// The best point so far.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct BestPoint {
    /// Point row id.
    pub point_id: i64,
    /// Parameter values, natural units.
    pub params: BTreeMap<String, f64>,
    /// The objective in the sweep file's sign (the metric itself for minimize or
    /// maximize; the standardised discrepancy for calibration targets).
    pub objective: f64,
    /// Finished replicates behind the value.
    pub replicates: u32,
}

/// A snapshot of a sweep.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct SweepStatus {
    /// Sweep name.
    pub sweep: String,
    /// Evaluations with metrics.
    pub done: u64,
    /// Evaluations that failed after all retries.
    pub failed: u64,
    /// Evaluations leased to a worker now.
    pub running: u64,
    /// Evaluations waiting, including those of points not yet proposed.
    pub queued: u64,
    /// Points in the budget.
    pub budget: u64,
    /// Points created so far.
    pub points: u64,
    /// Replicates per point.
    pub replicates: u32,
    /// Evaluations in the whole budget (budget x replicates).
    pub evaluations_total: u64,
    /// Workers known to the coordinator (empty when read from a file).
    pub workers: Vec<WorkerStatus>,
    /// Failure reasons with their counts, most frequent first.
    pub failures: Vec<(String, u64)>,
    /// Best point so far.
    pub best: Option<BestPoint>,
    /// Every evaluation of the budget is final.
    pub finished: bool,
    /// What the objective is.
    pub objective_label: String,
    /// Where runs fail, in words (none when no run failed).
    pub failure_region: Option<String>,
    /// Why the sweep stopped before its budget, if it did.
    pub stop_reason: Option<String>,
    /// Each batch of proposals waits for every result before it.
    pub reproducible: bool,
    /// Calibration waves so far, oldest first.
    pub waves: Vec<Wave>,
}

/// Per-point results, for the best point and the planner.
#[derive(Clone, Debug, Default)]
pub struct PointResults {
    /// Point row id.
    pub point_id: i64,
    /// Index of the point within the sweep (0 for the first).
    pub idx: u64,
    /// Values in natural units, in spec parameter order.
    pub values: Vec<f64>,
    /// Metrics of each finished replicate.
    pub replicates: Vec<BTreeMap<String, f64>>,
    /// Replicates that failed for good.
    pub failed: u32,
}

/// Failure reasons grouped for `status`: the first line, at most 120 chars.
pub fn group_reason(reason: &str) -> String {
    let line = reason.lines().next().unwrap_or("").trim();
    let line = if line.is_empty() {
        "unknown failure"
    } else {
        line
    };
    line.chars().take(120).collect()
}

/// The best point among `points` by mean loss over finished replicates.
pub fn best_point<'a>(
    spec: &Spec,
    points: impl Iterator<Item = &'a PointResults>,
) -> Option<BestPoint> {
    let mut best: Option<(f64, &PointResults)> = None;
    for p in points {
        let losses: Vec<f64> = p.replicates.iter().filter_map(|m| spec.loss(m)).collect();
        if losses.is_empty() {
            continue;
        }
        let mean = losses.iter().sum::<f64>() / losses.len() as f64;
        if !mean.is_finite() {
            continue;
        }
        if best.is_none_or(|(b, _)| mean < b) {
            best = Some((mean, p));
        }
    }
    best.map(|(loss, p)| BestPoint {
        point_id: p.point_id,
        params: spec
            .params
            .iter()
            .zip(p.values.iter())
            .map(|(ps, v)| (ps.name.clone(), *v))
            .collect(),
        objective: spec.display_objective(loss),
        replicates: p.replicates.len() as u32,
    })
}

/// A region of the box, as one or two one-sided conditions on parameters.
#[derive(Clone, Debug)]
struct Rule {
    /// (parameter index, at least?, threshold in natural units).
    conds: Vec<(usize, bool, f64)>,
}

impl Rule {
    fn holds(&self, values: &[f64]) -> bool {
        self.conds.iter().all(|&(j, above, t)| {
            if above {
                values[j] >= t
            } else {
                values[j] <= t
            }
        })
    }
}

/// Where runs fail, in words: the simplest region of the box (one or two
/// one-sided conditions on parameters) that holds at least half of the
/// failed runs and where runs fail most often compared with elsewhere;
/// or "spread over the box" when no such region stands out. `None` when
/// no run failed.
pub fn failure_region(spec: &Spec, results: &[PointResults]) -> Option<String> {
    let runs: Vec<(&[f64], u32, u32)> = results
        .iter()
        .filter(|p| p.values.len() == spec.dimension())
        .map(|p| {
            (
                p.values.as_slice(),
                p.failed,
                p.replicates.len() as u32 + p.failed,
            )
        })
        .filter(|(_, _, n)| *n > 0)
        .collect();
    let failed: u32 = runs.iter().map(|r| r.1).sum();
    let total: u32 = runs.iter().map(|r| r.2).sum();
    if failed == 0 {
        return None;
    }
    // Candidate thresholds: up to 8 quantiles of the parameter values of
    // points with failures.
    let d = spec.dimension();
    let mut singles: Vec<Rule> = Vec::new();
    for j in 0..d {
        let mut ts: Vec<f64> = runs.iter().filter(|r| r.1 > 0).map(|r| r.0[j]).collect();
        ts.sort_by(f64::total_cmp);
        ts.dedup();
        if ts.len() > 8 {
            ts = (0..8).map(|k| ts[k * (ts.len() - 1) / 7]).collect();
        }
        for &t in &ts {
            singles.push(Rule {
                conds: vec![(j, true, t)],
            });
            singles.push(Rule {
                conds: vec![(j, false, t)],
            });
        }
    }
    let score = |r: &Rule| -> Option<(f64, u32, u32)> {
        let (mut f_in, mut n_in) = (0u32, 0u32);
        for (v, f, n) in &runs {
            if r.holds(v) {
                f_in += f;
                n_in += n;
            }
        }
        let (f_out, n_out) = (failed - f_in, total - n_in);
        if 2 * f_in < failed || n_in == 0 {
            return None;
        }
        let rate_in = f64::from(f_in) / f64::from(n_in);
        let rate_out = if n_out > 0 {
            f64::from(f_out) / f64::from(n_out)
        } else {
            0.0
        };
        Some((rate_in - rate_out, f_in, n_in))
    };
    let best_of = |rules: &[Rule]| {
        rules
            .iter()
            .filter_map(|r| score(r).map(|s| (r.clone(), s)))
            .max_by(|a, b| a.1 .0.total_cmp(&b.1 .0))
    };
    let mut best = best_of(&singles);
    if d >= 2 && singles.len() <= 100 {
        let mut pairs = Vec::new();
        for (i, a) in singles.iter().enumerate() {
            for b in &singles[i + 1..] {
                if a.conds[0].0 != b.conds[0].0 {
                    pairs.push(Rule {
                        conds: vec![a.conds[0], b.conds[0]],
                    });
                }
            }
        }
        if let Some(p) = best_of(&pairs) {
            // Two conditions only when they say clearly more than one.
            if best.as_ref().is_none_or(|b| p.1 .0 > b.1 .0 + 0.15) {
                best = Some(p);
            }
        }
    }
    let spread = format!("failures are spread over the box ({failed} of {total} runs failed)");
    let Some((rule, (gap, f_in, n_in))) = best else {
        return Some(spread);
    };
    if gap < 0.3 {
        return Some(spread);
    }
    let words: Vec<String> = rule
        .conds
        .iter()
        .map(|&(j, above, t)| {
            let p = &spec.params[j];
            format!(
                "{} {} {}",
                p.name,
                if above { ">=" } else { "<=" },
                tessera_models::text::with_unit(tessera_models::text::short(t), &p.unit)
            )
        })
        .collect();
    Some(format!(
        "runs fail mostly where {}: {f_in} of {n_in} runs there failed, {} of {} elsewhere",
        words.join(" and "),
        failed - f_in,
        total - n_in
    ))
}

/// One calibration wave as recorded in the sweep file's notes and shown
/// by `tessera status`: the region when the wave's points were chosen.
#[derive(Clone, Debug, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Wave {
    /// 1 for the first wave after the initial design.
    pub wave: u32,
    /// Points with results that the surrogates were fitted to.
    pub points: usize,
    /// The non-implausible share of the box.
    pub fraction: f64,
    /// Its Monte Carlo standard error.
    pub fraction_se: f64,
}
