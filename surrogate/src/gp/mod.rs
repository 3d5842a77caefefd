//! Gaussian-process regression (Rasmussen & Williams 2006, GPML) with a
//! constant mean, standardised outputs, ARD Matern 5/2 or squared-exponential
//! kernels, a fitted nugget and known per-point noise variances (stochastic
//! kriging, Ankenman, Nelson & Staum 2010).
//!
//! Model, in standardised output units (y - y_mean) / y_scale:
//! y_i = m + f(x_i) + e_i, f ~ GP(0, s_f^2 k(x, x')), e_i ~ N(0, nugget + v_i),
//! with v_i the known noise variance of observation i (standardised).
//! `fit` chooses s_f^2, the length scales and the nugget by maximising the
//! log marginal likelihood (GPML eq. 2.30), with m at its generalised
//! least-squares value; predictions are returned in natural units.

mod batch;
mod fit;
mod gradient;
mod kernel;
mod linalg;
mod paths;

pub use fit::{bounds, FitOptions};
pub use gradient::{IntegratedVariance, PredictionGradient};
pub use kernel::KernelKind;
pub use paths::SamplePath;

use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use linalg::{cholesky, half_log_det, kernel_cross, kernel_lower, solve_chol, solve_lower};

/// Largest number of observations a [`Gp`] accepts: the dense factor of
/// 10,000 points takes 800 MB (twice that while it is built).
pub const MAX_OBSERVATIONS: usize = 10_000;

/// ln(2 pi).
const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// Training data. Inputs lie in the unit cube (the coordinator maps natural
/// units to it); `noise_var[i]` is the known variance of `y[i]` in natural
/// units, e.g. the sample variance of the replicates divided by their
/// number (stochastic kriging); 0 when unknown.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Observations {
    pub x: Vec<Vec<f64>>,
    pub y: Vec<f64>,
    pub noise_var: Vec<f64>,
}

impl Observations {
    /// Observations without known noise (all `noise_var` 0).
    pub fn new(x: Vec<Vec<f64>>, y: Vec<f64>) -> Self {
        let noise_var = vec![0.0; y.len()];
        Observations { x, y, noise_var }
    }
}

/// Hyperparameters, in standardised output units: `mean` is the constant
/// mean m, `signal_var` is s_f^2, `nugget` is the variance of the noise
/// shared by all points (added to each point's known noise). Length scales
/// are in unit-cube input units, one per input.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Hyper {
    pub mean: f64,
    pub signal_var: f64,
    pub lengthscales: Vec<f64>,
    pub nugget: f64,
}

/// A prediction at one point, in natural units.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Prediction {
    /// Posterior mean.
    pub mean: f64,
    /// Posterior standard deviation of the latent function f.
    pub sd: f64,
    /// Standard deviation of a new observation: f plus the nugget (not any
    /// point-specific known noise, which is unknown at a new point).
    pub sd_obs: f64,
}

/// Leave-one-out diagnostics (closed form, GPML sec. 5.4.2; Bastos &
/// O'Hagan 2009), in natural units, hyperparameters and mean held fixed.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Loo {
    /// Prediction of each y_i from all other points.
    pub mean: Vec<f64>,
    /// Standard deviation of the held-out observation y_i (includes the
    /// nugget and the point's known noise).
    pub sd: Vec<f64>,
    /// (y_i - mean_i) / sd_i; about N(0, 1) for a good surrogate.
    pub standardized: Vec<f64>,
    /// Root mean squared LOO error.
    pub rmse: f64,
    /// 1 - sum (y_i - mean_i)^2 / sum (y_i - ybar)^2; 0 when the outputs do
    /// not vary (never NaN, so it serialises to JSON).
    pub q2: f64,
    /// Fraction of points with |standardized| <= 1.959964.
    pub coverage95: f64,
}

