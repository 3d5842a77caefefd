//! `tessera check-fit`: how far each surrogate can be trusted, from its
//! leave-one-out errors, with a plain verdict.

use std::path::PathBuf;
use std::process::ExitCode;
use tessera_coordinator::query::{self, FitVerdict};

/// Arguments of `tessera check-fit`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Check each surrogate (one per metric) by leaving each point out in turn \
and predicting it from all the others. Shown per metric: the points and runs it \
was fitted to; the typical error of those predictions (LOO RMSE, in the metric's \
unit); Q2, the share of the variation between points that is predicted (1 is \
perfect, 0 is no better than the average); the share of left-out points inside \
their own 95% interval (about 95% when the sd is honest); the mean and sd of the \
standardised errors (about 0 and 1). Then the verdict, \"trustworthy\" or \"needs \
more points\", and why.\n\n\
The surrogates are refitted first if new results arrived since the last fit.",
    after_help = "\
Examples:
  tessera check-fit --db sweep.db
  tessera check-fit --db sweep.db --json

A surrogate that needs more points: raise the sweep's budget and run it again
(tessera run continues the sweep), preferably with strategy = \"explore\"."
)]
pub struct CheckFitArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Print one JSON array (one object per metric) instead of a table.
    #[arg(long)]
    pub json: bool,
}

fn print_human(verdicts: &[FitVerdict]) {
    let short = query::short_number;
    let mut rows = vec![[
        "metric", "points", "runs", "LOO RMSE", "Q2", "in 95%", "z mean", "z sd", "verdict",
    ]
    .map(str::to_string)
    .to_vec()];
    for v in verdicts {
        let rmse = if v.unit.is_empty() {
            short(v.loo_rmse)
        } else {
            format!("{} {}", short(v.loo_rmse), v.unit)
        };
        rows.push(vec![
            v.metric.clone(),
            v.n_points.to_string(),
            v.n_results.to_string(),
            rmse,
            format!("{:.3}", v.q2),
            format!("{:.0}%", 100.0 * v.coverage95),
            format!("{:.2}", v.standardized_mean),
            format!("{:.2}", v.standardized_sd),
            v.verdict.as_str().to_string(),
        ]);
    }
    super::predict::print_table(&rows, "");
    println!();
    for v in verdicts {
        println!("{}: {}: {}", v.metric, v.verdict.as_str(), v.reason);
        for n in &v.notes {
            println!("  note: {n}");
        }
    }
}

/// Runs `tessera check-fit`.
pub fn run(args: CheckFitArgs) -> anyhow::Result<ExitCode> {
    let (_spec, fits) = query::load_fits(&args.db)?;
    let verdicts = query::check_fit(&fits);
    if args.json {
        println!("{}", serde_json::to_string_pretty(&verdicts)?);
    } else {
        print_human(&verdicts);
    }
    Ok(ExitCode::SUCCESS)
}
