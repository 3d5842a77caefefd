//! Hyperparameter choice: the log marginal likelihood (GPML eq. 2.30) with
//! its analytic gradient (GPML eq. 5.9) in log parameters, maximised by
//! multi-start L-BFGS (argmin, More-Thuente line search).
//!
//! The constant mean is profiled out at its generalised least-squares value
//! m(theta) = 1^T K^-1 y / 1^T K^-1 1; by the envelope theorem the gradient of
//! the profiled LML is the partial gradient at fixed m.

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use argmin::core::{CostFunction, Executor, Gradient};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::quasinewton::LBFGS;
use faer::linalg::solvers::{DenseSolveCore, Solve};
use faer::MatMut;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use super::kernel::KernelKind;
use super::linalg::{cholesky_llt, kernel_lower_unit};
use super::{standardisation, validate, Gp, GpError, Hyper, Observations, LN_2PI};

/// Options of [`super::fit`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct FitOptions {
    pub kernel: KernelKind,
    /// Random starts in addition to the first, fixed start (as
    /// scikit-learn's `n_restarts_optimizer`): 1 + `restarts` starts in all.
    pub restarts: usize,
    /// Seed of the random starts and of the hyperparameter subset.
    pub seed: u64,
    /// Fit a nugget (shared noise variance); if false the nugget is 0 and
    /// only the known noise variances and jitter are on the diagonal.
    pub fit_nugget: bool,
    /// With more observations, hyperparameters are optimised on a seeded
    /// random subset of this size; the posterior uses all observations.
    /// Up to twice this size, the subset optimum is then polished by a few
    /// L-BFGS iterations on all observations.
    pub max_hyper_points: usize,
    /// Start from these hyperparameters (standardised units, as [`Gp::hyper`]
    /// returns them) instead of the default first start: a warm start from
    /// the previous fit when a few observations were added.
    #[serde(default)]
    pub start: Option<Hyper>,
    /// Keep the `start` hyperparameters as they are (no optimisation): the
    /// GP is only conditioned on the new data, at the cost of one
    /// factorisation.
    #[serde(default)]
    pub hold: bool,
    /// Most LML evaluations per start, and for the polish on all
    /// observations after a subset fit (`None`: no limit beyond the
    /// iteration limits). A run that spends them ends at the best point it
    /// evaluated. For planners that refit every few points: on smooth
    /// deterministic outputs the optimum lies at a large signal variance
    /// with the nugget at its bound, where rounding makes the LML noisy at
    /// about 1e-5 relative and the line search can spend hundreds of
    /// evaluations on that noise.
    #[serde(default)]
    pub max_evaluations: Option<usize>,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            kernel: KernelKind::Matern52,
            restarts: 5,
            seed: 0,
            fit_nugget: true,
            max_hyper_points: 1000,
            start: None,
            hold: false,
            max_evaluations: None,
        }
    }
}

/// Box for the hyperparameters (standardised outputs, unit-cube inputs):
/// `(signal_var, lengthscale, nugget)`, each `(low, high)`. Weak bounds that
/// keep the optimiser away from degenerate values (length scales far below
/// the point spacing or far beyond the cube); common practice, no source.
pub fn bounds() -> [(f64, f64); 3] {
    [(1e-3, 1e5), (1e-2, 1e3), (1e-8, 10.0)]
}

/// Penalty weight for leaving the box, per squared log unit (the objective
/// is -LML / n). Results are clamped into the box afterwards.
const PENALTY: f64 = 100.0;
const MAX_ITERS: u64 = 200;
/// L-BFGS iterations of the polish on all observations after a subset fit.
const POLISH_ITERS: u64 = 25;

/// The LML and its gradient in theta = (ln s_f^2, ln l_1..ln l_d [, ln nugget]).
struct Lml {
    value: f64,
    grad: Vec<f64>,
}

struct Data<'a> {
    kernel: KernelKind,
    x: &'a [f64],
    d: usize,
    ys: &'a [f64],
    noise: &'a [f64],
    fit_nugget: bool,
}

