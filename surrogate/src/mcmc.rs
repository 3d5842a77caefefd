//! Posterior sampling and its diagnostics.
//!
//! - [`ensemble`]: the affine-invariant ensemble sampler with the stretch
//!   move (Goodman & Weare 2010, "Ensemble samplers with affine
//!   invariance", Comm. App. Math. Comp. Sci. 5:65-80). The ensemble is
//!   updated in two halves, each walker against a walker of the other half,
//!   so that the log densities of a half can be evaluated in one batch.
//! - [`split_rhat`] and [`ess_bulk`]: the rank-normalised split R-hat and the
//!   bulk effective sample size of Vehtari, Gelman, Simpson, Carpenter &
//!   Bürkner (2021), "Rank-normalization, folding, and localization: an
//!   improved R-hat for assessing convergence of MCMC", Bayesian Analysis
//!   16:667-718, with Geyer's (1992) initial monotone sequence for the
//!   autocorrelation sum.

use crate::stats::{normal_quantile, ranks};
use rand::{Rng, SeedableRng};

/// Options of the ensemble sampler.
#[derive(Clone, Debug)]
pub struct EnsembleOptions {
    /// Steps per walker (every step is kept; drop a burn-in with [`Chains::after`]).
    pub steps: usize,
    /// The stretch scale `a` (Goodman & Weare use 2).
    pub stretch: f64,
    /// Seed of the moves.
    pub seed: u64,
}

impl Default for EnsembleOptions {
    fn default() -> Self {
        EnsembleOptions {
            steps: 2000,
            stretch: 2.0,
            seed: 1,
        }
    }
}

/// The walkers' paths: `positions[step][walker]` is a point of dimension `d`.
#[derive(Clone, Debug)]
pub struct Chains {
    /// Positions by step, then walker.
    pub positions: Vec<Vec<Vec<f64>>>,
    /// Log density at each position, by step, then walker.
    pub log_density: Vec<Vec<f64>>,
    /// Share of proposals accepted.
    pub acceptance: f64,
}

impl Chains {
    /// Number of walkers.
    pub fn walkers(&self) -> usize {
        self.positions.first().map_or(0, Vec::len)
    }

    /// Dimension of the points.
    pub fn dim(&self) -> usize {
        self.positions
            .first()
            .and_then(|s| s.first())
            .map_or(0, Vec::len)
    }

    /// The chains without their first `burn` steps.
    pub fn after(&self, burn: usize) -> Chains {
        let burn = burn.min(self.positions.len());
        Chains {
            positions: self.positions[burn..].to_vec(),
            log_density: self.log_density[burn..].to_vec(),
            acceptance: self.acceptance,
        }
    }

    /// Coordinate `k` of every walker's path: `[walker][step]`.
    pub fn coordinate(&self, k: usize) -> Vec<Vec<f64>> {
        (0..self.walkers())
            .map(|w| self.positions.iter().map(|s| s[w][k]).collect())
            .collect()
    }

    /// Every position, step by step (all walkers of a step together).
    pub fn flat(&self) -> Vec<Vec<f64>> {
        self.positions.iter().flatten().cloned().collect()
    }
}

/// Runs the ensemble sampler from `start` (one point per walker; at least
/// two walkers per half and more walkers than dimensions are advised), with
/// `log_density` evaluated on batches of points (`-inf` outside the support).
#[track_caller]
pub fn ensemble(
    log_density: &dyn Fn(&[Vec<f64>]) -> Vec<f64>,
    start: Vec<Vec<f64>>,
    opts: &EnsembleOptions,
) -> Chains {
    let n = start.len();
    assert!(n >= 4, "the ensemble needs at least 4 walkers, got {n}");
    let d = start[0].len();
    let a = opts.stretch;
    assert!(a > 1.0, "the stretch scale must exceed 1, got {a}");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(opts.seed);
    let mut x = start;
    let mut lp = log_density(&x);
    let mut positions = Vec::with_capacity(opts.steps);
    let mut densities = Vec::with_capacity(opts.steps);
    let half = n / 2;
    let (mut accepted, mut proposed) = (0usize, 0usize);
    for _ in 0..opts.steps {
        for (lo, hi, other_lo, other_hi) in [(0, half, half, n), (half, n, 0, half)] {
            let mut zs = Vec::with_capacity(hi - lo);
            let mut ys = Vec::with_capacity(hi - lo);
            for k in lo..hi {
                let j = rng.random_range(other_lo..other_hi);
                // z from g(z) ~ 1/sqrt(z) on [1/a, a] by inversion.
                let u: f64 = rng.random();
                let z = ((a - 1.0) * u + 1.0).powi(2) / a;
                let y: Vec<f64> = (0..d).map(|i| x[j][i] + z * (x[k][i] - x[j][i])).collect();
                zs.push(z);
                ys.push(y);
            }
            let lpy = log_density(&ys);
            for (m, k) in (lo..hi).enumerate() {
                proposed += 1;
                let log_ratio = (d as f64 - 1.0) * zs[m].ln() + lpy[m] - lp[k];
                let u: f64 = rng.random();
                if lpy[m].is_finite() && (log_ratio >= 0.0 || u.ln() < log_ratio) {
                    x[k] = std::mem::take(&mut ys[m]);
                    lp[k] = lpy[m];
                    accepted += 1;
                }
            }
        }
        positions.push(x.clone());
        densities.push(lp.clone());
    }
    Chains {
        positions,
        log_density: densities,
        acceptance: if proposed == 0 {
            0.0
        } else {
            accepted as f64 / proposed as f64
        },
    }
}

