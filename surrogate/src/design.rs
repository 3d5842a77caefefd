//! Space-filling designs in the unit cube: Latin hypercubes (McKay, Beckman
//! & Conover 1979) improved by the phi_p criterion (Morris & Mitchell 1995),
//! greedy maximin batches and extensions of an existing design, and the
//! measures used to judge a design (phi_p, minimum distance, the
//! squared centred L2 discrepancy of Hickernell 1998).
//!
//! Hand-written: no maintained Rust crate offers a seeded maximin Latin
//! hypercube with the phi_p criterion.

use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// The exponent of the phi_p criterion used by [`maximin_lhs`]. Morris &
/// Mitchell (1995) show that for large p minimising phi_p is the maximin
/// criterion with ties broken by the number of closest pairs; p = 50 is
/// large enough for that while keeping the criterion smooth.
pub const DESIGN_P: f64 = 50.0;

/// Above this many points [`maximin_lhs`] returns an unoptimised random Latin
/// hypercube: the optimiser keeps an n x n distance matrix (memory n^2 f64).
pub const MAX_OPTIMISED_POINTS: usize = 2000;

/// A Latin hypercube of `n` points in [0,1)^`d`, optimised for the phi_p
/// criterion ([`DESIGN_P`]), deterministic given the seed.
///
/// Each column holds exactly one point in each stratum [k/n, (k+1)/n)
/// (McKay, Beckman & Conover 1979). Each point sits at a uniformly random
/// position within its stratum (not the centre), drawn once; the optimiser
/// then permutes the values within columns, which keeps the Latin property.
///
/// Optimisation: simulated annealing over column-wise swaps of two elements,
/// as in Morris & Mitchell (1995), on log phi_p with a geometric cooling
/// schedule; the best design seen is returned. The swap's effect on the
/// pairwise distances is computed in O(n) from a stored distance matrix.
///
/// Edge cases: `n == 0` gives an empty vector; `n == 1` gives one random
/// point; `d == 0` gives `n` empty points. Above [`MAX_OPTIMISED_POINTS`]
/// points the design is a random Latin hypercube without optimisation.
pub fn maximin_lhs(n: usize, d: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    if n == 0 {
        return Vec::new();
    }
    let mut x = random_lhs(n, d, &mut rng);
    if n < 3 || d == 0 || n > MAX_OPTIMISED_POINTS {
        // With two points every Latin hypercube with the same column values
        // is equally good up to the jitter; nothing to optimise.
        return x;
    }
    anneal(&mut x, d, &mut rng);
    x
}

/// Picks `q` points from `candidates` one at a time, each the farthest
/// from `existing` and the points already picked (greedy maximin; Johnson,
/// Moore & Ylvisaker 1990): a space-filling batch inside a region.
pub fn spread(candidates: &[Vec<f64>], existing: &[Vec<f64>], q: usize) -> Vec<Vec<f64>> {
    let nearest = candidates
        .iter()
        .map(|c| {
            existing
                .iter()
                .map(|e| sq_dist(c, e))
                .fold(f64::INFINITY, f64::min)
        })
        .collect();
    farthest_first(candidates, nearest, q)
}

/// `k` more points for a design that already holds `existing` (all in the
/// unit cube): [`spread`] over a random Latin hypercube of at least 1024
/// candidates, with each candidate also kept away from its own mirror
/// images in the faces of the cube (twice its distance to the nearest
/// face), so that the extension fills the gaps of the design rather than
/// its corners (the mirror rule is our choice, no source). Deterministic
/// given the seed; `d == 0` gives `k` empty points.
pub fn extend_maximin(existing: &[Vec<f64>], k: usize, d: usize, seed: u64) -> Vec<Vec<f64>> {
    if d == 0 {
        return vec![Vec::new(); k];
    }
    let cands = latin_hypercube((64 * k).max(1024), d, seed);
    let nearest = cands
        .iter()
        .map(|c| {
            let face = c
                .iter()
                .map(|&v| v.min(1.0 - v))
                .fold(f64::INFINITY, f64::min);
            existing
                .iter()
                .filter(|e| e.len() == d)
                .map(|e| sq_dist(c, e))
                .fold(4.0 * face * face, f64::min)
        })
        .collect();
    farthest_first(&cands, nearest, k)
}

