//! Acquisition: where to run next, from a fitted surrogate.
//!
//! - [`Strategy::Improve`]: expected improvement for minimisation (Jones,
//!   Schonlau & Welch 1998) over the best *predicted* mean at the sampled
//!   points, the plug-in variant that stays sound when observations are
//!   noisy (Picheny, Wagner & Ginsbourger 2013, "A benchmark of kriging-based
//!   infill criteria for noisy optimization", Struct. Multidisc. Optim.
//!   48:607-626).
//! - [`Strategy::Explore`]: the largest reduction of the integrated predictive
//!   variance over the box (the ALC criterion of Cohn 1996, used for GP
//!   designs by Gramacy & Lee 2009), so that a trend map improves evenly
//!   instead of piling points on the faces of the box, where the predictive
//!   sd alone is largest.
//!
//! Both are weighted by the probability that a run succeeds, when a model of
//! failures is given (expected improvement times the probability of
//! feasibility: Schonlau, Welch & Jones 1998; Gardner et al. 2014).
//!
//! The search: a few thousand space-filling candidates (and, for Improve,
//! perturbations of the best sampled points), then local optimisation from
//! the best few: projected gradient ascent with the analytic gradients of
//! the GP mean and sd for Improve, a shrinking random search for Explore.
//! Batches of q points use the kriging believer (Ginsbourger, Le Riche &
//! Carraro 2010). Deterministic given the seed.

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use rayon::prelude::*;
use serde::{Deserialize, Serialize};

use crate::gp::{Gp, IntegratedVariance};

/// 1/sqrt(2 pi).
const INV_SQRT_2PI: f64 = 0.398_942_280_401_432_7;

/// Standard normal density.
pub fn normal_pdf(z: f64) -> f64 {
    INV_SQRT_2PI * (-0.5 * z * z).exp()
}

/// Standard normal distribution function, Phi(z) = erfc(-z/sqrt 2)/2, with
/// `libm::erfc` (a port of the musl/FreeBSD implementation, about 1 ulp):
/// using erfc rather than 1 + erf keeps full relative accuracy in the lower
/// tail.
pub fn normal_cdf(z: f64) -> f64 {
    0.5 * libm::erfc(-z / std::f64::consts::SQRT_2)
}

/// Expected improvement below `f_best` of a normal prediction with mean `mu`
/// and standard deviation `sigma` (minimisation; Jones, Schonlau & Welch
/// 1998): EI = (f_best - mu) Phi(z) + sigma phi(z), z = (f_best - mu)/sigma,
/// and EI = max(f_best - mu, 0) when sigma = 0.
///
/// Far in the lower tail (z < -10) the two terms cancel; there the
/// asymptotic series sigma phi(z) sum_k (-1)^(k+1) (2k-1)!! / z^(2k) is used
/// (from the Mills-ratio expansion of Phi). Relative accuracy is about
/// 1e-13 for |z| < 5 and 1e-11 further out (erfc error amplified by the
/// cancellation), against 50-digit values.
#[track_caller]
pub fn expected_improvement(f_best: f64, mu: f64, sigma: f64) -> f64 {
    assert!(sigma >= 0.0, "sigma must be non-negative, got {sigma}");
    let gain = f_best - mu;
    if sigma == 0.0 {
        return gain.max(0.0);
    }
    let z = gain / sigma;
    if z >= -10.0 {
        return (gain * normal_cdf(z) + sigma * normal_pdf(z)).max(0.0);
    }
    // z Phi(z) + phi(z) = phi(z) (1/z^2 - 3/z^4 + 15/z^6 - ...).
    let inv_z2 = 1.0 / (z * z);
    let mut term = inv_z2;
    let mut sum = 0.0;
    let mut sign = 1.0;
    for k in 1..40 {
        sum += sign * term;
        let next = term * (2 * k + 1) as f64 * inv_z2;
        if next >= term || next < 1e-18 * sum.abs() {
            break;
        }
        term = next;
        sign = -sign;
    }
    (sigma * normal_pdf(z) * sum).max(0.0)
}

