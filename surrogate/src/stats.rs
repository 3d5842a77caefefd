//! Small statistics used on samples: quantiles, ranks, correlation, the
//! normal quantile function and the Kolmogorov-Smirnov test against a
//! uniform distribution.

/// The standard normal quantile function `Phi^-1(p)` by Wichura's
/// algorithm AS 241 (PPND16; Applied Statistics 37:477-484, 1988), about
/// 1e-16 relative accuracy. `p` outside (0, 1) gives -inf, +inf or NaN.
// The coefficients are written as published, digits grouped after the point only.
#[allow(clippy::inconsistent_digit_grouping, clippy::excessive_precision)]
pub fn normal_quantile(p: f64) -> f64 {
    if p.is_nan() || !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    if p == 0.0 {
        return f64::NEG_INFINITY;
    }
    if p == 1.0 {
        return f64::INFINITY;
    }
    let q = p - 0.5;
    if q.abs() <= 0.425 {
        let r = 0.180625 - q * q;
        return q
            * (((((((r * 2509.080_928_730_122_7 + 33430.575_583_588_128) * r
                + 67265.770_927_008_7)
                * r
                + 45921.953_931_549_87)
                * r
                + 13731.693_765_509_461)
                * r
                + 1971.590_950_306_551_3)
                * r
                + 133.141_667_891_784_38)
                * r
                + 3.387_132_872_796_366_5)
            / (((((((r * 5226.495_278_852_545 + 28729.085_735_721_943) * r
                + 39307.895_800_092_71)
                * r
                + 21213.794_301_586_597)
                * r
                + 5394.196_021_424_751)
                * r
                + 687.187_007_492_057_9)
                * r
                + 42.313_330_701_600_91)
                * r
                + 1.0);
    }
    let r = if q < 0.0 { p } else { 1.0 - p };
    let r = (-r.ln()).sqrt();
    let x = if r <= 5.0 {
        let r = r - 1.6;
        (((((((r * 7.745_450_142_783_414e-4 + 0.022_723_844_989_269_184) * r
            + 0.241_780_725_177_450_6)
            * r
            + 1.270_458_252_452_368_4)
            * r
            + 3.647_848_324_763_204_5)
            * r
            + 5.769_497_221_460_691)
            * r
            + 4.630_337_846_156_546)
            * r
            + 1.423_437_110_749_683_5)
            / (((((((r * 1.050_750_071_644_416_9e-9 + 5.475_938_084_995_345e-4) * r
                + 0.015_198_666_563_616_457)
                * r
                + 0.148_103_976_427_480_08)
                * r
                + 0.689_767_334_985_1)
                * r
                + 1.676_384_830_183_803_8)
                * r
                + 2.053_191_626_637_759)
                * r
                + 1.0)
    } else {
        let r = r - 5.0;
        (((((((r * 2.010_334_399_292_288_1e-7 + 2.711_555_568_743_487_6e-5) * r
            + 0.001_242_660_947_388_078_4)
            * r
            + 0.026_532_189_526_576_124)
            * r
            + 0.296_560_571_828_504_9)
            * r
            + 1.784_826_539_917_291_3)
            * r
            + 5.463_784_911_164_114)
            * r
            + 6.657_904_643_501_103)
            / (((((((r * 2.044_263_103_389_939_7e-15 + 1.421_511_758_316_446e-7) * r
                + 1.846_318_317_510_054_8e-5)
                * r
                + 7.868_691_311_456_133e-4)
                * r
                + 0.014_875_361_290_850_615)
                * r
                + 0.136_929_880_922_735_8)
                * r
                + 0.599_832_206_555_888)
                * r
                + 1.0)
    };
    if q < 0.0 {
        -x
    } else {
        x
    }
}

/// Ranks of `v` from 1 to n, ties at their average rank.
pub fn ranks(v: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..v.len()).collect();
    order.sort_by(|&a, &b| v[a].total_cmp(&v[b]));
    let mut r = vec![0.0; v.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && v[order[j + 1]] == v[order[i]] {
            j += 1;
        }
        let avg = (i + j) as f64 / 2.0 + 1.0;
        for &k in &order[i..=j] {
            r[k] = avg;
        }
        i = j + 1;
    }
    r
}

