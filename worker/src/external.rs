//! The runner for operator-configured external simulators (being written).

use std::path::PathBuf;

use tokio_util::sync::CancellationToken;

use crate::runner::{FailureKind, Metrics, RunFailure, RunRequest};

/// One operator-configured command.
#[derive(Clone, Debug)]
pub struct ExternalCommand {
    name: String,
    words: Vec<String>,
    workdir_root: PathBuf,
    keep_workdirs: bool,
}

impl ExternalCommand {
    /// A command serving model `name`.
    pub fn new(
        name: String,
        words: Vec<String>,
        workdir_root: PathBuf,
        keep_workdirs: bool,
    ) -> Self {
        ExternalCommand {
            name,
            words,
            workdir_root,
            keep_workdirs,
        }
    }

    /// Runs the command once for `req`.
    pub async fn run(
        &self,
        _req: &RunRequest,
        _cancel: &CancellationToken,
    ) -> Result<Metrics, RunFailure> {
        let _ = (
            &self.name,
            &self.words,
            &self.workdir_root,
            self.keep_workdirs,
        );
        Err(RunFailure::new(
            FailureKind::Spawn,
            "external commands are not supported yet",
        ))
    }
}