/// Errors of GP construction. Bad observations come from user data;
/// the others are numerical failures.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum GpError {
    #[error("no observations")]
    Empty,
    #[error("{n} observations; at most {max} fit in dense memory (subsample or merge replicates)")]
    TooMany { n: usize, max: usize },
    #[error("observation {index}: {reason}")]
    BadObservation { index: usize, reason: String },
    #[error("bad hyperparameters: {0}")]
    BadHyper(String),
    #[error("kernel matrix of {n} points is not positive definite even with jitter {jitter:e}")]
    NotPositiveDefinite { n: usize, jitter: f64 },
    #[error("hyperparameter optimisation failed in all {restarts} starts: {last}")]
    OptimisationFailed { restarts: usize, last: String },
}

/// A fitted Gaussian process: data, hyperparameters and the Cholesky factor
/// of the covariance of the observations.
///
/// Serialises its data and hyperparameters only; deserialising refactorises
/// (O(n^3)).
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(into = "GpData", try_from = "GpData")]
pub struct Gp {
    kernel: KernelKind,
    hyper: Hyper,
    n: usize,
    d: usize,
    /// Inputs, row-major n x d.
    x: Vec<f64>,
    /// Standardised outputs.
    ys: Vec<f64>,
    /// Standardised known noise variances.
    noise: Vec<f64>,
    y_mean: f64,
    y_scale: f64,
    jitter: f64,
    /// Lower Cholesky factor of s_f^2 K + diag(nugget + noise + jitter), column-major.
    chol: Vec<f64>,
    /// (K + D)^-1 (ys - m).
    alpha: Vec<f64>,
    lml: f64,
    /// L^-1 (of `chol`) in f32 for bulk variances, built on first use (see `batch`).
    inv_chol32: batch::InverseFactor32,
}

/// The serialised form of a [`Gp`].
#[derive(Clone, Serialize, Deserialize)]
struct GpData {
    kernel: KernelKind,
    hyper: Hyper,
    x: Vec<Vec<f64>>,
    y: Vec<f64>,
    noise_var: Vec<f64>,
    y_mean: f64,
    y_scale: f64,
}

impl From<Gp> for GpData {
    fn from(gp: Gp) -> Self {
        let x = gp.x.chunks(gp.d.max(1)).map(<[f64]>::to_vec).collect();
        let x = if gp.d == 0 { vec![Vec::new(); gp.n] } else { x };
        GpData {
            kernel: gp.kernel,
            y: gp.ys.iter().map(|v| gp.y_mean + gp.y_scale * v).collect(),
            noise_var: gp
                .noise
                .iter()
                .map(|v| v * gp.y_scale * gp.y_scale)
                .collect(),
            hyper: gp.hyper,
            x,
            y_mean: gp.y_mean,
            y_scale: gp.y_scale,
        }
    }
}

impl TryFrom<GpData> for Gp {
    type Error = GpError;
    fn try_from(g: GpData) -> Result<Self, GpError> {
        let obs = Observations {
            x: g.x,
            y: g.y,
            noise_var: g.noise_var,
        };
        Gp::build(&obs, g.kernel, g.hyper, g.y_mean, g.y_scale)
    }
}

/// Check observations; returns the input dimension.
pub(crate) fn validate(obs: &Observations) -> Result<usize, GpError> {
    let n = obs.y.len();
    if n == 0 {
        return Err(GpError::Empty);
    }
    if n > MAX_OBSERVATIONS {
        return Err(GpError::TooMany {
            n,
            max: MAX_OBSERVATIONS,
        });
    }
    let bad = |index: usize, reason: &str| GpError::BadObservation {
        index,
        reason: reason.into(),
    };
    if obs.x.len() != n {
        return Err(bad(obs.x.len().min(n), "x and y have different lengths"));
    }
    if obs.noise_var.len() != n {
        return Err(bad(
            obs.noise_var.len().min(n),
            "noise_var and y have different lengths",
        ));
    }
    let d = obs.x[0].len();
    for i in 0..n {
        if obs.x[i].len() != d {
            return Err(bad(i, "inputs have different dimensions"));
        }
        if obs.x[i].iter().any(|v| !v.is_finite()) {
            return Err(bad(i, "input is not finite"));
        }
        if !obs.y[i].is_finite() {
            return Err(bad(i, "output is not finite"));
        }
        if !(obs.noise_var[i].is_finite() && obs.noise_var[i] >= 0.0) {
            return Err(bad(i, "noise variance is negative or not finite"));
        }
    }
    Ok(d)
}

