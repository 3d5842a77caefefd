//! `tessera check` (placeholder until implemented).

use std::process::ExitCode;

/// Arguments of `tessera check`.
#[derive(clap::Args, Debug)]
pub struct CheckArgs {}

/// Runs `tessera check`.
pub fn run(_args: CheckArgs) -> anyhow::Result<ExitCode> {
    anyhow::bail!("tessera check is not implemented yet")
}
