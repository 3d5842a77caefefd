//! `tessera init`: write a commented starter sweep file for a built-in model.

use anyhow::Context;
use std::fmt::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_worker::models::{self, InputInfo, ModelInfo};

/// Arguments of `tessera init`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Write a commented starter sweep file, sweep.toml, for one of the built-in models.\n\n\
The file says which model constants to vary and over what range, how many \
simulation runs to spend, and which readout to optimise. Every line is \
explained in comments; edit it, then check it with `tessera check sweep.toml`.",
    after_help = "\
Examples:
  tessera init                          sweep.toml for the built-in tiling model, here
  tessera init --dir runs/height        in another folder (created if needed)
  tessera init --model branin           rehearse on a test function with a known minimum
  tessera init --force                  replace an existing sweep.toml

Built-in models: tiling, branin, goldstein_price, hartmann3, hartmann6, ishigami."
)]
pub struct InitArgs {
    /// Folder to write sweep.toml into (created if missing).
    #[arg(long, value_name = "DIR", default_value = ".")]
    pub dir: PathBuf,
    /// Built-in model to start from.
    #[arg(long, value_name = "NAME", default_value = "tiling")]
    pub model: String,
    /// Replace an existing sweep.toml.
    #[arg(long)]
    pub force: bool,
}

/// Runs `tessera init`.
pub fn run(args: InitArgs) -> anyhow::Result<ExitCode> {
    let Some(model) = models::find(&args.model) else {
        let names: Vec<&str> = models::catalogue().iter().map(|m| m.name).collect();
        anyhow::bail!(
            "there is no built-in model {:?}; built-in models: {}\n\
             (for your own simulator, start from any of them and change [model] name and command)",
            args.model,
            names.join(", ")
        );
    };
    let path = args.dir.join("sweep.toml");
    if path.exists() && !args.force {
        anyhow::bail!(
            "{} already exists; not overwriting it. Use --force to replace it, or --dir to write elsewhere",
            path.display()
        );
    }
    std::fs::create_dir_all(&args.dir)
        .with_context(|| format!("cannot create folder {}", args.dir.display()))?;
    let text = starter(&model);
    std::fs::write(&path, text).with_context(|| format!("cannot write {}", path.display()))?;
    eprintln!(
        "wrote {} for model {}; next: tessera check {}",
        path.display(),
        model.name,
        path.display()
    );
    Ok(ExitCode::SUCCESS)
}

/// The swept inputs of the tiling starter, with the ranges to sweep.
const TILING_SWEPT: &[(&str, f64, f64, &str)] = &[
    ("height_sd", 0.0, 15.0, "linear"),
    // Density and exclusion together stay below the model's crowding limit
    // (packing fraction 40 pi 10^2 / 4e4 = 0.31 at the far corner).
    ("exclusion", 0.0, 10.0, "linear"),
    ("density", 10.0, 40.0, "log"),
];

use tessera_models::text::toml_decimal as toml_number;

fn unit_comment(unit: &str) -> String {
    if unit.is_empty() {
        String::new()
    } else {
        format!(" {unit}")
    }
}

/// Writes one `[params.NAME]` table.
fn param_table(s: &mut String, input: &InputInfo, lo: f64, hi: f64, scale: &str) {
    let _ = writeln!(
        s,
        "{:<34}# {}",
        format!("[params.{}]", input.name),
        input.description
    );
    if input.integer {
        let _ = writeln!(s, "range = [{}, {}]", lo.round(), hi.round());
        let _ = writeln!(s, "integer = true");
    } else {
        let _ = writeln!(s, "range = [{}, {}]", toml_number(lo), toml_number(hi));
    }
    if scale != "linear" {
        let _ = writeln!(s, "scale = \"{scale}\"");
    }
    if !input.unit.is_empty() {
        let _ = writeln!(s, "unit = \"{}\"", input.unit);
    }
    s.push('\n');
}

/// Comment lines listing inputs not used above.
fn other_inputs(s: &mut String, model: &ModelInfo, used: &[&str]) {
    let rest: Vec<&InputInfo> = model
        .inputs
        .iter()
        .filter(|i| !used.contains(&i.name))
        .collect();
    if rest.is_empty() {
        return;
    }
    let _ = writeln!(
        s,
        "# Other inputs of {} (each runs at its default unless swept or fixed):",
        model.name
    );
    let ranges: Vec<String> = rest
        .iter()
        .map(|i| format!("[{}, {}]{}", i.lo, i.hi, unit_comment(i.unit)))
        .collect();
    let width = rest.iter().map(|i| i.name.len()).max().unwrap_or(0);
    let rwidth = ranges.iter().map(|r| r.chars().count()).max().unwrap_or(0);
    for (i, range) in rest.iter().zip(&ranges) {
        let _ = writeln!(
            s,
            "#   {:width$}  {range:rwidth$}  default {:<6}  {}",
            i.name, i.default, i.description
        );
    }
    s.push('\n');
}

fn metric_list(s: &mut String, model: &ModelInfo) {
    let _ = writeln!(s, "# Metrics reported by {}:", model.name);
    let width = model
        .metrics
        .iter()
        .map(|m| m.name.len())
        .max()
        .unwrap_or(0);
    for m in &model.metrics {
        let _ = writeln!(
            s,
            "#   {:width$}  {}{}",
            m.name,
            m.description,
            if m.unit.is_empty() {
                String::new()
            } else {
                format!(" ({})", m.unit)
            }
        );
    }
}

