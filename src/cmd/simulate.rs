//! `tessera simulate` (placeholder until implemented).

use std::process::ExitCode;

/// Arguments of `tessera simulate`.
#[derive(clap::Args, Debug)]
pub struct SimulateArgs {}

/// Runs `tessera simulate`.
pub fn run(_args: SimulateArgs) -> anyhow::Result<ExitCode> {
    anyhow::bail!("tessera simulate is not implemented yet")
}
