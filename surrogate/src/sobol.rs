//! Variance-based sensitivity: Sobol first-order and total indices by the
//! pick-and-freeze design of Saltelli et al. (2010), "Variance based
//! sensitivity analysis of model output. Design and estimator for the total
//! sensitivity index", Comput. Phys. Commun. 181:259-270.
//!
//! With two independent uniform samples A and B of the unit cube (N rows
//! each) and, for each input i, the matrix AB_i (A with its column i taken
//! from B):
//!
//! - first order `S_i = mean(f(B) (f(AB_i) - f(A))) / V` (Saltelli et al.
//!   2010, Table 2, estimator (b));
//! - total `ST_i = mean((f(A) - f(AB_i))^2) / (2 V)` (Jansen 1999; Saltelli
//!   et al. 2010, Table 2, estimator (f));
//!
//! with `V` the variance of f over A and B together, and f centred on its
//! sample mean first. `N (d + 2)` evaluations.

use rand::{Rng, SeedableRng};

/// The pick-and-freeze sample: rows of A, then B, then AB_1 .. AB_d.
#[derive(Clone, Debug)]
pub struct Design {
    /// Base rows N.
    pub n: usize,
    /// Inputs d.
    pub d: usize,
    /// All `N (d + 2)` points in the unit cube, in the order A, B, AB_1 .. AB_d.
    pub points: Vec<Vec<f64>>,
}

/// First-order and total indices of each input.
#[derive(Clone, Debug, PartialEq)]
pub struct Indices {
    /// First-order index of each input.
    pub first: Vec<f64>,
    /// Total index of each input.
    pub total: Vec<f64>,
    /// Variance of the output over the sample.
    pub variance: f64,
}

/// Draws the pick-and-freeze sample with `n` base rows in `d` dimensions.
pub fn design(n: usize, d: usize, seed: u64) -> Design {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut draw = || -> Vec<Vec<f64>> {
        (0..n)
            .map(|_| (0..d).map(|_| rng.random::<f64>()).collect())
            .collect()
    };
    let a = draw();
    let b = draw();
    let mut points = Vec::with_capacity(n * (d + 2));
    points.extend(a.iter().cloned());
    points.extend(b.iter().cloned());
    for i in 0..d {
        for (ra, rb) in a.iter().zip(&b) {
            let mut p = ra.clone();
            p[i] = rb[i];
            points.push(p);
        }
    }
    Design { n, d, points }
}

/// The indices from the outputs `f` at [`Design::points`] (same order),
/// over the base rows `rows` (all rows: `0..n`; a bootstrap resample: row
/// numbers drawn with replacement).
pub fn indices_over(f: &[f64], n: usize, d: usize, rows: &[usize]) -> Indices {
    let m = rows.len() as f64;
    let mean = rows.iter().map(|&r| f[r] + f[n + r]).sum::<f64>() / (2.0 * m);
    // Centred outputs: the estimators' expectations do not change, their
    // variance does (far less Monte Carlo error when the mean is large
    // against the spread; common practice, no source).
    let fa = |r: usize| f[r] - mean;
    let fb = |r: usize| f[n + r] - mean;
    let fab = |i: usize, r: usize| f[(2 + i) * n + r] - mean;
    let mean = 0.0;
    let variance = rows
        .iter()
        .map(|&r| (fa(r) - mean).powi(2) + (fb(r) - mean).powi(2))
        .sum::<f64>()
        / (2.0 * m - 1.0);
    let mut first = Vec::with_capacity(d);
    let mut total = Vec::with_capacity(d);
    for i in 0..d {
        let s = rows
            .iter()
            .map(|&r| fb(r) * (fab(i, r) - fa(r)))
            .sum::<f64>()
            / m;
        let t = rows
            .iter()
            .map(|&r| (fa(r) - fab(i, r)).powi(2))
            .sum::<f64>()
            / (2.0 * m);
        if variance > 0.0 {
            first.push(s / variance);
            total.push(t / variance);
        } else {
            first.push(0.0);
            total.push(0.0);
        }
    }
    Indices {
        first,
        total,
        variance,
    }
}

/// The indices from the outputs `f` at [`Design::points`], all rows.
pub fn indices(f: &[f64], n: usize, d: usize) -> Indices {
    let rows: Vec<usize> = (0..n).collect();
    indices_over(f, n, d, &rows)
}

/// The indices of `reps` bootstrap resamples of the base rows (Efron 1979;
/// the rows, not the points, are resampled, so each resample keeps the
/// pick-and-freeze structure): their spread is the Monte Carlo error.
pub fn bootstrap(f: &[f64], n: usize, d: usize, reps: usize, seed: u64) -> Vec<Indices> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    (0..reps)
        .map(|_| {
            let rows: Vec<usize> = (0..n).map(|_| rng.random_range(0..n)).collect();
            indices_over(f, n, d, &rows)
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    // Analytic: f = x1 + 2 x2 on U(0,1)^2 has S = ST = (1/5, 4/5), no interactions.
    #[test]
    fn additive_function_has_equal_first_and_total() {
        let dz = design(20_000, 2, 5);
        let f: Vec<f64> = dz.points.iter().map(|p| p[0] + 2.0 * p[1]).collect();
        let ix = indices(&f, dz.n, dz.d);
        for (got, want) in ix.first.iter().zip([0.2, 0.8]) {
            assert!((got - want).abs() < 0.02, "{got} vs {want}");
        }
        for (got, want) in ix.total.iter().zip([0.2, 0.8]) {
            assert!((got - want).abs() < 0.02, "{got} vs {want}");
        }
    }
}
