//! `tessera sensitivity`: which constants matter for each metric (Sobol
//! indices on the surrogates), as a table, JSON, and a bar chart.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_coordinator::query::{self, MetricSensitivity};
use tessera_report::chart;

/// Arguments of `tessera sensitivity`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Which constants matter: for each metric, the Sobol first-order index of every \
parameter (the share of the metric's variance over the box that the parameter causes alone) and \
its total index (the share it causes with all its interactions), computed on the surrogates, \
with 95% intervals that include the Monte Carlo error and the surrogate's own uncertainty.\n\n\
A parameter with a total index near 0 hardly matters anywhere in the box; a total index well \
above the first-order one means it acts through interactions with others. Parameters are sampled \
evenly on their own scales (log-scaled ones evenly in the logarithm), so the answer depends on \
the box you swept.",
    after_help = "\
Examples:
  tessera sensitivity --db sweep.db
      a table per metric
  tessera sensitivity --db sweep.db --metric territory_cv --out sobol.png
      one metric, and its bar chart as PNG (or .svg)
  tessera sensitivity --db sweep.db --json
      {\"territory_cv\": {\"height_sd\": {\"first\": .., \"first_lower\": .., ...}}}"
)]
pub struct SensitivityArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Only this metric.
    #[arg(long, value_name = "NAME")]
    pub metric: Option<String>,
    /// Print one JSON object keyed by metric, then parameter.
    #[arg(long)]
    pub json: bool,
    /// Write the bar chart here (.svg or .png); with several metrics, one
    /// file per metric with the metric's name added.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Seed of the Monte Carlo samples.
    #[arg(long, default_value = "1", value_name = "N")]
    pub seed: u64,
}

/// The bar chart of one metric's indices.
pub fn figure(s: &MetricSensitivity) -> chart::BarPlot {
    chart::BarPlot {
        title: format!(
            "Which constants matter for {} (Sobol indices, 95% intervals)",
            s.metric
        ),
        bars: s
            .params
            .iter()
            .map(|(name, ix)| {
                (
                    name.clone(),
                    (ix.first.value, ix.first.lower, ix.first.upper),
                    (ix.total.value, ix.total.lower, ix.total.upper),
                )
            })
            .collect(),
    }
}

/// The JSON object: metric -> parameter -> indices and interval ends.
pub fn to_json(all: &[MetricSensitivity]) -> serde_json::Value {
    let mut out = serde_json::Map::new();
    for s in all {
        let mut per = serde_json::Map::new();
        for (name, ix) in &s.params {
            per.insert(
                name.clone(),
                serde_json::json!({
                    "first": ix.first.value,
                    "first_lower": ix.first.lower,
                    "first_upper": ix.first.upper,
                    "total": ix.total.value,
                    "total_lower": ix.total.lower,
                    "total_upper": ix.total.upper,
                    "first_mc_sd": ix.first.mc_sd,
                    "first_surrogate_sd": ix.first.surrogate_sd,
                    "total_mc_sd": ix.total.mc_sd,
                    "total_surrogate_sd": ix.total.surrogate_sd,
                }),
            );
        }
        out.insert(s.metric.clone(), serde_json::Value::Object(per));
    }
    serde_json::Value::Object(out)
}

/// The plain-words reading of one metric's indices.
pub fn reading(s: &MetricSensitivity) -> Vec<String> {
    let mut v: Vec<&(String, query::ParamIndices)> = s.params.iter().collect();
    v.sort_by(|a, b| b.1.total.value.total_cmp(&a.1.total.value));
    let mut out = Vec::new();
    if let Some((name, ix)) = v.first() {
        out.push(format!(
            "{name} matters most for {}: {:.0}% of its variance with interactions, {:.0}% alone",
            s.metric,
            100.0 * ix.total.value,
            100.0 * ix.first.value
        ));
    }
    let small: Vec<&str> = v
        .iter()
        .filter(|(_, ix)| ix.total.upper < 0.05)
        .map(|(n, _)| n.as_str())
        .collect();
    if !small.is_empty() {
        out.push(format!(
            "{} hardly matter{} for {} in this box (total index below 5%)",
            small.join(", "),
            if small.len() == 1 { "s" } else { "" },
            s.metric
        ));
    }
    let inter: Vec<String> = v
        .iter()
        .filter(|(_, ix)| ix.total.value - ix.first.value > 0.1)
        .map(|(n, _)| n.clone())
        .collect();
    if !inter.is_empty() {
        out.push(format!(
            "{} act{} through interactions (total well above first order)",
            inter.join(", "),
            if inter.len() == 1 { "s" } else { "" }
        ));
    }
    if s.q2 < query::MIN_Q2 {
        out.push(format!(
            "caution: the surrogate of {} is not yet trustworthy (leave-one-out Q2 {:.2}); these indices may change with more points",
            s.metric, s.q2
        ));
    }
    out
}

/// Runs `tessera sensitivity`.
pub fn run(args: SensitivityArgs) -> anyhow::Result<ExitCode> {
    if let Some(out) = &args.out {
        chart::format_of(out)?;
    }
    let (spec, fits) = query::load_fits(&args.db)?;
    let all = query::sensitivity(&fits, &spec, args.metric.as_deref(), args.seed)?;
    let mut written = Vec::new();
    if let Some(out) = &args.out {
        for s in &all {
            let path = if all.len() == 1 {
                out.clone()
            } else {
                let stem = out
                    .file_stem()
                    .map(|s| s.to_string_lossy().to_string())
                    .unwrap_or_default();
                let ext = out
                    .extension()
                    .map(|s| s.to_string_lossy().to_string())
                    .unwrap_or_default();
                out.with_file_name(format!("{stem}-{}.{ext}", super::file_word(&s.metric)))
            };
            chart::save(&figure(s), &path)?;
            written.push(path);
        }
    }
    if args.json {
        println!("{}", serde_json::to_string_pretty(&to_json(&all))?);
    } else {
        for s in &all {
            println!(
                "{}{}: share of its variance over the box",
                s.metric,
                if s.unit.is_empty() {
                    String::new()
                } else {
                    format!(" [{}]", s.unit)
                }
            );
            println!(
                "  {:<20} {:>8} {:>17} {:>8} {:>17}",
                "parameter", "first", "95% interval", "total", "95% interval"
            );
            let names: BTreeMap<&str, usize> = spec
                .params
                .iter()
                .enumerate()
                .map(|(i, p)| (p.name.as_str(), i))
                .collect();
            let mut rows: Vec<_> = s.params.iter().collect();
            rows.sort_by_key(|(n, _)| names.get(n.as_str()).copied().unwrap_or(usize::MAX));
            for (name, ix) in rows {
                println!(
                    "  {:<20} {:>8.3} {:>17} {:>8.3} {:>17}",
                    name,
                    ix.first.value,
                    format!("[{:.3}, {:.3}]", ix.first.lower, ix.first.upper),
                    ix.total.value,
                    format!("[{:.3}, {:.3}]", ix.total.lower, ix.total.upper)
                );
            }
            for line in reading(s) {
                println!("  {line}");
            }
            println!();
        }
        println!("Sobol indices on the surrogates: first order by Saltelli et al. (2010), total by Jansen (1999); intervals add the Monte Carlo error (bootstrap) and the surrogate's uncertainty (posterior sample paths).");
    }
    for p in &written {
        eprintln!("plot written to {}", p.display());
    }
    Ok(ExitCode::SUCCESS)
}
