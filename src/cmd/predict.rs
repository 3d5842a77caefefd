//! `tessera predict`: what the surrogate predicts at chosen parameter values,
//! with its uncertainty and plain-words warnings.

use super::net;
use anyhow::{bail, Context};
use std::collections::BTreeMap;
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use tessera_coordinator::client::QueryClient;
use tessera_coordinator::query::{self, PointPrediction};
use tessera_coordinator::spec::Spec;

/// Arguments of `tessera predict`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Predict the outcome of the model at parameter values you choose, without \
running it: for every metric, the predicted mean (the average over many replicate runs), \
its standard deviation (how unsure the surrogate is), the 95% interval mean +- 1.96 sd, \
and the unit.\n\n\
The surrogates are Gaussian processes fitted to the finished runs in the database; \
they are refitted first if new results arrived since the last fit, and stored, so \
asking again gives the same answer. Warnings on stderr say when a point lies outside \
the range sampled so far (extrapolation) or where the surrogate knows little \
(sd close to the prior sd). Check how far to trust the surrogates with tessera check-fit.",
    after_help = "\
Examples:
  tessera predict --db sweep.db height_sd=5 exclusion=8 density=30
      one point: every parameter as NAME=VALUE, in the sweep file's units
  tessera predict --db sweep.db --points grid.csv
      many points: a CSV file whose header names the parameters
  tessera predict --db sweep.db --points grid.csv --out predicted.csv
      the same as CSV, one row per point (or --format csv for standard output)
  tessera predict --db sweep.db height_sd=5 exclusion=8 density=30 --json
      a JSON array, one object per point: {\"territory_cv\": {\"mean\": .., \"sd\": ..}}
  tessera predict --coordinator http://10.0.0.5:7300 --token-file lab.token \\
      height_sd=5 exclusion=8 density=30
      ask the running coordinator (it answers from its latest fits)

grid.csv looks like:
  height_sd,exclusion,density
  2,8,30
  10,8,30"
)]
#[command(group(clap::ArgGroup::new("source").required(true).args(["db", "coordinator"])))]
pub struct PredictArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    #[command(flatten)]
    pub remote: net::CoordinatorArgs,
    /// One point: a value for every parameter, e.g. height_sd=2.5.
    #[arg(value_name = "NAME=VALUE")]
    pub values: Vec<String>,
    /// Many points from a CSV file: a header row with the parameter names, then one point per row.
    #[arg(long, value_name = "FILE.csv")]
    pub points: Option<PathBuf>,
    /// Print one JSON array (one object per point, keyed by metric name) instead of tables.
    #[arg(long, conflicts_with = "format")]
    pub json: bool,
    /// Output format: a table per point, or CSV (one row per point).
    #[arg(long, value_enum, default_value = "table")]
    pub format: Format,
    /// Write the predictions to this CSV file (one row per point: the
    /// parameters, then mean, sd and 95% interval of every metric, then the
    /// warnings) and print only a summary.
    #[arg(long, value_name = "FILE.csv")]
    pub out: Option<PathBuf>,
}

/// How `tessera predict` prints its answer.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    /// A table per point.
    Table,
    /// One CSV row per point.
    Csv,
}

/// Writes the predictions as CSV: parameters (sweep order when known),
/// then `METRIC_mean`, `METRIC_sd`, `METRIC_lower95`, `METRIC_upper95` per
/// metric, then `warnings` (joined by "; ").
fn write_csv<W: std::io::Write>(
    w: W,
    preds: &[PointPrediction],
    spec: Option<&Spec>,
) -> anyhow::Result<()> {
    let mut out = csv::Writer::from_writer(w);
    let Some(first) = preds.first() else {
        return Ok(());
    };
    let mut params: Vec<String> = first.point.keys().cloned().collect();
    if let Some(spec) = spec {
        params.sort_by_key(|name| spec.params.iter().position(|q| &q.name == name));
    }
    let metrics: Vec<String> = first.metrics.iter().map(|m| m.metric.clone()).collect();
    let mut header = params.clone();
    for m in &metrics {
        for part in ["mean", "sd", "lower95", "upper95"] {
            header.push(format!("{m}_{part}"));
        }
    }
    header.push("warnings".to_string());
    out.write_record(&header)?;
    let exact = tessera_models::text::exact;
    for p in preds {
        let mut row: Vec<String> = params
            .iter()
            .map(|n| p.point.get(n).map_or(String::new(), |v| exact(*v)))
            .collect();
        for m in &metrics {
            match p.metrics.iter().find(|x| &x.metric == m) {
                Some(x) => row.extend([
                    exact(x.mean),
                    exact(x.sd),
                    exact(x.lower95),
                    exact(x.upper95),
                ]),
                None => row.extend(std::iter::repeat_n(String::new(), 4)),
            }
        }
        row.push(p.warnings.join("; "));
        out.write_record(&row)?;
    }
    out.flush()?;
    Ok(())
}

