//! `tessera guard -- COMMAND...`: one external run under the guard
//! (`tessera_worker::guard`), which kills whatever the run leaves behind
//! and dies with its worker. Workers start it; people need not.

use std::process::ExitCode;

/// Arguments of `tessera guard`.
#[derive(clap::Args, Debug)]
pub struct GuardArgs {
    /// The command and its arguments.
    #[arg(trailing_var_arg = true, allow_hyphen_values = true, required = true)]
    pub command: Vec<String>,
}

/// The words that put a run under the guard: this very binary, on Linux
/// (elsewhere the run is started directly and only its process group is
/// cleaned up).
pub fn words() -> Vec<String> {
    if !cfg!(target_os = "linux") {
        return Vec::new();
    }
    match std::env::current_exe() {
        Ok(exe) => vec![exe.display().to_string(), "guard".into(), "--".into()],
        Err(e) => {
            tracing::warn!(error = %e, "cannot find this program's path; external runs are not guarded");
            Vec::new()
        }
    }
}

/// Runs `tessera guard`.
pub fn run(args: GuardArgs) -> anyhow::Result<ExitCode> {
    let code = tessera_worker::guard::run(&args.command);
    Ok(ExitCode::from(u8::try_from(code).unwrap_or(255)))
}
