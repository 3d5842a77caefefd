//! `tessera simulate`: one run of one model, its metrics printed as a table
//! (or one JSON object). For trying a model by hand before sweeping it.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use anyhow::Context;
use tessera_worker::models::{self, ModelInfo};
use tessera_worker::runner::{
    parse_command_arg, FailureKind, Metrics, RunFailure, RunRequest, Runner, RunnerConfig, Runners,
};
use tokio_util::sync::CancellationToken;

/// Exit status when the inputs or the model name are wrong (nothing ran).
const EXIT_USAGE: u8 = 2;
/// Exit status when the run itself failed.
const EXIT_RUN_FAILED: u8 = 1;

/// Arguments of `tessera simulate`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = long_about(),
    after_help = "\
Examples:
  tessera simulate tiling
      one run of the built-in tissue model with its default constants
  tessera simulate tiling --describe
      what the tiling model takes (ranges, defaults, units) and reports
  tessera simulate tiling height_sd=10 density=30 --seed 7
      cells of more unequal height in a denser layer, another random seed
  tessera simulate tiling --json
      the metrics as one JSON object, for scripts
  tessera simulate branin x1=3.14159 x2=2.275
      a published test function (its minimum, 0.397887, is there)
  tessera simulate colony division_rate=0.05 \\
      --command colony='python3 examples/simulators/python/colony.py'
      your own simulator, following docs/simulators.md

Exit status: 0 when the run gave metrics, 1 when the run failed (the reason \
and the end of the simulator's error output are printed), 2 when the model \
or an input was not valid (nothing was run)."
)]
pub struct SimulateArgs {
    /// The model to run: a built-in model or a NAME given with --command.
    #[arg(value_name = "MODEL")]
    pub model: String,
    /// Input values, e.g. height_sd=10. Inputs not given take the model's
    /// defaults. Values for your own simulators may also be text (mode=fast).
    #[arg(value_name = "NAME=VALUE")]
    pub values: Vec<String>,
    /// Random seed of the run: the same seed gives the same result.
    #[arg(long, default_value_t = 1, value_name = "S")]
    pub seed: u64,
    /// Print the metrics as one JSON object instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Show the model's inputs and metrics (ranges, defaults, units) and run nothing.
    #[arg(long)]
    pub describe: bool,
    /// Your own simulator: NAME=CMDLINE, split into words like a shell does
    /// (use sh -c '...' for pipes). May be given several times.
    #[arg(long = "command", value_name = "NAME=CMDLINE", value_parser = parse_command)]
    pub commands: Vec<(String, Vec<String>)>,
    /// Keep the run's working directory of your own simulator for inspection
    /// (where it is is printed on stderr).
    #[arg(long)]
    pub keep_workdirs: bool,
    /// Where run directories of your own simulators are made.
    #[arg(long, value_name = "DIR")]
    pub workdir_root: Option<PathBuf>,
    /// Give up (and stop the simulator) after this long, e.g. 30s, 5m, 2h.
    #[arg(long, value_name = "DUR")]
    pub timeout: Option<humantime::Duration>,
}

fn parse_command(arg: &str) -> Result<(String, Vec<String>), String> {
    parse_command_arg(arg)
}

fn long_about() -> String {
    let mut s = String::from(
        "Run one simulation and print its metrics.\n\n\
         Use it to try a model by hand before sweeping it: give the model's \
         name and any inputs as NAME=VALUE; inputs you leave out take the \
         model's defaults. Inputs are checked first: a wrong name or a value \
         out of range is refused with the list of valid inputs and ranges.\n\n\
         Built-in models:\n",
    );
    for m in models::catalogue() {
        let _ = writeln!(s, "  {:16} {}", m.name, m.description);
    }
    s.push_str(
        "\nYour own simulator joins with --command NAME=CMDLINE; it receives the \
         inputs and reports metrics as described in docs/simulators.md.",
    );
    s
}

/// Parsed `NAME=VALUE` words: numbers, and text for external commands.
#[derive(Debug, Default)]
struct Values {
    numbers: BTreeMap<String, f64>,
    texts: BTreeMap<String, String>,
}

/// Step 1, no I/O: split the `NAME=VALUE` words.
fn parse_values(words: &[String]) -> Result<Values, String> {
    let mut v = Values::default();
    for w in words {
        let Some((name, value)) = w.split_once('=') else {
            return Err(format!(
                "{w:?} is not NAME=VALUE (write e.g. height_sd=10, no spaces around '=')"
            ));
        };
        let name = name.trim();
        if name.is_empty() {
            return Err(format!("{w:?} has no name before '='"));
        }
        if v.numbers.contains_key(name) || v.texts.contains_key(name) {
            return Err(format!("input {name:?} is given twice"));
        }
        match value.trim().parse::<f64>() {
            Ok(x) => {
                v.numbers.insert(name.to_string(), x);
            }
            Err(_) => {
                v.texts.insert(name.to_string(), value.to_string());
            }
        }
    }
    Ok(v)
}