/// Mean and population standard deviation (ddof = 0, as scikit-learn's
/// `normalize_y`); a zero spread gives scale 1.
pub(crate) fn standardisation(y: &[f64]) -> (f64, f64) {
    let n = y.len() as f64;
    let mean = y.iter().sum::<f64>() / n;
    let var = y.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n;
    let sd = var.sqrt();
    (mean, if sd > 0.0 && sd.is_finite() { sd } else { 1.0 })
}

fn check_hyper(h: &Hyper, d: usize) -> Result<(), GpError> {
    if h.lengthscales.len() != d {
        return Err(GpError::BadHyper(format!(
            "{} length scales for {d} inputs",
            h.lengthscales.len()
        )));
    }
    let pos = |v: f64| v.is_finite() && v > 0.0;
    if !pos(h.signal_var) || !h.lengthscales.iter().all(|&l| pos(l)) {
        return Err(GpError::BadHyper(
            "signal variance and length scales must be positive".into(),
        ));
    }
    if !(h.nugget.is_finite() && h.nugget >= 0.0 && h.mean.is_finite()) {
        return Err(GpError::BadHyper(
            "nugget must be >= 0 and the mean finite".into(),
        ));
    }
    Ok(())
}

/// Fit a GP: standardise outputs, choose hyperparameters by multi-start
/// L-BFGS on the log marginal likelihood (see [`FitOptions`]), then condition
/// on all observations.
pub fn fit(obs: &Observations, opts: &FitOptions) -> Result<Gp, GpError> {
    fit::fit(obs, opts)
}

impl Gp {
    /// A GP with fixed hyperparameters (no optimisation). With `standardise`
    /// the outputs are centred and scaled (ddof 0) and `hyper` is read in
    /// standardised units; without, `hyper` is in natural units.
    pub fn with_hyper(
        obs: &Observations,
        kernel: KernelKind,
        hyper: Hyper,
        standardise: bool,
    ) -> Result<Gp, GpError> {
        validate(obs)?;
        let (m, s) = if standardise {
            standardisation(&obs.y)
        } else {
            (0.0, 1.0)
        };
        Gp::build(obs, kernel, hyper, m, s)
    }

    pub(crate) fn build(
        obs: &Observations,
        kernel: KernelKind,
        hyper: Hyper,
        y_mean: f64,
        y_scale: f64,
    ) -> Result<Gp, GpError> {
        let d = validate(obs)?;
        check_hyper(&hyper, d)?;
        if !(y_mean.is_finite() && y_scale.is_finite() && y_scale > 0.0) {
            return Err(GpError::BadHyper(
                "output scaling must be finite and positive".into(),
            ));
        }
        let n = obs.y.len();
        let x: Vec<f64> = obs.x.iter().flatten().copied().collect();
        let ys: Vec<f64> = obs.y.iter().map(|v| (v - y_mean) / y_scale).collect();
        let noise: Vec<f64> = obs
            .noise_var
            .iter()
            .map(|v| v / (y_scale * y_scale))
            .collect();
        let inv_l: Vec<f64> = hyper.lengthscales.iter().map(|l| 1.0 / l).collect();
        let diag: Vec<f64> = noise.iter().map(|v| v + hyper.nugget).collect();
        let k = kernel_lower(kernel, &x, d, hyper.signal_var, &inv_l, &diag);
        let scale = hyper.signal_var + hyper.nugget;
        let f = cholesky(&k, n, scale)?;
        let mut gp = Gp {
            kernel,
            hyper,
            n,
            d,
            x,
            ys,
            noise,
            y_mean,
            y_scale,
            jitter: f.jitter,
            chol: f.l,
            alpha: Vec::new(),
            lml: 0.0,
            inv_chol32: batch::InverseFactor32::default(),
        };
        gp.refresh_alpha();
        Ok(gp)
    }

