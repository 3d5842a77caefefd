//! `tessera export`: every evaluation of a sweep database as CSV or JSON lines.

use anyhow::Context;
use std::collections::{BTreeMap, BTreeSet};
use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use tessera_coordinator::spec;
use tessera_coordinator::store::{EvaluationRecord, PointRecord, Store};

/// Output format of `tessera export`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum ExportFormat {
    /// Comma-separated values with a header row (spreadsheets, R, pandas).
    Csv,
    /// One JSON object per line (scripts).
    Jsonl,
}

/// Arguments of `tessera export`.
#[derive(clap::Args, Debug)]
#[command(
    long_about = "Write every evaluation stored in a sweep database: one row per run \
(point and replicate), with its seed, its status, the parameter values in \
natural units, every metric the model reported, and why it failed if it did.\n\n\
Columns: point, origin, replicate, seed, status, one column per parameter, one \
per metric (the union over all runs; empty where a run did not report it), \
failure_kind, failure_reason, stderr_tail, worker, attempts, started_unix_ms, ended_unix_ms, \
started_utc, ended_utc (ISO 8601). With --per-point: one row per point with each metric's \
mean, sd and n; with --proposals: the proposed points and what the planner believed there. \
The database may be read while the sweep is still running.",
    after_help = "\
Examples:
  tessera export --db sweep.db                         CSV on the screen
  tessera export --db sweep.db --out results.csv       CSV into a file
  tessera export --db sweep.db --units --out results.csv   headers like \"height_mean [um]\"
  tessera export --db sweep.db --format jsonl > runs.jsonl
  tessera export --db sweep.db --per-point             one row per point: means, sds, counts
  tessera export --db sweep.db --proposals             why each adaptive point was chosen

In R: read.csv(\"results.csv\"); in Python: pandas.read_csv(\"results.csv\")."
)]
pub struct ExportArgs {
    /// The sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: PathBuf,
    /// Output format.
    #[arg(long, value_enum, default_value = "csv")]
    pub format: ExportFormat,
    /// Write to this file instead of standard output (written whole, then
    /// moved into place, so it is never left half-written).
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Add units to CSV headers, e.g. "height_mean [um]".
    #[arg(long)]
    pub units: bool,
    /// One row per point instead of per run: each metric's mean, sd and
    /// number of finished replicates, and what the planner believed when it
    /// proposed the point.
    #[arg(long, conflicts_with = "proposals")]
    pub per_point: bool,
    /// Only the proposed points (not the initial design), one row each, with
    /// the strategy, acquisition value, predicted mean and sd and the
    /// surrogate that chose them.
    #[arg(long)]
    pub proposals: bool,
}