/// What [`propose`] looks for.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Strategy {
    /// Maximise expected improvement for minimisation of the GP's output.
    Improve,
    /// Maximise the reduction of the integrated predictive variance.
    Explore,
}

/// Maps a point of the unit cube to the nearest point the sweep can run.
pub type Snap<'a> = &'a (dyn Fn(&[f64]) -> Vec<f64> + Sync);

/// A criterion with its gradient at a point.
type WithGradient<'a> = &'a dyn Fn(&[f64]) -> (f64, Vec<f64>);

/// Everything but the objective surrogate that a proposal depends on.
#[derive(Clone, Copy, Default)]
pub struct Context<'a> {
    /// Points already in the sweep but not in the surrogate (still running,
    /// or failed): proposals keep away from them.
    pub avoid: &'a [Vec<f64>],
    /// Points still running: before proposing, the surrogate is conditioned
    /// on its own prediction at each (kriging believer), so new points are
    /// chosen as if their results were in.
    pub pending: &'a [Vec<f64>],
    /// A GP of the failure rate over the box: P(fail) is its mean clamped to
    /// [0, 1]. Acquisitions are weighted by 1 - P(fail).
    pub failure: Option<&'a Gp>,
    /// Maps a point of the unit cube to the nearest point the sweep can
    /// run (the centre of an integer parameter's cell).
    pub snap: Option<Snap<'a>>,
    /// Choose a single point (q = 1) by Thompson sampling instead of
    /// expected improvement (batches of two or more always end with one).
    pub thompson: bool,
    /// Choose the first point of the batch where the predicted mean is
    /// lowest (pure exploitation), if that point is free.
    pub exploit: bool,
}

impl std::fmt::Debug for Context<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Context")
            .field("avoid", &self.avoid.len())
            .field("pending", &self.pending.len())
            .field("failure", &self.failure.is_some())
            .field("snap", &self.snap.is_some())
            .field("thompson", &self.thompson)
            .finish()
    }
}

/// One proposed point and what the surrogate believed there.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Proposal {
    /// The point, in the unit cube.
    pub x: Vec<f64>,
    /// The acquisition value that chose it (expected improvement, or the
    /// integrated-variance reduction, times the probability of success).
    pub acquisition: f64,
    /// Predicted mean of the objective there.
    pub mean: f64,
    /// Predictive sd of the objective there.
    pub sd: f64,
    /// Predicted probability that a run fails there (0 without a failure model).
    pub p_fail: f64,
}

/// The minimum distance between points, as a share of the typical spacing
/// sqrt(d) n^(-1/d) (our choice, common practice, no source: small enough
/// that a narrow minimum can be approached, 1% of a 2-D box's width after
/// 80 points, large enough to avoid repeating a point).
const SEPARATION: f64 = 0.01;
/// Space-filling candidates per proposed point.
const N_CANDIDATES: usize = 2048;
/// Best sampled points around which local candidates are drawn (Improve).
const N_INCUMBENTS: usize = 8;
/// Local candidates per incumbent and scale.
const N_LOCAL: usize = 32;
/// Local optimisations per proposed point.
const N_STARTS: usize = 8;
/// Steps of projected gradient ascent.
const GRADIENT_STEPS: usize = 60;
/// Rounds of the random local search (Explore) and trial points per round.
const SEARCH_ROUNDS: usize = 15;
const SEARCH_BATCH: usize = 12;
/// When the point of largest expected improvement has its predicted mean
/// more than this many sds above the best, its improvement comes from
/// uncertainty alone: the basins seen so far are exhausted, and the point is
/// chosen by the integrated-variance reduction instead, which explores the
/// interior of the box rather than its corners, where the sd is largest
/// (our choice: 3).
const UNCERTAINTY_ONLY: f64 = 3.0;
/// Batches larger than this are chosen from one scoring of the candidates
/// instead of one search per point (see [`large_batch`]).
const LARGE_BATCH: usize = 16;
/// Reference points for the integrated variance (Monte Carlo over the box).
const N_REFERENCE: usize = 256;

