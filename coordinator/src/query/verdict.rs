//! How far each surrogate can be trusted, from its leave-one-out errors.
//!
//! Each point is predicted from all the others (closed form, GPML sec.
//! 5.4.2). A good surrogate predicts left-out points well (Q2 near 1) and
//! its standardised errors (error / predicted sd) look like draws from a
//! standard normal distribution: about 95% inside +-1.96, mean near 0, sd
//! near 1 (Bastos & O'Hagan 2009, Technometrics 51:425-438).

use super::predict::short;
use crate::fitter::MetricFit;
use tessera_models::text::with_unit;

/// Below this Q2 the surrogate explains too little of the variation between
/// points (common practice, no source).
pub const MIN_Q2: f64 = 0.7;

/// Below this share of left-out points inside their 95% interval the
/// intervals are too narrow (common practice, no source).
pub const MIN_COVERAGE: f64 = 0.85;

/// Above this share of left-out points inside their 95% interval, together
/// with standardised errors of sd below `MIN_STANDARDIZED_SD`, a note says
/// the intervals are wider than needed (cautious, not a reason to distrust
/// the surrogate; common practice, no source).
pub const MAX_COVERAGE: f64 = 0.99;

/// See [`MAX_COVERAGE`] (common practice, no source).
pub const MIN_STANDARDIZED_SD: f64 = 0.5;

/// Points per parameter below which a surrogate is not yet judged
/// trustworthy: the "n = 10 d" rule of Loeppky, Sacks & Welch (2009,
/// Technometrics 51:366-376; from memory).
pub const POINTS_PER_PARAM: u32 = 10;

/// A standardised error beyond this is named as a badly predicted point
/// (Bastos & O'Hagan 2009 read individual errors beyond 2 to 3 as a local
/// problem; the 3 is our choice).
pub const LARGE_STANDARDIZED: f64 = 3.0;

/// The plain verdict.
#[derive(Clone, Copy, Debug, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// No check failed.
    Trustworthy,
    /// At least one check failed: add points (and look at the reasons).
    NeedsMorePoints,
    /// The differences between points are mostly run-to-run noise: the
    /// metric hardly depends on the swept constants, and more points will
    /// not change that.
    BarelyChanges,
}

impl Verdict {
    /// The words shown to users.
    pub fn as_str(self) -> &'static str {
        match self {
            Verdict::Trustworthy => "trustworthy",
            Verdict::NeedsMorePoints => "needs more points",
            Verdict::BarelyChanges => "barely changes over the box",
        }
    }
}

/// Above this share of the spread between point means that is noise (run
/// to run, or the fitted nugget), a metric "barely changes over the box"
/// (our choice: half the variance).
pub const NOISE_SHARE: f64 = 0.5;

/// The leave-one-out diagnostics of one surrogate and the verdict.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct FitVerdict {
    /// Metric name.
    pub metric: String,
    /// Unit of the metric (and of `loo_rmse`).
    pub unit: String,
    /// Points the surrogate was fitted to.
    pub n_points: u32,
    /// Results (replicates) behind those points.
    pub n_results: u32,
    /// Root mean squared leave-one-out error, in the metric's unit.
    pub loo_rmse: f64,
    /// Q2 = 1 - SSE / SST of the leave-one-out predictions.
    pub q2: f64,
    /// Share of left-out points inside their 95% interval.
    pub coverage95: f64,
    /// Mean of the standardised leave-one-out errors (about 0 when fine).
    pub standardized_mean: f64,
    /// Sd of the standardised leave-one-out errors (about 1 when fine).
    pub standardized_sd: f64,
    /// Trustworthy or needs more points.
    pub verdict: Verdict,
    /// Why, in plain words: the failed checks, or what passed.
    pub reason: String,
    /// Further remarks (badly predicted points, over-cautious intervals), not part of the verdict.
    pub notes: Vec<String>,
}

/// Judges each fit by its leave-one-out errors.
///
/// "Needs more points" when: fewer than 10 points per parameter; Q2 below
/// [`MIN_Q2`]; or coverage of the 95% interval below [`MIN_COVERAGE`].
/// Otherwise trustworthy. Notes (not part of the verdict) name badly
/// predicted points and intervals much wider than the errors.
pub fn check_fit(fits: &[MetricFit]) -> Vec<FitVerdict> {
    fits.iter().map(judge).collect()
}

/// How a metric name is written as a TOML key: bare if it can be, else
/// quoted (a JSON string is a valid TOML basic string for these names).
fn toml_key(name: &str) -> String {
    if !name.is_empty()
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-')
    {
        name.to_string()
    } else {
        serde_json::to_string(name).unwrap_or_else(|_| format!("\"{name}\""))
    }
}