/// The point given as NAME=VALUE arguments (`None` if there are none).
fn assignment_point(values: &[String]) -> anyhow::Result<Option<BTreeMap<String, f64>>> {
    if values.is_empty() {
        return Ok(None);
    }
    let mut point = BTreeMap::new();
    for arg in values {
        let (name, value) = query::parse_assignment(arg)?;
        if point.insert(name.clone(), value).is_some() {
            bail!("{name} is given twice; give each parameter once");
        }
    }
    Ok(Some(point))
}

/// Reads points from a CSV file whose header names the parameters. With a
/// sweep file at hand, the header and every value are checked here, so that
/// problems are reported with their line numbers.
fn csv_points(path: &Path, spec: Option<&Spec>) -> anyhow::Result<Vec<BTreeMap<String, f64>>> {
    let file = path.display();
    let mut reader = csv::ReaderBuilder::new()
        .trim(csv::Trim::All)
        .comment(Some(b'#'))
        .from_path(path)
        .with_context(|| format!("cannot read the points file {file}"))?;
    let header: Vec<String> = reader
        .headers()
        .with_context(|| format!("{file}: cannot read the header row"))?
        .iter()
        .map(str::to_string)
        .collect();
    if let Some(spec) = spec {
        let valid = query::describe_params(spec);
        for name in &header {
            if !spec.params.iter().any(|p| &p.name == name) {
                bail!("{file} line 1: column {name:?} is not a parameter of the sweep; its parameters are {valid}");
            }
        }
        let missing: Vec<&str> = spec
            .params
            .iter()
            .filter(|p| !header.contains(&p.name))
            .map(|p| p.name.as_str())
            .collect();
        if !missing.is_empty() {
            bail!(
                "{file} line 1: no column for {}; the header must name every parameter: {valid}",
                missing.join(", ")
            );
        }
    }
    let mut out = Vec::new();
    for row in reader.records() {
        let row = row.with_context(|| format!("{file}: bad row"))?;
        let line = row.position().map_or(0, |p| p.line());
        let mut point = BTreeMap::new();
        for (name, cell) in header.iter().zip(row.iter()) {
            let x: f64 = cell.parse().map_err(|_| {
                anyhow::anyhow!("{file} line {line}: column {name}: {cell:?} is not a number")
            })?;
            let param = spec.and_then(|s| s.params.iter().find(|p| &p.name == name));
            if let Some(p) = param {
                if query::natural_to_unit(p, x).is_none() {
                    bail!(
                        "{file} line {line}: {name} = {cell} cannot be used{}",
                        if x.is_finite() {
                            ": the parameter is on a log scale, so values must be above 0"
                        } else {
                            ": not a finite number"
                        }
                    );
                }
            }
            if point.insert(name.clone(), x).is_some() {
                bail!("{file} line 1: column {name} appears twice");
            }
        }
        out.push(point);
    }
    if out.is_empty() {
        bail!("{file} has a header but no points");
    }
    Ok(out)
}

fn points_of(
    args: &PredictArgs,
    spec: Option<&Spec>,
) -> anyhow::Result<Vec<BTreeMap<String, f64>>> {
    let mut points: Vec<BTreeMap<String, f64>> =
        assignment_point(&args.values)?.into_iter().collect();
    if let Some(path) = &args.points {
        points.extend(csv_points(path, spec)?);
    }
    if points.is_empty() {
        let valid = spec.map_or_else(|| "see tessera status".to_string(), query::describe_params);
        bail!(
            "no point given: give NAME=VALUE for every parameter ({valid}), or --points FILE.csv"
        );
    }
    Ok(points)
}

async fn from_coordinator(
    dial: net::Dial,
    points: Vec<BTreeMap<String, f64>>,
) -> anyhow::Result<Vec<PointPrediction>> {
    let mut client = QueryClient::new(&dial)?;
    Ok(client.predict(points).await?)
}

