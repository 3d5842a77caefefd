//! Gradients of the posterior mean and standard deviation with respect to
//! the input, for optimising acquisition functions (GPML eq. 2.25 and 2.26
//! differentiated in x*).
//!
//! mu(x) = m + k(x)^T alpha, so d mu / dx = sum_i alpha_i dk(x, x_i)/dx.
//! s2(x) = s_f^2 - k(x)^T K^-1 k(x), so d s2 / dx = -2 sum_i w_i dk(x, x_i)/dx
//! with w = K^-1 k(x); d s / dx = (d s2 / dx) / (2 s). For a stationary
//! kernel k(x, z) = s_f^2 k_u(r), r^2 = sum_j ((x_j - z_j)/l_j)^2:
//! dk/dx_j = -s_f^2 c(r) (x_j - z_j) / l_j^2 with c(r) = (5/3)(1 + sqrt5 r)
//! exp(-sqrt5 r) for Matern 5/2 and c = k_u for the squared exponential.

use rayon::prelude::*;

use super::kernel::{scaled_sq_dist, KernelKind};
use faer::linalg::matmul::matmul;
use faer::{Accum, MatMut, MatRef, Par};

use super::linalg::{kernel_cross, solve_chol};
use super::Gp;

const SQRT5: f64 = 2.236_067_977_499_79;

/// A prediction with its gradients, natural units.
#[derive(Clone, Debug, PartialEq)]
pub struct PredictionGradient {
    /// Posterior mean.
    pub mean: f64,
    /// Posterior sd of f.
    pub sd: f64,
    /// d mean / d x.
    pub d_mean: Vec<f64>,
    /// d sd / d x (0 where sd is 0).
    pub d_sd: Vec<f64>,
}

/// c(r) of the module docs, and k_u(r), for unit signal variance.
fn radial(kind: KernelKind, r2: f64) -> (f64, f64) {
    match kind {
        KernelKind::Matern52 => {
            let r = r2.sqrt();
            let e = (-SQRT5 * r).exp();
            (
                5.0 / 3.0 * (1.0 + SQRT5 * r) * e,
                (1.0 + SQRT5 * r + 5.0 / 3.0 * r2) * e,
            )
        }
        KernelKind::SquaredExponential => {
            let k = (-0.5 * r2).exp();
            (k, k)
        }
    }
}

impl Gp {
    /// The prediction at `x` with the gradients of its mean and sd in `x`.
    #[track_caller]
    pub fn predict_gradient(&self, x: &[f64]) -> PredictionGradient {
        assert_eq!(x.len(), self.d, "point has the wrong dimension");
        let (n, d) = (self.n, self.d);
        let sf2 = self.hyper.signal_var;
        let inv_l2: Vec<f64> = self
            .hyper
            .lengthscales
            .iter()
            .map(|l| 1.0 / (l * l))
            .collect();
        let inv_l: Vec<f64> = self.hyper.lengthscales.iter().map(|l| 1.0 / l).collect();
        // k(x) and dk/dx (n x d, row-major), standardised units.
        let mut k = vec![0.0; n];
        let mut dk = vec![0.0; n * d];
        for i in 0..n {
            let xi = &self.x[i * d..(i + 1) * d];
            let r2 = scaled_sq_dist(x, xi, &inv_l);
            let (c, ku) = radial(self.kernel, r2);
            k[i] = sf2 * ku;
            for j in 0..d {
                dk[i * d + j] = -sf2 * c * (x[j] - xi[j]) * inv_l2[j];
            }
        }
        let mean_s = self.hyper.mean + k.iter().zip(&self.alpha).map(|(a, b)| a * b).sum::<f64>();
        let mut w = k.clone();
        solve_chol(&self.chol, n, &mut w);
        let var_s = (sf2 - k.iter().zip(&w).map(|(a, b)| a * b).sum::<f64>()).max(0.0);
        let mut d_mean = vec![0.0; d];
        let mut d_var = vec![0.0; d];
        for i in 0..n {
            for j in 0..d {
                d_mean[j] += self.alpha[i] * dk[i * d + j];
                d_var[j] -= 2.0 * w[i] * dk[i * d + j];
            }
        }
        let sd_s = var_s.sqrt();
        let s = self.y_scale;
        PredictionGradient {
            mean: self.y_mean + s * mean_s,
            sd: s * sd_s,
            d_mean: d_mean.iter().map(|v| s * v).collect(),
            d_sd: d_var
                .iter()
                .map(|v| {
                    if sd_s > 0.0 {
                        s * v / (2.0 * sd_s)
                    } else {
                        0.0
                    }
                })
                .collect(),
        }
    }

