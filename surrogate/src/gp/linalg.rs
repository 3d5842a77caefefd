//! Dense kernel matrices and their Cholesky factors, on column-major
//! `Vec<f64>` storage viewed through faer.

use faer::linalg::solvers::Llt;
use faer::{MatMut, MatRef, Side};
use rayon::prelude::*;

use super::kernel::{scaled_transpose, KernelKind, UnitColumn};
use super::GpError;

/// Jitter ladder, relative to the mean diagonal: tried in order when the
/// Cholesky factorisation fails (common practice, no source).
const JITTER_STEPS: [f64; 7] = [0.0, 1e-10, 1e-9, 1e-8, 1e-7, 1e-6, 1e-5];

/// A lower Cholesky factor in column-major storage, and the jitter that was
/// added to the diagonal to obtain it.
pub(crate) struct Factor {
    pub l: Vec<f64>,
    pub jitter: f64,
}

/// Lower triangle (with diagonal) of s_f^2 k(x_i, x_j) + diag(extra), x
/// row-major n x d. The strict upper triangle is left at zero.
pub(crate) fn kernel_lower(
    kernel: KernelKind,
    x: &[f64],
    d: usize,
    signal_var: f64,
    inv_l: &[f64],
    extra_diag: &[f64],
) -> Vec<f64> {
    let n = extra_diag.len();
    let mut k = vec![0.0; n * n];
    kernel_lower_unit(kernel, x, d, inv_l, &mut k, None);
    for (i, v) in k.iter_mut().enumerate() {
        *v *= signal_var;
        if i % (n + 1) == 0 {
            *v += extra_diag[i / (n + 1)];
        }
    }
    k
}

/// Lower triangle of the unit-variance kernel matrix (diagonal 1) into `k`
/// (n x n column-major), and optionally the length-scale factor into `g`.
/// Columns in parallel; each column's loop is compiled for the best SIMD
/// level found at run time (pulp).
pub(crate) fn kernel_lower_unit(
    kernel: KernelKind,
    x: &[f64],
    d: usize,
    inv_l: &[f64],
    k: &mut [f64],
    g: Option<&mut [f64]>,
) {
    let n = (k.len() as f64).sqrt().round() as usize;
    if n == 0 {
        return;
    }
    let xt = scaled_transpose(x, d, inv_l);
    let arch = pulp::Arch::new();
    let column = |j: usize, kc: &mut [f64], gc: Option<&mut [f64]>| {
        let zj: Vec<f64> = (0..d).map(|q| xt[q * n + j]).collect();
        kc[j] = 1.0;
        let (_, below) = kc.split_at_mut(j + 1);
        let grad = gc.map(|gc| gc.split_at_mut(j + 1).1);
        arch.dispatch(UnitColumn {
            kernel,
            xt: &xt,
            n,
            start: j + 1,
            zj: &zj,
            out: below,
            grad,
            scale: 1.0,
        });
    };
    match g {
        Some(g) => k
            .par_chunks_mut(n)
            .zip(g.par_chunks_mut(n))
            .enumerate()
            .for_each(|(j, (kc, gc))| column(j, kc, Some(gc))),
        None => k
            .par_chunks_mut(n)
            .enumerate()
            .for_each(|(j, kc)| column(j, kc, None)),
    }
}

/// Cross-covariance s_f^2 k(x_i, z_j) for training rows x (n x d) and query
/// rows z (m x d), as an n x m column-major matrix.
pub(crate) fn kernel_cross(
    kernel: KernelKind,
    x: &[f64],
    z: &[f64],
    d: usize,
    signal_var: f64,
    inv_l: &[f64],
) -> Vec<f64> {
    let n = x.len().checked_div(d).unwrap_or(0);
    let m = z.len().checked_div(d).unwrap_or(0);
    let mut k = vec![0.0; n * m];
    if n == 0 {
        return k;
    }
    let xt = scaled_transpose(x, d, inv_l);
    let arch = pulp::Arch::new();
    k.par_chunks_mut(n).enumerate().for_each(|(j, col)| {
        let zj: Vec<f64> = (0..d).map(|q| z[j * d + q] * inv_l[q]).collect();
        arch.dispatch(UnitColumn {
            kernel,
            xt: &xt,
            n,
            start: 0,
            zj: &zj,
            out: col,
            grad: None,
            scale: signal_var,
        });
    });
    k
}

/// Cholesky factorisation (faer) of the lower-triangle matrix `a` (n x n
/// column-major), escalating jitter on failure. `scale` sets the jitter
/// unit (the mean diagonal). Returns the factorisation and the jitter used.
pub(crate) fn cholesky_llt(a: &[f64], n: usize, scale: f64) -> Result<(Llt<f64>, f64), GpError> {
    let view = MatRef::from_column_major_slice(a, n, n);
    let mut last = 0.0;
    for &step in &JITTER_STEPS {
        let jitter = step * scale;
        last = jitter;
        let attempt = if jitter == 0.0 {
            view.llt(Side::Lower)
        } else {
            let mut b = a.to_vec();
            for i in 0..n {
                b[i * n + i] += jitter;
            }
            MatRef::from_column_major_slice(&b, n, n).llt(Side::Lower)
        };
        if let Ok(llt) = attempt {
            let lm = llt.L();
            let finite = (0..n).all(|i| lm.get(i, i).is_finite() && *lm.get(i, i) > 0.0);
            if finite {
                return Ok((llt, jitter));
            }
        }
    }
    Err(GpError::NotPositiveDefinite { n, jitter: last })
}

/// As [`cholesky_llt`], with the factor copied to column-major storage.
pub(crate) fn cholesky(a: &[f64], n: usize, scale: f64) -> Result<Factor, GpError> {
    let (llt, jitter) = cholesky_llt(a, n, scale)?;
    let lm = llt.L();
    let mut l = vec![0.0; n * n];
    for j in 0..n {
        for i in j..n {
            l[j * n + i] = *lm.get(i, j);
        }
    }
    Ok(Factor { l, jitter })
}

/// Solve L X = B in place, B n x m column-major.
pub(crate) fn solve_lower(l: &[f64], n: usize, b: &mut [f64]) {
    if n == 0 {
        return;
    }
    let m = b.len() / n;
    let lv = MatRef::from_column_major_slice(l, n, n);
    let bv = MatMut::from_column_major_slice_mut(b, n, m);
    lv.solve_lower_triangular_in_place(bv);
}

/// Solve L^T X = B in place, B n x m column-major.
pub(crate) fn solve_upper_t(l: &[f64], n: usize, b: &mut [f64]) {
    if n == 0 {
        return;
    }
    let m = b.len() / n;
    let lv = MatRef::from_column_major_slice(l, n, n);
    let bv = MatMut::from_column_major_slice_mut(b, n, m);
    lv.transpose().solve_upper_triangular_in_place(bv);
}

/// Solve (L L^T) X = B in place.
pub(crate) fn solve_chol(l: &[f64], n: usize, b: &mut [f64]) {
    solve_lower(l, n, b);
    solve_upper_t(l, n, b);
}

/// Sum of log diagonal entries of L (half the log determinant of L L^T).
pub(crate) fn half_log_det(l: &[f64], n: usize) -> f64 {
    (0..n).map(|i| l[i * n + i].ln()).sum()
}
