//! `tessera check`: validate a sweep file, show what it asks for, and
//! optionally print the initial design.

use anyhow::Context;
use std::fmt::Write as _;
use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_coordinator::spec::{self, Direction, Spec};
use tessera_worker::models;

/// Arguments of `tessera check`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Check a sweep file without running anything.\n\n\
Every problem is listed at once, each with its line and column and what \
would be valid; the exit status is 1 if there is any. A valid file is \
summarised: the model, the run budget, a table of the parameters with their \
ranges and units, and the objective or calibration targets. For a built-in \
model, parameters that the model does not take, or ranges beyond what it \
accepts, are pointed out as warnings.",
    after_help = "\
Examples:
  tessera check sweep.toml                     validate and summarise
  tessera check sweep.toml --design            also print the initial design as CSV
  tessera check sweep.toml --design > design.csv   the summary stays on the screen (stderr)

With --design, standard output holds only the CSV: a header of parameter names,
then one row per point of the initial design, in natural units."
)]
pub struct CheckArgs {
    /// The sweep file to check.
    #[arg(value_name = "SPEC")]
    pub spec: PathBuf,
    /// Print the initial design (a maximin Latin hypercube) to stdout as CSV.
    #[arg(long)]
    pub design: bool,
}

/// A sweep file read and validated: its text, the sweep and the warnings.
pub struct Checked {
    /// The file's text, as stored in the sweep database.
    pub text: String,
    /// The validated sweep.
    pub spec: Spec,
    /// Warnings (with their place in the file) and remarks about the model.
    pub warnings: Vec<String>,
}

/// Reads and validates a sweep file; on problems prints every one of them
/// and returns the exit code (1) instead.
pub fn load(path: &std::path::Path) -> anyhow::Result<Result<Checked, ExitCode>> {
    let file = path.display().to_string();
    let text = spec::read_file(path)?;
    let (spec, spec_warnings) = match spec::parse_with_warnings(&text, &file) {
        Ok(s) => s,
        Err(errors) => {
            eprintln!("{errors}");
            let n = errors.len();
            eprintln!(
                "{file}: {n} problem{} found; nothing was run",
                if n == 1 { "" } else { "s" }
            );
            return Ok(Err(ExitCode::from(1)));
        }
    };
    let mut warnings: Vec<String> = spec_warnings.iter().map(ToString::to_string).collect();
    warnings.extend(model_warnings(&spec));
    Ok(Ok(Checked {
        text,
        spec,
        warnings,
    }))
}