impl Data<'_> {
    fn n(&self) -> usize {
        self.ys.len()
    }

    fn dim_theta(&self) -> usize {
        self.d + 1 + usize::from(self.fit_nugget)
    }

    fn unpack(&self, theta: &[f64]) -> (f64, Vec<f64>, f64) {
        let sf2 = theta[0].exp();
        let l: Vec<f64> = theta[1..=self.d].iter().map(|t| t.exp()).collect();
        let nug = if self.fit_nugget {
            theta[self.d + 1].exp()
        } else {
            0.0
        };
        (sf2, l, nug)
    }

    fn lml(&self, theta: &[f64]) -> Result<Lml, GpError> {
        let (n, d) = (self.n(), self.d);
        let (sf2, l, nug) = self.unpack(theta);
        let inv_l: Vec<f64> = l.iter().map(|v| 1.0 / v).collect();
        let x = self.x;
        let kernel = self.kernel;
        // Unit-variance kernel and its length-scale factor, lower triangles.
        let mut ku = vec![0.0; n * n];
        let mut g = vec![0.0; n * n];
        kernel_lower_unit(kernel, x, d, &inv_l, &mut ku, Some(&mut g));
        let mut a: Vec<f64> = ku.iter().map(|v| sf2 * v).collect();
        for i in 0..n {
            a[i * n + i] += nug + self.noise[i];
        }
        let (llt, _jitter) = cholesky_llt(&a, n, sf2 + nug)?;
        drop(a);
        // Solve for [1, y].
        let mut rhs = vec![0.0; 2 * n];
        rhs[..n].iter_mut().for_each(|v| *v = 1.0);
        rhs[n..].copy_from_slice(self.ys);
        llt.solve_in_place(MatMut::from_column_major_slice_mut(&mut rhs, n, 2));
        let (k1, ky) = rhs.split_at(n);
        let s11: f64 = k1.iter().sum();
        let s1y: f64 = ky.iter().sum();
        let mean = if s11 > 0.0 { s1y / s11 } else { 0.0 };
        let alpha: Vec<f64> = ky.iter().zip(k1).map(|(a, b)| a - mean * b).collect();
        let fit: f64 = self
            .ys
            .iter()
            .zip(&alpha)
            .map(|(y, a)| (y - mean) * a)
            .sum();
        let lm = llt.L();
        let half_log_det: f64 = (0..n).map(|i| lm.get(i, i).ln()).sum();
        let value = -0.5 * fit - half_log_det - 0.5 * n as f64 * LN_2PI;
        if !value.is_finite() {
            return Err(GpError::NotPositiveDefinite {
                n,
                jitter: f64::NAN,
            });
        }
        let kinv = llt.inverse();
        // Per-column partial sums (collected in order, then summed: deterministic).
        let parts: Vec<Vec<f64>> = (0..n)
            .into_par_iter()
            .map(|j| {
                let mut acc = vec![0.0; d + 2];
                let kc = kinv.col_as_slice(j);
                let xj = &x[j * d..(j + 1) * d];
                let wjj = alpha[j] * alpha[j] - kc[j];
                acc[0] += wjj; // unit kernel diagonal is 1
                acc[d + 1] += wjj;
                for i in (j + 1)..n {
                    let w = 2.0 * (alpha[i] * alpha[j] - kc[i]);
                    acc[0] += w * ku[j * n + i];
                    let wg = w * g[j * n + i];
                    let xi = &x[i * d..(i + 1) * d];
                    for k in 0..d {
                        let t = (xi[k] - xj[k]) * inv_l[k];
                        acc[1 + k] += wg * t * t;
                    }
                }
                acc
            })
            .collect();
        let mut tot = vec![0.0; d + 2];
        for p in &parts {
            for (t, v) in tot.iter_mut().zip(p) {
                *t += v;
            }
        }
        let mut grad = Vec::with_capacity(self.dim_theta());
        grad.push(0.5 * sf2 * tot[0]);
        for k in 0..d {
            grad.push(0.5 * sf2 * tot[1 + k]);
        }
        if self.fit_nugget {
            grad.push(0.5 * nug * tot[d + 1]);
        }
        Ok(Lml { value, grad })
    }
}

/// A cached evaluation: parameters, cost, gradient.
type Evaluation = (Vec<f64>, f64, Vec<f64>);

/// The minimised objective: -LML / n plus the box penalty; cost and
/// gradient of one evaluation are cached (argmin asks for them separately).
/// After `budget` evaluations it refuses to evaluate (the run then stops
/// with the best point seen).
struct Objective<'a> {
    data: &'a Data<'a>,
    lo: Vec<f64>,
    hi: Vec<f64>,
    cache: Mutex<Option<Evaluation>>,
    budget: usize,
    used: &'a AtomicUsize,
    best: &'a Mutex<Option<(Vec<f64>, f64)>>,
}

