//! The sweep database: one SQLite file per sweep.
//!
//! The file holds the sweep file's own text (so a database describes itself),
//! the points, one row per (point, replicate) evaluation, and the surrogate
//! fits. It is opened in WAL mode with `synchronous = FULL`, so a result is on
//! disk when [`Store::commit_outcomes`] returns: the coordinator acknowledges
//! a result to a worker only after that. Readers (`tessera export`,
//! `tessera status`) can open the file while a coordinator writes to it.
//!
//! The schema is versioned (see `schema.rs`): an older database is migrated
//! on open, a newer one is refused with a message naming both versions, and a
//! file that is not a tessera database is refused without being touched.

mod schema;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use rusqlite::{params, Connection, OpenFlags, OptionalExtension, Row};

use crate::seed::replicate_seed;
pub use schema::SCHEMA_VERSION;

/// How long a writer waits for another connection's lock before giving up.
const BUSY_TIMEOUT: Duration = Duration::from_secs(10);

/// What can go wrong with the sweep database.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// A query on a path with no file.
    #[error("no sweep database at {path}; start the sweep first (tessera run or tessera serve) or check the path")]
    Missing {
        /// The path given.
        path: PathBuf,
    },
    /// A directory was given as the database.
    #[error("{path} is a directory, not a sweep database; give the .db file (tessera run writes SWEEP.db next to SWEEP.toml)")]
    IsDirectory {
        /// The path given.
        path: PathBuf,
    },
    /// An empty file was given to a query.
    #[error("{path} is an empty file, not a sweep database; it was left untouched (was the sweep started with another --db?)")]
    Empty {
        /// The path given.
        path: PathBuf,
    },
    /// A writer cannot write the database (read-only file, directory or leftover files).
    #[error("cannot store results in {path}: {reason}. Nothing was run")]
    NotWritable {
        /// The database path.
        path: PathBuf,
        /// What is not writable and what to do.
        reason: String,
    },
    /// Another coordinator holds the database.
    #[error("{path} is in use by another coordinator: {holder}. One coordinator serves a database at a time; stop that one first, or give this one another --db")]
    Held {
        /// The database path.
        path: PathBuf,
        /// Who holds it, in words (host, process, since when, last heard).
        holder: String,
    },
    /// This coordinator no longer holds the database (another took it over).
    #[error("this coordinator lost {path} to another coordinator ({holder}); it stops handing out work and stores nothing more")]
    Lost {
        /// The database path.
        path: PathBuf,
        /// Who holds it now, in words.
        holder: String,
    },
    /// The file exists but is not an SQLite database.
    #[error("{path} is not a tessera sweep database (not an SQLite file); it was left untouched")]
    NotADatabase {
        /// The path given.
        path: PathBuf,
    },
    /// An SQLite database written by some other program.
    #[error("{path} is an SQLite database of some other program, not a tessera sweep database; it was left untouched")]
    Foreign {
        /// The path given.
        path: PathBuf,
    },
    /// Written by a newer tessera whose schema this build does not know.
    #[error("{path} was written by a newer tessera ({written_by}, schema version {found}); this tessera {ours} reads schema versions up to {supported}: upgrade tessera to open it")]
    NewerSchema {
        /// The path given.
        path: PathBuf,
        /// The file's schema version.
        found: i64,
        /// The newest version this build knows.
        supported: i64,
        /// The tessera version recorded in the file, if any.
        written_by: String,
        /// This build's version.
        ours: &'static str,
    },
    /// The file does not keep a write-ahead log (for example on a network file system).
    #[error("{path}: SQLite could not switch to WAL mode (got {mode:?}); keep the database on a local disk")]
    NoWal {
        /// The path given.
        path: PathBuf,
        /// The journal mode SQLite reported.
        mode: String,
    },
    /// `create_sweep` on a database that already holds one.
    #[error("this database already holds the sweep {name:?}; one database holds one sweep: use another --db file")]
    SweepExists {
        /// Name of the stored sweep.
        name: String,
    },
    /// A row that cannot be read back (edited by hand, or damaged).
    #[error("damaged row in the sweep database: {0}")]
    Damaged(String),
    /// Any other SQLite error. Its text is part of the message (not a
    /// separate `source`), so error chains do not print it twice.
    #[error("sweep database error: {0}")]
    Sqlite(rusqlite::Error),
    /// An SQLite error or a damaged row, with the file it happened in.
    #[error("sweep database {path}: {message}")]
    At {
        /// The database path.
        path: PathBuf,
        /// What went wrong.
        message: String,
    },
}

impl StoreError {
    /// Names the file in errors that do not already name it.
    pub fn at(self, path: &Path) -> StoreError {
        match self {
            StoreError::Sqlite(e) => StoreError::At {
                path: path.to_path_buf(),
                message: e.to_string(),
            },
            StoreError::Damaged(m) => StoreError::At {
                path: path.to_path_buf(),
                message: format!("damaged row: {m}"),
            },
            other => other,
        }
    }
}

/// Who holds a database: the coordinator allowed to write it.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Holder {
    /// Random id of the holding coordinator (new at every start).
    pub nonce: String,
    /// Host name it runs on.
    pub host: String,
    /// Its process id.
    pub pid: u32,
    /// When it took the database (ms since the Unix epoch).
    pub since_unix_ms: u64,
    /// Its last heartbeat (ms since the Unix epoch).
    pub beat_unix_ms: u64,
}

impl Holder {
    /// "host lab-3, process 4242, since 2026-12-02 14:01:07 UTC, last heard 2 s ago".
    pub fn describe(&self, now_ms: u64) -> String {
        let since = humantime::format_rfc3339_seconds(
            UNIX_EPOCH + Duration::from_millis(self.since_unix_ms),
        );
        format!(
            "host {}, process {}, since {since}, last heard {} s ago",
            self.host,
            self.pid,
            now_ms.saturating_sub(self.beat_unix_ms) / 1000
        )
    }
}