/// The greedy maximin loop: `nearest[i]` is candidate i's squared distance
/// to the nearest point so far; candidates already taken (distance 0) are
/// never taken again.
fn farthest_first(candidates: &[Vec<f64>], mut nearest: Vec<f64>, q: usize) -> Vec<Vec<f64>> {
    let mut out = Vec::new();
    for _ in 0..q.min(candidates.len()) {
        let Some((k, _)) = nearest
            .iter()
            .enumerate()
            .filter(|(_, d)| **d > 0.0)
            .max_by(|a, b| a.1.total_cmp(b.1))
        else {
            break;
        };
        let pick = candidates[k].clone();
        for (c, d) in candidates.iter().zip(nearest.iter_mut()) {
            *d = d.min(sq_dist(c, &pick));
        }
        out.push(pick);
    }
    out
}

/// A random Latin hypercube of `n` points in `d` dimensions (no
/// optimisation; for Monte Carlo averages, where stratifying each input is
/// what counts).
pub fn latin_hypercube(n: usize, d: usize, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    random_lhs(n, d, &mut rng)
}

fn random_lhs(n: usize, d: usize, rng: &mut ChaCha8Rng) -> Vec<Vec<f64>> {
    let mut x = vec![vec![0.0; d]; n];
    let mut perm: Vec<usize> = (0..n).collect();
    for k in 0..d {
        perm.shuffle(rng);
        for (row, &stratum) in x.iter_mut().zip(perm.iter()) {
            // Keep the jitter 1e-9 away from the stratum edges so that
            // rounding cannot move the value into the next stratum.
            let u = 1e-9 + (1.0 - 2e-9) * rng.random::<f64>();
            row[k] = (stratum as f64 + u) / n as f64;
        }
    }
    x
}

/// Simulated annealing on log phi_p with column-wise swaps.
fn anneal(x: &mut [Vec<f64>], d: usize, rng: &mut ChaCha8Rng) {
    let n = x.len();
    let p = DESIGN_P;
    let mut d2 = vec![0.0; n * n];
    let fill = |x: &[Vec<f64>], d2: &mut [f64]| {
        for i in 0..n {
            for j in (i + 1)..n {
                let s = sq_dist(&x[i], &x[j]);
                d2[i * n + j] = s;
                d2[j * n + i] = s;
            }
        }
    };
    fill(x, &mut d2);
    // Terms are (d_ij / scale)^(-p), with scale the initial minimum distance,
    // so they start at most 1 and the sum stays well inside f64 range. For
    // p = 50 the power is an integer power of the squared distance (powi).
    let mut dmin2 = f64::INFINITY;
    for i in 0..n {
        for j in (i + 1)..n {
            dmin2 = dmin2.min(d2[i * n + j]);
        }
    }
    let scale2 = dmin2.max(1e-300);
    let half = p / 2.0;
    let int_half = (half.fract() == 0.0 && half <= 64.0).then_some(half as i32);
    let term = |s: f64| {
        let r = s / scale2;
        match int_half {
            Some(h) => r.powi(-h),
            None => r.powf(-half),
        }
    };
    let mut t = vec![0.0; n * n];
    let refresh = |d2: &[f64], t: &mut [f64]| {
        let mut sum = 0.0;
        for i in 0..n {
            for j in (i + 1)..n {
                let v = term(d2[i * n + j]);
                t[i * n + j] = v;
                t[j * n + i] = v;
                sum += v;
            }
        }
        sum
    };
    let mut sum = refresh(&d2, &mut t);
    let mut best_sum = sum;
    let mut best_x: Vec<Vec<f64>> = x.to_vec();

    // Budget: 100 n d swap proposals within [2e4, 2e5], and at most 5e7 / n
    // so that the O(n) proposals keep n = 2000 well under a second; common
    // practice, no source.
    let iters = (100 * n * d)
        .clamp(20_000, 200_000)
        .min(50_000_000 / n)
        .max(1000);
    let t0: f64 = 0.05; // accept a 5% worsening of phi_p with probability 1/e at the start
    let t1: f64 = 1e-4;
    let cool = (t1 / t0).powf(1.0 / iters as f64);
    let mut temp = t0;
    let mut new_d1 = vec![0.0; n];
    let mut new_d2 = vec![0.0; n];
    let mut new_t1 = vec![0.0; n];
    let mut new_t2 = vec![0.0; n];
    let mut accepted_since_refresh = 0usize;
    for _ in 0..iters {
        temp *= cool;
        let k = rng.random_range(0..d);
        let i1 = rng.random_range(0..n);
        let mut i2 = rng.random_range(0..n - 1);
        if i2 >= i1 {
            i2 += 1;
        }
        let (a, b) = (x[i1][k], x[i2][k]);
        let mut delta = 0.0;
        for j in 0..n {
            if j == i1 || j == i2 {
                continue;
            }
            let xj = x[j][k];
            let (da, db) = ((a - xj) * (a - xj), (b - xj) * (b - xj));
            let n1 = (d2[i1 * n + j] - da + db).max(0.0);
            let n2 = (d2[i2 * n + j] - db + da).max(0.0);
            let (u1, u2) = (term(n1), term(n2));
            new_d1[j] = n1;
            new_d2[j] = n2;
            new_t1[j] = u1;
            new_t2[j] = u2;
            delta += u1 + u2 - t[i1 * n + j] - t[i2 * n + j];
        }
        // The pair (i1, i2) keeps its distance under the swap.
        let new_sum = (sum + delta).max(f64::MIN_POSITIVE);
        let dlog = (new_sum.ln() - sum.ln()) / p; // change of log phi_p
        let accept = dlog <= 0.0 || rng.random::<f64>() < (-dlog / temp).exp();
        if !accept {
            continue;
        }
        x[i1][k] = b;
        x[i2][k] = a;
        for j in 0..n {
            if j == i1 || j == i2 {
                continue;
            }
            d2[i1 * n + j] = new_d1[j];
            d2[j * n + i1] = new_d1[j];
            d2[i2 * n + j] = new_d2[j];
            d2[j * n + i2] = new_d2[j];
            t[i1 * n + j] = new_t1[j];
            t[j * n + i1] = new_t1[j];
            t[i2 * n + j] = new_t2[j];
            t[j * n + i2] = new_t2[j];
        }
        sum = new_sum;
        accepted_since_refresh += 1;
        // Incremental sums lose accuracy when large terms cancel: refresh.
        if accepted_since_refresh >= n || delta < -0.5 * (sum - delta) {
            fill(x, &mut d2);
            sum = refresh(&d2, &mut t);
            accepted_since_refresh = 0;
        }
        if sum < best_sum {
            best_sum = sum;
            best_x.clone_from_slice(x);
        }
    }
    // Judge the final and best designs exactly, keep the better.
    if phi_p(x, p) > phi_p(&best_x, p) {
        x.clone_from_slice(&best_x);
    }
}