/// Pads each column to its widest cell.
pub(crate) fn print_table(rows: &[Vec<String>], indent: &str) {
    let cols = rows.iter().map(Vec::len).max().unwrap_or(0);
    let widths: Vec<usize> = (0..cols)
        .map(|c| {
            rows.iter()
                .filter_map(|r| r.get(c))
                .map(|s| s.chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    for r in rows {
        let mut line = indent.to_string();
        for (c, cell) in r.iter().enumerate() {
            let pad = widths[c].saturating_sub(cell.chars().count());
            line.push_str(cell);
            if c + 1 < r.len() {
                line.push_str(&" ".repeat(pad + 2));
            }
        }
        println!("{}", line.trim_end());
    }
}

fn param_unit<'a>(spec: Option<&'a Spec>, name: &str) -> &'a str {
    spec.and_then(|s| s.params.iter().find(|p| p.name == name))
        .map_or("", |p| p.unit.as_str())
}

fn print_human(preds: &[PointPrediction], spec: Option<&Spec>) {
    let short = query::short_number;
    for (k, p) in preds.iter().enumerate() {
        if k > 0 {
            println!();
        }
        // In the sweep file's parameter order when it is known.
        let mut ordered: Vec<(&String, &f64)> = p.point.iter().collect();
        if let Some(spec) = spec {
            ordered.sort_by_key(|(name, _)| spec.params.iter().position(|q| &q.name == *name));
        }
        let coords: Vec<String> = ordered
            .into_iter()
            .map(|(name, v)| {
                let unit = param_unit(spec, name);
                if unit.is_empty() {
                    format!("{name} = {}", short(*v))
                } else {
                    format!("{name} = {} {unit}", short(*v))
                }
            })
            .collect();
        println!("point {}: {}", k + 1, coords.join(", "));
        let mut rows = vec![vec![
            "metric".to_string(),
            "mean".to_string(),
            "sd".to_string(),
            "95% interval".to_string(),
            "unit".to_string(),
        ]];
        for m in &p.metrics {
            rows.push(vec![
                m.metric.clone(),
                short(m.mean),
                short(m.sd),
                format!("[{}, {}]", short(m.lower95), short(m.upper95)),
                m.unit.clone(),
            ]);
        }
        print_table(&rows, "  ");
        warn(k, p);
    }
}

/// Warnings go to stderr, after what was printed for the point.
fn warn(k: usize, p: &PointPrediction) {
    if p.warnings.is_empty() {
        return;
    }
    let _ = std::io::stdout().flush();
    for w in &p.warnings {
        eprintln!("warning: point {}: {w}", k + 1);
    }
}

/// Per point, an object keyed by metric name.
fn to_json(preds: &[PointPrediction]) -> serde_json::Value {
    serde_json::Value::Array(
        preds
            .iter()
            .map(|p| {
                let obj: serde_json::Map<String, serde_json::Value> = p
                    .metrics
                    .iter()
                    .map(|m| {
                        (
                            m.metric.clone(),
                            serde_json::json!({
                                "mean": m.mean,
                                "sd": m.sd,
                                "lower95": m.lower95,
                                "upper95": m.upper95,
                                "unit": m.unit,
                                "sd_ratio": m.sd_ratio,
                            }),
                        )
                    })
                    .collect();
                serde_json::Value::Object(obj)
            })
            .collect(),
    )
}

/// Runs `tessera predict`.
pub fn run(args: PredictArgs) -> anyhow::Result<ExitCode> {
    let (preds, spec) = match (&args.db, &args.remote.coordinator) {
        (Some(db), _) => {
            let (spec, fits) = query::load_fits(db)?;
            let points = points_of(&args, Some(&spec))?;
            (query::predict(&fits, &spec, &points)?, Some(spec))
        }
        (None, Some(url)) => {
            let points = points_of(&args, None)?;
            let dial = net::dial(
                url,
                args.remote.token_file.as_deref(),
                args.remote.ca.as_deref(),
            )?;
            let rt = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
            (rt.block_on(from_coordinator(dial, points))?, None)
        }
        (None, None) => bail!("give --db FILE or --coordinator URL"),
    };
    if let Some(path) = &args.out {
        let file = std::fs::File::create(path)
            .with_context(|| format!("cannot write {}", path.display()))?;
        write_csv(std::io::BufWriter::new(file), &preds, spec.as_ref())
            .with_context(|| format!("cannot write {}", path.display()))?;
        let warned = preds.iter().filter(|p| !p.warnings.is_empty()).count();
        println!(
            "{} point(s) predicted; written to {} (one row per point: mean, sd and 95% interval of each metric)",
            preds.len(),
            path.display()
        );
        if warned > 0 {
            eprintln!(
                "warning: {warned} of {} points have warnings (extrapolation or little knowledge): see the warnings column",
                preds.len()
            );
        }
    } else if args.format == Format::Csv {
        write_csv(std::io::stdout().lock(), &preds, spec.as_ref())?;
        let warned = preds.iter().filter(|p| !p.warnings.is_empty()).count();
        if warned > 0 {
            eprintln!(
                "warning: {warned} of {} points have warnings: see the warnings column",
                preds.len()
            );
        }
    } else if args.json {
        println!("{}", serde_json::to_string_pretty(&to_json(&preds))?);
        for (k, p) in preds.iter().enumerate() {
            warn(k, p);
        }
    } else {
        print_human(&preds, spec.as_ref());
    }
    Ok(ExitCode::SUCCESS)
}
