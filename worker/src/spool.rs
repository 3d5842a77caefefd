//! The spool: results a worker finished but the coordinator has not yet
//! acknowledged, kept in a small JSON-lines file so a worker restart does
//! not lose them either.
//!
//! The file is rewritten whole (write to a temporary file, then rename) each
//! time the set changes, so it is never half-written. It survives a killed
//! process; after a power loss the last rewrite may be missing, which loses
//! no acknowledged result: an unacknowledged evaluation is handed out again
//! when its lease expires.

use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// What a finished run produced: metrics, or a failure. Never both.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RunOutcome {
    /// The run reported these metrics.
    Metrics(BTreeMap<String, f64>),
    /// The run failed.
    Failure {
        /// Failure kind (`exit`, `timeout`, ...).
        kind: String,
        /// What went wrong, in words.
        reason: String,
        /// The end of the simulator's stderr.
        stderr_tail: String,
    },
}

/// One finished run waiting for acknowledgement.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Spooled {
    /// Lease it ran under.
    pub lease_id: String,
    /// Evaluation id.
    pub evaluation_id: u64,
    /// Attempt number.
    pub attempt: u32,
    /// Start time, Unix ms.
    pub started_unix_ms: u64,
    /// End time, Unix ms.
    pub ended_unix_ms: u64,
    /// Metrics or failure.
    pub outcome: RunOutcome,
}

/// The line layout of spool files written before [`RunOutcome`] existed
/// (metrics and failure side by side), still read so that a worker upgraded
/// with results in its spool delivers them.
#[derive(Deserialize)]
struct EarlierLine {
    lease_id: String,
    evaluation_id: u64,
    attempt: u32,
    started_unix_ms: u64,
    ended_unix_ms: u64,
    metrics: Option<BTreeMap<String, f64>>,
    failure: Option<(String, String, String)>,
}

impl EarlierLine {
    fn upgrade(self) -> Option<Spooled> {
        let outcome = match (self.metrics, self.failure) {
            (Some(m), None) => RunOutcome::Metrics(m),
            (None, Some((kind, reason, stderr_tail))) => RunOutcome::Failure {
                kind,
                reason,
                stderr_tail,
            },
            _ => return None,
        };
        Some(Spooled {
            lease_id: self.lease_id,
            evaluation_id: self.evaluation_id,
            attempt: self.attempt,
            started_unix_ms: self.started_unix_ms,
            ended_unix_ms: self.ended_unix_ms,
            outcome,
        })
    }
}

/// Parses one spool line, in the current or the earlier layout.
fn parse_line(line: &str) -> Result<Spooled, String> {
    match serde_json::from_str::<Spooled>(line) {
        Ok(s) => Ok(s),
        Err(e) => serde_json::from_str::<EarlierLine>(line)
            .ok()
            .and_then(EarlierLine::upgrade)
            .ok_or_else(|| e.to_string()),
    }
}

/// Where the spool lives (or nowhere: results are kept in memory only).
#[derive(Clone, Debug)]
pub struct Spool {
    path: Option<PathBuf>,
}

/// The spool file could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum SpoolError {
    /// Reading or writing failed.
    #[error("spool file {path}: {source}")]
    Io {
        /// The file.
        path: String,
        /// The error.
        source: std::io::Error,
    },
    /// A line is not a spooled result.
    #[error("spool file {path}, line {line}: {message}; move the file away to start without it")]
    Corrupt {
        /// The file.
        path: String,
        /// 1-based line number.
        line: usize,
        /// What is wrong.
        message: String,
    },
}

impl Spool {
    /// A spool in `path` (created when first needed), or none.
    pub fn new(path: Option<PathBuf>) -> Self {
        Spool { path }
    }

    /// The file, if any.
    pub fn path(&self) -> Option<&Path> {
        self.path.as_deref()
    }