/// P(fail) at `x` and its gradient, from the failure GP.
fn failure_at(failure: Option<&Gp>, x: &[f64]) -> (f64, Vec<f64>) {
    let d = x.len();
    match failure {
        None => (0.0, vec![0.0; d]),
        Some(g) => {
            let p = g.predict_gradient(x);
            if p.mean <= 0.0 {
                (0.0, vec![0.0; d])
            } else if p.mean >= 1.0 {
                (1.0, vec![0.0; d])
            } else {
                (p.mean, p.d_mean)
            }
        }
    }
}

fn p_fail_many(failure: Option<&Gp>, pts: &[Vec<f64>]) -> Vec<f64> {
    match failure {
        None => vec![0.0; pts.len()],
        Some(g) => g
            .predict_mean(pts)
            .into_iter()
            .map(|m| m.clamp(0.0, 1.0))
            .collect(),
    }
}

fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(u, v)| (u - v) * (u - v)).sum()
}

/// A Latin hypercube of `n` points in `d` dimensions (not optimised: the
/// candidates only need to cover the box).
fn lhs(n: usize, d: usize, rng: &mut ChaCha8Rng) -> Vec<Vec<f64>> {
    let mut pts = vec![vec![0.0; d]; n];
    let mut perm: Vec<usize> = (0..n).collect();
    for k in 0..d {
        perm.shuffle(rng);
        for (row, &s) in pts.iter_mut().zip(&perm) {
            row[k] = (s as f64 + rng.random::<f64>()) / n as f64;
        }
    }
    pts
}

fn gauss(rng: &mut ChaCha8Rng) -> f64 {
    rng.sample(StandardNormal)
}

/// Expected improvement times the probability of success, and its gradient.
fn improve_value(gp: &Gp, failure: Option<&Gp>, f_best: f64, x: &[f64]) -> (f64, Vec<f64>) {
    let p = gp.predict_gradient(x);
    let ei = expected_improvement(f_best, p.mean, p.sd);
    let (pf, dpf) = failure_at(failure, x);
    let w = 1.0 - pf;
    let mut g = vec![0.0; x.len()];
    if p.sd > 0.0 {
        let z = (f_best - p.mean) / p.sd;
        let (cdf, pdf) = (normal_cdf(z), normal_pdf(z));
        for j in 0..x.len() {
            let dei = -cdf * p.d_mean[j] + pdf * p.d_sd[j];
            g[j] = dei * w - ei * dpf[j];
        }
    }
    (ei * w, g)
}

/// Projected gradient ascent in the unit cube from `x0`, with step halving.
fn ascend(x0: &[f64], f: WithGradient<'_>) -> (Vec<f64>, f64) {
    let mut x = x0.to_vec();
    let (mut fx, mut g) = f(&x);
    let mut step = 0.05;
    for _ in 0..GRADIENT_STEPS {
        let norm = g.iter().map(|v| v * v).sum::<f64>().sqrt();
        if norm.is_nan() || norm <= 0.0 || step < 1e-7 {
            break;
        }
        let trial: Vec<f64> = x
            .iter()
            .zip(&g)
            .map(|(xi, gi)| (xi + step * gi / norm).clamp(0.0, 1.0))
            .collect();
        let (ft, gt) = f(&trial);
        if ft > fx {
            x = trial;
            fx = ft;
            g = gt;
            step *= 1.5;
        } else {
            step *= 0.5;
        }
    }
    (x, fx)
}

