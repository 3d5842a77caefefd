//! `tessera trend`: how a metric moves with one parameter (a curve) or two
//! (a map), from the surrogate, with its uncertainty and the observed
//! points, as an SVG or PNG plot and a table.

use anyhow::Context;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use tessera_coordinator::query::{self, effects, Trend, TrendKind};
use tessera_coordinator::spec::{Scale, Spec};
use tessera_coordinator::store::{EvalStatus, Store};
use tessera_report::chart::{self, Axis};

/// Arguments of `tessera trend`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera trend --db sweep.db height_sd --metric territory_cv
      the main effect: territory spread against height spread, averaged over
      the other parameters; writes sweep-territory_cv-vs-height_sd.svg
  tessera trend --db sweep.db height_sd --metric territory_cv --at exclusion=15
      a slice: the other parameters held (exclusion at 15 um, the rest mid-range)
  tessera trend --db sweep.db height_sd exclusion --metric territory_cv --out map.png
      a map over two parameters: mean with contour lines, and its sd beside it

The line is the surrogate's predicted mean, the band its 95% interval (the
uncertainty of the mean, not the spread of single runs). Dots are the observed
point means, at whatever values the other parameters had: they scatter around
a main effect where those other parameters matter. A green band is the target
measured for this metric; grey shading marks where the surrogate knows little.")]
pub struct TrendArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// The parameter along the x axis.
    pub param: String,
    /// A second parameter: draw a map over both.
    pub param2: Option<String>,
    /// The metric (default: the objective's metric, else the first fitted one).
    #[arg(long, value_name = "NAME")]
    pub metric: Option<String>,
    /// Draw a slice with this parameter held at this value (the others at
    /// mid-range) instead of the main effect; may be repeated.
    #[arg(long = "at", value_name = "NAME=VALUE")]
    pub at: Vec<String>,
    /// Draw a slice with every other parameter at mid-range.
    #[arg(long)]
    pub slice: bool,
    /// Points along the curve (cells per side of a map).
    #[arg(long, value_name = "N")]
    pub steps: Option<usize>,
    /// Where to write the plot: .svg or .png (default: next to the database).
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Print the curve (or the map) as JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Seed of the Monte Carlo averages.
    #[arg(long, default_value = "1", value_name = "N")]
    pub seed: u64,
}

/// `name [unit]`, or the name alone.
pub fn label(name: &str, unit: &str) -> String {
    if unit.is_empty() {
        name.to_string()
    } else {
        format!("{name} [{unit}]")
    }
}

/// The axis of parameter `name` (log when the parameter is log-scaled).
pub fn param_axis(spec: &Spec, name: &str) -> Option<Axis> {
    let p = spec.params.iter().find(|p| p.name == name)?;
    Some(Axis::new(
        label(&p.name, &p.unit),
        p.lo,
        p.hi,
        p.scale == Scale::Log,
    ))
}

/// The figure of a curve.
pub fn curve_figure(t: &Trend, spec: &Spec) -> chart::CurvePlot {
    let what = match t.kind {
        TrendKind::MainEffect => "main effect: averaged over the other parameters",
        TrendKind::Slice => "slice: the other parameters held",
    };
    let bounds = spec.bounds_of(&t.metric);
    chart::CurvePlot {
        title: format!("{} against {} ({what})", t.metric, t.param),
        x: param_axis(spec, &t.param),
        y_label: label(&t.metric, &t.metric_unit),
        curve: t
            .curve
            .iter()
            .map(|s| (s.x, s.mean, s.lower95, s.upper95))
            .collect(),
        curve_label: "surrogate mean, 95% band".into(),
        observed: t.observed.iter().map(|o| (o.x, o.mean)).collect(),
        observed_label: "observed point means".into(),
        target: t.target.map(|(v, sd)| {
            (
                v,
                sd,
                format!(
                    "target {} +- {}",
                    query::short_number(v),
                    query::short_number(sd)
                ),
            )
        }),
        unsure: t.unsure.clone(),
        y_bounds: bounds,
    }
}