/// Runs `tessera simulate`.
pub fn run(args: SimulateArgs) -> anyhow::Result<ExitCode> {
    let values = match parse_values(&args.values) {
        Ok(v) => v,
        Err(e) => {
            eprintln!("error: {e}");
            return Ok(ExitCode::from(EXIT_USAGE));
        }
    };
    let is_external = args.commands.iter().any(|(n, _)| *n == args.model);
    let builtin = if is_external {
        None
    } else {
        models::find(&args.model)
    };
    if !is_external && builtin.is_none() {
        let names: Vec<&str> = models::catalogue().iter().map(|m| m.name).collect();
        eprintln!(
            "error: no model {:?}. Built-in models: {}. For your own simulator add \
             --command {}=CMDLINE (see docs/simulators.md).",
            args.model,
            names.join(", "),
            args.model
        );
        return Ok(ExitCode::from(EXIT_USAGE));
    }
    if args.describe {
        match &builtin {
            Some(info) => print!("{}", describe(info)),
            None => println!(
                "{:?} is your own simulator ({}); its inputs and metrics are whatever it \
                 defines. See docs/simulators.md for how it receives them.",
                args.model,
                args.commands
                    .iter()
                    .rev()
                    .find(|(n, _)| *n == args.model)
                    .map(|(_, w)| w.join(" "))
                    .unwrap_or_default()
            ),
        }
        return Ok(ExitCode::SUCCESS);
    }
    if let Some(info) = &builtin {
        if let Some(name) = values.texts.keys().next() {
            eprintln!(
                "error: input {name:?} = {:?} is not a number; model {:?} takes numbers:\n{}",
                values.texts[name],
                info.name,
                info.describe_inputs()
            );
            return Ok(ExitCode::from(EXIT_USAGE));
        }
        if let Err(f) = info.resolve(&values.numbers) {
            eprintln!("error: {}", f.reason);
            return Ok(ExitCode::from(EXIT_USAGE));
        }
    }

    // Step 2: build the runner and run.
    let mut cfg = RunnerConfig {
        commands: args.commands.clone(),
        keep_workdirs: args.keep_workdirs,
        ..RunnerConfig::default()
    };
    if let Some(root) = &args.workdir_root {
        cfg.workdir_root = root.clone();
    }
    let kept_under = (args.keep_workdirs && is_external).then(|| cfg.workdir_root.clone());
    cfg.guard = super::guard::words();
    let runners = Runners::new(cfg)?;
    let mut req = RunRequest::new(args.model.clone());
    req.params = values.numbers;
    req.fixed = values
        .texts
        .into_iter()
        .map(|(k, v)| (k, serde_json::Value::String(v)))
        .collect();
    req.seed = args.seed;
    req.timeout = args.timeout.map(Into::into);

    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("cannot start the async runtime")?;
    let t0 = Instant::now();
    let outcome = runtime.block_on(async {
        let cancel = CancellationToken::new();
        let on_interrupt = cancel.clone();
        // Ctrl-C stops the run (and kills the simulator's process group);
        // this task ends with the runtime.
        tokio::spawn(async move {
            if tokio::signal::ctrl_c().await.is_ok() {
                on_interrupt.cancel();
            }
        });
        runners.run(req, cancel).await
    });
    let elapsed = t0.elapsed();
    if let Some(root) = kept_under {
        eprintln!(
            "the run directory was kept: the newest eval-0-* folder under {}",
            root.display()
        );
    }
    match outcome {
        Ok(metrics) => {
            if args.json {
                println!("{}", metrics_json(&metrics));
            } else {
                println!(
                    "{} (seed {}, {:.2} s)",
                    args.model,
                    args.seed,
                    elapsed.as_secs_f64()
                );
                print!("{}", metrics_table(&metrics, builtin.as_ref()));
            }
            Ok(ExitCode::SUCCESS)
        }
        Err(f) => {
            report_failure(&args.model, &f);
            Ok(ExitCode::from(match f.kind {
                FailureKind::BadInput | FailureKind::UnknownModel => EXIT_USAGE,
                _ => EXIT_RUN_FAILED,
            }))
        }
    }
}