impl Objective<'_> {
    fn eval(&self, theta: &[f64]) -> Result<(f64, Vec<f64>), GpError> {
        if let Ok(guard) = self.cache.lock() {
            if let Some((p, c, g)) = guard.as_ref() {
                if p.as_slice() == theta {
                    return Ok((*c, g.clone()));
                }
            }
        }
        if self.used.fetch_add(1, Ordering::Relaxed) >= self.budget {
            return Err(GpError::OptimisationFailed {
                restarts: 1,
                last: "evaluation budget spent".into(),
            });
        }
        let n = self.data.n() as f64;
        let r = self.data.lml(theta)?;
        let mut cost = -r.value / n;
        let mut grad: Vec<f64> = r.grad.iter().map(|g| -g / n).collect();
        for (i, &t) in theta.iter().enumerate() {
            let ex = if t < self.lo[i] {
                t - self.lo[i]
            } else if t > self.hi[i] {
                t - self.hi[i]
            } else {
                0.0
            };
            cost += PENALTY * ex * ex;
            grad[i] += 2.0 * PENALTY * ex;
        }
        if let Ok(mut guard) = self.cache.lock() {
            *guard = Some((theta.to_vec(), cost, grad.clone()));
        }
        if let Ok(mut guard) = self.best.lock() {
            if guard.as_ref().is_none_or(|b| cost < b.1) {
                *guard = Some((theta.to_vec(), cost));
            }
        }
        Ok((cost, grad))
    }
}

impl CostFunction for Objective<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, p: &Vec<f64>) -> Result<f64, argmin::core::Error> {
        Ok(self.eval(p)?.0)
    }
}

impl Gradient for Objective<'_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, p: &Vec<f64>) -> Result<Vec<f64>, argmin::core::Error> {
        Ok(self.eval(p)?.1)
    }
}

/// One L-BFGS run from `start` of at most `max_iters` iterations and
/// `budget` evaluations; returns the clamped optimum and its LML.
fn run_start(
    data: &Data<'_>,
    lo: &[f64],
    hi: &[f64],
    start: Vec<f64>,
    max_iters: u64,
    budget: usize,
) -> Result<(Vec<f64>, f64), String> {
    let used = AtomicUsize::new(0);
    let seen = Mutex::new(None);
    let obj = Objective {
        data,
        lo: lo.to_vec(),
        hi: hi.to_vec(),
        cache: Mutex::new(None),
        budget,
        used: &used,
        best: &seen,
    };
    let solver = LBFGS::new(MoreThuenteLineSearch::new(), 7)
        .with_tolerance_grad(1e-7)
        .and_then(|s| s.with_tolerance_cost(1e-12))
        .map_err(|e| e.to_string())?;
    let best = match Executor::new(obj, solver)
        .configure(|s| s.param(start.clone()).max_iters(max_iters))
        .run()
    {
        Ok(res) => res.state().best_param.clone().unwrap_or(start),
        Err(e) => match seen.into_inner().ok().flatten() {
            Some((best, _)) if used.load(Ordering::Relaxed) > budget => best,
            _ => return Err(e.to_string()),
        },
    };
    let clamped: Vec<f64> = best
        .iter()
        .zip(lo.iter().zip(hi))
        .map(|(t, (l, h))| {
            if t.is_finite() {
                t.clamp(*l, *h)
            } else {
                0.5 * (l + h)
            }
        })
        .collect();
    let v = data.lml(&clamped).map_err(|e| e.to_string())?.value;
    Ok((clamped, v))
}