/// Derivative-free local search in the unit cube from `x0` (shrinking
/// Gaussian steps), for criteria without a cheap gradient.
fn search(
    x0: &[f64],
    f0: f64,
    rng: &mut ChaCha8Rng,
    f: &dyn Fn(&[Vec<f64>]) -> Vec<f64>,
) -> (Vec<f64>, f64) {
    let (mut x, mut fx) = (x0.to_vec(), f0);
    let mut step = 0.05;
    for _ in 0..SEARCH_ROUNDS {
        let trial: Vec<Vec<f64>> = (0..SEARCH_BATCH)
            .map(|_| {
                x.iter()
                    .map(|&v| (v + step * gauss(rng)).clamp(0.0, 1.0))
                    .collect()
            })
            .collect();
        let vals = f(&trial);
        let mut improved = false;
        for (t, v) in trial.into_iter().zip(vals) {
            if v > fx {
                x = t;
                fx = v;
                improved = true;
            }
        }
        if !improved {
            step *= 0.5;
        }
    }
    (x, fx)
}

/// Propose `q` new points in the unit cube for `gp` (see the module docs).
///
/// Every point keeps a minimum distance sep = 0.01 sqrt(d) (n + q)^(-1/d)
/// (our heuristic, common practice, no source) from the sampled points,
/// `ctx.avoid` and the other proposals; if nothing satisfies it (a crowded
/// cube), the best candidate is taken regardless.
#[track_caller]
pub fn propose(
    gp: &Gp,
    strategy: Strategy,
    q: usize,
    ctx: &Context<'_>,
    seed: u64,
) -> Vec<Proposal> {
    let d = gp.dim();
    assert!(
        ctx.avoid.iter().all(|p| p.len() == d),
        "avoid points must have dimension {d}"
    );
    if q == 0 {
        return Vec::new();
    }
    if d == 0 {
        return vec![
            Proposal {
                x: Vec::new(),
                acquisition: 0.0,
                mean: gp.predict_mean(&[Vec::new()])[0],
                sd: 0.0,
                p_fail: 0.0,
            };
            q
        ];
    }
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let observed = gp.observed_x();
    let sep = SEPARATION * (d as f64).sqrt() * ((observed.len() + q) as f64).powf(-1.0 / d as f64);
    let sep2 = sep * sep;
    let mut blocked: Vec<Vec<f64>> = ctx.avoid.iter().chain(observed.iter()).cloned().collect();
    let reference = lhs(N_REFERENCE, d, &mut rng);
    let snap = |x: Vec<f64>| match ctx.snap {
        Some(s) => s(&x),
        None => x,
    };
    let pending: Vec<Vec<f64>> = ctx
        .pending
        .iter()
        .filter(|p| p.len() == d)
        .cloned()
        .collect();
    let mut model = gp.believe_many(&pending).unwrap_or_else(|_| gp.clone());
    blocked.extend(ctx.pending.iter().cloned());
    // Work per proposal shrinks with the batch and the data, so that a
    // large batch on a large sweep still takes about a second.
    let n = model.n().max(1) as f64;
    let budget = 4e9 / (q as f64 * n * n);
    let n_candidates = (budget as usize).clamp(256, N_CANDIDATES);
    let n_starts = if n_candidates < N_CANDIDATES {
        3
    } else {
        N_STARTS
    };
    if q > LARGE_BATCH {
        return large_batch(
            &model, strategy, q, ctx, &blocked, sep2, &reference, &mut rng,
        );
    }
    let mut out: Vec<Proposal> = Vec::with_capacity(q);
    for _ in 0..q {
        let free = |p: &[f64], blocked: &[Vec<f64>]| blocked.iter().all(|b| dist2(p, b) >= sep2);
        let mut cands = lhs(n_candidates, d, &mut rng);
        // Plug-in best: the smallest predicted mean at a sampled point.
        let sampled = model.observed_x();
        let at_sampled = model.predict_mean(&sampled);
        let f_best = at_sampled.iter().copied().fold(f64::INFINITY, f64::min);
        if strategy == Strategy::Improve {
            let mut order: Vec<usize> = (0..sampled.len()).collect();
            order.sort_by(|&a, &b| at_sampled[a].total_cmp(&at_sampled[b]));
            for &i in order.iter().take(N_INCUMBENTS) {
                for scale in [0.02, 0.1] {
                    for _ in 0..N_LOCAL {
                        cands.push(
                            sampled[i]
                                .iter()
                                .map(|&v| (v + scale * gauss(&mut rng)).clamp(0.0, 1.0))
                                .collect(),
                        );
                    }
                }
            }
        }
        let p_fail = p_fail_many(ctx.failure, &cands);
        // The variance-reduction criterion of the current model, prepared
        // once per proposal (the reference solves) and only if needed.
        let iv_cell: std::sync::OnceLock<IntegratedVariance<'_>> = std::sync::OnceLock::new();
        let iv = || iv_cell.get_or_init(|| IntegratedVariance::new(&model, &reference));
        let score_many = |effective: Strategy, m: &Gp, pts: &[Vec<f64>], pf: &[f64]| -> Vec<f64> {
            match effective {
                Strategy::Improve => m
                    .predict(pts)
                    .iter()
                    .zip(pf)
                    .map(|(p, f)| expected_improvement(f_best, p.mean, p.sd) * (1.0 - f))
                    .collect(),
                Strategy::Explore => iv()
                    .reduction(pts)
                    .into_iter()
                    .zip(pf)
                    .map(|(v, f)| v * (1.0 - f))
                    .collect(),
            }
        };
        // One search under a criterion: the best candidates, then local
        // optimisation from the distinct best few.
        let pick = |effective: Strategy, rng: &mut ChaCha8Rng| -> Vec<f64> {
            let scores = score_many(effective, &model, &cands, &p_fail);
            let mut idx: Vec<usize> = (0..cands.len()).collect();
            idx.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
            let mut starts: Vec<usize> = Vec::new();
            for &i in &idx {
                if starts.len() == n_starts {
                    break;
                }
                if free(&cands[i], &blocked)
                    && starts
                        .iter()
                        .all(|&s| dist2(&cands[s], &cands[i]) >= 4.0 * sep2)
                {
                    starts.push(i);
                }
            }
            let seeds: Vec<u64> = (0..starts.len()).map(|_| rng.random()).collect();
            let model_ref = &model;
            let blocked_ref = &blocked;
            let refined: Vec<(Vec<f64>, f64)> = starts
                .par_iter()
                .zip(seeds)
                .map(|(&s, sd)| {
                    let (x, v) = match effective {
                        Strategy::Improve => ascend(&cands[s], &|x| {
                            improve_value(model_ref, ctx.failure, f_best, x)
                        }),
                        Strategy::Explore => {
                            let mut r = ChaCha8Rng::seed_from_u64(sd);
                            search(&cands[s], scores[s], &mut r, &|pts| {
                                let pf = p_fail_many(ctx.failure, pts);
                                score_many(effective, model_ref, pts, &pf)
                            })
                        }
                    };
                    let x = snap(x);
                    if free(&x, blocked_ref) {
                        (x, v)
                    } else {
                        (cands[s].clone(), scores[s])
                    }
                })
                .collect();
            refined
                .into_iter()
                .max_by(|a, b| a.1.total_cmp(&b.1))
                .map(|(x, _)| x)
                .unwrap_or_else(|| snap(cands[idx[0]].clone()))
        };
        let mut effective = strategy;
        let thompson =
            strategy == Strategy::Improve && out.len() + 1 == q && (q >= 2 || ctx.thompson);
        let exploit = strategy == Strategy::Improve && out.is_empty() && ctx.exploit;
        let exploited = if exploit {
            exploit_pick(&model, &cands, &p_fail, &|p: &[f64]| free(p, &blocked))
                .map(&snap)
                .filter(|x| free(x, &blocked))
        } else {
            None
        };
        let thompson = thompson && exploited.is_none();
        // In a batch of four or more whose turn starts at the surrogate's
        // minimum, the second point is a Thompson sample near the first
        // (the minimum, or expected improvement's choice when the minimum
        // lies too close to a point already in the sweep).
        let local = if strategy == Strategy::Improve
            && q >= LOCAL_FROM
            && out.len() == 1
            && ctx.exploit
            && exploited.is_none()
        {
            let centre = out[0].x.clone();
            let near: Vec<Vec<f64>> = [0.005, 0.02, 0.05]
                .iter()
                .flat_map(|&scale| {
                    (0..N_NEAR)
                        .map(|_| {
                            centre
                                .iter()
                                .map(|&v| (v + scale * gauss(&mut rng)).clamp(0.0, 1.0))
                                .collect::<Vec<f64>>()
                        })
                        .collect::<Vec<_>>()
                })
                .map(&snap)
                .collect();
            let pf = p_fail_many(ctx.failure, &near);
            thompson_pick(
                &model,
                &near,
                &pf,
                &|p: &[f64]| free(p, &blocked),
                rng.random(),
            )
        } else {
            None
        };
        let mut chosen = if let Some(x) = exploited.clone() {
            x
        } else if let Some(x) = local.clone() {
            x
        } else if thompson {
            thompson_pick(
                &model,
                &cands,
                &p_fail,
                &|p: &[f64]| free(p, &blocked),
                rng.random(),
            )
            .map(&snap)
            .unwrap_or_else(|| pick(strategy, &mut rng))
        } else {
            pick(strategy, &mut rng)
        };
        if strategy == Strategy::Improve && !thompson && exploited.is_none() && local.is_none() {
            // Expected improvement that comes from uncertainty alone (the
            // predicted mean far above the best) chases the corners of the
            // box, where the sd is largest. Improve near the best instead if
            // any candidate there still promises improvement; otherwise
            // explore the interior.
            let from_uncertainty = |x: &[f64]| {
                let p = model.predict(&[x.to_vec()])[0];
                p.sd <= 0.0 || (f_best - p.mean) / p.sd < -UNCERTAINTY_ONLY
            };
            if from_uncertainty(&chosen) {
                let preds = model.predict(&cands);
                let near = cands
                    .iter()
                    .zip(&preds)
                    .zip(&p_fail)
                    .filter(|((c, p), _)| {
                        p.sd > 0.0
                            && (f_best - p.mean) / p.sd >= -UNCERTAINTY_ONLY
                            && free(c, &blocked)
                    })
                    .map(|((c, p), f)| (c, expected_improvement(f_best, p.mean, p.sd) * (1.0 - f)))
                    .filter(|(_, v)| *v > 0.0)
                    .max_by(|a, b| a.1.total_cmp(&b.1))
                    .map(|(c, _)| c.clone());
                match near {
                    Some(c) => {
                        let (x, _) = ascend(&c, &|x| improve_value(&model, ctx.failure, f_best, x));
                        let x = snap(x);
                        chosen = if free(&x, &blocked) && !from_uncertainty(&x) {
                            x
                        } else {
                            snap(c)
                        };
                    }
                    None => {
                        effective = Strategy::Explore;
                        chosen = pick(effective, &mut rng);
                    }
                }
            }
        }
        // What the surrogate believes at the chosen point (after snapping).
        let pf = p_fail_many(ctx.failure, std::slice::from_ref(&chosen))[0];
        let pred = model.predict(std::slice::from_ref(&chosen))[0];
        let acquisition = match effective {
            Strategy::Improve => expected_improvement(f_best, pred.mean, pred.sd) * (1.0 - pf),
            Strategy::Explore => iv().reduction(std::slice::from_ref(&chosen))[0] * (1.0 - pf),
        };
        if let Ok(m) = model.update_believer(&chosen, pred.mean) {
            model = m;
        }
        blocked.push(chosen.clone());
        out.push(Proposal {
            x: chosen,
            acquisition,
            mean: pred.mean,
            sd: pred.sd,
            p_fail: pf,
        });
    }
    out
}

