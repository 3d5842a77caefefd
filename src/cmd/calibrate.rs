//! `tessera calibrate`: which constants match the measured targets, how
//! plausible each is, and which constants the targets leave free.

use anyhow::Context;
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use tessera_coordinator::query::{self, CalibrateOptions, Calibration};
use tessera_coordinator::spec::{Scale, Spec};
use tessera_models::text::{short, with_unit};
use tessera_report::chart::{self, Axis};

/// Arguments of `tessera calibrate`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Calibrate the model to the measurements in the sweep file's [[target]] tables, \
using the surrogates (no new runs):\n\n\
1. The region not ruled out (history matching): constants whose predicted metrics lie within \
3 standard deviations of every target, counting the measurement sd, the model discrepancy sd \
and the surrogate's own uncertainty. Its share of the box shows how much the targets narrow \
things down.\n\
2. Posterior samples: how plausible each constant set is, with a uniform prior over the box, \
drawn by an ensemble MCMC sampler, with convergence diagnostics.\n\
3. What the targets pin down: per constant, how much of its range is ruled out, and which \
constants trade off against each other.\n\n\
Plots (SVG and PNG) go to --out: the marginal posterior of each constant, a pairs plot of the \
samples over the region, and the implausibility against each constant.",
    after_help = "\
Examples:
  tessera calibrate --db sweep.db
      region, posterior summary, what is pinned; plots in sweep-calibration/
  tessera calibrate --db sweep.db --samples posterior.csv --out plots
      also write the posterior samples as CSV (a header of parameter names)
  tessera calibrate --db sweep.db --json
      one JSON object: region, posterior, correlations, identified, diagnostics"
)]
pub struct CalibrateArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Print one JSON object instead of tables.
    #[arg(long)]
    pub json: bool,
    /// Write the posterior samples to this CSV file.
    #[arg(long, value_name = "FILE.csv")]
    pub samples: Option<PathBuf>,
    /// Directory for the plots (default: next to the database, NAME-calibration).
    #[arg(long, value_name = "DIR")]
    pub out: Option<PathBuf>,
    /// Sampler steps per walker, the first 40% dropped as burn-in (default:
    /// 2500, doubled up to 20000 while the diagnostics are poor).
    #[arg(long, value_name = "N")]
    pub steps: Option<usize>,
    /// Seed of the region estimate and the sampler.
    #[arg(long, default_value = "1", value_name = "N")]
    pub seed: u64,
}

fn param_axis(spec: &Spec, k: usize) -> Axis {
    let p = &spec.params[k];
    Axis::new(
        with_unit_label(&p.name, &p.unit),
        p.lo,
        p.hi,
        p.scale == Scale::Log,
    )
}

/// `name [unit]`, or the name alone.
pub fn with_unit_label(name: &str, unit: &str) -> String {
    if unit.is_empty() {
        name.to_string()
    } else {
        format!("{name} [{unit}]")
    }
}