/// A holder not heard from for this long has stopped (crashed, killed or
/// stalled) and may be replaced. Holders beat every [`HOLDER_BEAT`].
pub const HOLDER_STALE: Duration = Duration::from_secs(15);
/// How often the holder writes its heartbeat (commits count as beats too).
pub const HOLDER_BEAT: Duration = Duration::from_secs(3);

impl From<rusqlite::Error> for StoreError {
    fn from(e: rusqlite::Error) -> Self {
        StoreError::Sqlite(e)
    }
}

/// The one sweep stored in a database.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct SweepRecord {
    /// Row id.
    pub id: i64,
    /// The sweep's name.
    pub name: String,
    /// The sweep file's text, exactly as given.
    pub spec_text: String,
    /// The sweep file's name as given (for messages).
    pub spec_file: String,
    /// The sweep seed.
    pub seed: u64,
    /// When the sweep was created (ms since the Unix epoch).
    pub created_unix_ms: u64,
}

/// Why a point was added.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum PointOrigin {
    /// Part of the initial space-filling design.
    Design,
    /// Proposed by expected improvement.
    Improve,
    /// Proposed where the surrogate is least certain.
    Explore,
    /// Proposed inside the region the targets have not ruled out.
    Calibrate,
}

impl PointOrigin {
    /// The word stored in the database and shown in exports.
    pub fn as_str(self) -> &'static str {
        match self {
            PointOrigin::Design => "design",
            PointOrigin::Improve => "improve",
            PointOrigin::Explore => "explore",
            PointOrigin::Calibrate => "calibrate",
        }
    }

    fn parse(s: &str) -> Result<Self, StoreError> {
        match s {
            "design" => Ok(PointOrigin::Design),
            "improve" => Ok(PointOrigin::Improve),
            "explore" => Ok(PointOrigin::Explore),
            "calibrate" => Ok(PointOrigin::Calibrate),
            other => Err(StoreError::Damaged(format!(
                "unknown point origin {other:?}"
            ))),
        }
    }
}

/// What the planner believed about a point it proposed.
#[derive(Clone, Debug, PartialEq)]
pub struct ProposalInfo {
    /// The acquisition value that chose it.
    pub acquisition: f64,
    /// The objective's predicted mean there (in the sweep file's sign).
    pub predicted_mean: f64,
    /// Its predictive sd.
    pub predicted_sd: f64,
    /// Which surrogate made the proposal, in words (metric, results, round).
    pub surrogate: String,
}

/// A point to add.
#[derive(Clone, Debug, PartialEq)]
pub struct NewPoint {
    /// Parameter values in natural units, in the sweep file's parameter order.
    pub values: Vec<f64>,
    /// Why it is added.
    pub origin: PointOrigin,
    /// Planning round that proposed it (0 for the initial design).
    pub batch: u32,
    /// What the planner believed there (none for the initial design).
    pub proposal: Option<ProposalInfo>,
}

/// A stored point.
#[derive(Clone, Debug, PartialEq)]
pub struct PointRecord {
    /// Row id.
    pub id: i64,
    /// Index within the sweep, from 0 in order of insertion (used for replicate seeds).
    pub idx: u64,
    /// Parameter values in natural units, in the sweep file's parameter order.
    pub values: Vec<f64>,
    /// Why it was added.
    pub origin: PointOrigin,
    /// Planning round that proposed it (0 for the initial design).
    pub batch: u32,
    /// What the planner believed there (none for the initial design, and
    /// in databases written before proposals were stored).
    pub proposal: Option<ProposalInfo>,
}

/// State of one (point, replicate) evaluation.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum EvalStatus {
    /// Waiting for a result (possibly leased to a worker right now).
    Queued,
    /// A result is stored.
    Done,
    /// Failed on its last allowed attempt.
    Failed,
}

impl EvalStatus {
    /// The word stored in the database and shown in exports.
    pub fn as_str(self) -> &'static str {
        match self {
            EvalStatus::Queued => "queued",
            EvalStatus::Done => "done",
            EvalStatus::Failed => "failed",
        }
    }

    fn parse(s: &str) -> Result<Self, StoreError> {
        match s {
            "queued" => Ok(EvalStatus::Queued),
            "done" => Ok(EvalStatus::Done),
            "failed" => Ok(EvalStatus::Failed),
            other => Err(StoreError::Damaged(format!(
                "unknown evaluation status {other:?}"
            ))),
        }
    }
}

/// A stored evaluation.
#[derive(Clone, Debug, PartialEq)]
pub struct EvaluationRecord {
    /// Row id (what leases and results refer to).
    pub id: i64,
    /// The point's row id.
    pub point_id: i64,
    /// The point's index within the sweep.
    pub point_idx: u64,
    /// Replicate number, from 0.
    pub replicate: u32,
    /// The run's seed (derived with [`crate::seed::replicate_seed`]).
    pub seed: u64,
    /// Queued, done or failed.
    pub status: EvalStatus,
    /// Results reported so far (failed attempts plus the successful one).
    pub attempts: u32,
    /// Worker that reported the latest result.
    pub worker: Option<String>,
    /// When the latest reported run started (ms since the Unix epoch).
    pub started_unix_ms: Option<u64>,
    /// When the latest reported run ended (ms since the Unix epoch).
    pub ended_unix_ms: Option<u64>,
    /// The metrics of the successful run (empty until done). Non-finite
    /// values reported by a model are stored as missing.
    pub metrics: BTreeMap<String, f64>,
    /// Kind of the latest failure (`exit`, `timeout`, ...), if any attempt failed.
    pub failure_kind: Option<String>,
    /// What went wrong in the latest failure.
    pub failure_reason: Option<String>,
    /// End of the simulator's stderr in the latest failure.
    pub stderr_tail: Option<String>,
}

