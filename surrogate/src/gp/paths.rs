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
