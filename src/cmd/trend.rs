//! `tessera trend`: one metric against one parameter, from the surrogate,
//! with its 95% band and the observed points, as an SVG plot and a table.

use anyhow::Context;
use plotters::prelude::*;
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use tessera_coordinator::query::{self, Trend};
use tessera_coordinator::store::Store;

/// Arguments of `tessera trend`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera trend --db sweep.db height_sd --metric territory_cv
      territory spread against height spread, the other parameters at mid-range;
      writes sweep-territory_cv-vs-height_sd.svg
  tessera trend --db sweep.db height_sd --metric territory_cv --at exclusion=15
      the same with the body spacing held at 15 um

The line is the surrogate's predicted mean, the band its 95% interval (the
uncertainty of the mean, not the spread of single runs). Dots are the observed
point means, at whatever values the other parameters had: they scatter around
the line where those other parameters matter.")]
pub struct TrendArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// The parameter along the x axis.
    pub param: String,
    /// The metric on the y axis (default: the objective's metric, else the first fitted one).
    #[arg(long, value_name = "NAME")]
    pub metric: Option<String>,
    /// Hold another parameter at this value (default: the middle of its range).
    #[arg(long = "at", value_name = "NAME=VALUE")]
    pub at: Vec<String>,
    /// Points along the curve.
    #[arg(long, default_value = "60", value_name = "N")]
    pub steps: usize,
    /// Where to write the plot (SVG).
    #[arg(long, value_name = "FILE.svg")]
    pub out: Option<PathBuf>,
    /// Print the curve as JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

fn label(name: &str, unit: &str) -> String {
    if unit.is_empty() {
        name.to_string()
    } else {
        format!("{name} [{unit}]")
    }
}

/// Draws `t` as an SVG file.
fn plot(t: &Trend, out: &Path) -> anyhow::Result<()> {
    let (x0, x1) = t
        .curve
        .iter()
        .map(|s| s.x)
        .chain(t.observed.iter().map(|o| o.x))
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), x| {
            (a.min(x), b.max(x))
        });
    let (y0, y1) = t
        .curve
        .iter()
        .flat_map(|s| [s.lower95, s.upper95])
        .chain(t.observed.iter().map(|o| o.mean))
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), y| {
            (a.min(y), b.max(y))
        });
    anyhow::ensure!(x0.is_finite() && y0.is_finite(), "nothing to plot");
    let pad = ((y1 - y0) * 0.08).max(1e-12);
    tessera_report::chart::fonts();
    let root = SVGBackend::new(out, (900, 560)).into_drawing_area();
    let draw =
        |e: DrawingAreaErrorKind<std::io::Error>| anyhow::anyhow!("cannot draw the plot: {e}");
    root.fill(&WHITE).map_err(draw)?;
    let held = t
        .held
        .iter()
        .map(|(k, v)| format!("{k}={}", query::short_number(*v)))
        .collect::<Vec<_>>()
        .join(", ");
    let title = if held.is_empty() {
        format!("{} against {}", t.metric, t.param)
    } else {
        format!("{} against {} ({held})", t.metric, t.param)
    };
    let mut chart = ChartBuilder::on(&root)
        .caption(title, ("sans-serif", 22))
        .margin(16)
        .x_label_area_size(48)
        .y_label_area_size(72)
        .build_cartesian_2d(x0..x1, (y0 - pad)..(y1 + pad))
        .map_err(draw)?;
    chart
        .configure_mesh()
        .x_desc(label(&t.param, &t.param_unit))
        .y_desc(label(&t.metric, &t.metric_unit))
        .light_line_style(WHITE.mix(0.0))
        .draw()
        .map_err(draw)?;
    let band_color = RGBColor(70, 110, 180);
    let band: Vec<(f64, f64)> = t
        .curve
        .iter()
        .map(|s| (s.x, s.upper95))
        .chain(t.curve.iter().rev().map(|s| (s.x, s.lower95)))
        .collect();
    chart
        .draw_series(std::iter::once(Polygon::new(
            band,
            band_color.mix(0.22).filled(),
        )))
        .map_err(draw)?
        .label("95% interval of the mean")
        .legend(move |(x, y)| {
            Rectangle::new([(x, y - 5), (x + 18, y + 5)], band_color.mix(0.22).filled())
        });
    chart
        .draw_series(LineSeries::new(
            t.curve.iter().map(|s| (s.x, s.mean)),
            band_color.stroke_width(3),
        ))
        .map_err(draw)?
        .label("surrogate mean")
        .legend(move |(x, y)| {
            PathElement::new(vec![(x, y), (x + 18, y)], band_color.stroke_width(3))
        });
    let dot = RGBColor(200, 90, 40);
    chart
        .draw_series(
            t.observed
                .iter()
                .map(|o| Circle::new((o.x, o.mean), 4, dot.stroke_width(2))),
        )
        .map_err(draw)?
        .label("observed point means (other parameters vary)")
        .legend(move |(x, y)| Circle::new((x + 9, y), 4, dot.stroke_width(2)));
    chart
        .configure_series_labels()
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.3))
        .position(SeriesLabelPosition::UpperLeft)
        .draw()
        .map_err(draw)?;
    root.present().map_err(draw)?;
    Ok(())
}

