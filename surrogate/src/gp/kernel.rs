//! Stationary covariance functions with ARD length scales (GPML ch. 4):
//! Matern 5/2 and squared exponential.

use serde::{Deserialize, Serialize};

/// The covariance function of a [`super::Gp`]. Both use one length scale per
/// input (automatic relevance determination) and a signal variance s_f^2.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq, Default)]
pub enum KernelKind {
    /// k = s_f^2 (1 + sqrt5 r + 5 r^2 / 3) exp(-sqrt5 r), r the scaled
    /// distance (GPML eq. 4.17 with nu = 5/2).
    #[default]
    Matern52,
    /// k = s_f^2 exp(-r^2 / 2) (GPML eq. 4.9).
    SquaredExponential,
}

const SQRT5: f64 = 2.236_067_977_499_79;

impl KernelKind {
    /// Covariance at squared scaled distance `r2`, for unit signal variance.
    #[inline]
    pub(crate) fn unit(self, r2: f64) -> f64 {
        match self {
            KernelKind::Matern52 => {
                let r = r2.sqrt();
                (1.0 + SQRT5 * r + 5.0 / 3.0 * r2) * (-SQRT5 * r).exp()
            }
            KernelKind::SquaredExponential => (-0.5 * r2).exp(),
        }
    }

    /// Covariance and the factor g with d k / d log l_k = g (delta_k / l_k)^2,
    /// both for unit signal variance.
    ///
    /// Matern 5/2: g = (5/3)(1 + sqrt5 r) exp(-sqrt5 r); SE: g = k.
    #[inline]
    pub(crate) fn unit_with_grad(self, r2: f64) -> (f64, f64) {
        match self {
            KernelKind::Matern52 => {
                let r = r2.sqrt();
                let e = (-SQRT5 * r).exp();
                let k = (1.0 + SQRT5 * r + 5.0 / 3.0 * r2) * e;
                (k, 5.0 / 3.0 * (1.0 + SQRT5 * r) * e)
            }
            KernelKind::SquaredExponential => {
                let k = (-0.5 * r2).exp();
                (k, k)
            }
        }
    }
}

/// Squared distance between `a` and `b` scaled by inverse length scales.
#[inline]
pub(crate) fn scaled_sq_dist(a: &[f64], b: &[f64], inv_l: &[f64]) -> f64 {
    let mut s = 0.0;
    for ((u, v), w) in a.iter().zip(b).zip(inv_l) {
        let t = (u - v) * w;
        s += t * t;
    }
    s
}