/// One result reported by a worker.
#[derive(Clone, Debug, PartialEq)]
pub struct Outcome {
    /// The evaluation the result is for.
    pub evaluation_id: i64,
    /// Name of the worker that ran it.
    pub worker: String,
    /// When the run started (ms since the Unix epoch).
    pub started_unix_ms: u64,
    /// When the run ended (ms since the Unix epoch).
    pub ended_unix_ms: u64,
    /// Metrics or failure.
    pub result: OutcomeResult,
}

/// What a run produced.
#[derive(Clone, Debug, PartialEq)]
pub enum OutcomeResult {
    /// The run finished with these metrics.
    Done(BTreeMap<String, f64>),
    /// The run failed.
    Failed {
        /// Short kind (`exit`, `timeout`, `crash`, ...).
        kind: String,
        /// What went wrong, in words.
        reason: String,
        /// End of the simulator's stderr.
        stderr_tail: String,
        /// No retries are left: the evaluation becomes `failed`.
        final_attempt: bool,
    },
}

/// What happened to one outcome in [`Store::commit_outcomes`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum CommitResult {
    /// Written.
    Stored,
    /// The evaluation already had its final result; this one was ignored.
    Duplicate,
    /// No evaluation with that id.
    Unknown,
}

/// A surrogate fit to store.
#[derive(Clone, Debug, PartialEq)]
pub struct NewFit {
    /// The metric (or objective) fitted.
    pub metric: String,
    /// Number of results the fit used.
    pub n_results: u32,
    /// Kernel name, e.g. `matern52`.
    pub kernel: String,
    /// Everything needed to predict again (hyperparameters, training data).
    pub model: serde_json::Value,
    /// Fit diagnostics (log marginal likelihood, leave-one-out errors, ...).
    pub diagnostics: serde_json::Value,
}

/// A stored surrogate fit.
#[derive(Clone, Debug, PartialEq)]
pub struct FitRecord {
    /// Row id.
    pub id: i64,
    /// The metric (or objective) fitted.
    pub metric: String,
    /// Number of results the fit used.
    pub n_results: u32,
    /// Kernel name.
    pub kernel: String,
    /// The stored model.
    pub model: serde_json::Value,
    /// The stored diagnostics.
    pub diagnostics: serde_json::Value,
    /// When it was stored (ms since the Unix epoch).
    pub created_unix_ms: u64,
}

/// An open sweep database.
#[derive(Debug)]
pub struct Store {
    conn: Connection,
    path: PathBuf,
    /// Our nonce once this store holds the database: every write then
    /// checks, in its own transaction, that we still do.
    holder: Option<String>,
}

fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

/// Seeds and times are u64 in Rust and INTEGER (i64) in SQLite: stored bit for bit.
fn to_sql_u64(x: u64) -> i64 {
    x as i64
}

fn from_sql_u64(x: i64) -> u64 {
    x as u64
}

fn is_not_a_database(e: &rusqlite::Error) -> bool {
    matches!(
        e.sqlite_error_code(),
        Some(rusqlite::ErrorCode::NotADatabase)
    )
}

/// `path` with `suffix` appended to its file name (`sweep.db-wal`).
fn sibling(path: &Path, suffix: &str) -> PathBuf {
    let mut name = path.as_os_str().to_os_string();
    name.push(suffix);
    PathBuf::from(name)
}

/// An SQLite `file:` URI for `path` with a query string, percent-encoding
/// the characters that URIs reserve.
fn file_uri(path: &Path, query: &str) -> String {
    let abs = std::path::absolute(path).unwrap_or_else(|_| path.to_path_buf());
    let mut out = String::from("file:");
    for b in abs.as_os_str().as_encoded_bytes() {
        match *b {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'/' | b'-' | b'_' | b'.' | b'~' => {
                out.push(char::from(*b))
            }
            other => out.push_str(&format!("%{other:02X}")),
        }
    }
    out.push('?');
    out.push_str(query);
    out
}

/// Whether this process may write `p` (the file's permission bits and, for
/// root, nothing at all: root may write anything but a read-only mount).
fn writable(p: &Path) -> bool {
    rustix::fs::access(p, rustix::fs::Access::WRITE_OK).is_ok()
}

/// A writer needs to write the database file, its directory (SQLite creates
/// `-wal` and `-shm` files there) and any `-wal`/`-shm` file already there.
fn check_writable(path: &Path) -> Result<(), StoreError> {
    let refuse = |reason: String| {
        Err(StoreError::NotWritable {
            path: path.to_path_buf(),
            reason,
        })
    };
    if path.is_dir() {
        return Err(StoreError::IsDirectory {
            path: path.to_path_buf(),
        });
    }
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    };
    if !dir.is_dir() {
        return refuse(format!(
            "its folder {} does not exist; create it first",
            dir.display()
        ));
    }
    if !writable(&dir) {
        return refuse(format!(
            "its folder {} is not writable by this user; SQLite must create files next to the database there. Use another --db, or copy the database somewhere writable to read it",
            dir.display()
        ));
    }
    if path.exists() && !writable(path) {
        return refuse("the file is read-only for this user".into());
    }
    for suffix in ["-wal", "-shm"] {
        let f = sibling(path, suffix);
        if f.exists() && !writable(&f) {
            return refuse(format!(
                "{} is not writable by this user (left by another user's process?); remove it when no tessera process uses the database",
                f.display()
            ));
        }
    }
    Ok(())
}

impl Store {
    /// Opens the database at `path` for writing, creating it if missing and
    /// migrating an older schema. Refuses at once, before anything runs, a
    /// file or directory this process cannot write (including `-wal` and
    /// `-shm` files left by another user).
    pub fn open(path: &Path) -> Result<Store, StoreError> {
        check_writable(path)?;
        let flags = OpenFlags::SQLITE_OPEN_READ_WRITE
            | OpenFlags::SQLITE_OPEN_CREATE
            | OpenFlags::SQLITE_OPEN_NO_MUTEX;
        let store = Self::open_with(path, flags)?;
        if store.conn.is_readonly(rusqlite::MAIN_DB).unwrap_or(true) {
            return Err(StoreError::NotWritable {
                path: path.to_path_buf(),
                reason: "SQLite opened it read-only (check the permissions of the file and its directory)".into(),
            });
        }
        Ok(store)
    }