fn judge(f: &MetricFit) -> FitVerdict {
    let l = &f.loo;
    let d = f.params.len().max(1) as u32;
    let mut failed: Vec<String> = Vec::new();
    if f.n_points < POINTS_PER_PARAM * d {
        failed.push(format!(
            "{} points for {} parameter{}; about {} per parameter ({}) are needed before the surrogate can be judged",
            f.n_points,
            d,
            if d == 1 { "" } else { "s" },
            POINTS_PER_PARAM,
            POINTS_PER_PARAM * d
        ));
    }
    if l.q2.is_nan() {
        failed.push(
            "Q2 cannot be computed: the metric has the same value at every point".to_string(),
        );
    } else if l.q2 < MIN_Q2 {
        failed.push(format!(
            "Q2 = {:.2} is below {MIN_Q2}: points left out are predicted poorly (the surrogate explains only {:.0}% of the variation between points)",
            l.q2,
            100.0 * l.q2.max(0.0)
        ));
    }
    if l.coverage95 < MIN_COVERAGE {
        failed.push(format!(
            "only {:.0}% of points left out fall inside their 95% interval (want at least {:.0}%): the sd is too small, the intervals are overconfident",
            100.0 * l.coverage95,
            100.0 * MIN_COVERAGE
        ));
    }
    let mut notes = Vec::new();
    if l.coverage95 > MAX_COVERAGE && l.standardized_sd < MIN_STANDARDIZED_SD {
        notes.push(format!(
            "the errors are much smaller than the sd says (standardised errors have sd {:.2}, about 1 is expected): the intervals are cautious, wider than they need to be",
            l.standardized_sd
        ));
    }
    for (z, idx) in l.standardized.iter().zip(&l.point_idx) {
        if z.abs() > LARGE_STANDARDIZED {
            notes.push(format!(
                "point {idx} is predicted badly when left out (standardised error {z:.1}): a sharp local change, or a bad run"
            ));
        }
    }
    let y = f.gp.observed_y();
    if f.log_from_data {
        let natural: Vec<f64> = y.iter().map(|&v| f.transform.inverse(v)).collect();
        notes.push(format!(
            "fitted on a log scale because every value is positive and they span about {:.0} orders of magnitude, so predictions are never negative; if {} can be zero or negative, declare [metrics.{}] transform = \"none\" in the sweep file",
            tessera_surrogate::transform::positive_decades(&natural).unwrap_or(0.0),
            f.metric,
            toml_key(&f.metric)
        ));
    }
    let n = y.len() as f64;
    let mean = y.iter().sum::<f64>() / n.max(1.0);
    let spread = y.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0).max(1.0);
    let noise = f.gp.observation_noise();
    let noise = noise.iter().sum::<f64>() / noise.len().max(1) as f64;
    let noise_share = if spread > 0.0 { noise / spread } else { 1.0 };
    let (verdict, reason) = if noise_share > NOISE_SHARE && !failed.is_empty() {
        (
            Verdict::BarelyChanges,
            if f.transform.is_identity() {
                format!(
                    "this metric barely changes over the box: the point means differ by sd {} while run-to-run noise alone gives sd {}; it hardly depends on the swept constants, and more points will not change that",
                    with_unit(short(spread.sqrt()), &f.unit),
                    with_unit(short(noise.sqrt()), &f.unit)
                )
            } else {
                format!(
                    "this metric barely changes over the box: on its fitted scale ({}) the point means differ by sd {} while run-to-run noise alone gives sd {}; it hardly depends on the swept constants, and more points will not change that",
                    f.transform.describe(),
                    short(spread.sqrt()),
                    short(noise.sqrt())
                )
            },
        )
    } else if failed.is_empty() {
        (
            Verdict::Trustworthy,
            format!(
                "Q2 = {:.2} and {:.0}% of points left out fall inside their 95% interval; typical error {}",
                l.q2,
                100.0 * l.coverage95,
                if f.unit.is_empty() {
                    short(l.rmse)
                } else {
                    format!("{} {}", short(l.rmse), f.unit)
                }
            ),
        )
    } else {
        (Verdict::NeedsMorePoints, failed.join("; "))
    };
    FitVerdict {
        metric: f.metric.clone(),
        unit: f.unit.clone(),
        n_points: f.n_points,
        n_results: f.n_results,
        loo_rmse: l.rmse,
        q2: l.q2,
        coverage95: l.coverage95,
        standardized_mean: l.standardized_mean,
        standardized_sd: l.standardized_sd,
        verdict,
        reason,
        notes,
    }
}

#[cfg(test)]
mod tests {
    use super::toml_key;

    /// Keys written into the note parse back to the same name as a table
    /// key (TOML 1.0.0, "Keys": bare keys are ASCII letters, digits, `_`
    /// and `-`; others are quoted basic strings with JSON-like escapes).
    #[test]
    fn metric_names_become_valid_toml_keys() {
        for name in [
            "value",
            "height_sd",
            "a b",
            "x.y",
            "q\"uote\\",
            "tab\there",
            "é",
            "",
        ] {
            let text = format!("[metrics.{}]\ntransform = \"none\"\n", toml_key(name));
            let table: toml::Table = text
                .parse()
                .unwrap_or_else(|e| panic!("{name:?} gave {text:?}: {e}"));
            let metrics = table["metrics"].as_table().expect("a table");
            assert!(metrics.contains_key(name), "{name:?} gave {text:?}");
        }
    }
}