    /// Set the constant mean to its generalised least-squares value
    /// 1^T K^-1 y / 1^T K^-1 1 (standardised units).
    pub(crate) fn set_gls_mean(&mut self) {
        let n = self.n;
        let mut rhs = vec![1.0; n];
        rhs.extend_from_slice(&self.ys);
        solve_chol(&self.chol, n, &mut rhs);
        let s11: f64 = rhs[..n].iter().sum();
        let s1y: f64 = rhs[n..].iter().sum();
        if s11 > 0.0 && (s1y / s11).is_finite() {
            self.hyper.mean = s1y / s11;
        }
        self.refresh_alpha();
    }

    /// Recompute alpha and the LML from the factor.
    fn refresh_alpha(&mut self) {
        let mut a: Vec<f64> = self.ys.iter().map(|v| v - self.hyper.mean).collect();
        let r = a.clone();
        solve_chol(&self.chol, self.n, &mut a);
        let fit: f64 = r.iter().zip(&a).map(|(u, v)| u * v).sum();
        self.lml = -0.5 * fit - half_log_det(&self.chol, self.n) - 0.5 * self.n as f64 * LN_2PI;
        self.alpha = a;
    }

    /// Number of observations.
    pub fn n(&self) -> usize {
        self.n
    }

    /// Input dimension.
    pub fn dim(&self) -> usize {
        self.d
    }

    pub fn kernel(&self) -> KernelKind {
        self.kernel
    }

    /// Hyperparameters (standardised output units; see [`Hyper`]).
    pub fn hyper(&self) -> &Hyper {
        &self.hyper
    }

    /// Jitter added to the diagonal for a stable factorisation (standardised units).
    pub fn jitter(&self) -> f64 {
        self.jitter
    }

    /// Log marginal likelihood (GPML eq. 2.30) of the standardised outputs
    /// at the current hyperparameters (the same units as scikit-learn's
    /// `normalize_y=True`).
    pub fn log_marginal_likelihood(&self) -> f64 {
        self.lml
    }

    /// Prior standard deviation of f, natural units: y_scale * s_f.
    pub fn prior_sd(&self) -> f64 {
        self.y_scale * self.hyper.signal_var.sqrt()
    }

    /// The observed outputs, natural units.
    pub fn observed_y(&self) -> Vec<f64> {
        self.ys
            .iter()
            .map(|v| self.y_mean + self.y_scale * v)
            .collect()
    }

    /// The same GP for the negated outputs (-y): what a minimiser needs to
    /// maximise a metric. Hyperparameters and the factor are unchanged.
    pub fn negated(&self) -> Gp {
        let mut g = self.clone();
        g.y_mean = -g.y_mean;
        g.hyper.mean = -g.hyper.mean;
        for v in g.ys.iter_mut().chain(g.alpha.iter_mut()) {
            *v = -*v;
        }
        g
    }

    /// The noise variance of each observation in natural units: its known
    /// noise plus the fitted nugget.
    pub fn observation_noise(&self) -> Vec<f64> {
        let s2 = self.y_scale * self.y_scale;
        self.noise
            .iter()
            .map(|v| (v + self.hyper.nugget) * s2)
            .collect()
    }

    /// Observed inputs.
    pub fn observed_x(&self) -> Vec<Vec<f64>> {
        (0..self.n)
            .map(|i| self.x[i * self.d..(i + 1) * self.d].to_vec())
            .collect()
    }

    #[track_caller]
    fn flatten_queries(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        assert!(
            xs.iter().all(|p| p.len() == self.d),
            "query points must have dimension {}",
            self.d
        );
        xs.iter().flatten().copied().collect()
    }

    fn inv_l(&self) -> Vec<f64> {
        self.hyper.lengthscales.iter().map(|l| 1.0 / l).collect()
    }

