//! `tessera demo`: the whole job with no setup. Writes a sweep of the
//! built-in `tiling` model in an invented scenario, runs it on this machine
//! with adaptive proposals, and writes the report.

use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;

/// Arguments of `tessera demo`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
The scenario is invented: a made-up glial layer whose mature cell height
varies from cell to cell, with invented \"measured\" targets. The demo writes
DIR/demo.toml (read it: every key is explained), runs it (rerunning continues
where it stopped), and writes DIR/report/index.html.")]
pub struct DemoArgs {
    /// Directory for the sweep file, its database and the report.
    #[arg(long, default_value = "tessera-demo", value_name = "DIR")]
    pub out: PathBuf,
    /// Parallel runs (default: the number of cores).
    #[arg(long, value_name = "N")]
    pub workers: Option<u32>,
}

/// The demo's sweep file: an invented scenario on the built-in model.
pub const DEMO_SWEEP: &str = r#"# tessera demo: an INVENTED scenario, not real data.
#
# A made-up glial layer, 40 um thick. Cells grow processes that claim
# territory; each cell's mature height differs from its neighbours'. Four
# constants are uncertain: the mean mature height, its cell-to-cell spread,
# the minimal spacing between cell bodies, and the density of cells. Two
# invented "measurements" of the layer are the targets: how uneven the
# territories are (territory_cv) and how regularly the cell bodies are
# spaced (clark_evans). The question: which constants reproduce them, and
# how does the spread of mature height drive the unevenness of territories?

name = "demo-glial-layer"
description = "an invented glial layer: which height spread, spacing and density reproduce the invented measurements"
seed = 2026
budget = 72                # points in all: 36 spread evenly, then 36 chosen
initial = 36
replicates = 2             # two runs per point (the model is stochastic)
strategy = "calibrate"     # spend the rest where the targets are not yet ruled out

[model]
name = "tiling"            # the built-in model (docs/tiling-model.md)
timeout = "2m"

[model.fixed]
duration_h = 48.0
layer_thickness = 40.0

[params.height_mean]
range = [15.0, 35.0]
unit = "um"
description = "mean mature height of a cell's territory"

[params.height_sd]
range = [0.0, 15.0]
unit = "um"
description = "cell-to-cell sd of the mature height"

[params.exclusion]
range = [0.0, 12.0]
unit = "um"
description = "mean minimal distance between cell bodies"

[params.density]
range = [10.0, 40.0]
scale = "log"
unit = "cells/10^4 um^2"
description = "cell bodies per 10,000 um^2"

# INVENTED measurements, for the demo only.
[[target]]
metric = "territory_cv"
value = 0.45
sd = 0.03
discrepancy_sd = 0.02

[[target]]
metric = "clark_evans"
value = 1.45
sd = 0.04
"#;

/// Runs `tessera demo`.
pub fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    std::fs::create_dir_all(&args.out)
        .with_context(|| format!("cannot create {}", args.out.display()))?;
    let spec = args.out.join("demo.toml");
    if spec.exists() {
        let old = std::fs::read_to_string(&spec)
            .with_context(|| format!("cannot read {}", spec.display()))?;
        if old != DEMO_SWEEP {
            anyhow::bail!(
                "{} exists and is not the demo's sweep file; give another directory with --out, or remove it",
                spec.display()
            );
        }
    } else {
        std::fs::write(&spec, DEMO_SWEEP)
            .with_context(|| format!("cannot write {}", spec.display()))?;
    }
    println!("demo: an invented glial layer on the built-in tiling model");
    println!(
        "sweep file: {} (every key explained in docs/sweep-file.md)",
        spec.display()
    );
    let code = super::run::run(super::run::RunArgs {
        spec: spec.clone(),
        db: None,
        workers: args.workers,
        force: false,
        keep_workdirs: false,
    })?;
    if code != ExitCode::SUCCESS {
        return Ok(code);
    }
    let db = super::run::default_db(&spec);
    // The headline: the main effect of the height spread on territory unevenness.
    let (s, fits) = tessera_coordinator::query::load_fits(&db)?;
    if let Some(fit) = fits.iter().find(|f| f.metric == "territory_cv") {
        if let Some(k) = s.params.iter().position(|p| p.name == "height_sd") {
            let curve = tessera_coordinator::query::effects::main_effect(fit, &s, k, 4, 1);
            let words: Vec<String> = curve
                .iter()
                .map(|c| {
                    format!(
                        "{} at height_sd = {} um",
                        tessera_models::text::significant(c.mean, 3),
                        tessera_models::text::significant(c.x, 3)
                    )
                })
                .collect();
            println!();
            println!(
                "main effect of height_sd on territory_cv (averaged over the other constants): {}",
                words.join(", ")
            );
        }
    }
    let report = args.out.join("report");
    super::report::run(super::report::ReportArgs {
        db,
        out: report.clone(),
        max_metrics: 6,
    })?;
    println!();
    println!(
        "open {} in a browser (it works offline)",
        report.join("index.html").display()
    );
    Ok(ExitCode::SUCCESS)
}