/// Writes `key = value`, with a comment aligned in a column.
fn kv(s: &mut String, key: &str, value: &str, comment: &str) {
    let line = format!("{key} = {value}");
    if comment.is_empty() {
        let _ = writeln!(s, "{line}");
    } else {
        let _ = writeln!(s, "{line:<34}# {comment}");
    }
}

fn header(
    s: &mut String,
    model: &ModelInfo,
    name: &str,
    budget: u32,
    initial: u32,
    replicates: u32,
    strategy: &str,
) {
    let _ = writeln!(
        s,
        "# Sweep file for tessera (every key is described in docs/sweep-file.md).\n\
         # Model: {} - {}.\n\
         # Check it with `tessera check sweep.toml`; `--design` prints the first points.\n",
        model.name, model.description
    );
    kv(
        s,
        "name",
        &format!("\"{name}\""),
        "a short name for this sweep",
    );
    kv(
        s,
        "seed",
        "1",
        "fixes the initial design and every run's random seed",
    );
    kv(
        s,
        "budget",
        &budget.to_string(),
        "points (parameter combinations) to evaluate in total",
    );
    kv(
        s,
        "initial",
        &initial.to_string(),
        "of which spread evenly over the ranges first (Latin hypercube)",
    );
    kv(
        s,
        "replicates",
        &replicates.to_string(),
        "runs per point, each with its own seed",
    );
    kv(
        s,
        "strategy",
        &format!("\"{strategy}\""),
        "improve: look for the best objective; explore: map trends",
    );
    kv(
        s,
        "retries",
        "2",
        "re-runs of a failed run before it counts as failed",
    );
    kv(
        s,
        "# batch",
        "4",
        "points proposed at once (default: 4 with `run`, free slots with `serve`)",
    );
    s.push('\n');
}

/// The starter sweep file for `model`.
pub fn starter(model: &ModelInfo) -> String {
    let mut s = String::new();
    if model.name == "tiling" {
        tiling_starter(&mut s, model);
    } else {
        generic_starter(&mut s, model);
    }
    s
}

fn tiling_starter(s: &mut String, model: &ModelInfo) {
    header(s, model, "height-spread", 30, 15, 2, "improve");
    s.push_str("[model]\n");
    kv(
        s,
        "name",
        &format!("\"{}\"", model.name),
        "the built-in model",
    );
    kv(
        s,
        "timeout",
        "\"5m\"",
        "longest a single run may take (\"90s\", \"10m\", \"2h\")",
    );
    s.push_str("\n[model.fixed]                     # inputs held constant in every run\n");
    kv(s, "duration_h", "48.0", "simulated time (h)");
    s.push_str("\n# The constants to vary, each over the range to search.\n");
    let mut used = vec!["duration_h"];
    for (name, lo, hi, scale) in TILING_SWEPT {
        if let Some(input) = model.input(name) {
            param_table(s, input, *lo, *hi, scale);
            used.push(input.name);
        }
    }
    other_inputs(s, model, &used);
    let _ = write!(
        s,
        "# What to optimise: the spread of territory volumes (sd / mean).\n\
         [objective]\n\
         minimize = \"territory_cv\"         # or maximize = \"...\"; or use targets below\n\
         \n\
         # To calibrate against imaging data instead, remove [objective] and give\n\
         # the observed value and its sd for one or more metrics:\n\
         # [[target]]\n\
         # metric = \"coverage\"\n\
         # value = 0.82\n\
         # sd = 0.04\n\
         \n"
    );
    for m in &model.metrics {
        if !m.unit.is_empty() {
            let _ = writeln!(s, "[metrics.{}]\nunit = \"{}\"\n", m.name, m.unit);
        }
    }
    metric_list(s, model);
}

/// Inputs whose description marks them as usually held fixed.
fn usually_fixed(input: &InputInfo) -> bool {
    input.description.contains("usually a fixed input")
}

fn generic_starter(s: &mut String, model: &ModelInfo) {
    let swept: Vec<&InputInfo> = model.inputs.iter().filter(|i| !usually_fixed(i)).collect();
    let d = swept.len().max(1) as u32;
    header(s, model, model.name, 20 * d, 10 * d, 1, "improve");
    s.push_str("[model]\n");
    kv(
        s,
        "name",
        &format!("\"{}\"", model.name),
        "the built-in model",
    );
    kv(s, "timeout", "\"1m\"", "longest a single run may take");
    kv(
        s,
        "# command",
        "[\"python3\", \"sim.py\"]",
        "your own simulator, for `tessera run` workers",
    );
    s.push('\n');
    let fixed: Vec<&InputInfo> = model.inputs.iter().filter(|i| usually_fixed(i)).collect();
    if !fixed.is_empty() {
        s.push_str("[model.fixed]                     # inputs held constant in every run\n");
        for i in &fixed {
            let value = if i.integer {
                format!("{}", i.default.round())
            } else {
                toml_number(i.default)
            };
            kv(s, i.name, &value, i.description);
        }
        s.push('\n');
    }
    for i in &swept {
        param_table(s, i, i.lo, i.hi, "linear");
    }
    let first = model.metrics.first().map_or("value", |m| m.name);
    let _ = write!(
        s,
        "[objective]\n\
         minimize = \"{first}\"\n\
         \n"
    );
    metric_list(s, model);
}