/// Runs `tessera trend`.
pub fn run(args: TrendArgs) -> anyhow::Result<ExitCode> {
    let (spec, fits) = query::load_fits(&args.db)?;
    let store = Store::open_read_only(&args.db)?;
    let sweep = store
        .sweep()?
        .with_context(|| format!("{} holds no sweep yet", args.db.display()))?;
    let points = store.points(sweep.id)?;
    let evals = store.evaluations(sweep.id)?;
    let metric = match &args.metric {
        Some(m) => m.clone(),
        None => spec
            .objective
            .as_ref()
            .map(|o| o.metric.clone())
            .or_else(|| fits.first().map(|f| f.metric.clone()))
            .context("no surrogate yet: the sweep has no results at enough points")?,
    };
    let mut held = BTreeMap::new();
    for a in &args.at {
        let (k, v) = query::parse_assignment(a)?;
        held.insert(k, v);
    }
    let t = query::trend(
        &fits,
        &spec,
        &points,
        &evals,
        &args.param,
        &metric,
        &held,
        args.steps,
    )?;
    let out = args.out.clone().unwrap_or_else(|| {
        let stem = args
            .db
            .file_stem()
            .map(|s| s.to_string_lossy().to_string())
            .unwrap_or_else(|| "sweep".into());
        args.db.with_file_name(format!(
            "{stem}-{}-vs-{}.svg",
            super::file_word(&t.metric),
            t.param
        ))
    });
    plot(&t, &out).with_context(|| format!("cannot write the plot {}", out.display()))?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&t)?);
    } else {
        let every = (t.curve.len() / 10).max(1);
        println!(
            "{} against {}{}",
            label(&t.metric, &t.metric_unit),
            label(&t.param, &t.param_unit),
            if t.held.is_empty() {
                String::new()
            } else {
                format!(
                    ", others held at {}",
                    t.held
                        .iter()
                        .map(|(k, v)| format!("{k}={}", query::short_number(*v)))
                        .collect::<Vec<_>>()
                        .join(" ")
                )
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
    let unsure: Vec<f64> = t
        .curve
        .iter()
        .filter(|s| s.sd_ratio > query::SD_RATIO_WARN)
        .map(|s| s.x)
        .collect();
    if let (Some(a), Some(b)) = (unsure.first(), unsure.last()) {
        eprintln!(
            "warning: between {} = {} and {} the surrogate knows little (sd above {:.0}% of the prior sd): add points there before trusting this part of the curve",
            t.param,
            query::short_number(*a),
            query::short_number(*b),
            query::SD_RATIO_WARN * 100.0
        );
    }
    eprintln!("plot written to {}", out.display());
    Ok(ExitCode::SUCCESS)
}
