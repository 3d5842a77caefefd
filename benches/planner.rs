//! Benchmarks of the adaptive search, printed as Markdown for
//! docs/benchmarks.md. The planner is the coordinator's own
//! (`tessera_coordinator::planner::Planner`), the models the built-in ones;
//! no network, so the figures are about the search, not the transport.
//!
//! Run: `cargo bench --bench planner -- [optima|latency|mapping|all]`.
//!
//! Optional: a function name after the group runs that function only;
//! `TESSERA_BENCH_Q=1,4` chooses the batch sizes, `TESSERA_BENCH_INITIAL`
//! the initial design size (default 5 per input), `TESSERA_BENCH_SEEDS=11,12`
//! the seeds (default 1 to 10); `TESSERA_BENCH_TRACE=1` prints each round's
//! best value, hyperparameters and proposals to stderr.
//!
//! - optima: evaluations until the best value is within 1% (of its absolute
//!   value) of the published minimum (Surjanovic & Bingham VLSE; Dixon &
//!   Szegő 1978), median over 10 seeds, sequential and in batches of 4 and 8,
//!   beside random search and a maximin Latin hypercube of the same size.
//! - latency: one planning round (fit and a proposal) against the number of
//!   results, first round (full hyperparameter search) and a later one.
//! - mapping: integrated predictive variance after an `explore` sweep and
//!   after a Latin hypercube of the same size.

use std::collections::BTreeMap;
use std::time::Instant;

use rand::{Rng, SeedableRng};
use tessera_coordinator::fitter;
use tessera_coordinator::planner::Planner;
use tessera_coordinator::spec::{self, Spec};
use tessera_coordinator::status::PointResults;
use tessera_models::run_builtin;
use tessera_surrogate::design::maximin_lhs;