fn report_failure(model: &str, f: &RunFailure) {
    eprintln!("error: run of {model:?} failed ({}): {}", f.kind, f.reason);
    if !f.stderr_tail.trim().is_empty() {
        eprintln!("--- end of the simulator's error output ---");
        eprintln!("{}", f.stderr_tail.trim_end());
        eprintln!("---");
    }
}

/// The metrics as one JSON object, in name order.
fn metrics_json(m: &Metrics) -> String {
    let map: serde_json::Map<String, serde_json::Value> = m
        .iter()
        .map(|(k, v)| {
            let value = serde_json::Number::from_f64(*v)
                .map(serde_json::Value::Number)
                .unwrap_or(serde_json::Value::Null);
            (k.clone(), value)
        })
        .collect();
    serde_json::Value::Object(map).to_string()
}

/// Six significant digits (trailing zeros dropped).
fn format_value(v: f64) -> String {
    tessera_models::text::significant(v, 6)
}

/// An aligned table: metric, value, unit (and the meaning for built-ins).
fn metrics_table(m: &Metrics, info: Option<&ModelInfo>) -> String {
    let rows: Vec<[String; 4]> = m
        .iter()
        .map(|(k, v)| {
            let mi = info.and_then(|i| i.metric(k));
            [
                k.clone(),
                format_value(*v),
                mi.map(|x| x.unit.to_string()).unwrap_or_default(),
                mi.map(|x| x.description.to_string()).unwrap_or_default(),
            ]
        })
        .collect();
    let header = [
        "metric".to_string(),
        "value".to_string(),
        "unit".to_string(),
        if info.is_some() {
            "meaning".to_string()
        } else {
            String::new()
        },
    ];
    let w0 = rows
        .iter()
        .map(|r| r[0].len())
        .chain([6])
        .max()
        .unwrap_or(6);
    let w1 = rows
        .iter()
        .map(|r| r[1].len())
        .chain([5])
        .max()
        .unwrap_or(5);
    let w2 = rows
        .iter()
        .map(|r| r[2].chars().count())
        .chain([4])
        .max()
        .unwrap_or(4);
    let mut s = String::new();
    for r in std::iter::once(&header).chain(rows.iter()) {
        let line = format!("{:w0$}  {:>w1$}  {:w2$}  {}", r[0], r[1], r[2], r[3]);
        let _ = writeln!(s, "{}", line.trim_end());
    }
    s
}

/// What a built-in model takes and reports.
fn describe(info: &ModelInfo) -> String {
    let mut s = format!(
        "{}: {}\n\nInputs (NAME=VALUE):\n",
        info.name, info.description
    );
    let rows: Vec<[String; 4]> = info
        .inputs
        .iter()
        .map(|i| {
            [
                i.name.to_string(),
                format_value(i.default),
                i.unit.to_string(),
                format!(
                    "[{}, {}]{}",
                    format_value(i.lo),
                    format_value(i.hi),
                    if i.integer { " whole numbers" } else { "" }
                ),
            ]
        })
        .collect();
    let header = ["name", "default", "unit", "range"].map(String::from);
    let width = |k: usize| {
        rows.iter()
            .chain([&header])
            .map(|r| r[k].chars().count())
            .max()
            .unwrap_or(0)
    };
    let (w0, w1, w2) = (width(0), width(1), width(2));
    let _ = writeln!(
        s,
        "  {:w0$}  {:>w1$}  {:w2$}  {}",
        header[0], header[1], header[2], header[3]
    );
    for (r, i) in rows.iter().zip(&info.inputs) {
        let _ = writeln!(s, "  {:w0$}  {:>w1$}  {:w2$}  {}", r[0], r[1], r[2], r[3]);
        let _ = writeln!(s, "      {}", i.description);
    }
    s.push_str("\nMetrics:\n");
    let w = info.metrics.iter().map(|m| m.name.len()).max().unwrap_or(0);
    let wu = info.metrics.iter().map(|m| m.unit.len()).max().unwrap_or(0);
    for m in &info.metrics {
        let _ = writeln!(s, "  {:w$}  {:wu$}  {}", m.name, m.unit, m.description);
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_split_into_numbers_and_text() {
        let v =
            parse_values(&["a=1.5".into(), "mode=fast".into(), "b=-2e-3".into()]).expect("valid");
        assert_eq!(v.numbers["a"], 1.5);
        assert_eq!(v.numbers["b"], -0.002);
        assert_eq!(v.texts["mode"], "fast");
        assert!(parse_values(&["a".into()]).is_err());
        assert!(parse_values(&["a=1".into(), "a=2".into()]).is_err());
    }
}
