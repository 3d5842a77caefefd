//! `tessera status`: how far a sweep has got, from its database or from the
//! running coordinator.

use super::net;
use anyhow::Context;
use std::path::PathBuf;
use std::process::ExitCode;
use tessera_coordinator::client::QueryClient;
use tessera_coordinator::scheduler::{status_from_records, FileNotes};
use tessera_coordinator::spec::{self, Spec};
use tessera_coordinator::status::SweepStatus;
use tessera_coordinator::store::Store;

/// Arguments of `tessera status`.
#[derive(clap::Args, Debug)]
#[command(after_help = "\
Examples:
  tessera status --db sweep.db
  tessera status --coordinator http://10.0.0.5:7300 --token-file lab.token
  tessera status --db sweep.db --json

Reading the database works while a sweep runs; only the coordinator knows its workers.")]
#[command(group(clap::ArgGroup::new("source").required(true).args(["db", "coordinator"])))]
pub struct StatusArgs {
    /// Read the sweep database.
    #[arg(long, value_name = "FILE")]
    pub db: Option<PathBuf>,
    #[command(flatten)]
    pub remote: net::CoordinatorArgs,
    /// Print one JSON object instead of tables.
    #[arg(long)]
    pub json: bool,
}

/// Reads the status of the sweep stored in `db`.
pub fn from_db(db: &std::path::Path) -> anyhow::Result<(SweepStatus, Spec)> {
    let store = Store::open_read_only(db)?;
    let sweep = store
        .sweep()?
        .with_context(|| format!("{} holds no sweep yet", db.display()))?;
    let spec = spec::parse(&sweep.spec_text, &sweep.spec_file).map_err(|e| {
        anyhow::anyhow!(
            "the sweep file stored in {} is not valid: {e}",
            db.display()
        )
    })?;
    let points = store.points(sweep.id)?;
    let evals = store.evaluations(sweep.id)?;
    let notes = FileNotes::read(&store)?;
    let spec = std::sync::Arc::new(spec);
    let st = status_from_records(spec.clone(), &points, &evals, &notes);
    Ok((st, (*spec).clone()))
}

async fn from_coordinator(dial: net::Dial) -> anyhow::Result<SweepStatus> {
    let mut client = QueryClient::new(&dial)?;
    Ok(client.status().await?)
}

fn unit_of<'a>(spec: Option<&'a Spec>, name: &str) -> &'a str {
    spec.and_then(|s| s.params.iter().find(|p| p.name == name))
        .map_or("", |p| p.unit.as_str())
}

/// Prints a status for people.
pub fn print_human(st: &SweepStatus, spec: Option<&Spec>) {
    println!("sweep      {}", st.sweep);
    println!("objective  {}", st.objective_label);
    println!(
        "points     {} of {} ({} replicates each; {})",
        st.points,
        st.budget,
        st.replicates,
        if st.reproducible {
            "each batch waits for the one before: reproducible"
        } else {
            "proposed as results arrive"
        }
    );
    println!(
        "runs       {} done, {} failed, {} running, {} queued, of {}{}",
        st.done,
        st.failed,
        st.running,
        st.queued,
        st.evaluations_total,
        if st.finished { " (finished)" } else { "" }
    );
    if st.workers.is_empty() && !st.finished && st.done + st.failed > 0 {
        println!("           (read from the file: runs under way count as queued; --coordinator URL shows them and the workers)");
    }
    match &st.best {
        Some(b) => {
            println!(
                "best       {} = {:.6} at point {}",
                st.objective_label, b.objective, b.point_id
            );
            // In the sweep file's order when it is known.
            let mut params: Vec<(&String, &f64)> = b.params.iter().collect();
            if let Some(spec) = spec {
                params.sort_by_key(|(name, _)| spec.params.iter().position(|q| &q.name == *name));
            }
            for (k, v) in params {
                println!(
                    "             {k} = {}",
                    tessera_models::text::with_unit(
                        tessera_models::text::significant(*v, 6),
                        unit_of(spec, k)
                    )
                );
            }
        }
        None => println!("best       no finished run yet"),
    }
    for (k, w) in st.waves.iter().enumerate() {
        println!(
            "{}wave {}: {:.1}% +- {:.1}% of the box not ruled out by the targets (fitted to {} points)",
            if k == 0 { "region     " } else { "           " },
            w.wave,
            100.0 * w.fraction,
            100.0 * w.fraction_se,
            w.points
        );
    }
    if !st.workers.is_empty() {
        println!();
        println!(
            "{:<20} {:<16} {:>5} {:>7} {:>9} {:>9} {:>10}",
            "worker", "host", "slots", "running", "completed", "runs/min", "contact"
        );
        let now = tessera_coordinator::scheduler::unix_ms();
        for w in &st.workers {
            let ago = now.saturating_sub(w.last_contact_unix_ms) / 1000;
            println!(
                "{:<20} {:<16} {:>5} {:>7} {:>9} {:>9.1} {:>10}",
                w.name,
                w.host,
                w.slots,
                w.running,
                w.completed,
                w.runs_per_minute,
                if w.connected {
                    format!("{ago}s ago")
                } else {
                    format!("gone {ago}s")
                }
            );
        }
    }
    if let Some(why) = &st.stop_reason {
        println!("stopped    {why}");
    }
    if !st.failures.is_empty() {
        println!();
        println!("failures by reason:");
        for (reason, n) in &st.failures {
            println!("  {n:>6}  {reason}");
        }
        if let Some(region) = &st.failure_region {
            println!("where:     {region}");
        }
    }
}

/// Runs `tessera status`.
pub fn run(args: StatusArgs) -> anyhow::Result<ExitCode> {
    let (st, spec) = match (&args.db, &args.remote.coordinator) {
        (Some(db), _) => {
            let (st, spec) = from_db(db)?;
            (st, Some(spec))
        }
        (None, Some(url)) => {
            let dial = net::dial(
                url,
                args.remote.token_file.as_deref(),
                args.remote.ca.as_deref(),
            )?;
            let rt = tokio::runtime::Runtime::new().context("cannot start the async runtime")?;
            (rt.block_on(from_coordinator(dial))?, None)
        }
        (None, None) => anyhow::bail!("give --db FILE or --coordinator URL"),
    };
    if args.json {
        let mut v = serde_json::to_value(&st)?;
        if let Some(obj) = v.as_object_mut() {
            let best = match &st.best {
                Some(b) => {
                    serde_json::json!({"params": b.params, "objective": b.objective, "point_id": b.point_id})
                }
                None => serde_json::Value::Null,
            };
            obj.insert("best".into(), best);
            obj.insert(
                "failures".into(),
                serde_json::Value::Array(
                    st.failures
                        .iter()
                        .map(|(r, n)| serde_json::json!({"reason": r, "count": n}))
                        .collect(),
                ),
            );
        }
        println!("{v}");
    } else {
        print_human(&st, spec.as_ref());
    }
    Ok(ExitCode::SUCCESS)
}
