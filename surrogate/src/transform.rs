//! Output transforms for bounded metrics: a metric that cannot leave
//! `[lo, hi]` (a fraction, a count, a volume) is fitted on a scale where it
//! is unbounded, and its predictions are mapped back, so that the predicted
//! mean and every interval stay inside the bounds.
//!
//! - Two bounds: the logit of `(y - lo) / (hi - lo)`, squeezed into
//!   `[SQUEEZE, 1 - SQUEEZE]` first so that values on a bound stay finite.
//! - One bound: the logarithm of the distance to the bound plus a small
//!   shift (`SQUEEZE` times the largest observed distance), for the same
//!   reason.
//! - A metric with no bounds at all whose values are all positive and span
//!   [`LOG_SCALE_DECADES`] orders of magnitude or more is fitted on the log
//!   scale of `[0, inf]` (see [`positive_decades`]; the sweep decides).
//!
//! A Gaussian prediction `N(mu, s^2)` on the fitted scale is mapped back by
//! its quantiles (the transform is monotone, so the 95% interval maps to the
//! 95% interval) and its mean and sd by Gauss-Hermite quadrature of the
//! inverse transform (Golub & Welsch 1969; nodes by Newton's method on the
//! Hermite recurrence, as in Press et al., Numerical Recipes, sec. 4.6).

use serde::{Deserialize, Serialize};
use std::sync::OnceLock;

/// How far values on a bound are moved inside it before the logit or log
/// (a fraction of the range, or of the largest observed distance to the
/// bound; our choice).
pub const SQUEEZE: f64 = 1e-3;

/// Orders of magnitude from which a positive metric with no declared bounds
/// is fitted on a log scale (`[metrics.NAME] transform = "auto"`; common
/// practice, no source: Jones, Schonlau & Welch 1998 fitted such a
/// function, Goldstein-Price, on a log scale).
pub const LOG_SCALE_DECADES: f64 = 3.0;

/// The orders of magnitude spanned by `observed`, `log10(max / min)`, if
/// every value is finite and positive (`None` otherwise or if empty).
pub fn positive_decades(observed: &[f64]) -> Option<f64> {
    if observed.is_empty() || observed.iter().any(|v| !v.is_finite() || *v <= 0.0) {
        return None;
    }
    let lo = observed.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = observed.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    Some((hi / lo).log10())
}

/// The 97.5% quantile of the standard normal distribution.
const Z95: f64 = 1.959_963_984_540_054;

/// Nodes of the Gauss-Hermite rule used for means and sds.
const HERMITE_NODES: usize = 48;

/// A monotone map from a metric's natural scale to the scale it is fitted on.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize, Default)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Transform {
    /// Fitted as it is.
    #[default]
    Identity,
    /// `ln(y - lo + shift)`: bounded below.
    LogAbove {
        /// The lower bound.
        lo: f64,
        /// Added before the logarithm so that `y = lo` stays finite.
        shift: f64,
    },
    /// `ln(hi - y + shift)`: bounded above (decreasing).
    LogBelow {
        /// The upper bound.
        hi: f64,
        /// Added before the logarithm so that `y = hi` stays finite.
        shift: f64,
    },
    /// `logit(SQUEEZE + (1 - 2 SQUEEZE) (y - lo) / (hi - lo))`: bounded on both sides.
    Logit {
        /// The lower bound.
        lo: f64,
        /// The upper bound.
        hi: f64,
    },
}

/// A prediction mapped back to the metric's natural scale.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Natural {
    /// Mean of the back-transformed predictive distribution.
    pub mean: f64,
    /// Its standard deviation.
    pub sd: f64,
    /// 2.5% quantile.
    pub lower95: f64,
    /// 97.5% quantile.
    pub upper95: f64,
    /// Median (the inverse transform of the fitted-scale mean).
    pub median: f64,
}

impl Transform {
    /// The transform for a metric with the given bounds (`None`: unbounded on
    /// that side), given the values observed so far (for the shift of a
    /// one-sided log). Two finite bounds give the logit, one the log, none
    /// the identity.
    pub fn for_bounds(lo: Option<f64>, hi: Option<f64>, observed: &[f64]) -> Transform {
        let lo = lo.filter(|v| v.is_finite());
        let hi = hi.filter(|v| v.is_finite());
        let shift = |dist: &dyn Fn(f64) -> f64| {
            let far = observed
                .iter()
                .filter(|v| v.is_finite())
                .map(|&v| dist(v).max(0.0))
                .fold(0.0, f64::max);
            if far > 0.0 {
                SQUEEZE * far
            } else {
                SQUEEZE
            }
        };
        match (lo, hi) {
            (Some(lo), Some(hi)) if hi > lo => Transform::Logit { lo, hi },
            (Some(lo), None) => Transform::LogAbove {
                lo,
                shift: shift(&|v| v - lo),
            },
            (None, Some(hi)) => Transform::LogBelow {
                hi,
                shift: shift(&|v| hi - v),
            },
            _ => Transform::Identity,
        }
    }