/// Writes the three calibration figures as SVG and PNG into `dir`; returns the SVG paths.
pub fn plots(c: &Calibration, spec: &Spec, dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create the plot directory {}", dir.display()))?;
    let d = spec.dimension();
    // Samples thinned for drawing.
    let step = (c.samples.len() / 2000).max(1);
    let drawn: Vec<Vec<f64>> = c.samples.iter().step_by(step).cloned().collect();
    let region: Vec<Vec<f64>> = c
        .implausibility_sample
        .iter()
        .filter(|(_, i)| *i <= c.region.cutoff)
        .map(|(x, _)| x.clone())
        .collect();
    let marginals = chart::HistPanels {
        title:
            "Posterior of each constant (bars; grey line: the uniform prior; green: 90% interval)"
                .into(),
        panels: (0..d)
            .map(|k| {
                let name = &spec.params[k].name;
                let shade = c.posterior.get(name).map(|m| (m.q05, m.q95));
                (
                    param_axis(spec, k),
                    c.samples.iter().map(|s| s[k]).collect(),
                    shade,
                )
            })
            .collect(),
        uniform_reference: true,
    };
    let pairs = chart::PairsPlot {
        title: "Posterior samples (blue) over the region not ruled out (grey)".into(),
        axes: (0..d).map(|k| param_axis(spec, k)).collect(),
        samples: drawn,
        region,
    };
    let imp = chart::ScatterPanels {
        title: "Combined implausibility of uniform points of the box".into(),
        y_label: "implausibility".into(),
        panels: (0..d)
            .map(|k| {
                (
                    param_axis(spec, k),
                    c.implausibility_sample.iter().map(|(x, _)| x[k]).collect(),
                )
            })
            .collect(),
        ys: c.implausibility_sample.iter().map(|(_, i)| *i).collect(),
        hline: Some((c.region.cutoff, format!("cutoff {}", c.region.cutoff))),
        y_max: Some(4.0 * c.region.cutoff),
    };
    let mut out = Vec::new();
    for (name, write) in [
        (
            "posterior",
            &(|p: &Path| chart::save(&marginals, p))
                as &dyn Fn(&Path) -> Result<(), chart::ChartError>,
        ),
        ("pairs", &|p: &Path| chart::save(&pairs, p)),
        ("implausibility", &|p: &Path| chart::save(&imp, p)),
    ] {
        for ext in ["svg", "png"] {
            let path = dir.join(format!("{name}.{ext}"));
            write(&path)?;
            if ext == "svg" {
                out.push(path);
            }
        }
    }
    Ok(out)
}

/// Writes the samples as CSV with a header of parameter names.
fn write_samples(c: &Calibration, spec: &Spec, path: &Path) -> anyhow::Result<()> {
    let mut w = csv::Writer::from_path(path)
        .with_context(|| format!("cannot write the samples file {}", path.display()))?;
    w.write_record(spec.param_names())?;
    for s in &c.samples {
        w.write_record(s.iter().map(|v| tessera_models::text::exact(*v)))?;
    }
    w.flush()
        .with_context(|| format!("cannot write the samples file {}", path.display()))?;
    Ok(())
}

