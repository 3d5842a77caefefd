//! Posterior means and variances for many points at once (GPML alg. 2.1,
//! lines 4-6), in blocks of query points handled in parallel.
//!
//! Each block's cross-covariances are built once (f64) and used for the
//! means (a dot product with alpha) and the variances
//! var_j = s_f^2 - ||L^-1 k_j||^2 (a triangular solve with many right-hand
//! sides). The solve is almost all of the work: n^2 / 2 multiply-adds per
//! point. For large batches it runs in single precision (twice the SIMD
//! width) and is then checked against double precision:
//!
//! 1. all points: v_j = L^-1 k_j in f32, as a product with L^-1 (computed
//!    in f64 once per GP, rounded to f32 and kept: half the memory of the
//!    factor), ||v_j||^2 accumulated in f64;
//! 2. a sample of points (the 32 with the smallest f32 variance and 32
//!    evenly spaced) is recomputed in f64; the largest difference in
//!    ||v||^2 is the measured error e of this batch;
//! 3. if e exceeds 1e-5 s_f^2, the f32 solve is not accurate enough for this
//!    factor and the whole batch is recomputed in f64; otherwise every point
//!    whose f32 variance is at most 2000 e is recomputed in f64.
//!
//! So a variance kept from the f32 pass is more than 2000 times the largest
//! error seen in the sample: its relative error is below 1/2000 if the
//! sample saw the worst case (and, tested, below 1e-3 in sd). Means are
//! always f64. Small batches use f64 throughout.

use faer::{Accum, MatMut, MatRef, Par};
use rayon::prelude::*;

use super::kernel::{scaled_transpose, UnitColumn};
use super::{Gp, Prediction};

/// Query points per block (measured at n = 1000 on 2 cores: 256 a little
/// faster than 64 and 128, and 512 to 1024 slower).
const BLOCK: usize = 256;

/// Columns of L^-1 per dense product in the f32 pass.
const PANEL: usize = 128;

/// Smallest problem (observations, points) solved in single precision;
/// below it the f64 solve is cheap anyway.
const MIXED_MIN_N: usize = 256;
const MIXED_MIN_M: usize = 512;

/// Points of a batch recomputed in f64 to measure the f32 error.
const SAMPLE_LOWEST: usize = 32;
const SAMPLE_SPREAD: usize = 32;

/// Measured f32 error (relative to s_f^2) above which a batch is done in f64.
const MAX_F32_ERROR: f64 = 1e-5;

/// A variance is kept from the f32 pass only if it is more than this many
/// times the measured f32 error. This and MAX_F32_ERROR are our own choices
/// (no source), set so that sd stays within 1e-3 relative in the tests.
const KEEP_FACTOR: f64 = 2000.0;

/// How predictive variances are computed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Precision {
    /// f64 throughout.
    Exact,
    /// f32 solve for large batches, checked and corrected in f64 (module docs).
    Auto,
}

/// Per-thread scratch for one block.
struct Scratch {
    k: Vec<f64>,
    k32: Vec<f32>,
    v32: Vec<f32>,
    zj: Vec<f64>,
}

impl Gp {
    /// Predictions (natural units) at the `m` query rows `z` (row-major
    /// m x d, unit-cube inputs).
    pub(crate) fn predict_batch(
        &self,
        z: &[f64],
        m: usize,
        precision: Precision,
    ) -> Vec<Prediction> {
        let n = self.n;
        let mixed = precision == Precision::Auto && n >= MIXED_MIN_N && m >= MIXED_MIN_M;
        let mut mean = vec![0.0; m];
        let mut q = vec![0.0; m];
        self.blocks(z, &mut mean, Some((&mut q, mixed)));
        if mixed {
            self.correct_f32(z, &mut q);
        }
        let sf2 = self.hyper.signal_var;
        let s2 = self.y_scale * self.y_scale;
        mean.iter()
            .zip(&q)
            .map(|(&mu, &qj)| {
                let var = (sf2 - qj).max(0.0);
                Prediction {
                    mean: self.y_mean + self.y_scale * (self.hyper.mean + mu),
                    sd: (s2 * var).sqrt(),
                    sd_obs: (s2 * (var + self.hyper.nugget)).sqrt(),
                }
            })
            .collect()
    }

    /// Standardised posterior means k_j^T alpha of the rows of `z`.
    pub(crate) fn mean_batch(&self, z: &[f64], m: usize) -> Vec<f64> {
        let mut mean = vec![0.0; m];
        self.blocks(z, &mut mean, None);
        mean
    }