    /// Opens an existing database for reading only: never creates,
    /// migrates or changes a file, and leaves no file behind. Works on
    /// read-only files and directories. While a writer has the file open
    /// (its `-wal` file exists) it reads through SQLite's read-only mode and
    /// sees every committed result; otherwise it opens the file as
    /// immutable, which takes no locks and creates no `-wal`/`-shm` files.
    pub fn open_read_only(path: &Path) -> Result<Store, StoreError> {
        let meta = std::fs::metadata(path).map_err(|_| StoreError::Missing {
            path: path.to_path_buf(),
        })?;
        if meta.is_dir() {
            return Err(StoreError::IsDirectory {
                path: path.to_path_buf(),
            });
        }
        if meta.len() == 0 {
            return Err(StoreError::Empty {
                path: path.to_path_buf(),
            });
        }
        let wal = sibling(path, "-wal");
        let immutable = !wal.exists();
        let uri = file_uri(path, if immutable { "immutable=1" } else { "mode=ro" });
        let flags = OpenFlags::SQLITE_OPEN_READ_ONLY
            | OpenFlags::SQLITE_OPEN_URI
            | OpenFlags::SQLITE_OPEN_NO_MUTEX;
        let conn = Connection::open_with_flags(&uri, flags).map_err(|e| StoreError::At {
            path: path.to_path_buf(),
            message: e.to_string(),
        })?;
        conn.busy_timeout(BUSY_TIMEOUT)
            .map_err(|e| StoreError::from(e).at(path))?;
        let mut store = Store {
            conn,
            path: path.to_path_buf(),
            holder: None,
        };
        match store.check_identity() {
            Ok(true) => Err(StoreError::Foreign {
                path: path.to_path_buf(),
            }),
            Ok(false) => Ok(store),
            Err(StoreError::Sqlite(ref e)) if is_not_a_database(e) => {
                Err(StoreError::NotADatabase {
                    path: path.to_path_buf(),
                })
            }
            Err(e) => Err(e.at(path)),
        }
    }

    fn open_with(path: &Path, flags: OpenFlags) -> Result<Store, StoreError> {
        // SQLite answers SQLITE_BUSY at once, without waiting, in a few lock
        // upgrades (switching a new file to WAL while another connection
        // reads it); opening is idempotent, so it is simply tried again.
        let started = std::time::Instant::now();
        loop {
            match Self::open_once(path, flags) {
                Err(StoreError::Sqlite(e))
                    if e.sqlite_error_code() == Some(rusqlite::ErrorCode::DatabaseBusy)
                        && started.elapsed() < BUSY_TIMEOUT =>
                {
                    std::thread::sleep(std::time::Duration::from_millis(20));
                }
                other => return other,
            }
        }
    }

    fn open_once(path: &Path, flags: OpenFlags) -> Result<Store, StoreError> {
        let conn = Connection::open_with_flags(path, flags)?;
        // Before anything touches the file: another process (a coordinator
        // creating the database, a `status` reading it) may hold a lock.
        conn.busy_timeout(BUSY_TIMEOUT)?;
        let mut store = Store {
            conn,
            path: path.to_path_buf(),
            holder: None,
        };
        store.check_identity().map_err(|e| match e {
            StoreError::Sqlite(ref s) if is_not_a_database(s) => StoreError::NotADatabase {
                path: path.to_path_buf(),
            },
            other => other,
        })?;

        let mode: String =
            store
                .conn
                .pragma_update_and_check(None, "journal_mode", "WAL", |r| r.get(0))?;
        if !mode.eq_ignore_ascii_case("wal") {
            return Err(StoreError::NoWal {
                path: path.to_path_buf(),
                mode,
            });
        }
        store.conn.pragma_update(None, "synchronous", "FULL")?;
        // Migrations rebuild tables, which foreign keys would forbid.
        store.migrate()?;
        store.conn.pragma_update(None, "foreign_keys", "ON")?;
        Ok(store)
    }

    /// Refuses files that are not tessera databases, or are from a newer
    /// schema. Returns true for a fresh (empty) database.
    fn check_identity(&mut self) -> Result<bool, StoreError> {
        // One read transaction: the three reads see the same state even if
        // another process is creating the schema right now.
        let tx = self.conn.transaction()?;
        let app: i32 = tx.pragma_query_value(None, "application_id", |r| r.get(0))?;
        let version: i64 = tx.pragma_query_value(None, "user_version", |r| r.get(0))?;
        let objects: i64 = tx.query_row("SELECT count(*) FROM sqlite_master", [], |r| r.get(0))?;
        tx.commit()?;
        let fresh = app == 0 && version == 0 && objects == 0;
        if !fresh && app != schema::APPLICATION_ID {
            return Err(StoreError::Foreign {
                path: self.path.clone(),
            });
        }
        if version > SCHEMA_VERSION {
            let written_by = self
                .conn
                .query_row("SELECT value FROM meta WHERE key = 'written_by'", [], |r| {
                    r.get::<_, String>(0)
                })
                .optional()
                .ok()
                .flatten()
                .unwrap_or_else(|| "unknown version".to_string());
            return Err(StoreError::NewerSchema {
                path: self.path.clone(),
                found: version,
                supported: SCHEMA_VERSION,
                written_by,
                ours: env!("CARGO_PKG_VERSION"),
            });
        }
        Ok(fresh)
    }