/// Observed `(x, y)` parameter pairs of the points with results.
fn observed_pairs(
    spec: &Spec,
    points: &[tessera_coordinator::store::PointRecord],
    done: &std::collections::BTreeSet<i64>,
    kx: usize,
    ky: usize,
) -> Vec<(f64, f64)> {
    points
        .iter()
        .filter(|p| done.contains(&p.id) && p.values.len() == spec.dimension())
        .map(|p| (p.values[kx], p.values[ky]))
        .collect()
}

fn default_out(db: &Path, metric: &str, what: &str) -> PathBuf {
    let stem = db
        .file_stem()
        .map(|s| s.to_string_lossy().to_string())
        .unwrap_or_else(|| "sweep".into());
    db.with_file_name(format!(
        "{stem}-{}-vs-{}.svg",
        super::file_word(metric),
        super::file_word(what)
    ))
}

/// Runs `tessera trend`.
pub fn run(args: TrendArgs) -> anyhow::Result<ExitCode> {
    if let Some(out) = &args.out {
        chart::format_of(out)?;
    }
    let (spec, fits) = query::load_fits(&args.db)?;
    let store = Store::open_read_only(&args.db)?;
    let sweep = store
        .sweep()?
        .with_context(|| format!("{} holds no sweep yet", args.db.display()))?;
    let points = store.points(sweep.id)?;
    let evals = store.evaluations(sweep.id)?;
    drop(store);
    let metric = match &args.metric {
        Some(m) => m.clone(),
        None => spec
            .objective
            .as_ref()
            .map(|o| o.metric.clone())
            .or_else(|| spec.targets.first().map(|t| t.metric.clone()))
            .or_else(|| fits.first().map(|f| f.metric.clone()))
            .context("no surrogate yet: the sweep has no results at enough points")?,
    };
    if let Some(p2) = &args.param2 {
        return run_map(&args, &spec, &fits, &points, &evals, p2, &metric);
    }
    let mut held = BTreeMap::new();
    for a in &args.at {
        let (k, v) = query::parse_assignment(a)?;
        held.insert(k, v);
    }
    let kind = if args.slice || !held.is_empty() {
        TrendKind::Slice
    } else {
        TrendKind::MainEffect
    };
    let t = query::trend(
        &fits,
        &spec,
        &points,
        &evals,
        &args.param,
        &metric,
        &held,
        args.steps.unwrap_or(60),
        kind,
        args.seed,
    )?;
    let out = args
        .out
        .clone()
        .unwrap_or_else(|| default_out(&args.db, &t.metric, &t.param));
    chart::save(&curve_figure(&t, &spec), &out)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&t)?);
    } else {
        let every = (t.curve.len() / 10).max(1);
        println!(
            "{} against {}: {}",
            label(&t.metric, &t.metric_unit),
            label(&t.param, &t.param_unit),
            match t.kind {
                TrendKind::MainEffect =>
                    "main effect (averaged over the other parameters)".to_string(),
                TrendKind::Slice => format!(
                    "slice, others held at {}",
                    t.held
                        .iter()
                        .map(|(k, v)| format!("{k}={}", query::short_number(*v)))
                        .collect::<Vec<_>>()
                        .join(" ")
                ),
            }
        );
        println!(
            "{:>14} {:>12} {:>12} {:>26}",
            t.param, "mean", "sd", "95% interval"
        );
        for (i, s) in t.curve.iter().enumerate() {
            if i % every == 0 || i + 1 == t.curve.len() {
                println!(
                    "{:>14} {:>12} {:>12} {:>26}",
                    query::short_number(s.x),
                    query::short_number(s.mean),
                    query::short_number(s.sd),
                    format!(
                        "[{}, {}]",
                        query::short_number(s.lower95),
                        query::short_number(s.upper95)
                    )
                );
            }
        }
    }
    for w in &t.warnings {
        eprintln!("warning: {w}");
    }
    eprintln!("plot written to {}", out.display());
    Ok(ExitCode::SUCCESS)
}