fn sq_dist(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(u, v)| (u - v) * (u - v)).sum()
}

#[track_caller]
fn check_rectangular(points: &[Vec<f64>]) -> usize {
    let d = points.first().map_or(0, Vec::len);
    assert!(
        points.iter().all(|p| p.len() == d),
        "all points must have the same dimension"
    );
    d
}

/// The phi_p criterion of Morris & Mitchell (1995):
/// phi_p = (sum_{i<j} d_ij^(-p))^(1/p), d_ij the Euclidean distances.
///
/// Smaller is better. Computed as (1/d_min) (sum (d_ij/d_min)^(-p))^(1/p) so
/// large p does not overflow. Fewer than two points give 0 (empty sum);
/// two coincident points give infinity.
#[track_caller]
pub fn phi_p(points: &[Vec<f64>], p: f64) -> f64 {
    assert!(p > 0.0, "p must be positive");
    check_rectangular(points);
    if points.len() < 2 {
        return 0.0;
    }
    let dmin = min_distance(points);
    if dmin == 0.0 {
        return f64::INFINITY;
    }
    let mut s = 0.0;
    for i in 0..points.len() {
        for j in (i + 1)..points.len() {
            let r = sq_dist(&points[i], &points[j]).sqrt() / dmin;
            s += r.powf(-p);
        }
    }
    s.powf(1.0 / p) / dmin
}

/// The smallest Euclidean distance between two points; infinity for fewer
/// than two points.
#[track_caller]
pub fn min_distance(points: &[Vec<f64>]) -> f64 {
    check_rectangular(points);
    let mut m = f64::INFINITY;
    for i in 0..points.len() {
        for j in (i + 1)..points.len() {
            m = m.min(sq_dist(&points[i], &points[j]));
        }
    }
    m.sqrt()
}