    /// Fill `mean` (k_j^T alpha) and, if asked, `q` (||L^-1 k_j||^2, in f32
    /// when the flag is set) for the query rows `z`, block by block in
    /// parallel.
    fn blocks(&self, z: &[f64], mean: &mut [f64], q: Option<(&mut [f64], bool)>) {
        let (n, d) = (self.n, self.d);
        let inv_l = self.inv_l();
        let xt = scaled_transpose(&self.x, d, &inv_l);
        let sf2 = self.hyper.signal_var;
        let arch = pulp::Arch::new();
        let w32 = match &q {
            Some((_, true)) => Some(self.inverse_factor_f32()),
            _ => None,
        };
        // In the f32 pass each column is built in f64 one at a time and
        // stored in f32 only, so a block's working set stays near the L2 size.
        let f32_pass = w32.is_some();
        let init = || Scratch {
            k: vec![0.0; if f32_pass { n } else { n * BLOCK }],
            k32: if f32_pass {
                vec![0.0; n * BLOCK]
            } else {
                Vec::new()
            },
            v32: if f32_pass {
                vec![0.0; n * BLOCK]
            } else {
                Vec::new()
            },
            zj: vec![0.0; d],
        };
        let run = |s: &mut Scratch, start: usize, mean: &mut [f64], q: Option<&mut [f64]>| {
            let b = mean.len();
            for (j, mu) in mean.iter_mut().enumerate() {
                let col = if f32_pass {
                    &mut s.k[..n]
                } else {
                    &mut s.k[j * n..(j + 1) * n]
                };
                if d == 0 {
                    col.fill(sf2);
                } else {
                    let row = start + j;
                    for (t, zt) in s.zj.iter_mut().enumerate() {
                        *zt = z[row * d + t] * inv_l[t];
                    }
                    arch.dispatch(UnitColumn {
                        kernel: self.kernel,
                        xt: &xt,
                        n,
                        start: 0,
                        zj: &s.zj,
                        out: col,
                        grad: None,
                        scale: sf2,
                    });
                }
                *mu = dot(col, &self.alpha);
                if f32_pass {
                    for (a, &v) in s.k32[j * n..(j + 1) * n].iter_mut().zip(col.iter()) {
                        *a = v as f32;
                    }
                }
            }
            let Some(q) = q else { return };
            match w32 {
                Some(w32) => {
                    let k32 = &s.k32[..n * b];
                    let v32 = &mut s.v32[..n * b];
                    lower_times(w32, n, k32, v32, b);
                    for (qj, col) in q.iter_mut().zip(v32.chunks(n)) {
                        *qj = sum_sq_f32(col);
                    }
                }
                None => {
                    let k = &mut s.k[..n * b];
                    let lv = MatRef::from_column_major_slice(&self.chol, n, n);
                    let bv = MatMut::from_column_major_slice_mut(k, n, b);
                    faer::linalg::triangular_solve::solve_lower_triangular_in_place(
                        lv,
                        bv,
                        Par::Seq,
                    );
                    for (qj, col) in q.iter_mut().zip(k.chunks(n)) {
                        *qj = dot(col, col);
                    }
                }
            }
        };
        if n == 0 {
            return;
        }
        match q {
            Some((q, _)) => mean
                .par_chunks_mut(BLOCK)
                .zip(q.par_chunks_mut(BLOCK))
                .enumerate()
                .for_each_init(init, |s, (i, (mb, qb))| run(s, i * BLOCK, mb, Some(qb))),
            None => mean
                .par_chunks_mut(BLOCK)
                .enumerate()
                .for_each_init(init, |s, (i, mb)| run(s, i * BLOCK, mb, None)),
        }
    }

    /// Steps 2 and 3 of the module docs: measure the f32 error of `q` on a
    /// sample, then recompute in f64 what it could spoil.
    fn correct_f32(&self, z: &[f64], q: &mut [f64]) {
        let m = q.len();
        let sf2 = self.hyper.signal_var;
        if m == 0 {
            return;
        }
        // The points with the smallest f32 variances (largest q) ...
        let mut order: Vec<usize> = (0..m).collect();
        let lowest = SAMPLE_LOWEST.min(m);
        order.select_nth_unstable_by(lowest - 1, |&a, &b| q[b].total_cmp(&q[a]));
        let mut sample: Vec<usize> = order[..lowest].to_vec();
        // ... and some spread over the batch.
        sample.extend((0..SAMPLE_SPREAD).map(|i| i * m / SAMPLE_SPREAD));
        sample.sort_unstable();
        sample.dedup();
        let exact = self.exact_q(z, &sample);
        let error = sample
            .iter()
            .zip(&exact)
            .map(|(&i, &e)| (q[i] - e).abs())
            .fold(0.0, f64::max);
        if error.is_nan() || error > MAX_F32_ERROR * sf2 {
            let all: Vec<usize> = (0..m).collect();
            let exact = self.exact_q(z, &all);
            q.copy_from_slice(&exact);
            return;
        }
        for (&i, &e) in sample.iter().zip(&exact) {
            q[i] = e;
        }
        let keep = KEEP_FACTOR * error;
        let redo: Vec<usize> = (0..m)
            .filter(|&i| sf2 - q[i] <= keep && sample.binary_search(&i).is_err())
            .collect();
        if !redo.is_empty() {
            let exact = self.exact_q(z, &redo);
            for (&i, &e) in redo.iter().zip(&exact) {
                q[i] = e;
            }
        }
    }

