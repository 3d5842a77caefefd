//! Published optimisation and sensitivity test functions with known optima
//! and indices, for validating the planner and rehearsing sweeps.
//!
//! Formulas and constants as given by Surjanovic & Bingham, Virtual Library of
//! Simulation Experiments (Branin, Goldstein-Price, Hartmann 3-D and 6-D,
//! Ishigami), after Dixon & Szegő (1978), Goldstein & Price (1971) and
//! Ishigami & Homma (1990). Inputs are named `x1..xd`, the metric is `value`.
//!
//! Every function also takes two inputs meant to be fixed in a sweep:
//! `delay_ms` (the run sleeps that long, to rehearse scheduling of slow
//! simulations) and `noise_sd` (Gaussian noise of that sd, drawn from the
//! run's seed, is added to `value`, to rehearse stochastic simulations).

use std::f64::consts::PI;
use std::sync::atomic::AtomicBool;
use std::time::{Duration, Instant};

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::{is_stopped, stopped, InputInfo, Inputs, MetricInfo, ModelInfo};
use crate::outcome::{FailureKind, Metrics, RunFailure};

/// Names of the test functions.
pub const NAMES: [&str; 5] = [
    "branin",
    "goldstein_price",
    "hartmann3",
    "hartmann6",
    "ishigami",
];

fn x(name: &'static str, lo: f64, hi: f64) -> InputInfo {
    InputInfo {
        name,
        lo,
        hi,
        default: 0.5 * (lo + hi),
        unit: "",
        integer: false,
        description: "coordinate of the test function",
    }
}

fn extras() -> [InputInfo; 2] {
    [
        InputInfo {
            name: "delay_ms",
            lo: 0.0,
            hi: 3_600_000.0,
            default: 0.0,
            unit: "ms",
            integer: false,
            description: "artificial run time: the run sleeps this long (usually a fixed input)",
        },
        InputInfo {
            name: "noise_sd",
            lo: 0.0,
            hi: 1e9,
            default: 0.0,
            unit: "",
            integer: false,
            description: "sd of Gaussian noise added to value, drawn from the run's seed (usually a fixed input)",
        },
    ]
}

fn value_metric(lo: f64, hi: f64) -> Vec<MetricInfo> {
    vec![MetricInfo {
        name: "value",
        unit: "",
        lo,
        hi,
        // Noise (noise_sd) can carry a value anywhere.
        bounds: [None, None],
        description: "function value (range without noise)",
    }]
}

/// Descriptions of all test functions.
pub fn infos() -> Vec<ModelInfo> {
    let pi = PI;
    let unit = |d: usize| -> Vec<InputInfo> {
        const N: [&str; 6] = ["x1", "x2", "x3", "x4", "x5", "x6"];
        N[..d].iter().map(|n| x(n, 0.0, 1.0)).collect()
    };
    let with_extras = |mut v: Vec<InputInfo>| {
        v.extend(extras());
        v
    };
    vec![
        ModelInfo {
            name: "branin",
            description: "Branin function (Dixon & Szegő 1978): 2 inputs, 3 global minima of 5/(4 pi) = 0.397887",
            inputs: with_extras(vec![x("x1", -5.0, 10.0), x("x2", 0.0, 15.0)]),
            // Range from a 3001 x 3001 grid, widened slightly.
            metrics: value_metric(0.397887, 308.2),
            limits: Vec::new(),
        },
        ModelInfo {
            name: "goldstein_price",
            description: "Goldstein-Price function (Goldstein & Price 1971): 2 inputs, minimum 3 at (0, -1)",
            inputs: with_extras(vec![x("x1", -2.0, 2.0), x("x2", -2.0, 2.0)]),
            // Maximum from a 2001 x 2001 grid (at a corner), widened slightly.
            metrics: value_metric(3.0, 1.0157e6),
            limits: Vec::new(),
        },
        ModelInfo {
            name: "hartmann3",
            description: "Hartmann 3-D function (Dixon & Szegő 1978): minimum -3.86278",
            inputs: with_extras(unit(3)),
            metrics: value_metric(-3.862_78, 0.0),
            limits: Vec::new(),
        },
        ModelInfo {
            name: "hartmann6",
            description: "Hartmann 6-D function (Dixon & Szegő 1978): minimum -3.32237",
            inputs: with_extras(unit(6)),
            metrics: value_metric(-3.322_37, 0.0),
            limits: Vec::new(),
        },
        ModelInfo {
            name: "ishigami",
            description: "Ishigami function, a = 7, b = 0.1 (Ishigami & Homma 1990): the standard Sobol-index test case",
            inputs: with_extras(vec![x("x1", -pi, pi), x("x2", -pi, pi), x("x3", -pi, pi)]),
            // -(1 + b pi^4) and 1 + a + b pi^4.
            metrics: value_metric(-(1.0 + 0.1 * pi.powi(4)), 1.0 + 7.0 + 0.1 * pi.powi(4)),
            limits: Vec::new(),
        },
    ]
}