/// Thompson sampling (Thompson 1933; for batches of GP optimisation,
/// Kandasamy et al. 2018): the minimiser, over the free candidates, of one
/// posterior sample path, weighted by the probability that a run succeeds
/// (a failing point counts as no improvement). One point of each batch is
/// chosen this way, so that the batch also tries where the minimum may be,
/// in proportion to the surrogate's belief, rather than only where expected
/// improvement peaks. The path is drawn by pathwise conditioning
/// ([`Gp::sample_path`], [`PATH_FEATURES`] random features): its cost grows
/// linearly with the candidates, where a joint draw at m candidates costs
/// O(m^3).
fn thompson_pick(
    model: &Gp,
    cands: &[Vec<f64>],
    p_fail: &[f64],
    free: &dyn Fn(&[f64]) -> bool,
    seed: u64,
) -> Option<Vec<f64>> {
    let idx: Vec<usize> = (0..cands.len()).filter(|&i| free(&cands[i])).collect();
    if idx.is_empty() {
        return None;
    }
    let pts: Vec<Vec<f64>> = idx.iter().map(|&i| cands[i].clone()).collect();
    let path = model.sample_path(PATH_FEATURES, seed).eval(&pts);
    let best_seen = model
        .predict_mean(&model.observed_x())
        .into_iter()
        .fold(f64::INFINITY, f64::min);
    idx.iter()
        .zip(&path)
        .map(|(&i, &v)| {
            // A likely failure is scored at the best value seen (no gain).
            let f = p_fail.get(i).copied().unwrap_or(0.0);
            (i, f * best_seen + (1.0 - f) * v)
        })
        .min_by(|a, b| a.1.total_cmp(&b.1))
        .map(|(i, _)| cands[i].clone())
}