    /// The reduction of the integrated posterior variance of f over the
    /// reference points `reference` (each of weight 1/m) if an observation
    /// with the nugget's noise were added at each candidate `xs`; natural
    /// units. This is the ALC criterion of Cohn (1996), as used for GP
    /// design by Gramacy & Lee (2009): for a new point x with noise t^2,
    /// delta(x) = (1/m) sum_z cov(z, x)^2 / (s2(x) + t^2).
    /// [`IntegratedVariance`] keeps the per-reference work for many calls.
    #[track_caller]
    pub fn integrated_variance_reduction(
        &self,
        reference: &[Vec<f64>],
        xs: &[Vec<f64>],
    ) -> Vec<f64> {
        IntegratedVariance::new(self, reference).reduction(xs)
    }
}

/// The integrated-variance reduction of a GP over fixed reference points,
/// with the solves K^-1 k(z) done once (n x m), so that each candidate
/// costs O(n m) plus one posterior variance; the products for a block of
/// candidates are one dense matrix product.
pub struct IntegratedVariance<'a> {
    gp: &'a Gp,
    reference: &'a [Vec<f64>],
    /// Reference points, row-major.
    z: Vec<f64>,
    /// K^-1 k(z) for every reference point, n x m column-major.
    kz: Vec<f64>,
}

impl std::fmt::Debug for IntegratedVariance<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("IntegratedVariance")
            .field("reference", &self.reference.len())
            .finish()
    }
}

/// Candidates per dense product in [`IntegratedVariance::reduction`].
const IV_BLOCK: usize = 128;

impl<'a> IntegratedVariance<'a> {
    /// Prepares the criterion of `gp` over `reference`.
    #[track_caller]
    pub fn new(gp: &'a Gp, reference: &'a [Vec<f64>]) -> Self {
        let (n, d) = (gp.n, gp.d);
        assert!(
            reference.iter().all(|p| p.len() == d),
            "points must have dimension {d}"
        );
        let z: Vec<f64> = reference.iter().flatten().copied().collect();
        let mut kz = cross(gp, &gp.x, n, &z, reference.len());
        solve_chol(&gp.chol, n, &mut kz);
        IntegratedVariance {
            gp,
            reference,
            z,
            kz,
        }
    }

    /// The reduction at each of `xs` (natural units).
    #[track_caller]
    pub fn reduction(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        let gp = self.gp;
        let (n, d) = (gp.n, gp.d);
        let m = self.reference.len();
        if m == 0 {
            return vec![0.0; xs.len()];
        }
        assert!(
            xs.iter().all(|x| x.len() == d),
            "points must have dimension {d}"
        );
        let noise = gp.hyper.nugget + gp.jitter;
        let s2 = gp.y_scale * gp.y_scale;
        let var: Vec<f64> = gp
            .predict(xs)
            .iter()
            .map(|p| (p.sd / gp.y_scale).powi(2))
            .collect();
        let kzv = MatRef::from_column_major_slice(&self.kz, n, m);
        xs.par_chunks(IV_BLOCK)
            .zip(var.par_chunks(IV_BLOCK))
            .flat_map_iter(|(block, var)| {
                let b = block.len();
                let flat: Vec<f64> = block.iter().flatten().copied().collect();
                // cov(z, x) = k(z, x) - (K^-1 k(z))^T k(x), m x b.
                let kx = cross(gp, &gp.x, n, &flat, b);
                let mut cov = cross(gp, &self.z, m, &flat, b);
                matmul(
                    MatMut::from_column_major_slice_mut(&mut cov, m, b),
                    Accum::Add,
                    kzv.transpose(),
                    MatRef::from_column_major_slice(&kx, n, b),
                    -1.0,
                    Par::Seq,
                );
                cov.chunks(m)
                    .zip(var)
                    .map(|(col, var_x)| {
                        let total: f64 = col.iter().map(|c| c * c).sum();
                        s2 * total / (m as f64 * (var_x + noise))
                    })
                    .collect::<Vec<f64>>()
            })
            .collect()
    }
}

/// s_f^2 k(a_i, b_j) for `na` rows a and `nb` rows b (row-major):
/// na x nb, column-major.
fn cross(gp: &Gp, a: &[f64], na: usize, b: &[f64], nb: usize) -> Vec<f64> {
    if gp.d == 0 {
        return vec![gp.hyper.signal_var; na * nb];
    }
    kernel_cross(gp.kernel, a, b, gp.d, gp.hyper.signal_var, &gp.inv_l())
}
