//! Calibration to measurements on the metric surrogates: history matching
//! (which constants are not ruled out) and posterior sampling (how plausible
//! each remaining constant set is).
//!
//! Every `[[target]]` is compared with its metric's own surrogate. At a
//! point `x` of the unit cube, with the surrogate's predicted mean `mu_m(x)`
//! and sd `s_m(x)` (on the metric's own scale), the target's value `z_m`,
//! its measurement sd and its model-discrepancy sd:
//!
//! - the implausibility `I_m(x) = |mu_m(x) - z_m| / sqrt(s_m(x)^2 + sd_m^2 +
//!   discrepancy_m^2)` (Craig, Goldstein, Seheult & Smith 1997; Vernon,
//!   Goldstein & Bower 2010, eq. 2.4);
//! - the combined implausibility: the largest `I_m` over the targets, or the
//!   second largest with [`SECOND_MAX_FROM`] or more targets, as Vernon et
//!   al. (2010) do so that one poorly emulated metric cannot rule out
//!   everything on its own;
//! - the cutoff [`CUTOFF`] = 3, from Pukelsheim's (1994) three-sigma rule:
//!   any unimodal distribution puts at least 95% of its mass within three
//!   standard deviations of its mean;
//! - the likelihood of the targets, Gaussian with the same three variances
//!   added, each target's log-likelihood multiplied by its weight;
//!   with a prior uniform over the box in the unit cube (so uniform in the
//!   logarithm for log-scaled parameters).
//!
//! This module owns the numbers; it must not read the store or print: the
//! planner uses it for calibration waves and `query::calibrate` for the
//! answer `tessera calibrate` shows.

use crate::fitter::MetricFit;
use crate::spec::{Spec, Target};
use rand::{Rng, SeedableRng};
use tessera_surrogate::mcmc::{self, EnsembleOptions};

/// Points with a combined implausibility above this are ruled out.
pub const CUTOFF: f64 = 3.0;

/// With this many targets or more, the second largest implausibility is
/// the combined one.
pub const SECOND_MAX_FROM: usize = 4;

/// The targets with the surrogates of their metrics.
#[derive(Clone, Debug)]
pub struct Matcher {
    targets: Vec<Target>,
    fits: Vec<MetricFit>,
    dim: usize,
}

/// A metric's surrogate prediction at one point, on the metric's scale.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Compared {
    /// Predicted mean.
    pub mean: f64,
    /// Variance of the prediction plus the target's measurement and discrepancy variances.
    pub variance: f64,
}

impl Matcher {
    /// Pairs every target of `spec` with its metric's fit. `Err` names the
    /// target metrics that have no surrogate yet.
    pub fn new(spec: &Spec, fits: &[MetricFit]) -> Result<Matcher, Vec<String>> {
        let mut missing = Vec::new();
        let mut pairs = Vec::new();
        for t in &spec.targets {
            match fits.iter().find(|f| f.metric == t.metric) {
                Some(f) => pairs.push((t.clone(), f.clone())),
                None => missing.push(t.metric.clone()),
            }
        }
        if !missing.is_empty() || pairs.is_empty() {
            return Err(missing);
        }
        let (targets, fits) = pairs.into_iter().unzip();
        Ok(Matcher {
            targets,
            fits,
            dim: spec.dimension(),
        })
    }

    /// The targets, in sweep-file order.
    pub fn targets(&self) -> &[Target] {
        &self.targets
    }

    /// Dimension of the unit cube.
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// Each target's comparison at each point: `[target][point]`.
    pub fn compare(&self, xs: &[Vec<f64>]) -> Vec<Vec<Compared>> {
        self.targets
            .iter()
            .zip(&self.fits)
            .map(|(t, f)| {
                f.predict(xs)
                    .into_iter()
                    .map(|p| Compared {
                        mean: p.mean,
                        variance: p.sd * p.sd + t.variance(),
                    })
                    .collect()
            })
            .collect()
    }

    /// Each target's implausibility at each point: `[point][target]`.
    pub fn implausibility(&self, xs: &[Vec<f64>]) -> Vec<Vec<f64>> {
        let c = self.compare(xs);
        (0..xs.len())
            .map(|i| {
                self.targets
                    .iter()
                    .zip(&c)
                    .map(|(t, ct)| (ct[i].mean - t.value).abs() / ct[i].variance.sqrt())
                    .collect()
            })
            .collect()
    }

    /// The combined implausibility at each point (see [`combine`]).
    pub fn combined(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        self.implausibility(xs)
            .iter()
            .map(|i| combine(i, &self.targets))
            .collect()
    }

