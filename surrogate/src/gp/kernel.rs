//! Stationary covariance functions with ARD length scales (GPML ch. 4):
//! Matern 5/2 and squared exponential.

use serde::{Deserialize, Serialize};

/// The covariance function of a [`super::Gp`]. Both use one length scale per
/// input (automatic relevance determination) and a signal variance s_f^2.
#[derive(Clone, Copy, Debug, Serialize, Deserialize, PartialEq, Eq, Default)]
pub enum KernelKind {
    /// k = s_f^2 (1 + sqrt5 r + 5 r^2 / 3) exp(-sqrt5 r), r the scaled
    /// distance (GPML eq. 4.17 with nu = 5/2).
    #[default]
    Matern52,
    /// k = s_f^2 exp(-r^2 / 2) (GPML eq. 4.9).
    SquaredExponential,
}

const SQRT5: f64 = 2.236_067_977_499_79;

impl KernelKind {
    /// Covariance at squared scaled distance `r2`, for unit signal variance.
    #[inline]
    pub(crate) fn unit(self, r2: f64) -> f64 {
        match self {
            KernelKind::Matern52 => {
                let r = r2.sqrt();
                (1.0 + SQRT5 * r + 5.0 / 3.0 * r2) * (-SQRT5 * r).exp()
            }
            KernelKind::SquaredExponential => (-0.5 * r2).exp(),
        }
    }

    /// Covariance and the factor g with d k / d log l_k = g (delta_k / l_k)^2,
    /// both for unit signal variance.
    ///
    /// Matern 5/2: g = (5/3)(1 + sqrt5 r) exp(-sqrt5 r); SE: g = k.
    /// Scalar reference for [`unit_column`].
    #[cfg(test)]
    pub(crate) fn unit_with_grad(self, r2: f64) -> (f64, f64) {
        match self {
            KernelKind::Matern52 => {
                let r = r2.sqrt();
                let e = (-SQRT5 * r).exp();
                let k = (1.0 + SQRT5 * r + 5.0 / 3.0 * r2) * e;
                (k, 5.0 / 3.0 * (1.0 + SQRT5 * r) * e)
            }
            KernelKind::SquaredExponential => {
                let k = (-0.5 * r2).exp();
                (k, k)
            }
        }
    }
}

/// Squared distance between `a` and `b` scaled by inverse length scales.
#[inline]
pub(crate) fn scaled_sq_dist(a: &[f64], b: &[f64], inv_l: &[f64]) -> f64 {
    let mut s = 0.0;
    for ((u, v), w) in a.iter().zip(b).zip(inv_l) {
        let t = (u - v) * w;
        s += t * t;
    }
    s
}

/// exp(x) for x <= 0, branch-free so that loops over it vectorise.
///
/// Hand-written because std's `exp` is an opaque call that blocks
/// vectorisation of kernel loops, and no maintained crate offers a stable,
/// safe vectorisable f64 exp. Method (Cody & Waite range reduction, as in
/// fdlibm): x = k ln2 + r, |r| <= ln2/2, exp(r) by its Taylor series to
/// degree 12 (truncation below 2e-16 relative), times 2^k built from the
/// exponent bits. Arguments below -708 are clamped to -708 (result 3.3e-308
/// instead of a smaller subnormal or 0). Within about 2 ulp of `f64::exp`
/// (tested).
#[inline(always)]
pub(crate) fn exp_neg(x: f64) -> f64 {
    const LOG2E: f64 = std::f64::consts::LOG2_E;
    // fdlibm's split of ln 2: LN2_HI has 32 significant bits, so k * LN2_HI is exact.
    const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
    const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);
    const SHIFT: f64 = 6_755_399_441_055_744.0; // 1.5 * 2^52: rounds to an integer
    let x = x.max(-708.0);
    let t = x * LOG2E + SHIFT;
    let kf = t - SHIFT;
    let r = (x - kf * LN2_HI) - kf * LN2_LO;
    // sum_{j=0}^{12} r^j / j! by Estrin's scheme with fused multiply-adds:
    // a depth of 5 instead of Horner's 12, so the loop is not latency-bound.
    let r2 = r * r;
    let r4 = r2 * r2;
    let r8 = r4 * r4;
    let a0 = r + 1.0;
    let a1 = r.mul_add(1.0 / 6.0, 0.5);
    let a2 = r.mul_add(1.0 / 120.0, 1.0 / 24.0);
    let a3 = r.mul_add(1.0 / 5_040.0, 1.0 / 720.0);
    let a4 = r.mul_add(1.0 / 362_880.0, 1.0 / 40_320.0);
    let a5 = r.mul_add(1.0 / 39_916_800.0, 1.0 / 3_628_800.0);
    let b0 = r2.mul_add(a1, a0);
    let b1 = r2.mul_add(a3, a2);
    let b2 = r2.mul_add(a5, a4);
    let c0 = r4.mul_add(b1, b0);
    let c1 = r4.mul_add(1.0 / 479_001_600.0, b2);
    let p = r8.mul_add(c1, c0);
    let k = t.to_bits().wrapping_sub(SHIFT.to_bits()) as i64;
    let scale = f64::from_bits((k.wrapping_add(1023) as u64) << 52);
    p * scale
}