    /// Posterior predictions at `xs` (natural units), in parallel blocks.
    /// Large batches (n >= 256 observations, >= 512 points) compute the
    /// variances' triangular solve in single precision, measure its error on
    /// a sample and redo in double precision every point it could affect
    /// (see the `batch` module; sd within 1e-3 relative of
    /// [`Gp::predict_exact`] in the tests). Means are always f64.
    #[track_caller]
    pub fn predict(&self, xs: &[Vec<f64>]) -> Vec<Prediction> {
        let z = self.flatten_queries(xs);
        self.predict_batch(&z, xs.len(), batch::Precision::Auto)
    }

    /// As [`Gp::predict`], in double precision throughout.
    #[track_caller]
    pub fn predict_exact(&self, xs: &[Vec<f64>]) -> Vec<Prediction> {
        let z = self.flatten_queries(xs);
        self.predict_batch(&z, xs.len(), batch::Precision::Exact)
    }

    /// Posterior means only (natural units): O(n) per point after the
    /// cross-covariances, no triangular solve; for trend maps and Sobol
    /// indices, which need many evaluations of the mean.
    #[track_caller]
    pub fn predict_mean(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        let z = self.flatten_queries(xs);
        self.mean_batch(&z, xs.len())
            .into_iter()
            .map(|mu| self.y_mean + self.y_scale * (self.hyper.mean + mu))
            .collect()
    }

    /// Posterior covariance matrix of f at `xs` (natural units, m x m).
    #[track_caller]
    pub fn predict_cov(&self, xs: &[Vec<f64>]) -> Vec<Vec<f64>> {
        let z = self.flatten_queries(xs);
        let (n, d, m) = (self.n, self.d, xs.len());
        let sf2 = self.hyper.signal_var;
        let inv_l = self.inv_l();
        let mut v = if d == 0 {
            vec![sf2; n * m]
        } else {
            kernel_cross(self.kernel, &self.x, &z, d, sf2, &inv_l)
        };
        solve_lower(&self.chol, n, &mut v);
        let s2 = self.y_scale * self.y_scale;
        (0..m)
            .into_par_iter()
            .map(|i| {
                (0..m)
                    .map(|j| {
                        let r2 = linalg_r2(&z, d, i, j, &inv_l);
                        let prior = sf2 * self.kernel.unit(r2);
                        let vi = &v[i * n..(i + 1) * n];
                        let vj = &v[j * n..(j + 1) * n];
                        let dot: f64 = vi.iter().zip(vj).map(|(a, b)| a * b).sum();
                        s2 * (prior - dot)
                    })
                    .collect()
            })
            .collect()
    }

    /// Closed-form leave-one-out predictions (GPML sec. 5.4.2, eqs. 5.10-5.12):
    /// mean_i = y_i - alpha_i / [K^-1]_ii, var_i = 1 / [K^-1]_ii, with K the
    /// covariance of the observations; hyperparameters and mean held fixed.
    pub fn loo(&self) -> Loo {
        let n = self.n;
        let kinv_diag = inverse_diagonal(&self.chol, n);
        let y = self.observed_y();
        let ybar = y.iter().sum::<f64>() / n as f64;
        let mut mean = Vec::with_capacity(n);
        let mut sd = Vec::with_capacity(n);
        let mut standardized = Vec::with_capacity(n);
        let (mut sse, mut sst, mut covered) = (0.0, 0.0, 0usize);
        for i in 0..n {
            let mu_s = self.ys[i] - self.alpha[i] / kinv_diag[i];
            let mu = self.y_mean + self.y_scale * mu_s;
            let s = self.y_scale / kinv_diag[i].sqrt();
            let e = y[i] - mu;
            let z = e / s;
            sse += e * e;
            sst += (y[i] - ybar) * (y[i] - ybar);
            if z.abs() <= 1.959_963_984_540_054 {
                covered += 1;
            }
            mean.push(mu);
            sd.push(s);
            standardized.push(z);
        }
        Loo {
            mean,
            sd,
            standardized,
            rmse: (sse / n as f64).sqrt(),
            q2: if sst > 0.0 { 1.0 - sse / sst } else { 0.0 },
            coverage95: covered as f64 / n as f64,
        }
    }

