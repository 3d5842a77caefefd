//! `tessera init` (placeholder until implemented).

use std::process::ExitCode;

/// Arguments of `tessera init`.
#[derive(clap::Args, Debug)]
pub struct InitArgs {}

/// Runs `tessera init`.
pub fn run(_args: InitArgs) -> anyhow::Result<ExitCode> {
    anyhow::bail!("tessera init is not implemented yet")
}