/// Each chain cut into its first and second half (an odd middle draw dropped).
fn split(chains: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let mut out = Vec::with_capacity(chains.len() * 2);
    for c in chains {
        let h = c.len() / 2;
        out.push(c[..h].to_vec());
        out.push(c[c.len() - h..].to_vec());
    }
    out
}

/// Rank normalisation: every draw replaced by the normal quantile of its
/// fractional rank over all chains, `Phi^-1((r - 3/8) / (S + 1/4))`
/// (Blom 1958; Vehtari et al. 2021, eq. 14), ties at their average rank.
fn rank_normalise(chains: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let all: Vec<f64> = chains.iter().flatten().copied().collect();
    let s = all.len() as f64;
    let r = ranks(&all);
    let mut k = 0;
    chains
        .iter()
        .map(|c| {
            c.iter()
                .map(|_| {
                    let z = normal_quantile((r[k] - 0.375) / (s + 0.25));
                    k += 1;
                    z
                })
                .collect()
        })
        .collect()
}

/// The classic R-hat of equal-length chains (Gelman et al., BDA3, eq. 11.4).
fn rhat(chains: &[Vec<f64>]) -> f64 {
    let m = chains.len() as f64;
    let n = chains.first().map_or(0, Vec::len) as f64;
    if m < 2.0 || n < 2.0 {
        return f64::NAN;
    }
    let means: Vec<f64> = chains.iter().map(|c| c.iter().sum::<f64>() / n).collect();
    let grand = means.iter().sum::<f64>() / m;
    let b = n / (m - 1.0) * means.iter().map(|x| (x - grand).powi(2)).sum::<f64>();
    let w = chains
        .iter()
        .zip(&means)
        .map(|(c, mu)| c.iter().map(|x| (x - mu).powi(2)).sum::<f64>() / (n - 1.0))
        .sum::<f64>()
        / m;
    let var_plus = (n - 1.0) / n * w + b / n;
    (var_plus / w).sqrt()
}

/// The rank-normalised split R-hat (Vehtari et al. 2021, sec. 4.2): the
/// larger of the split R-hat of the rank-normalised draws and of the
/// rank-normalised folded draws `|x - median|`. `chains[walker][step]`.
/// Values above 1.01 say the chains have not mixed.
pub fn split_rhat(chains: &[Vec<f64>]) -> f64 {
    let halves = split(chains);
    let bulk = rhat(&rank_normalise(&halves));
    let all: Vec<f64> = halves.iter().flatten().copied().collect();
    let med = crate::stats::median(&all);
    let folded: Vec<Vec<f64>> = halves
        .iter()
        .map(|c| c.iter().map(|x| (x - med).abs()).collect())
        .collect();
    let tail = rhat(&rank_normalise(&folded));
    bulk.max(tail)
}

/// The autocovariance of a centred chain at lag `t` (divided by `n`, the
/// estimator that keeps the sequence positive definite; computed only for
/// the lags the sum needs).
fn autocovariance(x: &[f64], t: usize) -> f64 {
    let n = x.len();
    x[..n - t]
        .iter()
        .zip(&x[t..])
        .map(|(a, b)| a * b)
        .sum::<f64>()
        / n as f64
}