    /// A copy conditioned on its own predicted mean at each of `xs` (the
    /// kriging believer for many points at once): one new factorisation,
    /// O((n + m)^3), instead of m rank-one extensions of a copied factor.
    /// Hyperparameters, mean and output scaling unchanged.
    #[track_caller]
    pub fn believe_many(&self, xs: &[Vec<f64>]) -> Result<Gp, GpError> {
        if xs.is_empty() {
            return Ok(self.clone());
        }
        let means = self.predict_mean(xs);
        let mut obs = Observations {
            x: self.observed_x(),
            y: self.observed_y(),
            noise_var: self
                .noise
                .iter()
                .map(|v| v * self.y_scale * self.y_scale)
                .collect(),
        };
        obs.x.extend(xs.iter().cloned());
        obs.y.extend(means);
        obs.noise_var.extend(std::iter::repeat_n(0.0, xs.len()));
        Gp::build(
            &obs,
            self.kernel,
            self.hyper.clone(),
            self.y_mean,
            self.y_scale,
        )
    }

    /// A copy with one pseudo-observation (x, y) added, y in natural units
    /// with no known noise beyond the nugget; hyperparameters, mean and
    /// output scaling unchanged (kriging believer, Ginsbourger, Le Riche &
    /// Carraro 2010). The Cholesky factor is extended in O(n^2).
    #[track_caller]
    pub fn update_believer(&self, x: &[f64], y: f64) -> Result<Gp, GpError> {
        assert_eq!(x.len(), self.d, "point has the wrong dimension");
        if !y.is_finite() || x.iter().any(|v| !v.is_finite()) {
            return Err(GpError::BadObservation {
                index: self.n,
                reason: "not finite".into(),
            });
        }
        let n = self.n;
        let sf2 = self.hyper.signal_var;
        let inv_l = self.inv_l();
        let mut k = if self.d == 0 {
            vec![sf2; n]
        } else {
            kernel_cross(self.kernel, &self.x, x, self.d, sf2, &inv_l)
        };
        solve_lower(&self.chol, n, &mut k);
        if n + 1 > MAX_OBSERVATIONS {
            return Err(GpError::TooMany {
                n: n + 1,
                max: MAX_OBSERVATIONS,
            });
        }
        let diag = sf2 + self.hyper.nugget + self.jitter - k.iter().map(|v| v * v).sum::<f64>();
        if !(diag > 0.0 && diag.is_finite()) {
            return Err(GpError::NotPositiveDefinite {
                n: n + 1,
                jitter: self.jitter,
            });
        }
        let n1 = n + 1;
        let mut l = vec![0.0; n1 * n1];
        for j in 0..n {
            l[j * n1..j * n1 + n].copy_from_slice(&self.chol[j * n..(j + 1) * n]);
            l[j * n1 + n] = k[j];
        }
        l[n * n1 + n] = diag.sqrt();
        let mut gp = self.clone();
        gp.n = n1;
        gp.x.extend_from_slice(x);
        gp.ys.push((y - self.y_mean) / self.y_scale);
        gp.noise.push(0.0);
        gp.chol = l;
        gp.inv_chol32 = batch::InverseFactor32::default();
        gp.refresh_alpha();
        Ok(gp)
    }
}

fn linalg_r2(z: &[f64], d: usize, i: usize, j: usize, inv_l: &[f64]) -> f64 {
    kernel::scaled_sq_dist(&z[i * d..(i + 1) * d], &z[j * d..(j + 1) * d], inv_l)
}

/// Diagonal of (L L^T)^-1: squared column norms of L^-1.
fn inverse_diagonal(l: &[f64], n: usize) -> Vec<f64> {
    let mut inv = vec![0.0; n * n];
    for i in 0..n {
        inv[i * n + i] = 1.0;
    }
    solve_lower(l, n, &mut inv);
    // (K^-1)_ii = sum_k (L^-1)_{k i}^2: column i of L^-1.
    inv.par_chunks(n)
        .map(|col| col.iter().map(|v| v * v).sum())
        .collect()
}