fn print_human(c: &Calibration, spec: &Spec, fits_points: u32) -> std::io::Result<()> {
    let mut o = std::io::stdout().lock();
    writeln!(
        o,
        "calibration of {} against {} target(s) (surrogates fitted to {} points)",
        spec.name,
        c.targets.len(),
        fits_points
    )?;
    writeln!(o)?;
    writeln!(o, "targets")?;
    for t in &c.targets {
        let mut extra = String::new();
        if t.discrepancy_sd > 0.0 {
            extra.push_str(&format!(
                ", model discrepancy sd {}",
                short(t.discrepancy_sd)
            ));
        }
        if t.weight != 1.0 {
            extra.push_str(&format!(", weight {}", short(t.weight)));
        }
        writeln!(
            o,
            "  {:<20} {} +- {}{extra}",
            t.metric,
            with_unit(short(t.value), &t.unit),
            short(t.sd)
        )?;
    }
    writeln!(o)?;
    writeln!(
        o,
        "region not ruled out (combined implausibility <= {})",
        c.region.cutoff
    )?;
    writeln!(
        o,
        "  {:.1}% +- {:.1}% of the box ({} uniform points)",
        100.0 * c.region.fraction,
        100.0 * c.region.fraction_se,
        c.region.samples
    )?;
    for p in &spec.params {
        if let Some([lo, hi]) = c.region.bounds.get(&p.name) {
            writeln!(
                o,
                "  {:<20} {:<24} (swept {})",
                p.name,
                with_unit(format!("{} - {}", short(*lo), short(*hi)), &p.unit),
                with_unit(format!("{} - {}", short(p.lo), short(p.hi)), &p.unit)
            )?;
        }
    }
    writeln!(o)?;
    writeln!(
        o,
        "posterior (uniform prior over the box; {} walkers x {} steps; ESS {:.0}, R-hat {:.3})",
        c.diagnostics.walkers, c.diagnostics.steps, c.diagnostics.ess, c.diagnostics.rhat
    )?;
    writeln!(
        o,
        "  {:<20} {:>11} {:>11} {:>11} {:>11} {:>11}  unit",
        "parameter", "mean", "sd", "5%", "median", "95%"
    )?;
    for p in &spec.params {
        if let Some(m) = c.posterior.get(&p.name) {
            writeln!(
                o,
                "  {:<20} {:>11} {:>11} {:>11} {:>11} {:>11}  {}",
                p.name,
                short(m.mean),
                short(m.sd),
                short(m.q05),
                short(m.q50),
                short(m.q95),
                p.unit
            )?;
        }
    }
    for w in &c.diagnostics.warnings {
        writeln!(o, "  warning: {w}")?;
    }
    writeln!(o)?;
    writeln!(o, "what the targets pin down")?;
    for f in &c.findings {
        writeln!(o, "  {}", f.words)?;
    }
    for t in &c.trade_offs {
        writeln!(o, "  {t}")?;
    }
    if !c.best_points.is_empty() {
        writeln!(o)?;
        writeln!(o, "observed points closest to the targets (score: sum of squared standardised differences)")?;
        for m in &c.best_points {
            let values: Vec<String> = spec
                .params
                .iter()
                .filter_map(|p| {
                    m.values
                        .get(&p.name)
                        .map(|v| format!("{}={}", p.name, short(*v)))
                })
                .collect();
            writeln!(
                o,
                "  point {:<5} score {:<8} {}",
                m.point,
                short(m.score),
                values.join(" ")
            )?;
        }
    }
    writeln!(o)?;
    writeln!(o, "cautions")?;
    for c in &c.cautions {
        writeln!(o, "  - {c}")?;
    }
    Ok(())
}

/// Runs `tessera calibrate`.
pub fn run(args: CalibrateArgs) -> anyhow::Result<ExitCode> {
    let (spec, fits) = query::load_fits(&args.db)?;
    let results = query::load_results(&args.db)?;
    let defaults = CalibrateOptions::default();
    let opts = CalibrateOptions {
        steps: args.steps.map_or(defaults.steps, |s| s.max(50)),
        max_steps: args.steps.map_or(defaults.max_steps, |s| s.max(50)),
        seed: args.seed,
        ..defaults
    };
    let c = query::calibrate(&fits, &spec, &results, &opts)?;
    let dir = args.out.clone().unwrap_or_else(|| {
        let stem = args
            .db
            .file_stem()
            .map(|s| s.to_string_lossy().to_string())
            .unwrap_or_else(|| "sweep".into());
        args.db.with_file_name(format!("{stem}-calibration"))
    });
    let written = plots(&c, &spec, &dir)?;
    if let Some(path) = &args.samples {
        write_samples(&c, &spec, path)?;
    }
    let points = fits
        .iter()
        .filter(|f| spec.targets.iter().any(|t| t.metric == f.metric))
        .map(|f| f.n_points)
        .max()
        .unwrap_or(0);
    if args.json {
        println!("{}", serde_json::to_string_pretty(&c)?);
    } else {
        print_human(&c, &spec, points)?;
        println!();
        for p in &written {
            println!(
                "plot: {} (and .png)",
                shlex::try_quote(&p.display().to_string()).unwrap_or_default()
            );
        }
        if let Some(path) = &args.samples {
            println!(
                "samples: {} ({} rows)",
                shlex::try_quote(&path.display().to_string()).unwrap_or_default(),
                c.samples.len()
            );
        }
    }
    for w in &c.diagnostics.warnings {
        eprintln!("warning: {w}");
    }
    Ok(ExitCode::SUCCESS)
}