    /// ||L^-1 k_j||^2 in f64 for the listed rows of `z`.
    fn exact_q(&self, z: &[f64], rows: &[usize]) -> Vec<f64> {
        let d = self.d;
        let zs: Vec<f64> = if d == 0 {
            vec![0.0; rows.len()]
        } else {
            rows.iter()
                .flat_map(|&i| z[i * d..(i + 1) * d].iter().copied())
                .collect()
        };
        let mut mean = vec![0.0; rows.len()];
        let mut q = vec![0.0; rows.len()];
        self.blocks(&zs, &mut mean, Some((&mut q, false)));
        q
    }

    /// L^-1 in f32 (column-major, zeros above the diagonal), computed in f64
    /// on first use, PANEL columns at a time, and kept.
    fn inverse_factor_f32(&self) -> &[f32] {
        self.inv_chol32.0.get_or_init(|| {
            let n = self.n;
            let l = MatRef::from_column_major_slice(&self.chol, n, n);
            let mut w = vec![0.0f32; n * n];
            let mut panel = vec![0.0f64; n * PANEL];
            for p in (0..n).step_by(PANEL) {
                // Columns p..p+c of L^-1 are zero above row p; below, they
                // solve L[p.., p..] X = I[p.., p..p+c].
                let c = PANEL.min(n - p);
                let rows = n - p;
                let x = &mut panel[..rows * c];
                x.fill(0.0);
                for j in 0..c {
                    x[j * rows + j] = 1.0;
                }
                let xv = MatMut::from_column_major_slice_mut(x, rows, c);
                faer::linalg::triangular_solve::solve_lower_triangular_in_place(
                    l.submatrix(p, p, rows, rows),
                    xv,
                    Par::rayon(0),
                );
                for j in 0..c {
                    let col = &mut w[(p + j) * n + p..(p + j + 1) * n];
                    for (o, &v) in col.iter_mut().zip(&x[j * rows..(j + 1) * rows]) {
                        *o = v as f32;
                    }
                }
            }
            w
        })
    }
}

/// out = W k for W lower triangular (n x n, column-major, zeros above the
/// diagonal) and k n x b: one dense matrix product per panel of PANEL
/// columns of W, skipping the zero rows above the panel (measured 10%
/// faster than faer's triangular kernels at n = 1000, b = 128).
fn lower_times(w: &[f32], n: usize, k: &[f32], out: &mut [f32], b: usize) {
    let wv = MatRef::from_column_major_slice(w, n, n);
    let kv = MatRef::from_column_major_slice(k, n, b);
    let mut ov = MatMut::from_column_major_slice_mut(out, n, b);
    for p in (0..n).step_by(PANEL) {
        let c = PANEL.min(n - p);
        let accum = if p == 0 { Accum::Replace } else { Accum::Add };
        faer::linalg::matmul::matmul(
            ov.as_mut().subrows_mut(p, n - p),
            accum,
            wv.submatrix(p, p, n - p, c),
            kv.subrows(p, c),
            1.0f32,
            Par::Seq,
        );
    }
}

/// Dot product with eight independent partial sums, so that it vectorises
/// (a single running sum is a chain of dependent additions).
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let mut acc = [0.0f64; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let tail: f64 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    acc.iter().sum::<f64>() + tail
}

/// Sum of squares of f32 values, accumulated in f64.
fn sum_sq_f32(a: &[f32]) -> f64 {
    let mut acc = [0.0f64; 8];
    let ca = a.chunks_exact(8);
    let tail: f64 = ca
        .remainder()
        .iter()
        .map(|&x| f64::from(x) * f64::from(x))
        .sum();
    for x in ca {
        for i in 0..8 {
            let v = f64::from(x[i]);
            acc[i] += v * v;
        }
    }
    acc.iter().sum::<f64>() + tail
}

/// The f32 copy of the inverse of a GP's Cholesky factor, built lazily;
/// shown by its size only in debug output.
#[derive(Clone, Default)]
pub(crate) struct InverseFactor32(pub std::sync::OnceLock<Vec<f32>>);

impl std::fmt::Debug for InverseFactor32 {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.0.get() {
            Some(v) => write!(f, "InverseFactor32({} entries)", v.len()),
            None => write!(f, "InverseFactor32(not built)"),
        }
    }
}