struct Case {
    name: &'static str,
    /// Sweep-file lines added for this case (e.g. a bounded metric).
    extra: &'static str,
    ranges: Vec<(&'static str, f64, f64)>,
    minimum: f64,
    cap: usize,
}

fn cases() -> Vec<Case> {
    let unit = |d: usize| -> Vec<(&'static str, f64, f64)> {
        ["x1", "x2", "x3", "x4", "x5", "x6"][..d]
            .iter()
            .map(|n| (*n, 0.0, 1.0))
            .collect()
    };
    vec![
        Case {
            name: "branin",
            extra: "",
            ranges: vec![("x1", -5.0, 10.0), ("x2", 0.0, 15.0)],
            minimum: 0.397_887_357_729_738,
            cap: 80,
        },
        Case {
            name: "goldstein_price",
            extra: "",
            ranges: vec![("x1", -2.0, 2.0), ("x2", -2.0, 2.0)],
            minimum: 3.0,
            cap: 80,
        },
        // The same function declared non-negative: fitted on a log scale.
        Case {
            name: "goldstein_price",
            extra: "[metrics.value]\nbounds = [0, inf]\n",
            ranges: vec![("x1", -2.0, 2.0), ("x2", -2.0, 2.0)],
            minimum: 3.0,
            cap: 80,
        },
        Case {
            name: "hartmann3",
            extra: "",
            ranges: unit(3),
            minimum: -3.862_779_787_33,
            cap: 100,
        },
        Case {
            name: "hartmann6",
            extra: "",
            ranges: unit(6),
            minimum: -3.322_368_011_415_51,
            cap: 200,
        },
    ]
}

fn spec_text(
    model: &str,
    ranges: &[(&str, f64, f64)],
    budget: usize,
    initial: usize,
    seed: u64,
    strategy: &str,
) -> String {
    let mut s = format!(
        "name = \"bench\"\nseed = {seed}\nbudget = {budget}\ninitial = {initial}\nstrategy = \"{strategy}\"\n[model]\nname = \"{model}\"\n"
    );
    for (n, lo, hi) in ranges {
        s.push_str(&format!("[params.{n}]\nrange = [{lo:?}, {hi:?}]\n"));
    }
    s.push_str("[objective]\nminimize = \"value\"\n");
    s
}

/// The sweep file of a case.
fn case_text(case: &Case, budget: usize, initial: usize, seed: u64, strategy: &str) -> String {
    spec_text(case.name, &case.ranges, budget, initial, seed, strategy) + case.extra
}

fn spec_of(text: &str) -> Spec {
    spec::parse(text, "bench.toml").expect("valid benchmark sweep")
}

fn value(spec: &Spec, x: &[f64], seed: u64) -> BTreeMap<String, f64> {
    let inputs: BTreeMap<String, f64> = spec
        .params
        .iter()
        .zip(x)
        .map(|(p, v)| (p.name.clone(), *v))
        .collect();
    run_builtin(&spec.model.name, &inputs, seed).expect("a valid point")
}

/// Evaluations of the adaptive search until the target (None: not within the cap).
fn search(case: &Case, seed: u64, q: usize) -> Option<usize> {
    let d = case.ranges.len();
    let initial = initial_points(d);
    let spec = spec_of(&case_text(case, case.cap, initial, seed, "improve"));
    let target = case.minimum + 0.01 * case.minimum.abs();
    let mut results: Vec<PointResults> = Vec::new();
    let mut planner = Planner::new();
    let push = |results: &mut Vec<PointResults>, x: Vec<f64>| -> bool {
        let idx = results.len() as u64;
        let m = value(&spec, &x, idx);
        let hit = m["value"] <= target;
        results.push(PointResults {
            point_id: idx as i64 + 1,
            idx,
            values: x,
            replicates: vec![m],
            failed: 0,
        });
        hit
    };
    for x in spec.initial_design() {
        if push(&mut results, x) {
            return Some(results.len());
        }
    }
    let mut batch = 1;
    while results.len() < case.cap {
        let q = q.min(case.cap - results.len());
        let plan = planner.plan(
            &spec,
            &results,
            &[],
            q,
            batch,
            seed ^ u64::from(batch) << 20,
        );
        batch += 1;
        if std::env::var_os("TESSERA_BENCH_TRACE").is_some() {
            let best = results
                .iter()
                .map(|r| r.replicates[0]["value"])
                .fold(f64::INFINITY, f64::min);
            let h = plan.objective_fit.as_ref().map(|f| f.gp.hyper().clone());
            eprintln!(
                "n={} best={best:.4} hyper={:?} new={:?}",
                results.len(),
                h,
                plan.points
                    .iter()
                    .map(|p| p
                        .proposal
                        .as_ref()
                        .map(|i| (i.predicted_mean, i.predicted_sd)))
                    .collect::<Vec<_>>()
            );
        }
        for p in plan.points {
            if push(&mut results, p.values) {
                return Some(results.len());
            }
        }
    }
    None
}

/// Evaluations of uniform random search until the target (None past `cap`).
fn random_search(case: &Case, seed: u64, cap: usize) -> Option<usize> {
    let spec = spec_of(&spec_text(case.name, &case.ranges, 10, 1, seed, "improve"));
    let target = case.minimum + 0.01 * case.minimum.abs();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    for k in 1..=cap {
        let u: Vec<f64> = (0..spec.dimension()).map(|_| rng.random::<f64>()).collect();
        if value(&spec, &spec.to_natural(&u), 0)["value"] <= target {
            return Some(k);
        }
    }
    None
}

/// Whether a maximin Latin hypercube of `n` points reaches the target.
fn lhs_reaches(case: &Case, seed: u64, n: usize) -> bool {
    let spec = spec_of(&spec_text(case.name, &case.ranges, n, n, seed, "improve"));
    let target = case.minimum + 0.01 * case.minimum.abs();
    maximin_lhs(n, spec.dimension(), seed)
        .iter()
        .any(|u| value(&spec, &spec.to_natural(u), 0)["value"] <= target)
}

/// Initial design size: 5 per input unless `TESSERA_BENCH_INITIAL` says.
fn initial_points(d: usize) -> usize {
    std::env::var("TESSERA_BENCH_INITIAL")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(5 * d)
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

fn show(v: Option<usize>, cap: usize) -> String {
    v.map_or(format!(">{cap}"), |n| n.to_string())
}

fn optima() {
    let qs: Vec<usize> = std::env::var("TESSERA_BENCH_Q")
        .ok()
        .map(|v| v.split(',').filter_map(|x| x.parse().ok()).collect())
        .unwrap_or_else(|| vec![1, 4, 8]);
    let columns: Vec<String> = qs
        .iter()
        .map(|&q| match q {
            1 => "sequential: median (seeds reaching)".to_string(),
            _ => format!("batch {q}"),
        })
        .collect();
    println!(
        "| function | initial | {} | random search: median | LHS of the sequential median's size: seeds reaching |",
        columns.join(" | ")
    );
    println!("|---|---:|{}---:|---:|", "---:|".repeat(qs.len()));
    let only = std::env::args().skip(2).find(|a| !a.starts_with("--"));
    for case in cases() {
        if only.as_deref().is_some_and(|o| o != case.name) {
            continue;
        }
        let seeds: Vec<u64> = std::env::var("TESSERA_BENCH_SEEDS")
            .ok()
            .map(|v| v.split(',').filter_map(|x| x.parse().ok()).collect())
            .unwrap_or_else(|| (1..=10).collect());
        let mut cells = Vec::new();
        let mut seq_median = case.cap as f64;
        for &q in &qs {
            let runs: Vec<Option<usize>> = seeds.iter().map(|&s| search(&case, s, q)).collect();
            let reached = runs.iter().filter(|r| r.is_some()).count();
            // Seeds that never reach count as one more than the cap.
            let m = median(
                runs.iter()
                    .map(|r| r.map_or(case.cap as f64 + 1.0, |n| n as f64))
                    .collect(),
            );
            if q == 1 {
                seq_median = m;
            }
            let shown = if m > case.cap as f64 {
                format!(">{}", case.cap)
            } else {
                format!("{m}")
            };
            cells.push(format!("{shown} ({reached}/10)"));
            eprintln!(
                "{} q={q}: {:?}",
                case.name,
                runs.iter().map(|r| show(*r, case.cap)).collect::<Vec<_>>()
            );
        }
        let rcap = 5000;
        let rs: Vec<f64> = seeds
            .iter()
            .map(|&s| random_search(&case, s, rcap).map_or(rcap as f64 + 1.0, |n| n as f64))
            .collect();
        let rm = median(rs);
        let n = (seq_median.min(case.cap as f64)) as usize;
        let lhs_ok = seeds.iter().filter(|&&s| lhs_reaches(&case, s, n)).count();
        println!(
            "| {}{} | {} | {} | {} | {lhs_ok}/10 (n = {n}) |",
            case.name,
            if case.extra.is_empty() {
                ""
            } else {
                " (bounds = [0, inf] declared)"
            },
            initial_points(case.ranges.len()),
            cells.join(" | "),
            if rm > rcap as f64 {
                format!(">{rcap}")
            } else {
                format!("{rm}")
            }
        );
    }
}

fn latency() {
    println!(
        "| results | first round (full search), s | later round, s | how the later round fits |"
    );
    println!("|---:|---:|---:|---|");
    let all = cases();
    let Some(case) = all.iter().find(|c| c.name == "hartmann6") else {
        return;
    };
    for n in [50usize, 200, 1000, 2000] {
        let spec = spec_of(&spec_text(
            case.name,
            &case.ranges,
            n + 10,
            10,
            1,
            "improve",
        ));
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(n as u64);
        let results: Vec<PointResults> = (0..n)
            .map(|i| {
                let u: Vec<f64> = (0..6).map(|_| rng.random::<f64>()).collect();
                let x = spec.to_natural(&u);
                let m = value(&spec, &x, i as u64);
                PointResults {
                    point_id: i as i64 + 1,
                    idx: i as u64,
                    values: x,
                    replicates: vec![m],
                    failed: 0,
                }
            })
            .collect();
        let mut planner = Planner::new();
        let t = Instant::now();
        let _ = planner.plan(&spec, &results, &[], 1, 1, 1);
        let first = t.elapsed().as_secs_f64();
        let t = Instant::now();
        let plan = planner.plan(&spec, &results, &[], 1, 2, 2);
        let later = t.elapsed().as_secs_f64();
        let how = plan.points[0]
            .proposal
            .as_ref()
            .map_or(String::new(), |p| p.surrogate.clone());
        println!("| {n} | {first:.2} | {later:.2} | {how} |");
    }
}

/// Mean posterior variance of the fitted surrogate of `metric` over 4096
/// uniform points of the unit cube (Monte Carlo, seeded).
fn integrated_variance(spec: &Spec, results: &[PointResults], metric: &str) -> f64 {
    let jobs = fitter::jobs_from_results(spec, results, spec.seed);
    let job = jobs.iter().find(|j| j.metric == metric).expect("a job");
    let fit = fitter::run_job(job).expect("a fit");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(99);
    let pts: Vec<Vec<f64>> = (0..4096)
        .map(|_| (0..spec.dimension()).map(|_| rng.random::<f64>()).collect())
        .collect();
    let p = fit.gp.predict(&pts);
    p.iter().map(|q| q.sd * q.sd).sum::<f64>() / p.len() as f64
}

fn sweep(spec: &Spec, strategy_points: usize, reps: u32) -> Vec<PointResults> {
    let mut results: Vec<PointResults> = Vec::new();
    let push = |results: &mut Vec<PointResults>, x: Vec<f64>| {
        let idx = results.len() as u64;
        let replicates = (0..reps)
            .map(|r| {
                value(
                    spec,
                    &x,
                    tessera_coordinator::seed::replicate_seed(spec.seed, idx, r),
                )
            })
            .collect();
        results.push(PointResults {
            point_id: idx as i64 + 1,
            idx,
            values: x,
            replicates,
            failed: 0,
        });
    };
    for x in spec.initial_design() {
        push(&mut results, x);
    }
    let mut planner = Planner::new();
    let mut batch = 1;
    while results.len() < strategy_points {
        let plan = planner.plan(spec, &results, &[], 1, batch, batch.into());
        batch += 1;
        for p in plan.points {
            push(&mut results, p.values);
        }
    }
    results
}

fn mapping() {
    println!("| model | metric | points | explore: integrated variance | Latin hypercube of the same size | ratio |");
    println!("|---|---|---:|---:|---:|---:|");
    let all = cases();
    let Some(h3) = all.iter().find(|c| c.name == "hartmann3") else {
        return;
    };
    let tiling = vec![
        ("height_sd", 0.0, 15.0),
        ("height_mean", 15.0, 45.0),
        ("exclusion", 0.0, 15.0),
    ];
    for (model, ranges, metric, total, initial, reps) in [
        (
            "hartmann3",
            h3.ranges.clone(),
            "value",
            45usize,
            15usize,
            1u32,
        ),
        ("tiling", tiling, "territory_cv", 36, 18, 2),
    ] {
        let mut ex = Vec::new();
        let mut lh = Vec::new();
        for seed in 1..=3u64 {
            let text = spec_text(model, &ranges, total, initial, seed, "explore").replace(
                "[objective]\nminimize = \"value\"\n",
                &format!("[objective]\nminimize = \"{metric}\"\n"),
            );
            let spec = spec_of(&text);
            ex.push(integrated_variance(
                &spec,
                &sweep(&spec, total, reps),
                metric,
            ));
            let lhs_spec = spec_of(&text.replace(
                &format!("initial = {initial}"),
                &format!("initial = {total}"),
            ));
            lh.push(integrated_variance(
                &lhs_spec,
                &sweep(&lhs_spec, total, reps),
                metric,
            ));
        }
        let (e, l) = (median(ex), median(lh));
        println!(
            "| {model} | {metric} | {total} | {e:.3e} | {l:.3e} | {:.2} |",
            e / l
        );
    }
}

fn big_batch() {
    let all = cases();
    let Some(case) = all.iter().find(|c| c.name == "branin") else {
        return;
    };
    let spec = spec_of(&spec_text(case.name, &case.ranges, 900, 200, 1, "improve"));
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
    let mk = |rng: &mut rand_chacha::ChaCha8Rng, i: usize| {
        let u: Vec<f64> = (0..2).map(|_| rng.random::<f64>()).collect();
        let x = spec.to_natural(&u);
        let m = value(&spec, &x, i as u64);
        PointResults {
            point_id: i as i64 + 1,
            idx: i as u64,
            values: x,
            replicates: vec![m],
            failed: 0,
        }
    };
    let results: Vec<PointResults> = (0..400).map(|i| mk(&mut rng, i)).collect();
    let pending: Vec<Vec<f64>> = (0..200).map(|i| mk(&mut rng, 1000 + i).values).collect();
    let mut planner = Planner::new();
    for round in 0..2 {
        let t = Instant::now();
        let plan = planner.plan(&spec, &results, &pending, 200, round + 1, 7);
        println!(
            "| 400 results, 200 running, 200 proposed (round {}) | {:.2} s | {} |",
            round + 1,
            t.elapsed().as_secs_f64(),
            plan.points.len()
        );
    }
}

fn main() {
    let what = std::env::args()
        .skip(1)
        .find(|a| !a.starts_with("--"))
        .unwrap_or_else(|| "all".into());
    if what == "optima" || what == "all" {
        optima();
    }
    if what == "latency" || what == "all" {
        latency();
    }
    if what == "batch" || what == "all" {
        big_batch();
    }
    if what == "mapping" || what == "all" {
        mapping();
    }
}
