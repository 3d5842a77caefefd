//! Joint posterior sample paths of the latent function f at chosen points,
//! for quantities that are functionals of f (main effects, Sobol indices):
//! their spread over paths is the surrogate's own uncertainty about them.

use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};

use super::linalg::cholesky;
use super::Gp;

impl Gp {
    /// `k` joint draws of f at `xs` from the posterior (natural units):
    /// mean plus the Cholesky factor of the posterior covariance (with the
    /// jitter ladder of the fit) times standard normal vectors. One row per
    /// draw. Cost: O(m^2 n) for the covariance and O(m^3) for its factor;
    /// keep `xs` to a few thousand points.
    #[track_caller]
    pub fn sample_paths(&self, xs: &[Vec<f64>], k: usize, seed: u64) -> Vec<Vec<f64>> {
        let m = xs.len();
        if m == 0 || k == 0 {
            return vec![Vec::new(); k];
        }
        let mean = self.predict_mean(xs);
        let cov = self.predict_cov(xs);
        // Column-major for the factorisation (the matrix is symmetric).
        let mut a = vec![0.0; m * m];
        let mut scale = 0.0;
        for (i, row) in cov.iter().enumerate() {
            for (j, &v) in row.iter().enumerate() {
                a[j * m + i] = v;
            }
            scale += row[i].max(0.0);
        }
        let scale = (scale / m as f64).max(f64::MIN_POSITIVE);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let Ok(f) = cholesky(&a, m, scale) else {
            // Not positive definite even with the largest jitter: the
            // marginal sds alone (each point drawn on its own).
            return (0..k)
                .map(|_| {
                    mean.iter()
                        .zip(&cov)
                        .enumerate()
                        .map(|(i, (mu, row))| {
                            let z: f64 = StandardNormal.sample(&mut rng);
                            mu + row[i].max(0.0).sqrt() * z
                        })
                        .collect()
                })
                .collect();
        };
        (0..k)
            .map(|_| {
                let z: Vec<f64> = (0..m).map(|_| StandardNormal.sample(&mut rng)).collect();
                let mut out = mean.clone();
                // out += L z, L lower triangular column-major.
                for (j, zj) in z.iter().enumerate() {
                    let col = &f.l[j * m..(j + 1) * m];
                    for i in j..m {
                        out[i] += col[i] * zj;
                    }
                }
                out
            })
            .collect()
    }
}

/// One posterior sample path of the latent f that can be evaluated at any
/// point: a random-feature draw from the prior, conditioned on the data by
/// pathwise conditioning (Matheron's rule; Wilson, Borovitskiy, Terenin,
/// Mostowski & Deisenroth 2020, "Efficiently sampling functions from
/// Gaussian process posteriors", ICML, eq. 13):
///
///   f*(x) = m + g(x) + k(x, X) (K + D)^-1 (y - m - g(X) - e),  e ~ N(0, D),
///
/// with g a prior draw by random Fourier features (Rahimi & Recht 2007,
/// "Random features for large-scale kernel machines", NeurIPS). The
/// features' frequencies come from the kernel's spectral density: standard
/// normal for the squared exponential, and for Matern nu a multivariate
/// Student t with 2 nu degrees of freedom (GPML eq. 4.15). The data term is
/// exact, so near the data the path follows the exact posterior; only the
/// prior far from the data is approximated (covariance error of order
/// s_f^2 sqrt(2 / M) for M features).
///
/// Cost: O(M n d + n^2) to draw, O((M d + n) m) to evaluate at m points,
/// against O(m^2 n + m^3) for a joint draw by [`Gp::sample_paths`].
#[derive(Clone, Debug)]
pub struct SamplePath {
    d: usize,
    kernel: super::KernelKind,
    sf2: f64,
    inv_l: Vec<f64>,
    /// Frequencies for inputs divided by the length scales, d x M
    /// (dimension-major).
    omega: Vec<f64>,
    phase: Vec<f64>,
    /// Feature weights times sqrt(2 s_f^2 / M).
    weight: Vec<f64>,
    /// Observed inputs (row-major) and the conditioning weights v.
    x: Vec<f64>,
    v: Vec<f64>,
    mean: f64,
    y_mean: f64,
    y_scale: f64,
}

/// Points per block in [`SamplePath::eval`].
const EVAL_BLOCK: usize = 128;