    /// Brings the schema to [`SCHEMA_VERSION`], one migration per transaction.
    fn migrate(&mut self) -> Result<(), StoreError> {
        let version: i64 = self
            .conn
            .pragma_query_value(None, "user_version", |r| r.get(0))?;
        for (i, sql) in schema::MIGRATIONS.iter().enumerate() {
            let target = i as i64 + 1;
            if version >= target {
                continue;
            }
            // IMMEDIATE: take the write lock first, then re-read the version,
            // so two processes opening a new file at once migrate it once.
            let tx = self
                .conn
                .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
            let now: i64 = tx.pragma_query_value(None, "user_version", |r| r.get(0))?;
            if now >= target {
                tx.commit()?;
                continue;
            }
            tx.execute_batch(sql)?;
            tx.pragma_update(None, "application_id", schema::APPLICATION_ID)?;
            tx.pragma_update(None, "user_version", target)?;
            tx.execute(
                "INSERT INTO meta (key, value) VALUES ('schema_version', ?1)
                 ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                params![target.to_string()],
            )?;
            tx.execute(
                "INSERT INTO meta (key, value) VALUES ('written_by', ?1)
                 ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                params![format!("tessera {}", env!("CARGO_PKG_VERSION"))],
            )?;
            tx.commit()?;
            tracing::debug!(path = %self.path.display(), version = target, "migrated sweep database");
        }
        Ok(())
    }

    /// Takes the database for the coordinator `nonce` on `host`, process
    /// `pid`, unless another coordinator holds it and is alive: heard from
    /// within [`HOLDER_STALE`] and, on this host, its process still exists.
    /// A stopped holder (killed, crashed) is replaced without manual clean-up.
    /// From now on every write of this store checks that it still holds the
    /// database.
    pub fn acquire(&mut self, nonce: &str, host: &str, pid: u32) -> Result<(), StoreError> {
        let now = now_ms();
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        let current = read_holder(&tx)?;
        if let Some(h) = &current {
            let heard = Duration::from_millis((now as u64).saturating_sub(h.beat_unix_ms));
            let alive_here = h.host != host || process_exists(h.pid);
            if h.nonce != nonce && heard < HOLDER_STALE && alive_here {
                return Err(StoreError::Held {
                    path: self.path.clone(),
                    holder: h.describe(now as u64),
                });
            }
            if h.nonce != nonce {
                tracing::warn!(db = %self.path.display(), previous = %h.describe(now as u64), "taking over the database from a coordinator that stopped");
            }
        }
        tx.execute(
            "INSERT INTO holder (id, nonce, host, pid, since_unix_ms, beat_unix_ms)
             VALUES (1, ?1, ?2, ?3, ?4, ?4)
             ON CONFLICT(id) DO UPDATE SET nonce = excluded.nonce, host = excluded.host,
                 pid = excluded.pid, since_unix_ms = excluded.since_unix_ms,
                 beat_unix_ms = excluded.beat_unix_ms",
            params![nonce, host, pid, now],
        )?;
        tx.commit()?;
        self.holder = Some(nonce.to_string());
        Ok(())
    }

    /// Writes this holder's heartbeat; [`StoreError::Lost`] if another
    /// coordinator has taken the database meanwhile.
    pub fn beat(&mut self) -> Result<(), StoreError> {
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        check_holder(self.holder.as_deref(), &self.path, &tx)?;
        tx.commit()?;
        Ok(())
    }

    /// Gives the database up (at a clean shutdown), so the next coordinator
    /// may start at once.
    pub fn release(&mut self) -> Result<(), StoreError> {
        if let Some(nonce) = self.holder.take() {
            self.conn.execute(
                "DELETE FROM holder WHERE id = 1 AND nonce = ?1",
                params![nonce],
            )?;
        }
        Ok(())
    }

    /// The coordinator holding this database, if any.
    pub fn holder(&self) -> Result<Option<Holder>, StoreError> {
        if !self.has_table("holder")? {
            return Ok(None);
        }
        read_holder(&self.conn)
    }

    fn has_table(&self, name: &str) -> Result<bool, StoreError> {
        Ok(self
            .conn
            .query_row(
                "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?1",
                params![name],
                |_| Ok(()),
            )
            .optional()?
            .is_some())
    }

    /// The file this store writes.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The schema version of the open file (always [`SCHEMA_VERSION`] after open).
    pub fn schema_version(&self) -> Result<i64, StoreError> {
        Ok(self
            .conn
            .pragma_query_value(None, "user_version", |r| r.get(0))?)
    }

    /// SQLite's journal mode for this connection (`"wal"` after open).
    pub fn journal_mode(&self) -> Result<String, StoreError> {
        Ok(self
            .conn
            .pragma_query_value(None, "journal_mode", |r| r.get(0))?)
    }

    /// The sweep in this database, if one was created.
    pub fn sweep(&self) -> Result<Option<SweepRecord>, StoreError> {
        self.sweep_unnamed().map_err(|e| e.at(&self.path))
    }

    fn sweep_unnamed(&self) -> Result<Option<SweepRecord>, StoreError> {
        Ok(self
            .conn
            .query_row(
                "SELECT id, name, spec_text, spec_file, seed, created_unix_ms
                 FROM sweeps ORDER BY id LIMIT 1",
                [],
                |r| {
                    Ok(SweepRecord {
                        id: r.get(0)?,
                        name: r.get(1)?,
                        spec_text: r.get(2)?,
                        spec_file: r.get(3)?,
                        seed: from_sql_u64(r.get(4)?),
                        created_unix_ms: from_sql_u64(r.get(5)?),
                    })
                },
            )
            .optional()?)
    }