    /// The log-likelihood of the targets at each point (up to a constant);
    /// `-inf` outside the unit cube (the uniform prior's support).
    pub fn log_posterior(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        let inside: Vec<bool> = xs
            .iter()
            .map(|x| x.iter().all(|v| (0.0..=1.0).contains(v)))
            .collect();
        let kept: Vec<Vec<f64>> = xs
            .iter()
            .zip(&inside)
            .filter(|(_, &ok)| ok)
            .map(|(x, _)| x.clone())
            .collect();
        let c = self.compare(&kept);
        let mut lp = vec![0.0; kept.len()];
        for (t, ct) in self.targets.iter().zip(&c) {
            for (l, cmp) in lp.iter_mut().zip(ct) {
                let r = cmp.mean - t.value;
                *l += -0.5 * t.weight * (r * r / cmp.variance + cmp.variance.ln());
            }
        }
        let mut k = 0;
        inside
            .iter()
            .map(|&ok| {
                if ok {
                    k += 1;
                    lp[k - 1]
                } else {
                    f64::NEG_INFINITY
                }
            })
            .collect()
    }
}

/// The combined implausibility of per-target values: the largest over the
/// targets with a weight above zero, or the second largest with
/// [`SECOND_MAX_FROM`] or more of them.
pub fn combine(per_target: &[f64], targets: &[Target]) -> f64 {
    let mut v: Vec<f64> = per_target
        .iter()
        .zip(targets)
        .filter(|(_, t)| t.weight > 0.0)
        .map(|(i, _)| *i)
        .collect();
    if v.is_empty() {
        return 0.0;
    }
    v.sort_by(|a, b| b.total_cmp(a));
    if v.len() >= SECOND_MAX_FROM {
        v[1]
    } else {
        v[0]
    }
}

/// Uniform points of the unit cube (seeded).
pub fn uniform_points(n: usize, d: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    (0..n)
        .map(|_| (0..d).map(|_| rng.random::<f64>()).collect())
        .collect()
}

/// The non-implausible region, estimated by Monte Carlo over the box.
#[derive(Clone, Debug)]
pub struct Region {
    /// Uniform points drawn.
    pub samples: usize,
    /// How many were not ruled out.
    pub inside: usize,
    /// `inside / samples`: the region's share of the box's volume (in the unit cube).
    pub fraction: f64,
    /// Binomial standard error of `fraction`, `sqrt(f (1 - f) / samples)`.
    pub fraction_se: f64,
    /// Per parameter, the smallest and largest unit-cube coordinate of the
    /// points not ruled out (`None` when none is left).
    pub bounds: Option<Vec<[f64; 2]>>,
    /// The points not ruled out (unit cube), at most [`MAX_KEPT`].
    pub kept: Vec<Vec<f64>>,
    /// Their combined implausibility, in the same order.
    pub kept_implausibility: Vec<f64>,
    /// The drawn point of lowest combined implausibility and its value.
    pub lowest: (Vec<f64>, f64),
}

/// Most non-implausible points a [`Region`] keeps.
pub const MAX_KEPT: usize = 20_000;

/// Estimates the non-implausible region from `n` uniform points.
pub fn region(m: &Matcher, n: usize, seed: u64) -> Region {
    let xs = uniform_points(n.max(1), m.dim(), seed);
    let imp = m.combined(&xs);
    let mut kept = Vec::new();
    let mut kept_imp = Vec::new();
    let mut bounds: Option<Vec<[f64; 2]>> = None;
    let mut lowest = (xs[0].clone(), f64::INFINITY);
    for (x, &i) in xs.iter().zip(&imp) {
        if i < lowest.1 {
            lowest = (x.clone(), i);
        }
        if i <= CUTOFF {
            let b = bounds.get_or_insert_with(|| x.iter().map(|&v| [v, v]).collect());
            for (bk, &v) in b.iter_mut().zip(x) {
                bk[0] = bk[0].min(v);
                bk[1] = bk[1].max(v);
            }
            if kept.len() < MAX_KEPT {
                kept.push(x.clone());
                kept_imp.push(i);
            }
        }
    }
    let inside = imp.iter().filter(|&&i| i <= CUTOFF).count();
    let f = inside as f64 / xs.len() as f64;
    Region {
        samples: xs.len(),
        inside,
        fraction: f,
        fraction_se: (f * (1.0 - f) / xs.len() as f64).sqrt(),
        bounds,
        kept,
        kept_implausibility: kept_imp,
        lowest,
    }
}

/// Posterior samples on the surrogates and their diagnostics.
#[derive(Clone, Debug)]
pub struct Posterior {
    /// Samples after the burn-in (unit cube), walker by walker at each step.
    pub samples: Vec<Vec<f64>>,
    /// Rank-normalised split R-hat per parameter (Vehtari et al. 2021).
    pub rhat: Vec<f64>,
    /// Bulk effective sample size per parameter (Vehtari et al. 2021).
    pub ess: Vec<f64>,
    /// Share of the sampler's proposals accepted.
    pub acceptance: f64,
    /// Walkers of the ensemble.
    pub walkers: usize,
    /// Steps kept per walker (after the burn-in).
    pub steps: usize,
}