/// Unit-variance kernel values for one query point against a range of
/// training points: `out[i] = k(r2)` with r2 from scaled, transposed inputs
/// `xt` (row k holds input k of all n points, divided by l_k) and the scaled
/// query `zj`. Optionally also the length-scale factor of
/// [`KernelKind::unit_with_grad`] into `grad`.
#[inline(always)]
pub(crate) fn unit_column(
    kernel: KernelKind,
    xt: &[f64],
    n: usize,
    start: usize,
    zj: &[f64],
    out: &mut [f64],
    mut grad: Option<&mut [f64]>,
) {
    let len = out.len();
    out.fill(0.0);
    for (k, &zk) in zj.iter().enumerate() {
        let row = &xt[k * n + start..k * n + start + len];
        for (c, &xv) in out.iter_mut().zip(row) {
            let t = xv - zk;
            *c += t * t;
        }
    }
    match kernel {
        KernelKind::Matern52 => {
            if let Some(g) = grad.as_deref_mut() {
                for (c, gi) in out.iter_mut().zip(g.iter_mut()) {
                    let r = c.sqrt();
                    let e = exp_neg(-SQRT5 * r);
                    *gi = 5.0 / 3.0 * (1.0 + SQRT5 * r) * e;
                    *c = (1.0 + SQRT5 * r + 5.0 / 3.0 * *c) * e;
                }
            } else {
                for c in out.iter_mut() {
                    let r = c.sqrt();
                    *c = (1.0 + SQRT5 * r + 5.0 / 3.0 * *c) * exp_neg(-SQRT5 * r);
                }
            }
        }
        KernelKind::SquaredExponential => {
            for c in out.iter_mut() {
                *c = exp_neg(-0.5 * *c);
            }
            if let Some(g) = grad {
                g.copy_from_slice(out);
            }
        }
    }
}

/// [`unit_column`] (optionally times `scale`) as a pulp operation, so that
/// `pulp::Arch::dispatch` compiles it for the best SIMD level found at run
/// time (a closure is not inlined into the dispatch and stays SSE2).
pub(crate) struct UnitColumn<'a> {
    pub kernel: KernelKind,
    pub xt: &'a [f64],
    pub n: usize,
    pub start: usize,
    pub zj: &'a [f64],
    pub out: &'a mut [f64],
    pub grad: Option<&'a mut [f64]>,
    pub scale: f64,
}

impl pulp::WithSimd for UnitColumn<'_> {
    type Output = ();
    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, _simd: S) {
        unit_column(
            self.kernel,
            self.xt,
            self.n,
            self.start,
            self.zj,
            self.out,
            self.grad,
        );
        if self.scale != 1.0 {
            for c in self.out.iter_mut() {
                *c *= self.scale;
            }
        }
    }
}

/// Inputs (row-major n x d) divided by the length scales and transposed to
/// d x n, for [`unit_column`].
pub(crate) fn scaled_transpose(x: &[f64], d: usize, inv_l: &[f64]) -> Vec<f64> {
    let n = x.len().checked_div(d).unwrap_or(0);
    let mut xt = vec![0.0; n * d];
    for i in 0..n {
        for k in 0..d {
            xt[k * n + i] = x[i * d + k] * inv_l[k];
        }
    }
    xt
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exp_neg_agrees_with_std_exp() {
        // Reference: Rust's f64::exp (the platform libm). Relative error below 4 ulp.
        let mut worst: f64 = 0.0;
        for i in 0..=200_000 {
            let x = -708.0 * (i as f64 / 200_000.0).powi(3);
            let rel = (exp_neg(x) - x.exp()).abs() / x.exp();
            worst = worst.max(rel);
        }
        assert!(worst < 4.0 * f64::EPSILON, "worst relative error {worst:e}");
        assert_eq!(exp_neg(0.0), 1.0);
    }

    #[test]
    fn unit_column_equals_scalar_kernel() {
        let x = [0.1, 0.7, 0.4, 0.2, 0.9, 0.95, 0.33, 0.5, 0.0];
        let inv_l = [2.0, 0.5, 3.0];
        let xt = scaled_transpose(&x, 3, &inv_l);
        let z = [0.3, 0.3, 0.3];
        let zs: Vec<f64> = z.iter().zip(&inv_l).map(|(a, b)| a * b).collect();
        for kernel in [KernelKind::Matern52, KernelKind::SquaredExponential] {
            let mut out = [0.0; 3];
            let mut g = [0.0; 3];
            unit_column(kernel, &xt, 3, 0, &zs, &mut out, Some(&mut g));
            for i in 0..3 {
                let r2 = scaled_sq_dist(&x[i * 3..i * 3 + 3], &z, &inv_l);
                let (k, gg) = kernel.unit_with_grad(r2);
                assert!((out[i] - k).abs() < 1e-14 && (g[i] - gg).abs() < 1e-14);
            }
        }
    }
}