    /// Stores the sweep; refuses if the database already holds one.
    pub fn create_sweep(
        &mut self,
        name: &str,
        spec_text: &str,
        spec_file: &str,
        seed: u64,
    ) -> Result<SweepRecord, StoreError> {
        let tx = self.conn.transaction()?;
        let existing: Option<String> = tx
            .query_row("SELECT name FROM sweeps LIMIT 1", [], |r| r.get(0))
            .optional()?;
        if let Some(name) = existing {
            return Err(StoreError::SweepExists { name });
        }
        let created = now_ms();
        tx.execute(
            "INSERT INTO sweeps (name, spec_text, spec_file, seed, created_unix_ms)
             VALUES (?1, ?2, ?3, ?4, ?5)",
            params![name, spec_text, spec_file, to_sql_u64(seed), created],
        )?;
        let id = tx.last_insert_rowid();
        tx.commit()?;
        Ok(SweepRecord {
            id,
            name: name.to_string(),
            spec_text: spec_text.to_string(),
            spec_file: spec_file.to_string(),
            seed,
            created_unix_ms: from_sql_u64(created),
        })
    }

    /// Adds points after the existing ones, each with `replicates` queued
    /// evaluations seeded by [`replicate_seed`]`(sweep_seed, idx, r)`, in one
    /// transaction. Returns the new points in order.
    pub fn insert_points(
        &mut self,
        sweep_id: i64,
        points: &[NewPoint],
        replicates: u32,
        sweep_seed: u64,
    ) -> Result<Vec<PointRecord>, StoreError> {
        let tx = self.conn.transaction()?;
        check_holder(self.holder.as_deref(), &self.path, &tx)?;
        let next: i64 = tx.query_row(
            "SELECT coalesce(max(idx) + 1, 0) FROM points WHERE sweep_id = ?1",
            params![sweep_id],
            |r| r.get(0),
        )?;
        let created = now_ms();
        let mut out = Vec::with_capacity(points.len());
        {
            let mut put_point = tx.prepare(
                "INSERT INTO points (sweep_id, idx, values_json, origin, batch, created_unix_ms,
                                     acquisition, predicted_mean, predicted_sd, surrogate)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10)",
            )?;
            let mut put_eval = tx.prepare(
                "INSERT INTO evaluations (point_id, replicate, seed, status, attempts)
                 VALUES (?1, ?2, ?3, 'queued', 0)",
            )?;
            for (k, p) in points.iter().enumerate() {
                if let Some(bad) = p.values.iter().find(|v| !v.is_finite()) {
                    return Err(StoreError::Damaged(format!(
                        "point values must be finite numbers, got {bad}"
                    )));
                }
                let idx = next + k as i64;
                let values_json = serde_json::to_string(&p.values)
                    .map_err(|e| StoreError::Damaged(format!("point values: {e}")))?;
                let info = p.proposal.as_ref();
                let finite = |x: f64| x.is_finite().then_some(x);
                put_point.execute(params![
                    sweep_id,
                    idx,
                    values_json,
                    p.origin.as_str(),
                    p.batch,
                    created,
                    info.and_then(|i| finite(i.acquisition)),
                    info.and_then(|i| finite(i.predicted_mean)),
                    info.and_then(|i| finite(i.predicted_sd)),
                    info.map(|i| i.surrogate.clone()),
                ])?;
                let point_id = tx.last_insert_rowid();
                for r in 0..replicates {
                    let seed = replicate_seed(sweep_seed, idx as u64, r);
                    put_eval.execute(params![point_id, r, to_sql_u64(seed)])?;
                }
                out.push(PointRecord {
                    id: point_id,
                    idx: idx as u64,
                    values: p.values.clone(),
                    origin: p.origin,
                    batch: p.batch,
                    proposal: p.proposal.clone(),
                });
            }
        }
        tx.commit()?;
        Ok(out)
    }

    /// All points of the sweep, by index.
    pub fn points(&self, sweep_id: i64) -> Result<Vec<PointRecord>, StoreError> {
        self.points_unnamed(sweep_id).map_err(|e| e.at(&self.path))
    }

    fn points_unnamed(&self, sweep_id: i64) -> Result<Vec<PointRecord>, StoreError> {
        // Proposal columns exist from schema version 2 on (read-only
        // queries may open an older file).
        let with_proposals = self.has_table("holder")?;
        let sql = if with_proposals {
            "SELECT id, idx, values_json, origin, batch,
                    acquisition, predicted_mean, predicted_sd, surrogate
             FROM points WHERE sweep_id = ?1 ORDER BY idx"
        } else {
            "SELECT id, idx, values_json, origin, batch, NULL, NULL, NULL, NULL
             FROM points WHERE sweep_id = ?1 ORDER BY idx"
        };
        let mut stmt = self.conn.prepare(sql)?;
        let rows = stmt.query_map(params![sweep_id], |r| {
            Ok((
                (
                    r.get::<_, i64>(0)?,
                    r.get::<_, i64>(1)?,
                    r.get::<_, String>(2)?,
                    r.get::<_, String>(3)?,
                    r.get::<_, u32>(4)?,
                ),
                (
                    r.get::<_, Option<f64>>(5)?,
                    r.get::<_, Option<f64>>(6)?,
                    r.get::<_, Option<f64>>(7)?,
                    r.get::<_, Option<String>>(8)?,
                ),
            ))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let ((id, idx, values_json, origin, batch), (acq, mean, sd, surrogate)) = row?;
            let values: Vec<f64> = serde_json::from_str(&values_json).map_err(|e| {
                StoreError::Damaged(format!("point {idx}: values {values_json:?}: {e}"))
            })?;
            let proposal = surrogate.map(|surrogate| ProposalInfo {
                acquisition: acq.unwrap_or(f64::NAN),
                predicted_mean: mean.unwrap_or(f64::NAN),
                predicted_sd: sd.unwrap_or(f64::NAN),
                surrogate,
            });
            out.push(PointRecord {
                id,
                idx: idx as u64,
                values,
                origin: PointOrigin::parse(&origin)?,
                batch,
                proposal,
            });
        }
        Ok(out)
    }

    /// Records a fact about the sweep (`key` -> `value`) in the `meta` table;
    /// `None` removes it.
    pub fn set_note(&mut self, key: &str, value: Option<&str>) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        check_holder(self.holder.as_deref(), &self.path, &tx)?;
        let k = format!("note.{key}");
        match value {
            Some(v) => tx.execute(
                "INSERT INTO meta (key, value) VALUES (?1, ?2)
                 ON CONFLICT(key) DO UPDATE SET value = excluded.value",
                params![k, v],
            )?,
            None => tx.execute("DELETE FROM meta WHERE key = ?1", params![k])?,
        };
        tx.commit()?;
        Ok(())
    }

    /// A fact recorded with [`Store::set_note`].
    pub fn note(&self, key: &str) -> Result<Option<String>, StoreError> {
        self.conn
            .query_row(
                "SELECT value FROM meta WHERE key = ?1",
                params![format!("note.{key}")],
                |r| r.get::<_, String>(0),
            )
            .optional()
            .map_err(|e| StoreError::from(e).at(&self.path))
    }

    /// Replaces the stored sweep file (a compatible edit: a raised budget,
    /// another strategy); see `Spec::continues`.
    pub fn update_spec_text(
        &mut self,
        sweep_id: i64,
        spec_text: &str,
        spec_file: &str,
    ) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        check_holder(self.holder.as_deref(), &self.path, &tx)?;
        tx.execute(
            "UPDATE sweeps SET spec_text = ?2, spec_file = ?3 WHERE id = ?1",
            params![sweep_id, spec_text, spec_file],
        )?;
        tx.commit()?;
        Ok(())
    }

    /// All evaluations of the sweep, by point index and replicate.
    pub fn evaluations(&self, sweep_id: i64) -> Result<Vec<EvaluationRecord>, StoreError> {
        self.evaluations_unnamed(sweep_id)
            .map_err(|e| e.at(&self.path))
    }

    fn evaluations_unnamed(&self, sweep_id: i64) -> Result<Vec<EvaluationRecord>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT e.id, e.point_id, p.idx, e.replicate, e.seed, e.status, e.attempts,
                    e.worker, e.started_unix_ms, e.ended_unix_ms, e.metrics_json,
                    e.failure_kind, e.failure_reason, e.stderr_tail
             FROM evaluations e JOIN points p ON p.id = e.point_id
             WHERE p.sweep_id = ?1 ORDER BY p.idx, e.replicate",
        )?;
        let rows = stmt.query_map(params![sweep_id], raw_evaluation)?;
        let mut out = Vec::new();
        for row in rows {
            out.push(row?.finish()?);
        }
        Ok(out)
    }

    /// Writes a batch of results in one transaction (group commit).
    ///
    /// The first result for an evaluation wins: a result for an evaluation
    /// that is already done or failed is ignored ([`CommitResult::Duplicate`]).
    /// A failure counts an attempt and keeps its kind, reason and stderr;
    /// the evaluation becomes `failed` only on its final attempt, otherwise
    /// it stays queued to be handed out again. Returns one [`CommitResult`]
    /// per outcome, in order; when this returns `Ok`, the batch is on disk.
    pub fn commit_outcomes(
        &mut self,
        outcomes: &[Outcome],
    ) -> Result<Vec<CommitResult>, StoreError> {
        let tx = self.conn.transaction()?;
        check_holder(self.holder.as_deref(), &self.path, &tx)?;
        let mut out = Vec::with_capacity(outcomes.len());
        {
            let mut done = tx.prepare(
                "UPDATE evaluations
                 SET status = 'done', attempts = attempts + 1, worker = ?2,
                     started_unix_ms = ?3, ended_unix_ms = ?4, metrics_json = ?5
                 WHERE id = ?1 AND status = 'queued'",
            )?;
            let mut failed = tx.prepare(
                "UPDATE evaluations
                 SET status = CASE WHEN ?8 THEN 'failed' ELSE 'queued' END,
                     attempts = attempts + 1, worker = ?2,
                     started_unix_ms = ?3, ended_unix_ms = ?4,
                     failure_kind = ?5, failure_reason = ?6, stderr_tail = ?7
                 WHERE id = ?1 AND status = 'queued'",
            )?;
            let mut exists = tx.prepare("SELECT 1 FROM evaluations WHERE id = ?1")?;
            for o in outcomes {
                let started = to_sql_u64(o.started_unix_ms);
                let ended = to_sql_u64(o.ended_unix_ms);
                let changed = match &o.result {
                    OutcomeResult::Done(metrics) => {
                        // Non-finite metrics become JSON null, read back as missing.
                        let json = serde_json::to_string(metrics)
                            .map_err(|e| StoreError::Damaged(format!("metrics: {e}")))?;
                        done.execute(params![o.evaluation_id, o.worker, started, ended, json])?
                    }
                    OutcomeResult::Failed {
                        kind,
                        reason,
                        stderr_tail,
                        final_attempt,
                    } => failed.execute(params![
                        o.evaluation_id,
                        o.worker,
                        started,
                        ended,
                        kind,
                        reason,
                        stderr_tail,
                        final_attempt
                    ])?,
                };
                out.push(if changed == 1 {
                    CommitResult::Stored
                } else if exists.exists(params![o.evaluation_id])? {
                    CommitResult::Duplicate
                } else {
                    CommitResult::Unknown
                });
            }
        }
        tx.commit()?;
        Ok(out)
    }

    /// Stores a surrogate fit.
    pub fn save_fit(&mut self, sweep_id: i64, fit: &NewFit) -> Result<(), StoreError> {
        let tx = self.conn.transaction()?;
        check_holder(self.holder.as_deref(), &self.path, &tx)?;
        tx.execute(
            "INSERT INTO fits (sweep_id, metric, n_results, kernel, model_json, diagnostics_json, created_unix_ms)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            params![
                sweep_id,
                fit.metric,
                fit.n_results,
                fit.kernel,
                fit.model.to_string(),
                fit.diagnostics.to_string(),
                now_ms()
            ],
        )?;
        tx.commit()?;
        Ok(())
    }

    /// The most recent fit of each metric, by metric name.
    pub fn latest_fits(&self, sweep_id: i64) -> Result<Vec<FitRecord>, StoreError> {
        self.latest_fits_unnamed(sweep_id)
            .map_err(|e| e.at(&self.path))
    }

    fn latest_fits_unnamed(&self, sweep_id: i64) -> Result<Vec<FitRecord>, StoreError> {
        let mut stmt = self.conn.prepare(
            "SELECT id, metric, n_results, kernel, model_json, diagnostics_json, created_unix_ms
             FROM fits WHERE id IN (SELECT max(id) FROM fits WHERE sweep_id = ?1 GROUP BY metric)
             ORDER BY metric",
        )?;
        let rows = stmt.query_map(params![sweep_id], |r| {
            Ok((
                r.get::<_, i64>(0)?,
                r.get::<_, String>(1)?,
                r.get::<_, u32>(2)?,
                r.get::<_, String>(3)?,
                r.get::<_, String>(4)?,
                r.get::<_, String>(5)?,
                r.get::<_, i64>(6)?,
            ))
        })?;
        let mut out = Vec::new();
        for row in rows {
            let (id, metric, n_results, kernel, model, diagnostics, created) = row?;
            let parse = |s: &str| {
                serde_json::from_str(s)
                    .map_err(|e| StoreError::Damaged(format!("fit {id} of {metric}: {e}")))
            };
            out.push(FitRecord {
                model: parse(&model)?,
                diagnostics: parse(&diagnostics)?,
                id,
                metric,
                n_results,
                kernel,
                created_unix_ms: from_sql_u64(created),
            });
        }
        Ok(out)
    }
}

