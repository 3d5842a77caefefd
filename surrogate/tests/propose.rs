//! Checks of `acquisition::propose` on published test functions.

use tessera_surrogate::acquisition::{propose, Strategy};
use tessera_surrogate::design::maximin_lhs;
use tessera_surrogate::gp::{fit, FitOptions, Observations};

/// Branin on [-5,10] x [0,15] (Surjanovic & Bingham; Dixon & Szego 1978), unit-cube inputs.
fn branin(u: &[f64]) -> f64 {
    use std::f64::consts::PI;
    let x1 = -5.0 + 15.0 * u[0];
    let x2 = 15.0 * u[1];
    let b = 5.1 / (4.0 * PI * PI);
    let c = 5.0 / PI;
    let t = 1.0 / (8.0 * PI);
    (x2 - b * x1 * x1 + c * x1 - 6.0).powi(2) + 10.0 * (1.0 - t) * x1.cos() + 10.0
}

/// Known Branin minimum 5/(4 pi) = 0.397887357729738 (Surjanovic & Bingham VLSE; Dixon & Szegő 1978).
const BRANIN_MIN: f64 = 0.397_887_357_729_738;

#[test]
fn branin_reaches_the_minimum_with_expected_improvement() {
    // 10 x 2 = 20-point maximin LHS, then one EI proposal per round, refitting each time.
    // Tolerance 0.01 on f (2.5% of the minimum) within 40 further evaluations (23 with this seed): our own
    // target, not a published count (the paper's counts are known only from memory, so not used).
    let mut x = maximin_lhs(20, 2, 3);
    let mut y: Vec<f64> = x.iter().map(|p| branin(p)).collect();
    let mut reached = None;
    for round in 0..40 {
        let gp = fit(
            &Observations::new(x.clone(), y.clone()),
            &FitOptions::default(),
        )
        .expect("fit");
        let p = propose(&gp, Strategy::Improve, 1, &[], round as u64);
        assert_eq!(p.len(), 1);
        let v = branin(&p[0]);
        x.push(p[0].clone());
        y.push(v);
        if v - BRANIN_MIN < 0.01 {
            reached = Some(round + 1);
            break;
        }
    }
    let best = y.iter().copied().fold(f64::INFINITY, f64::min);
    eprintln!("branin: best {best} after {:?} EI evaluations", reached);
    assert!(reached.is_some(), "best {best}");
}

#[test]
fn batches_are_in_the_cube_apart_and_deterministic() {
    let x = maximin_lhs(12, 3, 1);
    let y: Vec<f64> = x.iter().map(|p| (3.0 * p[0]).sin() + p[1] * p[2]).collect();
    let gp = fit(&Observations::new(x.clone(), y), &FitOptions::default()).expect("fit");
    let avoid = vec![vec![0.5, 0.5, 0.5]];
    for strategy in [Strategy::Improve, Strategy::Explore] {
        let a = propose(&gp, strategy, 5, &avoid, 9);
        let b = propose(&gp, strategy, 5, &avoid, 9);
        assert_eq!(a, b);
        assert_eq!(a.len(), 5);
        let all: Vec<&Vec<f64>> = a.iter().chain(avoid.iter()).chain(x.iter()).collect();
        for (i, p) in a.iter().enumerate() {
            assert!(p.iter().all(|v| (0.0..=1.0).contains(v)));
            for (j, o) in all.iter().enumerate() {
                if i != j {
                    let dd: f64 = p.iter().zip(o.iter()).map(|(u, v)| (u - v).powi(2)).sum();
                    assert!(
                        dd.sqrt() > 1e-3,
                        "{strategy:?}: points {i} and {j} coincide"
                    );
                }
            }
        }
    }
}

#[test]
fn explore_picks_high_uncertainty() {
    // Largest predictive sd: the first proposal's sd must exceed that of 99% of random points.
    let x = maximin_lhs(15, 2, 4);
    let y: Vec<f64> = x.iter().map(|p| branin(p)).collect();
    let gp = fit(&Observations::new(x, y), &FitOptions::default()).expect("fit");
    let p = propose(&gp, Strategy::Explore, 1, &[], 2);
    let sd_p = gp.predict(&p)[0].sd;
    let grid: Vec<Vec<f64>> = (0..50)
        .flat_map(|i| (0..50).map(move |j| vec![i as f64 / 49.0, j as f64 / 49.0]))
        .collect();
    let mut sds: Vec<f64> = gp.predict(&grid).iter().map(|q| q.sd).collect();
    sds.sort_by(f64::total_cmp);
    assert!(sd_p >= sds[(0.99 * sds.len() as f64) as usize], "sd {sd_p}");
}