/// Options of [`posterior`].
#[derive(Clone, Debug)]
pub struct PosteriorOptions {
    /// Steps per walker of the first run, burn-in included.
    pub steps: usize,
    /// Most steps per walker: while the diagnostics are poor (R-hat above
    /// [`RHAT_TARGET`] or bulk ESS below [`ESS_TARGET`]) the run is doubled
    /// up to this length.
    pub max_steps: usize,
    /// Seed of the starting points and the moves.
    pub seed: u64,
}

impl Default for PosteriorOptions {
    fn default() -> Self {
        PosteriorOptions {
            steps: 2500,
            max_steps: 20_000,
            seed: 1,
        }
    }
}

/// The R-hat below which the chains count as mixed (Vehtari et al. 2021, sec. 4.4).
pub const RHAT_TARGET: f64 = 1.01;
/// The bulk ESS above which quantiles are stable enough (Vehtari et al. 2021, sec. 4.4).
pub const ESS_TARGET: f64 = 400.0;
/// Share of each run dropped as burn-in (our choice).
pub const BURN_SHARE: f64 = 0.4;

/// Samples the posterior with the affine-invariant ensemble sampler
/// (Goodman & Weare 2010), its walkers started at points of `region` (the
/// non-implausible points, or the least implausible one with small jitter
/// when none is left).
pub fn posterior(m: &Matcher, region: &Region, opts: &PosteriorOptions) -> Posterior {
    let d = m.dim();
    // Walkers: at least 32 and four per parameter, an even number (our choice).
    let walkers = (4 * d).max(32).next_multiple_of(2);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(opts.seed ^ 0x5eed_ca1b);
    let start: Vec<Vec<f64>> = (0..walkers)
        .map(|_| {
            if region.kept.len() >= walkers {
                region.kept[rng.random_range(0..region.kept.len())].clone()
            } else {
                region
                    .lowest
                    .0
                    .iter()
                    .map(|&v| (v + 0.02 * (rng.random::<f64>() - 0.5)).clamp(0.0, 1.0))
                    .collect()
            }
        })
        .collect();
    let logp = |xs: &[Vec<f64>]| m.log_posterior(xs);
    let run = |start: Vec<Vec<f64>>, steps: usize, seed: u64| {
        mcmc::ensemble(
            &logp,
            start,
            &EnsembleOptions {
                steps,
                seed,
                ..EnsembleOptions::default()
            },
        )
    };
    let mut all = run(start, opts.steps.max(10), opts.seed);
    let mut extension = 0u64;
    let (chains, rhat, ess) = loop {
        let total = all.positions.len();
        let chains = all.after((total as f64 * BURN_SHARE) as usize);
        let rhat: Vec<f64> = (0..d)
            .map(|k| mcmc::split_rhat(&chains.coordinate(k)))
            .collect();
        let ess: Vec<f64> = (0..d)
            .map(|k| mcmc::ess_bulk(&chains.coordinate(k)))
            .collect();
        let good = rhat.iter().all(|r| *r <= RHAT_TARGET) && ess.iter().all(|e| *e >= ESS_TARGET);
        if good || total >= opts.max_steps {
            break (chains, rhat, ess);
        }
        // Twice as long: continue every walker from where it stopped.
        extension += 1;
        let last = all.positions.last().cloned().unwrap_or_default();
        let more = run(
            last,
            total.min(opts.max_steps - total),
            opts.seed.wrapping_add(extension.wrapping_mul(0x9E37_79B9)),
        );
        let (n0, n1) = (total as f64, more.positions.len() as f64);
        all.acceptance = (all.acceptance * n0 + more.acceptance * n1) / (n0 + n1);
        all.positions.extend(more.positions);
        all.log_density.extend(more.log_density);
    };
    Posterior {
        steps: chains.positions.len(),
        samples: chains.flat(),
        rhat,
        ess,
        acceptance: chains.acceptance,
        walkers,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn target(w: f64) -> Target {
        Target {
            metric: "m".into(),
            value: 0.0,
            sd: 1.0,
            discrepancy_sd: 0.0,
            weight: w,
        }
    }

    #[test]
    fn combined_is_max_then_second_max() {
        let t3 = vec![target(1.0); 3];
        assert_eq!(combine(&[1.0, 5.0, 2.0], &t3), 5.0);
        let t4 = vec![target(1.0); 4];
        assert_eq!(combine(&[1.0, 5.0, 2.0, 4.0], &t4), 4.0);
        let weighted = vec![target(1.0), target(0.0)];
        assert_eq!(combine(&[1.0, 9.0], &weighted), 1.0);
    }
}