/// An evaluation row before its JSON and words are checked.
struct RawEvaluation {
    id: i64,
    point_id: i64,
    point_idx: i64,
    replicate: u32,
    seed: i64,
    status: String,
    attempts: u32,
    worker: Option<String>,
    started: Option<i64>,
    ended: Option<i64>,
    metrics_json: Option<String>,
    failure_kind: Option<String>,
    failure_reason: Option<String>,
    stderr_tail: Option<String>,
}

fn raw_evaluation(r: &Row<'_>) -> rusqlite::Result<RawEvaluation> {
    Ok(RawEvaluation {
        id: r.get(0)?,
        point_id: r.get(1)?,
        point_idx: r.get(2)?,
        replicate: r.get(3)?,
        seed: r.get(4)?,
        status: r.get(5)?,
        attempts: r.get(6)?,
        worker: r.get(7)?,
        started: r.get(8)?,
        ended: r.get(9)?,
        metrics_json: r.get(10)?,
        failure_kind: r.get(11)?,
        failure_reason: r.get(12)?,
        stderr_tail: r.get(13)?,
    })
}

impl RawEvaluation {
    fn finish(self) -> Result<EvaluationRecord, StoreError> {
        let metrics = match &self.metrics_json {
            None => BTreeMap::new(),
            Some(json) => {
                let m: BTreeMap<String, Option<f64>> = serde_json::from_str(json).map_err(|e| {
                    StoreError::Damaged(format!("evaluation {}: metrics {json:?}: {e}", self.id))
                })?;
                m.into_iter()
                    .filter_map(|(k, v)| v.filter(|x| x.is_finite()).map(|x| (k, x)))
                    .collect()
            }
        };
        Ok(EvaluationRecord {
            id: self.id,
            point_id: self.point_id,
            point_idx: self.point_idx as u64,
            replicate: self.replicate,
            seed: from_sql_u64(self.seed),
            status: EvalStatus::parse(&self.status)?,
            attempts: self.attempts,
            worker: self.worker,
            started_unix_ms: self.started.map(from_sql_u64),
            ended_unix_ms: self.ended.map(from_sql_u64),
            metrics,
            failure_kind: self.failure_kind,
            failure_reason: self.failure_reason,
            stderr_tail: self.stderr_tail,
        })
    }
}

