//! The database layout and its migrations.
//!
//! `PRAGMA user_version` holds the schema version; `PRAGMA application_id`
//! marks the file as a tessera sweep database, so that a stray SQLite file is
//! refused instead of being written into. Migration `i` (0-based) brings a
//! database from version `i` to `i + 1`; every migration runs in one
//! transaction with the version bump, so a crash leaves the old version.

/// Marks a tessera sweep database (the ASCII bytes "TSRA").
pub(crate) const APPLICATION_ID: i32 = 0x5453_5241;

/// Migrations in order; `MIGRATIONS.len()` is the schema version this build writes.
pub(crate) const MIGRATIONS: &[&str] = &[V1, V2];

/// The schema version this build writes and reads.
pub const SCHEMA_VERSION: i64 = MIGRATIONS.len() as i64;

const V1: &str = "
CREATE TABLE meta (
    key   TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
CREATE TABLE sweeps (
    id              INTEGER PRIMARY KEY,
    name            TEXT NOT NULL,
    spec_text       TEXT NOT NULL,
    spec_file       TEXT NOT NULL,
    seed            INTEGER NOT NULL,
    created_unix_ms INTEGER NOT NULL
);
CREATE TABLE points (
    id              INTEGER PRIMARY KEY,
    sweep_id        INTEGER NOT NULL REFERENCES sweeps(id),
    idx             INTEGER NOT NULL,
    values_json     TEXT NOT NULL,
    origin          TEXT NOT NULL CHECK (origin IN ('design', 'improve', 'explore')),
    batch           INTEGER NOT NULL,
    created_unix_ms INTEGER NOT NULL,
    UNIQUE (sweep_id, idx)
);
CREATE TABLE evaluations (
    id              INTEGER PRIMARY KEY,
    point_id        INTEGER NOT NULL REFERENCES points(id),
    replicate       INTEGER NOT NULL,
    seed            INTEGER NOT NULL,
    status          TEXT NOT NULL CHECK (status IN ('queued', 'done', 'failed')),
    attempts        INTEGER NOT NULL DEFAULT 0,
    worker          TEXT,
    started_unix_ms INTEGER,
    ended_unix_ms   INTEGER,
    metrics_json    TEXT,
    failure_kind    TEXT,
    failure_reason  TEXT,
    stderr_tail     TEXT,
    UNIQUE (point_id, replicate)
);
CREATE INDEX evaluations_by_status ON evaluations(status);
CREATE TABLE fits (
    id               INTEGER PRIMARY KEY,
    sweep_id         INTEGER NOT NULL REFERENCES sweeps(id),
    metric           TEXT NOT NULL,
    n_results        INTEGER NOT NULL,
    kernel           TEXT NOT NULL,
    model_json       TEXT NOT NULL,
    diagnostics_json TEXT NOT NULL,
    created_unix_ms  INTEGER NOT NULL
);
CREATE INDEX fits_by_metric ON fits(sweep_id, metric, id);
";

/// Version 2: the `holder` row (which coordinator may write, with its
/// heartbeat), and the points table rebuilt so that the planner can store
/// why it proposed a point (strategy, acquisition value, predicted mean and
/// sd, and the surrogate that made it); point origins are checked by the
/// code, not by a CHECK constraint, so new strategies need no rebuild.
const V2: &str = "
CREATE TABLE holder (
    id              INTEGER PRIMARY KEY CHECK (id = 1),
    nonce           TEXT NOT NULL,
    host            TEXT NOT NULL,
    pid             INTEGER NOT NULL,
    since_unix_ms   INTEGER NOT NULL,
    beat_unix_ms    INTEGER NOT NULL
);
CREATE TABLE points_v2 (
    id              INTEGER PRIMARY KEY,
    sweep_id        INTEGER NOT NULL REFERENCES sweeps(id),
    idx             INTEGER NOT NULL,
    values_json     TEXT NOT NULL,
    origin          TEXT NOT NULL,
    batch           INTEGER NOT NULL,
    created_unix_ms INTEGER NOT NULL,
    acquisition     REAL,
    predicted_mean  REAL,
    predicted_sd    REAL,
    surrogate       TEXT,
    UNIQUE (sweep_id, idx)
);
INSERT INTO points_v2 (id, sweep_id, idx, values_json, origin, batch, created_unix_ms)
    SELECT id, sweep_id, idx, values_json, origin, batch, created_unix_ms FROM points;
DROP TABLE points;
ALTER TABLE points_v2 RENAME TO points;
";