/// The free point of lowest predicted mean, likely failures (P(fail) of
/// one half or more) excluded: the best candidate, then projected descent
/// on the mean. Expected improvement alone seldom spends a run where the
/// surrogate is already confident, so a minimum narrower than the spacing
/// of the points is approached slowly; an occasional run at the
/// surrogate's own minimum refines it (pure exploitation, the limit of the
/// lower confidence bound with no exploration weight).
fn exploit_pick(
    model: &Gp,
    cands: &[Vec<f64>],
    p_fail: &[f64],
    free: &dyn Fn(&[f64]) -> bool,
) -> Option<Vec<f64>> {
    let means = model.predict_mean(cands);
    let start = (0..cands.len())
        .filter(|&i| p_fail.get(i).copied().unwrap_or(0.0) < 0.5 && free(&cands[i]))
        .min_by(|&a, &b| means[a].total_cmp(&means[b]))?;
    let (x, _) = ascend(&cands[start], &|x| {
        let p = model.predict_gradient(x);
        (-p.mean, p.d_mean.iter().map(|g| -g).collect())
    });
    Some(if free(&x) { x } else { cands[start].clone() })
}

/// Smallest batch whose second point is a Thompson sample near the
/// surrogate's minimum (our choice, measured in docs/benchmarks.md).
const LOCAL_FROM: usize = 4;