fn read_holder(conn: &Connection) -> Result<Option<Holder>, StoreError> {
    Ok(conn
        .query_row(
            "SELECT nonce, host, pid, since_unix_ms, beat_unix_ms FROM holder WHERE id = 1",
            [],
            |r| {
                Ok(Holder {
                    nonce: r.get(0)?,
                    host: r.get(1)?,
                    pid: r.get(2)?,
                    since_unix_ms: from_sql_u64(r.get(3)?),
                    beat_unix_ms: from_sql_u64(r.get(4)?),
                })
            },
        )
        .optional()?)
}

/// Whether a process with this id exists on this machine.
fn process_exists(pid: u32) -> bool {
    let Some(pid) = i32::try_from(pid)
        .ok()
        .and_then(rustix::process::Pid::from_raw)
    else {
        return false;
    };
    match rustix::process::test_kill_process(pid) {
        Ok(()) => true,
        // It exists but belongs to another user.
        Err(e) => e == rustix::io::Errno::PERM,
    }
}

/// Inside a write transaction: refreshes our heartbeat, or fails with
/// [`StoreError::Lost`] when we no longer hold the database.
fn check_holder(
    holder: Option<&str>,
    path: &Path,
    tx: &rusqlite::Transaction<'_>,
) -> Result<(), StoreError> {
    let Some(nonce) = holder else {
        return Ok(());
    };
    let n = tx.execute(
        "UPDATE holder SET beat_unix_ms = ?1 WHERE id = 1 AND nonce = ?2",
        params![now_ms(), nonce],
    )?;
    if n == 1 {
        return Ok(());
    }
    let holder =
        read_holder(tx)?.map_or_else(|| "nobody".to_string(), |h| h.describe(now_ms() as u64));
    Err(StoreError::Lost {
        path: path.to_path_buf(),
        holder,
    })
}
