//! The loss the planner minimises, the unit-cube mapping and the initial design.

use std::collections::BTreeMap;
use tessera_coordinator::spec;

const HEAD: &str = r#"name = "t"
seed = 11
budget = 40
initial = 12
[model]
name = "m"
[params.height_mean]
range = [20.0, 60.0]
unit = "um"
[params.density]
range = [5.0, 50.0]
scale = "log"
[params.branches]
range = [1, 8]
integer = true
"#;

fn with(tail: &str) -> spec::Spec {
    spec::parse(&format!("{HEAD}{tail}"), "t.toml").expect("valid spec")
}

fn metrics(pairs: &[(&str, f64)]) -> BTreeMap<String, f64> {
    pairs.iter().map(|(k, v)| (k.to_string(), *v)).collect()
}

// Definition (docs/sweep-file.md): minimize -> m, maximize -> -m.
#[test]
fn loss_of_minimize_and_maximize() {
    let s = with("[objective]\nminimize = \"cv\"\n");
    assert_eq!(s.loss(&metrics(&[("cv", 0.3)])), Some(0.3));
    assert_eq!(s.objective_label(), "cv (min)");
    assert_eq!(s.display_objective(0.3), 0.3);
    let s = with("[objective]\nmaximize = \"cov\"\n");
    assert_eq!(s.loss(&metrics(&[("cov", 0.7)])), Some(-0.7));
    assert_eq!(s.objective_label(), "cov (max)");
    assert_eq!(s.display_objective(-0.7), 0.7);
    assert_eq!(s.loss(&metrics(&[("other", 1.0)])), None);
    assert_eq!(s.loss(&metrics(&[("cov", f64::NAN)])), None);
}

// Standardised discrepancy sum ((m - value)/sd)^2 (the square of the
// implausibility measure, Craig et al. 1997; Vernon et al. 2010):
// (0.90 - 0.82)/0.04 = 2 and (14 - 10)/4 = 1 give 2^2 + 1^2 = 5 (hand arithmetic).
#[test]
fn loss_of_targets_is_standardised_discrepancy() {
    let s = with(
        "[[target]]\nmetric = \"coverage\"\nvalue = 0.82\nsd = 0.04\n[[target]]\nmetric = \"count\"\nvalue = 10.0\nsd = 4.0\n",
    );
    let l = s
        .loss(&metrics(&[("coverage", 0.90), ("count", 14.0)]))
        .expect("all metrics present");
    assert!((l - 5.0).abs() < 1e-12, "{l}");
    assert_eq!(s.loss(&metrics(&[("coverage", 0.90)])), None);
    assert_eq!(s.objective_label(), "calibration discrepancy");
    assert_eq!(s.metrics_needed(), ["coverage", "count"]);
}

#[test]
fn metrics_needed_are_deduplicated_objective_first() {
    let s = with(
        "[objective]\nminimize = \"cv\"\n[[target]]\nmetric = \"coverage\"\nvalue = 0.8\nsd = 0.1\n[[target]]\nmetric = \"cv\"\nvalue = 0.2\nsd = 0.1\n",
    );
    assert_eq!(s.metrics_needed(), ["cv", "coverage"]);
}

// Analytic: the log-scale midpoint of [5, 50] is sqrt(5 * 50); integer cells
// of [1, 8] have width 1/8, value k at the centre (k - 0.5)/8.
#[test]
fn natural_and_unit_coordinates_round_trip() {
    let s = with("[objective]\nminimize = \"cv\"\n");
    let x = s.to_natural(&[0.5, 0.5, 0.5]);
    assert_eq!(x[0], 40.0);
    assert!((x[1] - 250f64.sqrt()).abs() < 1e-12);
    assert_eq!(x[2], 5.0, "u = 0.5 is the lower edge of cell 5 of 1..8");
    let u = s.to_unit(&[30.0, 50.0, 3.0]);
    assert!((u[0] - 0.25).abs() < 1e-15);
    assert!((u[1] - 1.0).abs() < 1e-12);
    assert!((u[2] - 2.5 / 8.0).abs() < 1e-15);
    assert_eq!(s.to_natural(&u), [30.0, 50.0, 3.0]);
}

/// The LHS property (McKay, Beckman & Conover 1979): each of the n equal
/// strata of every continuous parameter holds exactly one point.
fn assert_latin(unit: &[Vec<f64>], cols: &[usize]) {
    let n = unit.len();
    for &j in cols {
        let mut strata: Vec<usize> = unit
            .iter()
            .map(|p| ((p[j] * n as f64).floor() as usize).min(n - 1))
            .collect();
        strata.sort_unstable();
        assert_eq!(strata, (0..n).collect::<Vec<_>>(), "column {j}");
    }
}

#[test]
fn initial_design_is_a_latin_hypercube_in_natural_units() {
    let s = with("[objective]\nminimize = \"cv\"\n");
    let design = s.initial_design();
    assert_eq!(design.len(), 12);
    for p in &design {
        assert!((20.0..=60.0).contains(&p[0]));
        assert!((5.0..=50.0).contains(&p[1]));
        assert!((1.0..=8.0).contains(&p[2]) && p[2].fract() == 0.0);
    }
    let unit: Vec<Vec<f64>> = design.iter().map(|p| s.to_unit(p)).collect();
    assert_latin(&unit, &[0, 1]);
    // Integers: 12 strata over 8 cells of width 1/8 = 1.5 strata each, so a
    // cell holds 1 or 2 points and, with the strata straddling its edges,
    // never more than 3 (counting argument).
    let mut counts = [0usize; 8];
    for p in &design {
        counts[p[2] as usize - 1] += 1;
    }
    assert!(counts.iter().all(|&c| (1..=3).contains(&c)), "{counts:?}");
    assert_eq!(s.initial_design(), design, "same seed, same design");
    let other = spec::parse(
        &format!("{HEAD}[objective]\nminimize = \"cv\"\n").replace("seed = 11", "seed = 12"),
        "t",
    )
    .expect("valid");
    assert_ne!(
        other.initial_design(),
        design,
        "another seed, another design"
    );
}