/// Runs `tessera export`.
pub fn run(args: ExportArgs) -> anyhow::Result<ExitCode> {
    let store = Store::open_read_only(&args.db)?;
    let db = args.db.display().to_string();
    let sweep = store
        .sweep()?
        .with_context(|| format!("{db} holds no sweep yet"))?;
    let spec = spec::parse(&sweep.spec_text, &sweep.spec_file).map_err(|e| {
        anyhow::anyhow!("the sweep file stored in {db} is not valid for this tessera: {e}")
    })?;
    let points = store.points(sweep.id)?;
    let evals = store.evaluations(sweep.id)?;
    let table = Table::new(&spec, &points, &evals);
    let mut buf = Vec::new();
    if args.per_point || args.proposals {
        let rows = per_point_rows(&table, args.proposals);
        match args.format {
            ExportFormat::Csv => write_rows_csv(&mut buf, &rows)?,
            ExportFormat::Jsonl => write_rows_jsonl(&mut buf, &rows)?,
        }
    } else {
        match args.format {
            ExportFormat::Csv => table.write_csv(&mut buf, args.units)?,
            ExportFormat::Jsonl => table.write_jsonl(&mut buf)?,
        }
    }
    match &args.out {
        Some(path) => write_atomically(path, &buf)?,
        None => {
            let mut out = std::io::stdout().lock();
            out.write_all(&buf)
                .and_then(|()| out.flush())
                .context("cannot write to standard output")?;
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Writes `bytes` to a temporary file beside `path`, syncs it, then renames
/// it over `path`: readers see the old file or the whole new one.
fn write_atomically(path: &Path, bytes: &[u8]) -> anyhow::Result<()> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let name = path
        .file_name()
        .with_context(|| format!("--out {} is not a file name", path.display()))?;
    let tmp = dir.join(format!(
        ".{}.tmp-{}",
        name.to_string_lossy(),
        std::process::id()
    ));
    let result = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if let Err(e) = result {
        let _ = std::fs::remove_file(&tmp);
        return Err(e).with_context(|| format!("cannot write {}", path.display()));
    }
    Ok(())
}

/// The export table: fixed columns, parameters, metrics.
struct Table<'a> {
    spec: &'a spec::Spec,
    points: BTreeMap<i64, &'a PointRecord>,
    evals: &'a [EvaluationRecord],
    metrics: Vec<String>,
}

const FIXED_BEFORE: &[&str] = &["point", "origin", "replicate", "seed", "status"];
const FIXED_AFTER: &[&str] = &[
    "failure_kind",
    "failure_reason",
    "stderr_tail",
    "worker",
    "attempts",
    "started_unix_ms",
    "ended_unix_ms",
    "started_utc",
    "ended_utc",
];

/// Unix milliseconds as ISO 8601 (RFC 3339) in UTC, to the millisecond.
fn utc(ms: Option<u64>) -> String {
    ms.map_or(String::new(), |t| {
        humantime::format_rfc3339_millis(
            std::time::UNIX_EPOCH + std::time::Duration::from_millis(t),
        )
        .to_string()
    })
}

/// One output row: column name and value, in order.
type Row = Vec<(String, serde_json::Value)>;

/// One row per point (only proposed points with `only_proposed`).
fn per_point_rows(t: &Table<'_>, only_proposed: bool) -> Vec<Row> {
    use serde_json::{json, Value};
    let mut by_point: BTreeMap<i64, Vec<&EvaluationRecord>> = BTreeMap::new();
    for e in t.evals {
        by_point.entry(e.point_id).or_default().push(e);
    }
    let mut points: Vec<&PointRecord> = t.points.values().copied().collect();
    points.sort_by_key(|p| p.idx);
    let num =
        |x: f64| -> Value { serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number) };
    let mut rows = Vec::new();
    for p in points {
        if only_proposed && p.origin == tessera_coordinator::store::PointOrigin::Design {
            continue;
        }
        let evals = by_point.get(&p.id).cloned().unwrap_or_default();
        let mut row: Row = vec![
            ("point".into(), json!(p.idx)),
            ("origin".into(), json!(p.origin.as_str())),
            ("batch".into(), json!(p.batch)),
        ];
        for (j, q) in t.spec.params.iter().enumerate() {
            let v = p.values.get(j).copied().unwrap_or(f64::NAN);
            let value = if q.integer {
                json!(v.round() as i64)
            } else {
                num(v)
            };
            row.push((q.name.clone(), value));
        }
        let done: Vec<&&EvaluationRecord> = evals
            .iter()
            .filter(|e| e.status == tessera_coordinator::store::EvalStatus::Done)
            .collect();
        let failed = evals
            .iter()
            .filter(|e| e.status == tessera_coordinator::store::EvalStatus::Failed)
            .count();
        row.push(("runs_done".into(), json!(done.len())));
        row.push(("runs_failed".into(), json!(failed)));
        if !only_proposed {
            for m in &t.metrics {
                let v: Vec<f64> = done
                    .iter()
                    .filter_map(|e| e.metrics.get(m).copied())
                    .collect();
                let n = v.len();
                let mean = if n > 0 {
                    v.iter().sum::<f64>() / n as f64
                } else {
                    f64::NAN
                };
                let sd = if n > 1 {
                    (v.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / (n - 1) as f64).sqrt()
                } else {
                    f64::NAN
                };
                row.push((format!("{m}_mean"), num(mean)));
                row.push((format!("{m}_sd"), num(sd)));
                row.push((format!("{m}_n"), json!(n)));
            }
        }
        let info = p.proposal.as_ref();
        row.push((
            "acquisition".into(),
            info.map_or(Value::Null, |i| num(i.acquisition)),
        ));
        row.push((
            "predicted_mean".into(),
            info.map_or(Value::Null, |i| num(i.predicted_mean)),
        ));
        row.push((
            "predicted_sd".into(),
            info.map_or(Value::Null, |i| num(i.predicted_sd)),
        ));
        row.push((
            "surrogate".into(),
            info.map_or(Value::Null, |i| json!(i.surrogate)),
        ));
        rows.push(row);
    }
    rows
}

fn write_rows_csv(out: &mut Vec<u8>, rows: &[Row]) -> anyhow::Result<()> {
    let mut w = csv::Writer::from_writer(out);
    if let Some(first) = rows.first() {
        w.write_record(first.iter().map(|(k, _)| k.as_str()))?;
    }
    for r in rows {
        w.write_record(r.iter().map(|(_, v)| match v {
            serde_json::Value::Null => String::new(),
            serde_json::Value::String(s) => s.clone(),
            serde_json::Value::Number(n) => match n.as_f64() {
                Some(x) if n.is_f64() => tessera_models::text::exact(x),
                _ => n.to_string(),
            },
            other => other.to_string(),
        }))?;
    }
    w.flush()?;
    Ok(())
}

fn write_rows_jsonl(out: &mut Vec<u8>, rows: &[Row]) -> anyhow::Result<()> {
    for r in rows {
        let obj: serde_json::Map<String, serde_json::Value> = r.iter().cloned().collect();
        serde_json::to_writer(&mut *out, &obj)?;
        out.push(b'\n');
    }
    Ok(())
}