/// Runs `tessera check`.
pub fn run(args: CheckArgs) -> anyhow::Result<ExitCode> {
    let file = args.spec.display().to_string();
    let Checked { spec, warnings, .. } = match load(&args.spec)? {
        Ok(c) => c,
        Err(code) => return Ok(code),
    };
    let summary = summary(&spec, &file);
    if args.design {
        eprint!("{summary}");
        for w in &warnings {
            eprintln!("warning: {w}");
        }
        let csv = design_csv(&spec);
        let mut out = std::io::stdout().lock();
        out.write_all(csv.as_bytes())
            .and_then(|()| out.flush())
            .context("cannot write the design to standard output")?;
    } else {
        print!("{summary}");
        for w in &warnings {
            eprintln!("warning: {w}");
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// A number as written in tables and CSV: whole values of integer
/// parameters without decimals, others in the shortest exact form.
pub fn format_value(x: f64, integer: bool) -> String {
    tessera_models::text::value(x, integer)
}

/// The initial design as CSV with a header of parameter names.
pub fn design_csv(spec: &Spec) -> String {
    let mut s = spec.param_names().join(",");
    s.push('\n');
    for point in spec.initial_design() {
        let row: Vec<String> = spec
            .params
            .iter()
            .zip(&point)
            .map(|(p, &x)| format_value(x, p.integer))
            .collect();
        s.push_str(&row.join(","));
        s.push('\n');
    }
    s
}

/// Left-aligned columns separated by two spaces.
fn table(rows: &[Vec<String>]) -> String {
    let cols = rows.iter().map(Vec::len).max().unwrap_or(0);
    let widths: Vec<usize> = (0..cols)
        .map(|c| {
            rows.iter()
                .filter_map(|r| r.get(c))
                .map(|x| x.chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut s = String::new();
    for r in rows {
        let mut line = String::from("  ");
        for (c, cell) in r.iter().enumerate() {
            if c + 1 == r.len() {
                line.push_str(cell);
            } else {
                let _ = write!(line, "{cell:<w$}  ", w = widths[c]);
            }
        }
        s.push_str(line.trim_end());
        s.push('\n');
    }
    s
}

use tessera_models::text::with_unit;

/// The human summary of a valid sweep file.
pub fn summary(spec: &Spec, file: &str) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{file}: valid");
    let _ = writeln!(s, "sweep:  {} (seed {})", spec.name, spec.seed);
    let mut model = format!(
        "model:  {}, timeout {}",
        spec.model.name,
        humantime::format_duration(spec.model.timeout)
    );
    if let Some(cmd) = &spec.model.command {
        let _ = write!(model, ", command for local workers: {}", cmd.join(" "));
    }
    let _ = writeln!(s, "{model}");
    if !spec.model.fixed.is_empty() {
        let fixed: Vec<String> = spec
            .model
            .fixed
            .iter()
            .map(|(k, v)| format!("{k} = {v}"))
            .collect();
        let _ = writeln!(s, "fixed:  {}", fixed.join(", "));
    }
    let runs = u64::from(spec.budget) * u64::from(spec.replicates);
    let _ = writeln!(
        s,
        "runs:   {} points ({} in the initial design) x {} replicate{} = {} runs",
        spec.budget,
        spec.initial,
        spec.replicates,
        if spec.replicates == 1 { "" } else { "s" },
        runs
    );
    // Without `batch`, the size depends on how the sweep is run (the
    // `reproducible` default differs between `run` and `serve`).
    let batch = match (spec.batch, spec.reproducible) {
        (Some(b), _) => b.to_string(),
        (None, Some(true)) => tessera_coordinator::spec::DEFAULT_REPRODUCIBLE_BATCH.to_string(),
        (None, Some(false)) => "as many as free worker slots".to_string(),
        (None, None) => format!(
            "{} with `tessera run` (reproducible), as many as free worker slots with `tessera serve`",
            tessera_coordinator::spec::DEFAULT_REPRODUCIBLE_BATCH
        ),
    };
    let _ = writeln!(
        s,
        "then:   strategy {}, batch {}, retries {}",
        spec.strategy.as_str(),
        batch,
        spec.retries
    );
    s.push('\n');
    let mut rows = vec![vec![
        "parameter".to_string(),
        "low".to_string(),
        "high".to_string(),
        "scale".to_string(),
        "integer".to_string(),
        "unit".to_string(),
    ]];
    for p in &spec.params {
        rows.push(vec![
            p.name.clone(),
            format_value(p.lo, p.integer),
            format_value(p.hi, p.integer),
            p.scale.as_str().to_string(),
            if p.integer { "yes" } else { "no" }.to_string(),
            if p.unit.is_empty() {
                "-".to_string()
            } else {
                p.unit.clone()
            },
        ]);
    }
    s.push_str(&table(&rows));
    s.push('\n');
    if let Some(o) = &spec.objective {
        let word = match o.direction {
            Direction::Minimize => "minimize",
            Direction::Maximize => "maximize",
        };
        let _ = writeln!(
            s,
            "objective: {word} {}",
            with_unit(o.metric.clone(), &bracket(spec.metric_unit(&o.metric)))
        );
    }
    if !spec.targets.is_empty() {
        let _ = writeln!(
            s,
            "targets{}:",
            match (spec.strategy, spec.objective.is_some()) {
                (tessera_coordinator::spec::Strategy::Calibrate, _) =>
                    " (calibration waves narrow down the constants that match them; then tessera calibrate)",
                (_, false) => " (the search minimises the standardised discrepancy; tessera calibrate maps the matching constants)",
                (_, true) => " (tessera calibrate maps the constants that match them)",
            }
        );
        let mut rows = Vec::new();
        for t in &spec.targets {
            let unit = spec.metric_unit(&t.metric);
            rows.push(vec![
                t.metric.clone(),
                format!(
                    "= {}",
                    with_unit(tessera_models::text::exact(t.value), unit)
                ),
                format!("sd {}", with_unit(tessera_models::text::exact(t.sd), unit)),
                if t.discrepancy_sd > 0.0 {
                    format!(
                        "model discrepancy sd {}",
                        with_unit(tessera_models::text::exact(t.discrepancy_sd), unit)
                    )
                } else {
                    String::new()
                },
                if t.weight == 1.0 {
                    String::new()
                } else {
                    format!("weight {}", tessera_models::text::exact(t.weight))
                },
            ]);
        }
        s.push_str(&table(&rows));
    }
    s
}

fn bracket(unit: &str) -> String {
    if unit.is_empty() {
        String::new()
    } else {
        format!("({unit})")
    }
}

/// What `check` says about the model beyond the sweep file's own rules: a
/// model that is neither built in nor given a command.
pub fn model_warnings(spec: &Spec) -> Vec<String> {
    let builtin = models::find(&spec.model.name).is_some() && spec.model.command.is_none();
    if builtin {
        return Vec::new();
    }
    let mut out = Vec::new();
    if spec.model.command.is_none() {
        let names: Vec<&str> = models::catalogue().iter().map(|m| m.name).collect();
        out.push(format!(
            "model {:?} is not built in ({}); workers must be started with --command {}=\"...\" for it",
            spec.model.name,
            names.join(", "),
            spec.model.name
        ));
    }
    // The metrics of a command are known only once it has run.
    let needed = spec.metrics_needed();
    if !needed.is_empty() {
        out.push(format!(
            "the metrics of {:?} cannot be checked before it runs: it must report {}; a run that does not fails with a message naming the missing metric (try one run with tessera simulate first)",
            spec.model.name,
            needed.join(", ")
        ));
    }
    out
}