/// Candidates per scale for that sample.
const N_NEAR: usize = 150;

/// Random features of the prior in a Thompson sample path (our choice: far
/// from the data, one path's covariance then errs by about sqrt(2 / 1024),
/// 4% of the signal variance; near the data the path is exact).
const PATH_FEATURES: usize = 1024;

/// A large batch from one scoring of the candidates, so that hundreds of
/// points take about a second: for [`Strategy::Improve`], expected
/// improvement with local penalisation (Gonzalez, Dai, Hennig & Lawrence
/// 2016, "Batch Bayesian optimization via local penalization", AISTATS):
/// after each choice x_j the acquisition is multiplied by
/// phi(x) = Phi((M + L |x - x_j| - mu(x_j)) / s(x_j)), the probability that
/// x lies outside the ball around x_j that cannot hold the minimum, with M
/// the best predicted mean and L the largest gradient norm of the mean over
/// the best candidates. For [`Strategy::Explore`], the points of largest
/// integrated-variance reduction that keep the minimum distance from each
/// other (a greedy spread over the best candidates).
#[allow(clippy::too_many_arguments)]
fn large_batch(
    model: &Gp,
    strategy: Strategy,
    q: usize,
    ctx: &Context<'_>,
    blocked: &[Vec<f64>],
    sep2: f64,
    reference: &[Vec<f64>],
    rng: &mut ChaCha8Rng,
) -> Vec<Proposal> {
    let d = model.dim();
    let n_cands = (8 * q).clamp(N_CANDIDATES, 8192);
    let mut cands = lhs(n_cands, d, rng);
    let sampled = model.observed_x();
    let at_sampled = model.predict_mean(&sampled);
    let f_best = at_sampled.iter().copied().fold(f64::INFINITY, f64::min);
    if strategy == Strategy::Improve {
        let mut order: Vec<usize> = (0..sampled.len()).collect();
        order.sort_by(|&a, &b| at_sampled[a].total_cmp(&at_sampled[b]));
        for &i in order.iter().take(N_INCUMBENTS) {
            for scale in [0.02, 0.1] {
                for _ in 0..N_LOCAL {
                    cands.push(
                        sampled[i]
                            .iter()
                            .map(|&v| (v + scale * gauss(rng)).clamp(0.0, 1.0))
                            .collect(),
                    );
                }
            }
        }
    }
    if let Some(snap) = ctx.snap {
        for c in cands.iter_mut() {
            *c = snap(c);
        }
    }
    let pf = p_fail_many(ctx.failure, &cands);
    let preds = model.predict(&cands);
    let mut score: Vec<f64> = match strategy {
        Strategy::Improve => preds
            .iter()
            .zip(&pf)
            .map(|(p, f)| expected_improvement(f_best, p.mean, p.sd) * (1.0 - f))
            .collect(),
        Strategy::Explore => IntegratedVariance::new(model, reference)
            .reduction(&cands)
            .into_iter()
            .zip(&pf)
            .map(|(v, f)| v * (1.0 - f))
            .collect(),
    };
    // When expected improvement has vanished everywhere, spread by the sd.
    if strategy == Strategy::Improve && score.iter().all(|&v| v <= 0.0) {
        score = preds
            .iter()
            .zip(&pf)
            .map(|(p, f)| p.sd * (1.0 - f))
            .collect();
    }
    let lipschitz = if strategy == Strategy::Improve {
        let mut idx: Vec<usize> = (0..cands.len()).collect();
        idx.sort_by(|&a, &b| score[b].total_cmp(&score[a]));
        idx.iter()
            .take(64)
            .map(|&i| {
                let g = model.predict_gradient(&cands[i]);
                g.d_mean.iter().map(|v| v * v).sum::<f64>().sqrt()
            })
            .fold(1e-12, f64::max)
    } else {
        0.0
    };
    // Candidates far enough from every point in the sweep; kept up to date
    // as points are chosen.
    let mut far: Vec<bool> = cands
        .par_iter()
        .map(|c| blocked.iter().all(|b| dist2(c, b) >= sep2))
        .collect();
    let mut taken = vec![false; cands.len()];
    let mut out = Vec::with_capacity(q);
    for _ in 0..q {
        let best = (0..cands.len())
            .filter(|&i| far[i] && !taken[i])
            .max_by(|&a, &b| score[a].total_cmp(&score[b]))
            .or_else(|| {
                (0..cands.len())
                    .filter(|&i| !taken[i])
                    .max_by(|&a, &b| score[a].total_cmp(&score[b]))
            });
        let Some(j) = best else {
            break;
        };
        taken[j] = true;
        out.push(Proposal {
            x: cands[j].clone(),
            acquisition: score[j],
            mean: preds[j].mean,
            sd: preds[j].sd,
            p_fail: pf[j],
        });
        let s = preds[j].sd.max(1e-12 * (1.0 + f_best.abs()));
        for (i, c) in cands.iter().enumerate() {
            let r2 = dist2(c, &cands[j]);
            if r2 < sep2 {
                far[i] = false;
            }
            if strategy == Strategy::Improve {
                score[i] *= normal_cdf((f_best + lipschitz * r2.sqrt() - preds[j].mean) / s);
            }
        }
    }
    out
}