/// The effective sample size of equal-length chains (Vehtari et al. 2021,
/// sec. 3.2, eqs. 10-11, with Geyer's initial positive and monotone
/// sequences; the multi-chain autocorrelation of Stan's reference manual).
pub fn ess(chains: &[Vec<f64>]) -> f64 {
    let m = chains.len();
    let n = chains.first().map_or(0, Vec::len);
    if m == 0 || n < 4 {
        return f64::NAN;
    }
    let (mf, nf) = (m as f64, n as f64);
    let (lo, hi) = chains
        .iter()
        .flatten()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    if hi - lo < 1e-15 {
        // Constant draws carry no autocorrelation to estimate.
        return mf * nf;
    }
    let means: Vec<f64> = chains.iter().map(|c| c.iter().sum::<f64>() / nf).collect();
    let centred: Vec<Vec<f64>> = chains
        .iter()
        .zip(&means)
        .map(|(c, m)| c.iter().map(|v| v - m).collect())
        .collect();
    let acov_mean = |t: usize| centred.iter().map(|x| autocovariance(x, t)).sum::<f64>() / mf;
    let mean_var = acov_mean(0) * nf / (nf - 1.0);
    let mut var_plus = mean_var * (nf - 1.0) / nf;
    if m > 1 {
        let g = means.iter().sum::<f64>() / mf;
        var_plus += means.iter().map(|x| (x - g).powi(2)).sum::<f64>() / (mf - 1.0);
    }
    if var_plus.is_nan() || var_plus <= 0.0 {
        return f64::NAN;
    }
    let rho = |t: usize| 1.0 - (mean_var - acov_mean(t)) / var_plus;
    let mut rho_t = vec![0.0; n];
    rho_t[0] = 1.0;
    let mut even = 1.0;
    let mut odd = rho(1);
    rho_t[1] = odd;
    let mut t = 1;
    while t < n - 3 && even + odd > 0.0 {
        even = rho(t + 1);
        odd = rho(t + 2);
        if even + odd >= 0.0 {
            rho_t[t + 1] = even;
            rho_t[t + 2] = odd;
        }
        t += 2;
    }
    let max_t = t - 2;
    if even > 0.0 {
        rho_t[max_t + 1] = even;
    }
    // Initial monotone sequence.
    let mut t = 1;
    while t + 2 <= max_t {
        if rho_t[t + 1] + rho_t[t + 2] > rho_t[t - 1] + rho_t[t] {
            let v = (rho_t[t - 1] + rho_t[t]) / 2.0;
            rho_t[t + 1] = v;
            rho_t[t + 2] = v;
        }
        t += 2;
    }
    let total = mf * nf;
    let tau = -1.0 + 2.0 * rho_t[..=max_t].iter().sum::<f64>() + rho_t[max_t + 1];
    let tau = tau.max(1.0 / total.log10());
    total / tau
}

/// The bulk effective sample size: [`ess`] of the rank-normalised split
/// chains (Vehtari et al. 2021, sec. 4.3). `chains[walker][step]`.
pub fn ess_bulk(chains: &[Vec<f64>]) -> f64 {
    ess(&rank_normalise(&split(chains)))
}

#[cfg(test)]
mod tests {
    use super::*;

    // Analytic: independent normal draws in well-mixed chains give R-hat near
    // 1 and an ESS near the number of draws.
    #[test]
    fn independent_draws_look_converged() {
        use rand_distr::{Distribution, StandardNormal};
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let chains: Vec<Vec<f64>> = (0..4)
            .map(|_| (0..1000).map(|_| StandardNormal.sample(&mut rng)).collect())
            .collect();
        let r = split_rhat(&chains);
        assert!((r - 1.0).abs() < 0.01, "R-hat {r}");
        let e = ess_bulk(&chains);
        assert!(e > 3000.0 && e < 5000.0, "ESS {e}");
    }

    // Chains stuck in different places are flagged.
    #[test]
    fn separated_chains_are_flagged() {
        let chains: Vec<Vec<f64>> = (0..4)
            .map(|c| {
                (0..500)
                    .map(|i| c as f64 + 0.001 * (i % 7) as f64)
                    .collect()
            })
            .collect();
        assert!(split_rhat(&chains) > 1.5);
    }

    // Analytic: a standard normal target; the sampler's mean and variance
    // converge to 0 and 1.
    #[test]
    fn ensemble_samples_a_normal() {
        let logp = |xs: &[Vec<f64>]| -> Vec<f64> {
            xs.iter()
                .map(|x| -0.5 * x.iter().map(|v| v * v).sum::<f64>())
                .collect()
        };
        let start: Vec<Vec<f64>> = (0..16)
            .map(|k| vec![0.1 * k as f64 - 0.8, 0.05 * k as f64])
            .collect();
        let chains = ensemble(
            &logp,
            start,
            &EnsembleOptions {
                steps: 3000,
                ..Default::default()
            },
        )
        .after(500);
        let flat = chains.flat();
        let n = flat.len() as f64;
        for k in 0..2 {
            let mean = flat.iter().map(|x| x[k]).sum::<f64>() / n;
            let var = flat.iter().map(|x| (x[k] - mean).powi(2)).sum::<f64>() / n;
            assert!(mean.abs() < 0.08, "mean {mean}");
            assert!((var - 1.0).abs() < 0.1, "var {var}");
        }
        assert!(chains.acceptance > 0.3 && chains.acceptance < 0.9);
    }
}
