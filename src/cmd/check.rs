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
    before_long_help = "Check a sweep file without running anything.\n\n\
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

/// Runs `tessera check`.
pub fn run(args: CheckArgs) -> anyhow::Result<ExitCode> {
    let file = args.spec.display().to_string();
    let text = std::fs::read_to_string(&args.spec)
        .with_context(|| format!("cannot read the sweep file {file}"))?;
    let spec = match spec::parse(&text, &file) {
        Ok(s) => s,
        Err(errors) => {
            eprintln!("{errors}");
            let n = errors.len();
            eprintln!(
                "{file}: {n} problem{} found; nothing was run",
                if n == 1 { "" } else { "s" }
            );
            return Ok(ExitCode::from(1));
        }
    };
    let summary = summary(&spec, &file);
    let warnings = model_warnings(&spec);
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
    if integer {
        format!("{}", x.round() as i64)
    } else {
        format!("{x}")
    }
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

fn with_unit(value: String, unit: &str) -> String {
    if unit.is_empty() {
        value
    } else {
        format!("{value} {unit}")
    }
}

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
    let batch = spec
        .batch
        .map_or("as many as free worker slots".to_string(), |b| {
            b.to_string()
        });
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
            if spec.objective.is_none() {
                " (calibration: minimise the standardised discrepancy)"
            } else {
                " (used to mark the calibrated region)"
            }
        );
        let mut rows = Vec::new();
        for t in &spec.targets {
            let unit = spec.metric_unit(&t.metric);
            rows.push(vec![
                t.metric.clone(),
                format!("= {}", with_unit(t.value.to_string(), unit)),
                format!("sd {}", with_unit(t.sd.to_string(), unit)),
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

/// Mismatches between the sweep file and a built-in model's declared inputs and metrics.
pub fn model_warnings(spec: &Spec) -> Vec<String> {
    let Some(model) = models::find(&spec.model.name) else {
        let mut w = Vec::new();
        if spec.model.command.is_none() {
            let names: Vec<&str> = models::catalogue().iter().map(|m| m.name).collect();
            w.push(format!(
                "model {:?} is not built in ({}); workers must be started with a command for it",
                spec.model.name,
                names.join(", ")
            ));
        }
        return w;
    };
    let inputs: Vec<&str> = model.inputs.iter().map(|i| i.name).collect();
    let mut w = Vec::new();
    for p in &spec.params {
        match model.input(&p.name) {
            None => w.push(format!(
                "parameter {} is not an input of model {}; its inputs: {}",
                p.name,
                model.name,
                inputs.join(", ")
            )),
            Some(i) => {
                if p.lo < i.lo || p.hi > i.hi {
                    w.push(format!(
                        "parameter {} ranges over [{}, {}] but model {} accepts {} in [{}, {}]{}; runs outside will fail",
                        p.name,
                        p.lo,
                        p.hi,
                        model.name,
                        i.name,
                        i.lo,
                        i.hi,
                        unit_suffix(i.unit)
                    ));
                }
                if i.integer && !p.integer {
                    w.push(format!(
                        "model {} takes whole numbers for {}; add integer = true to [params.{}]",
                        model.name, i.name, p.name
                    ));
                }
                if !i.unit.is_empty() && !p.unit.is_empty() && i.unit != p.unit {
                    w.push(format!(
                        "parameter {} has unit {:?} but model {} measures {} in {:?}",
                        p.name, p.unit, model.name, i.name, i.unit
                    ));
                }
            }
        }
    }
    for (name, value) in &spec.model.fixed {
        match model.input(name) {
            None => w.push(format!(
                "fixed input {name} is not an input of model {}; its inputs: {}",
                model.name,
                inputs.join(", ")
            )),
            Some(i) => match value.as_f64() {
                Some(x) if x < i.lo || x > i.hi => w.push(format!(
                    "fixed input {name} = {x} is outside [{}, {}]{} accepted by model {}",
                    i.lo,
                    i.hi,
                    unit_suffix(i.unit),
                    model.name
                )),
                Some(_) => {}
                None => w.push(format!(
                    "fixed input {name} should be a number for model {}",
                    model.name
                )),
            },
        }
    }
    let metrics: Vec<&str> = model.metrics.iter().map(|m| m.name).collect();
    for m in spec.metrics_needed() {
        if model.metric(&m).is_none() {
            w.push(format!(
                "model {} reports no metric {m}; it reports: {}",
                model.name,
                metrics.join(", ")
            ));
        }
    }
    w
}

fn unit_suffix(unit: &str) -> String {
    if unit.is_empty() {
        String::new()
    } else {
        format!(" {unit}")
    }
}