    /// Whether this is the identity.
    pub fn is_identity(&self) -> bool {
        matches!(self, Transform::Identity)
    }

    /// A short description for tables: `"logit on [0, 1]"`.
    pub fn describe(&self) -> String {
        match *self {
            Transform::Identity => "none".to_string(),
            Transform::LogAbove { lo, .. } => format!("log (bounded below by {lo})"),
            Transform::LogBelow { hi, .. } => format!("log (bounded above by {hi})"),
            Transform::Logit { lo, hi } => format!("logit on [{lo}, {hi}]"),
        }
    }

    /// Clamps a value into the bounds.
    pub fn clamp(&self, y: f64) -> f64 {
        match *self {
            Transform::Identity => y,
            Transform::LogAbove { lo, .. } => y.max(lo),
            Transform::LogBelow { hi, .. } => y.min(hi),
            Transform::Logit { lo, hi } => y.clamp(lo, hi),
        }
    }

    /// From the natural scale to the fitted scale (values beyond a bound are
    /// taken as on it).
    pub fn forward(&self, y: f64) -> f64 {
        let y = self.clamp(y);
        match *self {
            Transform::Identity => y,
            Transform::LogAbove { lo, shift } => (y - lo + shift).ln(),
            Transform::LogBelow { hi, shift } => (hi - y + shift).ln(),
            Transform::Logit { lo, hi } => {
                let s = SQUEEZE + (1.0 - 2.0 * SQUEEZE) * (y - lo) / (hi - lo);
                (s / (1.0 - s)).ln()
            }
        }
    }

    /// From the fitted scale back to the natural scale, inside the bounds.
    pub fn inverse(&self, z: f64) -> f64 {
        let y = match *self {
            Transform::Identity => z,
            Transform::LogAbove { lo, shift } => lo + z.exp() - shift,
            Transform::LogBelow { hi, shift } => hi - z.exp() + shift,
            Transform::Logit { lo, hi } => {
                let s = 1.0 / (1.0 + (-z).exp());
                lo + (hi - lo) * (s - SQUEEZE) / (1.0 - 2.0 * SQUEEZE)
            }
        };
        self.clamp(y)
    }

    /// Maps a Gaussian prediction `N(mu, sd^2)` on the fitted scale back to
    /// the natural scale: quantiles exactly (the map is monotone), mean and
    /// sd by Gauss-Hermite quadrature.
    pub fn natural(&self, mu: f64, sd: f64) -> Natural {
        if self.is_identity() {
            return Natural {
                mean: mu,
                sd,
                lower95: mu - Z95 * sd,
                upper95: mu + Z95 * sd,
                median: mu,
            };
        }
        let (a, b) = (self.inverse(mu - Z95 * sd), self.inverse(mu + Z95 * sd));
        let (lower95, upper95) = if a <= b { (a, b) } else { (b, a) };
        let (mean, var) = self.moments(mu, sd);
        Natural {
            mean: self.clamp(mean),
            sd: var.max(0.0).sqrt(),
            lower95,
            upper95,
            median: self.inverse(mu),
        }
    }

    /// Mean and variance of `inverse(Z)`, `Z ~ N(mu, sd^2)`.
    fn moments(&self, mu: f64, sd: f64) -> (f64, f64) {
        if sd.is_nan() || sd <= 0.0 {
            return (self.inverse(mu), 0.0);
        }
        let (x, w) = hermite();
        let mut m1 = 0.0;
        let mut m2 = 0.0;
        let c = std::f64::consts::SQRT_2 * sd;
        let centre = self.inverse(mu);
        for (xi, wi) in x.iter().zip(w) {
            // Centred on the median for accuracy of the variance.
            let v = self.inverse(mu + c * xi) - centre;
            m1 += wi * v;
            m2 += wi * v * v;
        }
        let norm = std::f64::consts::PI.sqrt();
        let (m1, m2) = (m1 / norm, m2 / norm);
        (centre + m1, m2 - m1 * m1)
    }
}

/// Nodes and weights of the `HERMITE_NODES`-point Gauss-Hermite rule for the
/// weight `exp(-x^2)`: `sum w_i f(x_i) ~ integral f(x) exp(-x^2) dx`.
pub fn hermite() -> &'static (Vec<f64>, Vec<f64>) {
    static RULE: OnceLock<(Vec<f64>, Vec<f64>)> = OnceLock::new();
    RULE.get_or_init(|| gauss_hermite(HERMITE_NODES))
}