pub(super) fn fit(obs: &Observations, opts: &FitOptions) -> Result<Gp, GpError> {
    let d = validate(obs)?;
    let n = obs.y.len();
    let (y_mean, y_scale) = standardisation(&obs.y);
    if let (true, Some(h)) = (opts.hold, &opts.start) {
        if h.lengthscales.len() == d {
            let mut gp = Gp::build(obs, opts.kernel, h.clone(), y_mean, y_scale)?;
            gp.set_gls_mean();
            return Ok(gp);
        }
    }
    let ys: Vec<f64> = obs.y.iter().map(|v| (v - y_mean) / y_scale).collect();
    let noise: Vec<f64> = obs
        .noise_var
        .iter()
        .map(|v| v / (y_scale * y_scale))
        .collect();
    let x: Vec<f64> = obs.x.iter().flatten().copied().collect();

    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed);
    // Hyperparameter subset.
    let cap = opts.max_hyper_points.max(2);
    let (hx, hy, hn) = if n > cap {
        let mut idx: Vec<usize> = (0..n).collect();
        idx.shuffle(&mut rng);
        idx.truncate(cap);
        idx.sort_unstable();
        let hx: Vec<f64> = idx
            .iter()
            .flat_map(|&i| x[i * d..(i + 1) * d].iter().copied())
            .collect();
        (
            hx,
            idx.iter().map(|&i| ys[i]).collect(),
            idx.iter().map(|&i| noise[i]).collect(),
        )
    } else {
        (x.clone(), ys.clone(), noise.clone())
    };
    let data = Data {
        kernel: opts.kernel,
        x: &hx,
        d,
        ys: &hy,
        noise: &hn,
        fit_nugget: opts.fit_nugget,
    };

    let [bs, bl, bn] = bounds();
    let mut lo = vec![bs.0.ln()];
    let mut hi = vec![bs.1.ln()];
    lo.extend(std::iter::repeat_n(bl.0.ln(), d));
    hi.extend(std::iter::repeat_n(bl.1.ln(), d));
    if opts.fit_nugget {
        lo.push(bn.0.ln());
        hi.push(bn.1.ln());
    }
    // First start: unit signal variance, length scale 0.3 sqrt(d) (about a
    // third of the mean distance of random points), nugget 1e-3; then
    // log-uniform random starts in a central part of the box.
    let mut starts = Vec::with_capacity(opts.restarts + 1);
    let warm = opts
        .start
        .as_ref()
        .filter(|h| h.lengthscales.len() == d && h.signal_var > 0.0);
    let first = match warm {
        Some(h) => {
            let mut t = vec![h.signal_var.ln()];
            t.extend(h.lengthscales.iter().map(|l| l.max(1e-300).ln()));
            if opts.fit_nugget {
                t.push(h.nugget.max(bn.0).ln());
            }
            t.iter()
                .zip(lo.iter().zip(&hi))
                .map(|(v, (l, h))| v.clamp(*l, *h))
                .collect()
        }
        None => {
            let mut first = vec![0.0];
            first.extend(std::iter::repeat_n(
                (0.3 * (d.max(1) as f64).sqrt()).ln(),
                d,
            ));
            if opts.fit_nugget {
                first.push(1e-3f64.ln());
            }
            first
        }
    };
    starts.push(first);
    for _ in 0..opts.restarts {
        let mut s = vec![rng.random_range(0.1f64.ln()..10f64.ln())];
        for _ in 0..d {
            s.push(rng.random_range(0.05f64.ln()..2f64.ln()));
        }
        if opts.fit_nugget {
            s.push(rng.random_range(1e-6f64.ln()..1e-1f64.ln()));
        }
        starts.push(s);
    }
    let budget = opts.max_evaluations.unwrap_or(usize::MAX);
    let results: Vec<Result<(Vec<f64>, f64), String>> = starts
        .into_par_iter()
        .map(|s| run_start(&data, &lo, &hi, s, MAX_ITERS, budget))
        .collect();
    let mut best: Option<(Vec<f64>, f64)> = None;
    let mut last_err = String::new();
    for r in results {
        match r {
            Ok((t, v)) if v.is_finite() => {
                if best.as_ref().is_none_or(|b| v > b.1) {
                    best = Some((t, v));
                }
            }
            Ok(_) => last_err = "non-finite likelihood".into(),
            Err(e) => last_err = e,
        }
    }
    let Some((theta, _)) = best else {
        return Err(GpError::OptimisationFailed {
            restarts: opts.restarts + 1,
            last: last_err,
        });
    };
    // Subset fits of up to twice the subset size are polished on all the
    // observations, from the subset optimum (a few L-BFGS iterations).
    let mut theta = theta;
    if n > cap && n <= 2 * cap {
        let full = Data {
            x: &x,
            ys: &ys,
            noise: &noise,
            ..data
        };
        let start_lml = full
            .lml(&theta)
            .map(|r| r.value)
            .unwrap_or(f64::NEG_INFINITY);
        if let Ok((t, v)) = run_start(&full, &lo, &hi, theta.clone(), POLISH_ITERS, budget) {
            if v > start_lml {
                theta = t;
            }
        }
    }
    let (sf2, l, nug) = data.unpack(&theta);
    let hyper = Hyper {
        mean: 0.0,
        signal_var: sf2,
        lengthscales: l,
        nugget: nug,
    };
    let mut gp = Gp::build(obs, opts.kernel, hyper, y_mean, y_scale)?;
    gp.set_gls_mean();
    Ok(gp)
}
