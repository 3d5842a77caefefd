//! The `tessera` command line: argument parsing and wiring only.
//!
//! Each subcommand lives in `src/cmd/<name>.rs` with its own clap `Args`
//! struct and a `run` function; the logic lives in the library crates.

use clap::{Parser, Subcommand};
use std::process::ExitCode;

mod cmd;

/// Distributed parameter sweeps and Gaussian-process surrogates for
/// stochastic simulations of tissue formation.
///
/// Typical night: `tessera init` writes a sweep file; `tessera run sweep.toml`
/// runs it on this machine (or `tessera serve` plus `tessera worker` on many);
/// next morning `tessera status`, `tessera predict` and `tessera export` read
/// the results.
#[derive(Parser, Debug)]
#[command(name = "tessera", version, about, long_about, after_help = cmd::EXAMPLES)]
struct Cli {
    /// How much to log on stderr: error, warn, info, debug or trace
    /// [default: info for serve and worker, warn otherwise].
    #[arg(
        long,
        global = true,
        value_name = "LEVEL",
        help_heading = "Global options",
        display_order = 1000
    )]
    log_level: Option<String>,
    /// Log format on stderr: text (for people) or json (for log collectors).
    #[arg(
        long,
        global = true,
        default_value = "text",
        value_name = "FORMAT",
        help_heading = "Global options",
        display_order = 1001
    )]
    log_format: cmd::LogFormat,
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Run the whole job on an invented example, with no setup, and write its report.
    Demo(cmd::demo::DemoArgs),
    /// Write a commented starter sweep file.
    Init(cmd::init::InitArgs),
    /// Validate a sweep file and show its parameters (and, with --design, the initial design).
    Check(cmd::check::CheckArgs),
    /// Run one simulation and print its metrics.
    Simulate(cmd::simulate::SimulateArgs),
    /// Run a whole sweep on this machine (coordinator and workers in one process).
    Run(cmd::run::RunArgs),
    /// Start a coordinator for workers on other machines.
    Serve(cmd::serve::ServeArgs),
    /// Run simulations for a coordinator until told to stop.
    Worker(cmd::worker::WorkerArgs),
    /// Show how far a sweep has got.
    Status(cmd::status::StatusArgs),
    /// Predict metrics, with uncertainty, at parameter values you choose.
    Predict(cmd::predict::PredictArgs),
    /// Check how far each surrogate can be trusted (leave-one-out errors and a verdict).
    CheckFit(cmd::check_fit::CheckFitArgs),
    /// Plot how a metric moves with one parameter (a curve) or two (a map), with its uncertainty.
    Trend(cmd::trend::TrendArgs),
    /// Which constants matter for each metric (Sobol indices on the surrogates).
    Sensitivity(cmd::sensitivity::SensitivityArgs),
    /// Write one HTML page about a sweep, with its plots, to show the lab.
    Report(cmd::report::ReportArgs),
    /// Find the constants that match the measured targets, and what the targets pin down.
    Calibrate(cmd::calibrate::CalibrateArgs),
    /// Write every evaluation in a sweep database as CSV or JSON lines.
    Export(cmd::export::ExportArgs),
    /// Run one external simulator under supervision (used by workers).
    #[command(hide = true)]
    Guard(cmd::guard::GuardArgs),
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    // Long-running services say what they do; one-shot commands stay quiet.
    let level = cli.log_level.clone().unwrap_or_else(|| match cli.command {
        Command::Serve(_) | Command::Worker(_) => {
            "warn,tessera_coordinator=info,tessera_worker=info".to_string()
        }
        _ => "warn".to_string(),
    });
    if let Err(e) = cmd::init_logging(&level, cli.log_format) {
        eprintln!("error: {e:#}");
        return ExitCode::from(2);
    }
    let outcome = match cli.command {
        Command::Demo(a) => cmd::demo::run(a),
        Command::Init(a) => cmd::init::run(a),
        Command::Check(a) => cmd::check::run(a),
        Command::Simulate(a) => cmd::simulate::run(a),
        Command::Run(a) => cmd::run::run(a),
        Command::Serve(a) => cmd::serve::run(a),
        Command::Worker(a) => cmd::worker::run(a),
        Command::Status(a) => cmd::status::run(a),
        Command::Predict(a) => cmd::predict::run(a),
        Command::CheckFit(a) => cmd::check_fit::run(a),
        Command::Trend(a) => cmd::trend::run(a),
        Command::Sensitivity(a) => cmd::sensitivity::run(a),
        Command::Calibrate(a) => cmd::calibrate::run(a),
        Command::Report(a) => cmd::report::run(a),
        Command::Export(a) => cmd::export::run(a),
        Command::Guard(a) => cmd::guard::run(a),
    };
    match outcome {
        Ok(code) => code,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::from(1)
        }
    }
}