/// The squared centred L2 discrepancy (Hickernell 1998), the value scipy's
/// `qmc.discrepancy(X, method='CD')` returns. Points must lie in the unit cube.
///
/// CD^2 = (13/12)^d - (2/n) sum_i prod_k (1 + |z_ik|/2 - z_ik^2/2)
///      + (1/n^2) sum_{i,j} prod_k (1 + |z_ik|/2 + |z_jk|/2 - |x_ik - x_jk|/2),
/// with z = x - 1/2.
#[track_caller]
pub fn centered_l2_discrepancy_sq(points: &[Vec<f64>]) -> f64 {
    let d = check_rectangular(points);
    let n = points.len();
    assert!(n > 0, "the discrepancy needs at least one point");
    assert!(
        points.iter().flatten().all(|v| (0.0..=1.0).contains(v)),
        "points must lie in the unit cube"
    );
    let mut single = 0.0;
    for p in points {
        let mut prod = 1.0;
        for &v in p {
            let z = (v - 0.5).abs();
            prod *= 1.0 + 0.5 * z - 0.5 * z * z;
        }
        single += prod;
    }
    let mut double = 0.0;
    for a in points {
        for b in points {
            let mut prod = 1.0;
            for k in 0..d {
                prod *= 1.0 + 0.5 * (a[k] - 0.5).abs() + 0.5 * (b[k] - 0.5).abs()
                    - 0.5 * (a[k] - b[k]).abs();
            }
            double += prod;
        }
    }
    let nf = n as f64;
    (13.0f64 / 12.0).powi(d as i32) - 2.0 / nf * single + double / (nf * nf)
}

/// True when every column has exactly one point in each stratum
/// [k/n, (k+1)/n), k = 0..n (all values must lie in [0,1)).
pub fn is_latin_hypercube(points: &[Vec<f64>]) -> bool {
    let n = points.len();
    if n == 0 {
        return true;
    }
    let d = points[0].len();
    if points.iter().any(|p| p.len() != d) {
        return false;
    }
    let mut seen = vec![false; n];
    for k in 0..d {
        seen.iter_mut().for_each(|s| *s = false);
        for p in points {
            let v = p[k];
            if !(0.0..1.0).contains(&v) {
                return false;
            }
            let s = ((v * n as f64).floor() as usize).min(n - 1);
            if seen[s] {
                return false;
            }
            seen[s] = true;
        }
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn small_cases() {
        assert!(maximin_lhs(0, 3, 1).is_empty());
        let one = maximin_lhs(1, 3, 1);
        assert_eq!(one.len(), 1);
        assert!(is_latin_hypercube(&one));
        let line = maximin_lhs(7, 1, 1);
        assert!(is_latin_hypercube(&line));
        let two = maximin_lhs(2, 4, 9);
        assert!(is_latin_hypercube(&two));
        assert_eq!(phi_p(&one, 50.0), 0.0);
        assert!(min_distance(&one).is_infinite());
    }

    #[test]
    fn spread_picks_far_points_first() {
        let c = vec![vec![0.1], vec![0.5], vec![0.9]];
        let picked = spread(&c, &[vec![0.0]], 2);
        assert_eq!(picked, vec![vec![0.9], vec![0.5]]);
    }

    #[test]
    fn extension_fills_the_largest_gaps() {
        // In one dimension the score of x is min(|x - p|, 2 min(x, 1 - x))
        // over the earlier points p (mirror images in the ends). Analytic
        // optima: from nothing, the centre 1/2; then 1/6 or 5/6, where
        // |x - 1/2| = 2x (or 2(1 - x)); then the other of the two.
        let ext = extend_maximin(&[], 3, 1, 4);
        assert_eq!(ext.len(), 3);
        let tol = 2.0 / 1024.0;
        assert!((ext[0][0] - 0.5).abs() < tol, "{ext:?}");
        let mut rest = [ext[1][0], ext[2][0]];
        rest.sort_by(f64::total_cmp);
        assert!((rest[0] - 1.0 / 6.0).abs() < tol, "{ext:?}");
        assert!((rest[1] - 5.0 / 6.0).abs() < tol, "{ext:?}");
        // Next to a design, the new point goes to the widest gap: with
        // points at 0.1 and 0.9 the centre 0.5 scores 0.4, the ends at
        // most 1/15 (where 0.1 - x = 2x).
        let ext = extend_maximin(&[vec![0.1], vec![0.9]], 1, 1, 7);
        assert!((ext[0][0] - 0.5).abs() < tol, "{ext:?}");
        // Deterministic for a seed; every point inside the cube.
        let a = extend_maximin(&maximin_lhs(20, 6, 1), 10, 6, 3);
        assert_eq!(a, extend_maximin(&maximin_lhs(20, 6, 1), 10, 6, 3));
        assert!(a.iter().flatten().all(|v| (0.0..1.0).contains(v)));
        assert_eq!(extend_maximin(&[], 2, 0, 1), vec![Vec::<f64>::new(); 2]);
    }

    #[test]
    fn latin_property_detects_violations() {
        // Two points in the same stratum of column 0 (definition, McKay et al. 1979).
        let bad = vec![vec![0.1, 0.2], vec![0.2, 0.7]];
        assert!(!is_latin_hypercube(&bad));
        let good = vec![vec![0.1, 0.7], vec![0.6, 0.2]];
        assert!(is_latin_hypercube(&good));
    }
}