impl<'a> Table<'a> {
    fn new(spec: &'a spec::Spec, points: &'a [PointRecord], evals: &'a [EvaluationRecord]) -> Self {
        // Metrics the sweep needs come first, then any others in name order.
        let mut metrics = spec.metrics_needed();
        let others: BTreeSet<&String> = evals
            .iter()
            .flat_map(|e| e.metrics.keys())
            .filter(|m| !metrics.contains(m))
            .collect();
        metrics.extend(others.into_iter().cloned());
        Table {
            spec,
            points: points.iter().map(|p| (p.id, p)).collect(),
            evals,
            metrics,
        }
    }

    /// Column names; a parameter or metric named like a fixed column gets a prefix.
    fn header(&self, units: bool) -> Vec<String> {
        let taken = |n: &str| FIXED_BEFORE.contains(&n) || FIXED_AFTER.contains(&n);
        let decorate = |name: String, unit: &str| {
            if units && !unit.is_empty() {
                format!("{name} [{unit}]")
            } else {
                name
            }
        };
        let mut h: Vec<String> = FIXED_BEFORE.iter().map(|s| s.to_string()).collect();
        for p in &self.spec.params {
            let name = if taken(&p.name) {
                format!("param_{}", p.name)
            } else {
                p.name.clone()
            };
            h.push(decorate(name, &p.unit));
        }
        let params: BTreeSet<&str> = self.spec.param_names().into_iter().collect();
        for m in &self.metrics {
            let name = if taken(m) || params.contains(m.as_str()) {
                format!("metric_{m}")
            } else {
                m.clone()
            };
            h.push(decorate(name, self.spec.metric_unit(m)));
        }
        h.extend(FIXED_AFTER.iter().map(|s| s.to_string()));
        h
    }

    fn point_of(&self, e: &EvaluationRecord) -> Option<&'a PointRecord> {
        self.points.get(&e.point_id).copied()
    }

    fn write_csv(&self, out: &mut Vec<u8>, units: bool) -> anyhow::Result<()> {
        let mut w = csv::Writer::from_writer(out);
        w.write_record(self.header(units))?;
        for e in self.evals {
            let point = self.point_of(e);
            let mut row: Vec<String> = vec![
                e.point_idx.to_string(),
                point.map_or(String::new(), |p| p.origin.as_str().to_string()),
                e.replicate.to_string(),
                e.seed.to_string(),
                e.status.as_str().to_string(),
            ];
            for (j, p) in self.spec.params.iter().enumerate() {
                let v = point.and_then(|pt| pt.values.get(j)).copied();
                row.push(v.map_or(String::new(), |x| super::check::format_value(x, p.integer)));
            }
            for m in &self.metrics {
                row.push(
                    e.metrics
                        .get(m)
                        .map_or(String::new(), |x| tessera_models::text::exact(*x)),
                );
            }
            row.push(e.failure_kind.clone().unwrap_or_default());
            row.push(e.failure_reason.clone().unwrap_or_default());
            row.push(e.stderr_tail.clone().unwrap_or_default());
            row.push(e.worker.clone().unwrap_or_default());
            row.push(e.attempts.to_string());
            row.push(e.started_unix_ms.map_or(String::new(), |t| t.to_string()));
            row.push(e.ended_unix_ms.map_or(String::new(), |t| t.to_string()));
            row.push(utc(e.started_unix_ms));
            row.push(utc(e.ended_unix_ms));
            w.write_record(&row)?;
        }
        w.flush()?;
        Ok(())
    }

    fn write_jsonl(&self, out: &mut Vec<u8>) -> anyhow::Result<()> {
        use serde_json::{json, Map, Value};
        for e in self.evals {
            let point = self.point_of(e);
            let mut params = Map::new();
            for (j, p) in self.spec.params.iter().enumerate() {
                let v = point.and_then(|pt| pt.values.get(j)).copied();
                let value = match v {
                    Some(x) if p.integer => json!(x.round() as i64),
                    Some(x) => json!(x),
                    None => Value::Null,
                };
                params.insert(p.name.clone(), value);
            }
            let row = json!({
                "point": e.point_idx,
                "origin": point.map(|p| p.origin.as_str()),
                "replicate": e.replicate,
                "seed": e.seed,
                "status": e.status.as_str(),
                "params": params,
                "metrics": e.metrics,
                "failure_kind": e.failure_kind,
                "failure_reason": e.failure_reason,
                "stderr_tail": e.stderr_tail,
                "worker": e.worker,
                "attempts": e.attempts,
                "started_unix_ms": e.started_unix_ms,
                "ended_unix_ms": e.ended_unix_ms,
                "started_utc": e.started_unix_ms.map(|t| utc(Some(t))),
                "ended_utc": e.ended_unix_ms.map(|t| utc(Some(t))),
            });
            serde_json::to_writer(&mut *out, &row)?;
            out.push(b'\n');
        }
        Ok(())
    }
}
