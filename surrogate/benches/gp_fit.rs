//! Timing of GP fitting and prediction (plain std::time; results go to
//! docs/benchmarks.md next to scikit-learn's from scripts/bench_gp_sklearn.py,
//! which builds the same data).
//!
//! Data: d = 6, inputs x_ik = frac(0.5 + i a_k) with a_k = frac(sqrt(p_k)),
//! p = 2, 3, 5, 7, 11, 13 (a Kronecker sequence), outputs Hartmann-6 plus
//! 0.05 sin(1.3 i) as deterministic "noise".
//!
//! Usage: cargo bench -p tessera-surrogate [-- n1 n2 ...]

use std::time::Instant;

use tessera_surrogate::design::{maximin_lhs, phi_p};
use tessera_surrogate::gp::{fit, FitOptions, Observations};

fn hartmann6(x: &[f64]) -> f64 {
    // Surjanovic & Bingham, Virtual Library of Simulation Experiments.
    const ALPHA: [f64; 4] = [1.0, 1.2, 3.0, 3.2];
    const A: [[f64; 6]; 4] = [
        [10.0, 3.0, 17.0, 3.5, 1.7, 8.0],
        [0.05, 10.0, 17.0, 0.1, 8.0, 14.0],
        [3.0, 3.5, 1.7, 10.0, 17.0, 8.0],
        [17.0, 8.0, 0.05, 10.0, 0.1, 14.0],
    ];
    const P: [[f64; 6]; 4] = [
        [1312.0, 1696.0, 5569.0, 124.0, 8283.0, 5886.0],
        [2329.0, 4135.0, 8307.0, 3736.0, 1004.0, 9991.0],
        [2348.0, 1451.0, 3522.0, 2883.0, 3047.0, 6650.0],
        [4047.0, 8828.0, 8732.0, 5743.0, 1091.0, 381.0],
    ];
    -(0..4)
        .map(|i| {
            let s: f64 = (0..6)
                .map(|j| A[i][j] * (x[j] - 1e-4 * P[i][j]).powi(2))
                .sum();
            ALPHA[i] * (-s).exp()
        })
        .sum::<f64>()
}

fn frac(v: f64) -> f64 {
    v - v.floor()
}

fn data(n: usize, offset: usize) -> Observations {
    let primes = [2.0f64, 3.0, 5.0, 7.0, 11.0, 13.0];
    let a: Vec<f64> = primes.iter().map(|p| frac(p.sqrt())).collect();
    let x: Vec<Vec<f64>> = (offset..offset + n)
        .map(|i| a.iter().map(|ak| frac(0.5 + i as f64 * ak)).collect())
        .collect();
    let y = x
        .iter()
        .enumerate()
        .map(|(i, p)| hartmann6(p) + 0.05 * (1.3 * (offset + i) as f64).sin())
        .collect();
    Observations::new(x, y)
}

fn main() {
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    println!("maximin_lhs (seed 1)");
    println!("| n | d | time (s) | phi_50 |");
    println!("|---|---|---|---|");
    for &(n, d) in &[
        (60usize, 6usize),
        (200, 6),
        (500, 10),
        (1000, 10),
        (2000, 20),
    ] {
        let t = Instant::now();
        let x = maximin_lhs(n, d, 1);
        let secs = t.elapsed().as_secs_f64();
        println!("| {n} | {d} | {secs:.3} | {:.4} |", phi_p(&x, 50.0));
    }
    let sizes = if args.is_empty() {
        vec![100, 250, 500, 1000, 2000, 5000]
    } else {
        args
    };
    let threads = rayon::current_num_threads();
    println!("tessera-surrogate GP benchmark, d = 6, {threads} threads, FitOptions::default() (1 + 5 starts)");
    println!("| n | fit (s) | LML | hyperparameter points |");
    println!("|---|---|---|---|");
    let opts = FitOptions::default();
    for &n in &sizes {
        let obs = data(n, 0);
        let t = Instant::now();
        let gp = match fit(&obs, &opts) {
            Ok(gp) => gp,
            Err(e) => {
                println!("| {n} | failed: {e} | | |");
                continue;
            }
        };
        let secs = t.elapsed().as_secs_f64();
        println!(
            "| {n} | {secs:.3} | {:.3} | {} |",
            gp.log_marginal_likelihood(),
            n.min(opts.max_hyper_points)
        );
        if n == 1000 {
            let xs = data(10_000, 100_000).x;
            let time = |label: &str, f: &dyn Fn() -> usize| {
                let mut times = Vec::new();
                for _ in 0..7 {
                    let t = Instant::now();
                    assert_eq!(f(), xs.len());
                    times.push(t.elapsed().as_secs_f64());
                }
                times.sort_by(f64::total_cmp);
                println!(
                    "{label} 10,000 points from n = 1000: median {:.1} ms (min {:.1} ms, max {:.1} ms) of 7",
                    1e3 * times[3],
                    1e3 * times[0],
                    1e3 * times[6]
                );
            };
            time("predict (mean and sd)", &|| gp.predict(&xs).len());
            time("predict_exact (mean and sd, f64 only)", &|| {
                gp.predict_exact(&xs).len()
            });
            time("predict_mean", &|| gp.predict_mean(&xs).len());
            let (fast, exact) = (gp.predict(&xs), gp.predict_exact(&xs));
            let worst = fast
                .iter()
                .zip(&exact)
                .map(|(a, b)| (a.sd - b.sd).abs() / b.sd)
                .fold(0.0, f64::max);
            let same_mean = fast.iter().zip(&exact).all(|(a, b)| a.mean == b.mean);
            let min_sd = exact.iter().map(|p| p.sd).fold(f64::INFINITY, f64::min);
            println!(
                "predict vs predict_exact: largest relative sd difference {worst:.2e}, means identical: {same_mean}, smallest sd / prior sd {:.3}",
                min_sd / gp.prior_sd()
            );
        }
    }
}
