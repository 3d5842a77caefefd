//! Checks of `acquisition::propose` on published test functions.

use tessera_surrogate::acquisition::{propose, Context, Strategy};
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
        let p = propose(&gp, Strategy::Improve, 1, &Context::default(), round as u64);
        assert_eq!(p.len(), 1);
        let v = branin(&p[0].x);
        x.push(p[0].x.clone());
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
    let ctx = Context {
        avoid: &avoid,
        ..Context::default()
    };
    for strategy in [Strategy::Improve, Strategy::Explore] {
        let a = propose(&gp, strategy, 5, &ctx, 9);
        let b = propose(&gp, strategy, 5, &ctx, 9);
        assert_eq!(a, b);
        assert_eq!(a.len(), 5);
        let a: Vec<Vec<f64>> = a.into_iter().map(|p| p.x).collect();
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

/// Explore reduces the integrated variance more than 99% of random points
/// would, and does not put its points on the faces of the box (where the
/// predictive sd alone is largest).
#[test]
fn explore_reduces_integrated_variance_away_from_the_faces() {
    let x = maximin_lhs(15, 2, 4);
    let y: Vec<f64> = x.iter().map(|p| branin(p)).collect();
    let gp = fit(&Observations::new(x, y), &FitOptions::default()).expect("fit");
    let batch = propose(&gp, Strategy::Explore, 8, &Context::default(), 2);
    let on_face = batch
        .iter()
        .filter(|p| p.x.iter().any(|&v| !(1e-9..=1.0 - 1e-9).contains(&v)))
        .count();
    assert!(on_face <= 1, "{on_face} of 8 on a face: {batch:?}");
    let reference: Vec<Vec<f64>> = (0..40)
        .flat_map(|i| (0..40).map(move |j| vec![(i as f64 + 0.5) / 40.0, (j as f64 + 0.5) / 40.0]))
        .collect();
    let first = gp.integrated_variance_reduction(&reference, std::slice::from_ref(&batch[0].x))[0];
    let mut random = gp.integrated_variance_reduction(&reference, &maximin_lhs(400, 2, 11));
    random.sort_by(f64::total_cmp);
    assert!(
        first >= random[(0.99 * random.len() as f64) as usize],
        "{first} vs {random:?}"
    );
}

/// The exploiting point goes to the surrogate's own minimum: for the
/// parabola (x - 0.3)^2 sampled at 6 points of [0.2, 0.4], the point's
/// predicted mean is no higher than the surrogate's anywhere on a grid of
/// 1001 points, and it lies within 0.01 of the parabola's minimum 0.3
/// (expected improvement, by contrast, goes to x = 1, where the sd is
/// largest).
#[test]
fn the_exploiting_point_is_at_the_surrogate_minimum() {
    let x: Vec<Vec<f64>> = (0..6).map(|i| vec![0.2 + 0.04 * i as f64]).collect();
    let y: Vec<f64> = x.iter().map(|p| (p[0] - 0.3).powi(2)).collect();
    let gp = fit(&Observations::new(x, y), &FitOptions::default()).expect("fit");
    let ctx = Context {
        exploit: true,
        ..Context::default()
    };
    let p = propose(&gp, Strategy::Improve, 1, &ctx, 4);
    let grid: Vec<Vec<f64>> = (0..=1000).map(|i| vec![i as f64 / 1000.0]).collect();
    let lowest = gp
        .predict_mean(&grid)
        .into_iter()
        .fold(f64::INFINITY, f64::min);
    assert!(
        p[0].mean <= lowest + 1e-9 && (p[0].x[0] - 0.3).abs() < 0.01,
        "mean {} at {:?}; the grid's lowest is {lowest}",
        p[0].mean,
        p[0].x
    );
}