impl SamplePath {
    /// The path at `xs` (natural units).
    #[track_caller]
    pub fn eval(&self, xs: &[Vec<f64>]) -> Vec<f64> {
        use rayon::prelude::*;
        let d = self.d;
        assert!(
            xs.iter().all(|p| p.len() == d),
            "points must have dimension {d}"
        );
        let n = self.v.len();
        xs.par_chunks(EVAL_BLOCK)
            .flat_map_iter(|block| {
                let flat: Vec<f64> = block.iter().flatten().copied().collect();
                // The data term k(x, X) v: one column of the cross-kernel per point.
                let data: Vec<f64> = if n == 0 || d == 0 {
                    vec![self.sf2 * self.v.iter().sum::<f64>(); block.len()]
                } else {
                    super::linalg::kernel_cross(
                        self.kernel,
                        &self.x,
                        &flat,
                        d,
                        self.sf2,
                        &self.inv_l,
                    )
                    .chunks(n)
                    .map(|col| col.iter().zip(&self.v).map(|(k, v)| k * v).sum())
                    .collect()
                };
                block
                    .iter()
                    .zip(data)
                    .map(|(p, data)| {
                        let f = self.mean + self.prior(p) + data;
                        self.y_mean + self.y_scale * f
                    })
                    .collect::<Vec<f64>>()
            })
            .collect()
    }

    /// The prior draw g at `p`: the frequencies are stored one input
    /// dimension after another, so the arguments are built by vectorisable
    /// passes and only the cosines are scalar.
    fn prior(&self, p: &[f64]) -> f64 {
        let m = self.phase.len();
        let mut arg = self.phase.clone();
        for (k, (pk, il)) in p.iter().zip(&self.inv_l).enumerate() {
            let s = pk * il;
            for (a, o) in arg.iter_mut().zip(&self.omega[k * m..(k + 1) * m]) {
                *a += o * s;
            }
        }
        arg.iter().zip(&self.weight).map(|(a, w)| w * a.cos()).sum()
    }
}

impl Gp {
    /// One posterior sample path with `features` random features (see
    /// [`SamplePath`]), deterministic for the seed.
    pub fn sample_path(&self, features: usize, seed: u64) -> SamplePath {
        use rand::Rng;
        use rand_distr::ChiSquared;
        let (n, d) = (self.n, self.d);
        let m = features.max(1);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        // Student t with 2 nu degrees of freedom: z / sqrt(u / (2 nu)).
        let dof = match self.kernel {
            super::KernelKind::Matern52 => Some(5.0),
            super::KernelKind::SquaredExponential => None,
        };
        let chi = dof.and_then(|k| ChiSquared::new(k).ok());
        // Dimension-major: omega[k * m + j] is component k of frequency j.
        let mut omega = vec![0.0; m * d];
        for j in 0..m {
            let scale = match (dof, &chi) {
                (Some(k), Some(c)) => {
                    let u: f64 = c.sample(&mut rng);
                    (k / u.max(f64::MIN_POSITIVE)).sqrt()
                }
                _ => 1.0,
            };
            for k in 0..d {
                let z: f64 = StandardNormal.sample(&mut rng);
                omega[k * m + j] = z * scale;
            }
        }
        let phase: Vec<f64> = (0..m)
            .map(|_| rng.random_range(0.0..std::f64::consts::TAU))
            .collect();
        let sf2 = self.hyper.signal_var;
        let amp = (2.0 * sf2 / m as f64).sqrt();
        let weight: Vec<f64> = (0..m)
            .map(|_| {
                let z: f64 = StandardNormal.sample(&mut rng);
                amp * z
            })
            .collect();
        let mut path = SamplePath {
            d,
            kernel: self.kernel,
            sf2,
            inv_l: self.inv_l(),
            omega,
            phase,
            weight,
            x: self.x.clone(),
            v: Vec::new(),
            mean: self.hyper.mean,
            y_mean: self.y_mean,
            y_scale: self.y_scale,
        };
        // v = (K + D)^-1 (y - m - g(X) - e), e ~ N(0, D).
        let mut r: Vec<f64> = (0..n)
            .map(|i| {
                let di = self.hyper.nugget + self.noise[i] + self.jitter;
                let e: f64 = StandardNormal.sample(&mut rng);
                self.ys[i]
                    - self.hyper.mean
                    - path.prior(&self.x[i * d..(i + 1) * d])
                    - di.max(0.0).sqrt() * e
            })
            .collect();
        super::linalg::solve_chol(&self.chol, n, &mut r);
        path.v = r;
        path
    }
}