/// The `n`-point Gauss-Hermite rule by Newton's method on the orthonormal
/// Hermite recurrence (Press et al., Numerical Recipes, 3rd ed., sec. 4.6.1).
pub fn gauss_hermite(n: usize) -> (Vec<f64>, Vec<f64>) {
    const PIM4: f64 = 0.751_125_544_464_942_5; // pi^(-1/4)
    let mut x = vec![0.0; n];
    let mut w = vec![0.0; n];
    let nf = n as f64;
    let m = n.div_ceil(2);
    let mut z = 0.0f64;
    for i in 0..m {
        z = match i {
            0 => (2.0 * nf + 1.0).sqrt() - 1.85575 * (2.0 * nf + 1.0).powf(-0.16667),
            1 => z - 1.14 * nf.powf(0.426) / z,
            2 => 1.86 * z - 0.86 * x[0],
            3 => 1.91 * z - 0.91 * x[1],
            _ => 2.0 * z - x[i - 2],
        };
        let mut pp = 1.0;
        for _ in 0..100 {
            let mut p1 = PIM4;
            let mut p2 = 0.0;
            for j in 0..n {
                let p3 = p2;
                p2 = p1;
                let jf = j as f64;
                p1 = z * (2.0 / (jf + 1.0)).sqrt() * p2 - (jf / (jf + 1.0)).sqrt() * p3;
            }
            pp = (2.0 * nf).sqrt() * p2;
            let z1 = z;
            z = z1 - p1 / pp;
            if (z - z1).abs() <= 1e-15 * z.abs().max(1.0) {
                break;
            }
        }
        x[i] = z;
        x[n - 1 - i] = -z;
        w[i] = 2.0 / (pp * pp);
        w[n - 1 - i] = w[i];
    }
    (x, w)
}

#[cfg(test)]
mod tests {
    use super::*;

    // Analytic: the rule integrates exp(-x^2) x^(2k) exactly,
    // Gamma(k + 1/2) = sqrt(pi) (2k-1)!! / 2^k.
    #[test]
    fn hermite_rule_integrates_even_moments() {
        let (x, w) = gauss_hermite(HERMITE_NODES);
        let pi = std::f64::consts::PI;
        let moment = |k: i32| {
            x.iter()
                .zip(&w)
                .map(|(xi, wi)| wi * xi.powi(2 * k))
                .sum::<f64>()
        };
        assert!((moment(0) - pi.sqrt()).abs() < 1e-12);
        assert!((moment(1) - pi.sqrt() / 2.0).abs() < 1e-12);
        assert!((moment(2) - 3.0 * pi.sqrt() / 4.0).abs() < 1e-12);
    }

    // Analytic: exp of N(mu, s^2) is log-normal with mean exp(mu + s^2/2)
    // and variance (exp(s^2) - 1) exp(2 mu + s^2).
    #[test]
    fn log_transform_gives_lognormal_moments() {
        let t = Transform::LogAbove {
            lo: 0.0,
            shift: 0.0,
        };
        let (mu, s) = (0.3, 0.7);
        let n = t.natural(mu, s);
        let mean = (mu + s * s / 2.0f64).exp();
        let sd = ((s * s).exp_m1() * (2.0 * mu + s * s).exp()).sqrt();
        assert!((n.mean - mean).abs() < 1e-10 * mean, "{} vs {mean}", n.mean);
        assert!((n.sd - sd).abs() < 1e-8 * sd, "{} vs {sd}", n.sd);
        assert!((n.lower95 - (mu - Z95 * s).exp()).abs() < 1e-12);
    }

    #[test]
    fn logit_round_trips_and_stays_inside() {
        let t = Transform::Logit { lo: 0.0, hi: 1.0 };
        for y in [0.0, 1e-6, 0.3, 0.999, 1.0] {
            assert!((t.inverse(t.forward(y)) - y).abs() < 1e-12, "{y}");
        }
        for (mu, s) in [(0.0, 5.0), (8.0, 3.0), (-8.0, 30.0)] {
            let n = t.natural(mu, s);
            for v in [n.mean, n.lower95, n.upper95, n.median] {
                assert!((0.0..=1.0).contains(&v), "{v} from N({mu}, {s})");
            }
            assert!(n.lower95 <= n.median && n.median <= n.upper95);
        }
    }

    #[test]
    fn bounds_choose_the_transform() {
        assert_eq!(Transform::for_bounds(None, None, &[]), Transform::Identity);
        assert_eq!(
            Transform::for_bounds(Some(0.0), Some(1.0), &[]),
            Transform::Logit { lo: 0.0, hi: 1.0 }
        );
        assert_eq!(
            Transform::for_bounds(Some(0.0), Some(f64::INFINITY), &[2.0, 5.0]),
            Transform::LogAbove {
                lo: 0.0,
                shift: 5e-3
            }
        );
        assert_eq!(
            Transform::for_bounds(None, Some(1.0), &[]),
            Transform::LogBelow {
                hi: 1.0,
                shift: SQUEEZE
            }
        );
    }
}