    /// Reads what an earlier run of this worker left undelivered.
    pub fn load(&self) -> Result<Vec<Spooled>, SpoolError> {
        let Some(path) = &self.path else {
            return Ok(Vec::new());
        };
        let text = match std::fs::read_to_string(path) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
            Err(source) => {
                return Err(SpoolError::Io {
                    path: path.display().to_string(),
                    source,
                })
            }
        };
        let mut out = Vec::new();
        for (i, line) in text.lines().enumerate() {
            if line.trim().is_empty() {
                continue;
            }
            let s = parse_line(line).map_err(|message| SpoolError::Corrupt {
                path: path.display().to_string(),
                line: i + 1,
                message,
            })?;
            out.push(s);
        }
        Ok(out)
    }

    /// Replaces the spool with `items` (removes the file when empty).
    pub fn save(&self, items: &[Spooled]) -> Result<(), SpoolError> {
        let Some(path) = &self.path else {
            return Ok(());
        };
        let io = |source| SpoolError::Io {
            path: path.display().to_string(),
            source,
        };
        if items.is_empty() {
            return match std::fs::remove_file(path) {
                Ok(()) => Ok(()),
                Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(()),
                Err(e) => Err(io(e)),
            };
        }
        if let Some(dir) = path.parent() {
            if !dir.as_os_str().is_empty() {
                std::fs::create_dir_all(dir).map_err(io)?;
            }
        }
        let mut text = String::new();
        for it in items {
            // Serialising plain data cannot fail.
            text.push_str(&serde_json::to_string(it).unwrap_or_default());
            text.push('\n');
        }
        let tmp = path.with_extension("tmp");
        std::fs::write(&tmp, text).map_err(io)?;
        std::fs::rename(&tmp, path).map_err(io)?;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn item(id: u64) -> Spooled {
        Spooled {
            lease_id: format!("{id}.x.1"),
            evaluation_id: id,
            attempt: 1,
            started_unix_ms: 1,
            ended_unix_ms: 2,
            outcome: RunOutcome::Metrics(BTreeMap::from([("value".to_string(), 0.5)])),
        }
    }

    #[test]
    fn save_then_load_round_trips_and_empty_removes_the_file() {
        let dir = tempfile::tempdir().expect("temp dir");
        let spool = Spool::new(Some(dir.path().join("s").join("spool.jsonl")));
        spool.save(&[item(1), item(2)]).expect("save");
        assert_eq!(spool.load().expect("load"), vec![item(1), item(2)]);
        spool.save(&[]).expect("save empty");
        assert!(!dir.path().join("s").join("spool.jsonl").exists());
        assert!(spool.load().expect("load").is_empty());
    }

    #[test]
    fn earlier_layout_is_still_read() {
        let line = r#"{"lease_id":"7.x.1","evaluation_id":7,"attempt":1,"started_unix_ms":1,"ended_unix_ms":2,"metrics":null,"failure":["exit","code 3","oops"]}"#;
        let s = parse_line(line).expect("earlier layout");
        assert_eq!(
            s.outcome,
            RunOutcome::Failure {
                kind: "exit".into(),
                reason: "code 3".into(),
                stderr_tail: "oops".into()
            }
        );
        let both = line.replace("\"metrics\":null", "\"metrics\":{\"a\":1.0}");
        assert!(parse_line(&both).is_err(), "metrics and failure together");
    }

    #[test]
    fn values_come_back_bit_for_bit() {
        let dir = tempfile::tempdir().expect("temp dir");
        let spool = Spool::new(Some(dir.path().join("spool.jsonl")));
        let hard = [
            25854.295647428462,
            5e-324,
            2.2250738585072014e-308,
            1e308,
            0.1 + 0.2,
            -0.0,
        ];
        let mut it = item(1);
        it.outcome = RunOutcome::Metrics(
            hard.iter()
                .enumerate()
                .map(|(i, v)| (format!("m{i}"), *v))
                .collect(),
        );
        spool.save(std::slice::from_ref(&it)).expect("save");
        let back = spool.load().expect("load");
        let RunOutcome::Metrics(m) = &back[0].outcome else {
            panic!("metrics expected")
        };
        for (i, v) in hard.iter().enumerate() {
            assert_eq!(m[&format!("m{i}")].to_bits(), v.to_bits(), "{v:e}");
        }
    }

    #[test]
    fn corrupt_line_is_reported_with_its_number() {
        let dir = tempfile::tempdir().expect("temp dir");
        let path = dir.path().join("spool.jsonl");
        let good = serde_json::to_string(&item(1)).expect("json");
        std::fs::write(&path, format!("{good}\nnot json\n")).expect("write");
        let err = Spool::new(Some(path)).load().expect_err("corrupt");
        assert!(err.to_string().contains("line 2"), "{err}");
    }
}