/// Branin: a (x2 - b x1^2 + c x1 - r)^2 + s (1 - t) cos x1 + s.
pub fn branin(x1: f64, x2: f64) -> f64 {
    let b = 5.1 / (4.0 * PI * PI);
    let c = 5.0 / PI;
    let t = 1.0 / (8.0 * PI);
    (x2 - b * x1 * x1 + c * x1 - 6.0).powi(2) + 10.0 * (1.0 - t) * x1.cos() + 10.0
}

/// Goldstein-Price.
pub fn goldstein_price(x1: f64, x2: f64) -> f64 {
    let a = 1.0
        + (x1 + x2 + 1.0).powi(2)
            * (19.0 - 14.0 * x1 + 3.0 * x1 * x1 - 14.0 * x2 + 6.0 * x1 * x2 + 3.0 * x2 * x2);
    let b = 30.0
        + (2.0 * x1 - 3.0 * x2).powi(2)
            * (18.0 - 32.0 * x1 + 12.0 * x1 * x1 + 48.0 * x2 - 36.0 * x1 * x2 + 27.0 * x2 * x2);
    a * b
}

const HARTMANN_ALPHA: [f64; 4] = [1.0, 1.2, 3.0, 3.2];

/// Hartmann 3-D: -sum_i alpha_i exp(-sum_j A_ij (x_j - P_ij)^2).
///
/// Panics if `x` has not 3 coordinates (a bug in the caller).
#[track_caller]
pub fn hartmann3(x: &[f64]) -> f64 {
    assert_eq!(x.len(), 3, "hartmann3 takes 3 coordinates");
    const A: [[f64; 3]; 4] = [
        [3.0, 10.0, 30.0],
        [0.1, 10.0, 35.0],
        [3.0, 10.0, 30.0],
        [0.1, 10.0, 35.0],
    ];
    const P: [[f64; 3]; 4] = [
        [3689.0, 1170.0, 2673.0],
        [4699.0, 4387.0, 7470.0],
        [1091.0, 8732.0, 5547.0],
        [381.0, 5743.0, 8828.0],
    ];
    hartmann(x, &A, &P)
}

/// Hartmann 6-D.
///
/// Panics if `x` has not 6 coordinates (a bug in the caller).
#[track_caller]
pub fn hartmann6(x: &[f64]) -> f64 {
    assert_eq!(x.len(), 6, "hartmann6 takes 6 coordinates");
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
    hartmann(x, &A, &P)
}

fn hartmann<const D: usize>(x: &[f64], a: &[[f64; D]; 4], p: &[[f64; D]; 4]) -> f64 {
    -(0..4)
        .map(|i| {
            let inner: f64 = (0..D)
                .map(|j| a[i][j] * (x[j] - 1e-4 * p[i][j]).powi(2))
                .sum();
            HARTMANN_ALPHA[i] * (-inner).exp()
        })
        .sum::<f64>()
}

/// Ishigami with a = 7, b = 0.1: sin x1 + a sin^2 x2 + b x3^4 sin x1.
pub fn ishigami(x1: f64, x2: f64, x3: f64) -> f64 {
    let (a, b) = (7.0, 0.1);
    x1.sin() + a * x2.sin().powi(2) + b * x3.powi(4) * x1.sin()
}

/// Evaluates test function `name` at validated inputs, sleeping `delay_ms`
/// (checking `stop` every 10 ms) and adding `noise_sd` noise.
pub(crate) fn run(
    name: &str,
    inputs: &Inputs,
    seed: u64,
    stop: &AtomicBool,
) -> Result<Metrics, RunFailure> {
    let g = |n: &str| inputs.get(n);
    let value = match name {
        "branin" => branin(g("x1"), g("x2")),
        "goldstein_price" => goldstein_price(g("x1"), g("x2")),
        "hartmann3" => hartmann3(&[g("x1"), g("x2"), g("x3")]),
        "hartmann6" => hartmann6(&[g("x1"), g("x2"), g("x3"), g("x4"), g("x5"), g("x6")]),
        "ishigami" => ishigami(g("x1"), g("x2"), g("x3")),
        other => {
            return Err(RunFailure::new(
                FailureKind::UnknownModel,
                format!("no test function {other:?}"),
            ))
        }
    };
    let deadline = Instant::now() + Duration::from_secs_f64(g("delay_ms") / 1000.0);
    loop {
        if is_stopped(stop) {
            return Err(stopped(name));
        }
        let now = Instant::now();
        if now >= deadline {
            break;
        }
        std::thread::sleep((deadline - now).min(Duration::from_millis(10)));
    }
    let noise_sd = g("noise_sd");
    let noise = if noise_sd > 0.0 {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let z: f64 = StandardNormal.sample(&mut rng);
        noise_sd * z
    } else {
        0.0
    };
    let mut m = Metrics::new();
    m.insert("value".to_string(), value + noise);
    Ok(m)
}
