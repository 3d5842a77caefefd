//! `tessera export` (placeholder until implemented).

use std::process::ExitCode;

/// Arguments of `tessera export`.
#[derive(clap::Args, Debug)]
pub struct ExportArgs {}

/// Runs `tessera export`.
pub fn run(_args: ExportArgs) -> anyhow::Result<ExitCode> {
    anyhow::bail!("tessera export is not implemented yet")
}