/// The `p` quantile by linear interpolation between order statistics
/// (Hyndman & Fan 1996, definition 7; numpy's default). NaN for no data.
pub fn quantile(v: &[f64], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    let h = (s.len() - 1) as f64 * p.clamp(0.0, 1.0);
    let lo = h.floor() as usize;
    let hi = h.ceil() as usize;
    s[lo] + (h - lo as f64) * (s[hi] - s[lo])
}

/// The median ([`quantile`] at 0.5).
pub fn median(v: &[f64]) -> f64 {
    quantile(v, 0.5)
}

/// Mean and standard deviation (n - 1 denominator).
pub fn mean_sd(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    if v.is_empty() {
        return (f64::NAN, f64::NAN);
    }
    let m = v.iter().sum::<f64>() / n;
    if v.len() < 2 {
        return (m, f64::NAN);
    }
    let var = v.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (n - 1.0);
    (m, var.sqrt())
}

/// Pearson's correlation coefficient (NaN if either has no spread).
pub fn correlation(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    if n < 2 {
        return f64::NAN;
    }
    let ma = a[..n].iter().sum::<f64>() / n as f64;
    let mb = b[..n].iter().sum::<f64>() / n as f64;
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a[..n].iter().zip(&b[..n]) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    if saa <= 0.0 || sbb <= 0.0 {
        return f64::NAN;
    }
    sab / (saa * sbb).sqrt()
}

/// The Kolmogorov distribution's survival function,
/// `Q(x) = 2 sum_{k>=1} (-1)^(k-1) exp(-2 k^2 x^2)` (Kolmogorov 1933), the
/// limiting distribution of `sqrt(n) D_n`.
pub fn kolmogorov_sf(x: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    if x < 0.2 {
        // The alternating series converges slowly here; Q is 1 to double precision.
        return 1.0;
    }
    let mut sum = 0.0;
    for k in 1..=100 {
        let kf = k as f64;
        let term = (-2.0 * kf * kf * x * x).exp();
        sum += if k % 2 == 1 { term } else { -term };
        if term < 1e-17 {
            break;
        }
    }
    (2.0 * sum).clamp(0.0, 1.0)
}

/// The one-sample Kolmogorov-Smirnov test of `v` against the uniform
/// distribution on `[lo, hi]`: the statistic `D` and its asymptotic
/// p-value [`kolmogorov_sf`]`(sqrt(n) D)`.
pub fn ks_uniform(v: &[f64], lo: f64, hi: f64) -> (f64, f64) {
    let n = v.len();
    if n == 0 || hi <= lo {
        return (f64::NAN, f64::NAN);
    }
    let mut u: Vec<f64> = v
        .iter()
        .map(|x| ((x - lo) / (hi - lo)).clamp(0.0, 1.0))
        .collect();
    u.sort_by(f64::total_cmp);
    let nf = n as f64;
    let d = u
        .iter()
        .enumerate()
        .map(|(i, &x)| ((i as f64 + 1.0) / nf - x).max(x - i as f64 / nf))
        .fold(0.0, f64::max);
    (d, kolmogorov_sf(nf.sqrt() * d))
}

#[cfg(test)]
mod tests {
    use super::*;

    // Reference values of Phi^-1 from scipy.special.ndtri (scipy 1.17.1):
    // 0.975 -> 1.959963984540054, 1e-10 -> -6.361340902404056.
    #[test]
    fn normal_quantile_matches_published_values() {
        assert!((normal_quantile(0.975) - 1.959_963_984_540_054).abs() < 1e-14);
        assert!((normal_quantile(0.5)).abs() < 1e-16);
        assert!((normal_quantile(1e-10) + 6.361_340_902_404_056).abs() < 1e-12);
        assert!((normal_quantile(0.025) + 1.959_963_984_540_054).abs() < 1e-14);
    }

    #[test]
    fn ranks_average_ties() {
        assert_eq!(ranks(&[3.0, 1.0, 3.0, 2.0]), vec![3.5, 1.0, 3.5, 2.0]);
    }

    // numpy.quantile([1, 2, 3, 4], 0.25) = 1.75 (linear interpolation).
    #[test]
    fn quantile_interpolates_like_numpy() {
        assert!((quantile(&[4.0, 1.0, 3.0, 2.0], 0.25) - 1.75).abs() < 1e-15);
        assert!((median(&[5.0, 1.0, 3.0]) - 3.0).abs() < 1e-15);
    }
}