#[allow(clippy::too_many_arguments)]
fn run_map(
    args: &TrendArgs,
    spec: &Spec,
    fits: &[tessera_coordinator::fitter::MetricFit],
    points: &[tessera_coordinator::store::PointRecord],
    evals: &[tessera_coordinator::store::EvaluationRecord],
    p2: &str,
    metric: &str,
) -> anyhow::Result<ExitCode> {
    if !args.at.is_empty() || args.slice {
        anyhow::bail!("a map averages over the other parameters; --at and --slice are for curves (give one parameter)");
    }
    let position = |name: &str| {
        spec.params
            .iter()
            .position(|p| p.name == name)
            .ok_or_else(|| query::QueryError::NotAParameter {
                name: name.to_string(),
                valid: query::describe_params(spec),
            })
    };
    let (kx, ky) = (position(&args.param)?, position(p2)?);
    if kx == ky {
        anyhow::bail!("give two different parameters for a map, or one for a curve");
    }
    let fit = fits.iter().find(|f| f.metric == metric).ok_or_else(|| {
        query::QueryError::NoSuchMetric {
            metric: metric.to_string(),
            fitted: fits
                .iter()
                .map(|f| f.metric.as_str())
                .collect::<Vec<_>>()
                .join(", "),
        }
    })?;
    let m = effects::map(fit, spec, kx, ky, args.steps.unwrap_or(30), args.seed)?;
    let done: std::collections::BTreeSet<i64> = evals
        .iter()
        .filter(|e| e.status == EvalStatus::Done)
        .map(|e| e.point_id)
        .collect();
    let observed = observed_pairs(spec, points, &done, kx, ky);
    let out = args
        .out
        .clone()
        .unwrap_or_else(|| default_out(&args.db, metric, &format!("{}-{}", args.param, p2)));
    let fig = chart::MapPlot {
        title: format!(
            "{} over {} and {}{}",
            label(metric, &fit.unit),
            args.param,
            p2,
            if spec.dimension() > 2 {
                " (averaged over the other parameters)"
            } else {
                ""
            }
        ),
        x: param_axis(spec, &args.param),
        y: param_axis(spec, p2),
        xs: m.xs.clone(),
        ys: m.ys.clone(),
        mean: m.mean.clone(),
        sd: m.sd.clone(),
        metric: label(metric, &fit.unit),
        observed: observed.clone(),
    };
    chart::save(&fig, &out)?;
    let unsure = m
        .sd_ratio
        .iter()
        .flatten()
        .filter(|r| **r > query::SD_RATIO_WARN)
        .count();
    if args.json {
        let v = serde_json::json!({
            "kind": "map",
            "metric": metric,
            "metric_unit": fit.unit,
            "x_param": m.x_param,
            "y_param": m.y_param,
            "grid": m,
            "observed": observed.iter().map(|(a, b)| serde_json::json!({"x": a, "y": b})).collect::<Vec<_>>(),
        });
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        let (lo, hi) = m
            .mean
            .iter()
            .flatten()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
                (a.min(*v), b.max(*v))
            });
        println!(
            "{} over {} and {}: from {} to {} ({} x {} grid; the plot shows it)",
            label(metric, &fit.unit),
            args.param,
            p2,
            query::short_number(lo),
            query::short_number(hi),
            m.xs.len(),
            m.ys.len()
        );
    }
    if unsure > 0 {
        eprintln!(
            "warning: the surrogate knows little in {unsure} of {} cells (sd above {:.0}% of the prior sd); see the sd map",
            m.xs.len() * m.ys.len(),
            query::SD_RATIO_WARN * 100.0
        );
    }
    eprintln!("plot written to {}", out.display());
    Ok(ExitCode::SUCCESS)
}
