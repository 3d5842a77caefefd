//! One module per subcommand. Shared pieces: logging setup and the examples
//! printed under `tessera --help`.

use anyhow::Context;

pub mod calibrate;
pub mod check;
pub mod check_fit;
pub mod demo;
pub mod export;
pub mod guard;
pub mod init;
pub mod net;
pub mod predict;
pub mod report;
pub mod run;
pub mod sensitivity;
pub mod serve;
pub mod simulate;
pub mod status;
pub mod trend;
pub mod worker;

/// Examples shown at the end of `tessera --help`.
pub const EXAMPLES: &str = "\
Examples:
  tessera demo                         an invented example end to end, with its report
  tessera init                         write sweep.toml for the built-in tiling model
  tessera check sweep.toml --design    validate it and print the initial design as CSV
  tessera simulate tiling --json       one run of the built-in model
  tessera run sweep.toml               run the whole sweep on this machine
  tessera serve sweep.toml --db sweep.db --listen 0.0.0.0:7300 --token-file lab.token
  tessera worker --coordinator http://HOST:7300 --token-file lab.token
  tessera status --db sweep.db         progress and the best point so far
  tessera trend --db sweep.db height_sd --metric territory_cv
                                       a metric against a parameter, as a plot
  tessera export --db sweep.db         every evaluation as CSV";

/// Log output format.
#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum LogFormat {
    /// Human-readable lines.
    Text,
    /// One JSON object per line.
    Json,
}

/// Whether to colour what goes to stderr: only on a terminal, and never
/// when `NO_COLOR` is set to anything non-empty (no-color.org).
pub fn colour_stderr() -> bool {
    use std::io::IsTerminal;
    std::io::stderr().is_terminal() && std::env::var_os("NO_COLOR").is_none_or(|v| v.is_empty())
}

/// Sets up `tracing` to log to stderr at `level` (results go to stdout).
pub fn init_logging(level: &str, format: LogFormat) -> anyhow::Result<()> {
    let filter = tracing_subscriber::EnvFilter::try_new(level).with_context(|| {
        format!("--log-level {level:?} is not valid: use error, warn, info, debug or trace")
    })?;
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(colour_stderr())
        .with_writer(std::io::stderr);
    match format {
        LogFormat::Text => builder.init(),
        LogFormat::Json => builder.json().init(),
    }
    Ok(())
}

/// A name made safe for a file name: letters, digits, `-`, `_` and `.`
/// kept, anything else (spaces, slashes) becomes `-`.
pub fn file_word(name: &str) -> String {
    name.chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.') {
                c
            } else {
                '-'
            }
        })
        .collect()
}
