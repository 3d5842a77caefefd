//! Surrogate fits stored in a real sweep database, and the queries on them:
//! `fitter::refit_if_stale`, `query::predict`, `query::check_fit` and the
//! `Predict` gRPC handler.
//!
//! The data come from the Branin function, computed here from its formula
//! (Surjanovic & Bingham, Virtual Library of Simulation Experiments;
//! Dixon & Szego 1978): on x1 in [-5, 10], x2 in [0, 15],
//! f = (x2 - 5.1 x1^2 / (4 pi^2) + 5 x1 / pi - 6)^2 + 10 (1 - 1 / (8 pi)) cos x1 + 10.

use rand::{Rng, SeedableRng};
use std::collections::BTreeMap;
use std::f64::consts::PI;
use tessera_coordinator::fitter::{self, MetricFit};
use tessera_coordinator::query::{self, QueryError, Verdict};
use tessera_coordinator::spec::{self, Spec};
use tessera_coordinator::store::{NewPoint, Outcome, OutcomeResult, PointOrigin, Store};
use tessera_coordinator::wire;
use tessera_proto::v1 as pb;

/// Branin (Surjanovic & Bingham), global minimum 5 / (4 pi) = 0.397887.
fn branin(x1: f64, x2: f64) -> f64 {
    let b = 5.1 / (4.0 * PI * PI);
    let c = 5.0 / PI;
    let t = 1.0 / (8.0 * PI);
    (x2 - b * x1 * x1 + c * x1 - 6.0).powi(2) + 10.0 * (1.0 - t) * x1.cos() + 10.0
}

fn spec_text(replicates: u32) -> String {
    format!(
        r#"name = "branin-query"
seed = 7
budget = 200
initial = 10
replicates = {replicates}

[model]
name = "branin"

[params.x1]
range = [-5.0, 10.0]
unit = "mm"

[params.x2]
range = [0.0, 15.0]
unit = "s"

[objective]
minimize = "value"

[metrics.value]
unit = "au"
"#
    )
}

/// A sweep database in a temp dir.
struct Sweep {
    _dir: tempfile::TempDir,
    db: std::path::PathBuf,
    store: Store,
    id: i64,
    spec: Spec,
}

fn sweep(replicates: u32) -> Sweep {
    sweep_from(spec_text(replicates))
}

fn sweep_from(text: String) -> Sweep {
    let dir = tempfile::tempdir().expect("temp dir");
    let db = dir.path().join("sweep.db");
    let spec = spec::parse(&text, "sweep.toml").expect("valid sweep file");
    let mut store = Store::open(&db).expect("open store");
    let sw = store
        .create_sweep(&spec.name, &text, "sweep.toml", spec.seed)
        .expect("create sweep");
    Sweep {
        _dir: dir,
        db,
        store,
        id: sw.id,
        spec,
    }
}

/// Makes the metrics of one run from its point and replicate number.
type MetricsOf<'a> = dyn FnMut(&[f64], u32) -> BTreeMap<String, f64> + 'a;

/// Stores `points` (natural units) and one result per replicate, made by `metrics`.
fn add_results(s: &mut Sweep, points: &[Vec<f64>], metrics: &mut MetricsOf<'_>) {
    let new: Vec<NewPoint> = points
        .iter()
        .map(|v| NewPoint {
            values: v.clone(),
            origin: PointOrigin::Design,
            batch: 0,
            proposal: None,
        })
        .collect();
    let reps = s.spec.replicates;
    let recs = s
        .store
        .insert_points(s.id, &new, reps, s.spec.seed)
        .expect("insert points");
    let ids: std::collections::HashSet<i64> = recs.iter().map(|p| p.id).collect();
    let values: BTreeMap<i64, Vec<f64>> = recs.iter().map(|p| (p.id, p.values.clone())).collect();
    let outcomes: Vec<Outcome> = s
        .store
        .evaluations(s.id)
        .expect("evaluations")
        .into_iter()
        .filter(|e| ids.contains(&e.point_id))
        .map(|e| Outcome {
            evaluation_id: e.id,
            worker: "test".into(),
            started_unix_ms: 1,
            ended_unix_ms: 2,
            result: OutcomeResult::Done(metrics(&values[&e.point_id], e.replicate)),
        })
        .collect();
    s.store.commit_outcomes(&outcomes).expect("commit");
}

/// A seeded maximin Latin hypercube on the Branin domain (natural units).
fn design(n: usize, seed: u64) -> Vec<Vec<f64>> {
    tessera_surrogate::design::maximin_lhs(n, 2, seed)
        .iter()
        .map(|u| vec![-5.0 + 15.0 * u[0], 15.0 * u[1]])
        .collect()
}

fn branin_only(x: &[f64], _r: u32) -> BTreeMap<String, f64> {
    BTreeMap::from([("value".to_string(), branin(x[0], x[1]))])
}

fn at(x1: f64, x2: f64) -> BTreeMap<String, f64> {
    BTreeMap::from([("x1".to_string(), x1), ("x2".to_string(), x2)])
}

fn fit_of<'a>(fits: &'a [MetricFit], metric: &str) -> &'a MetricFit {
    fits.iter()
        .find(|f| f.metric == metric)
        .unwrap_or_else(|| panic!("no fit of {metric}"))
}

// GP regression with (nearly) no noise interpolates its data (GPML sec. 2.2):
// at the training points the mean is the Branin value and the interval holds it.
// Held-out points: the 95% intervals cover most of them (at least 80%:
// common practice, no source).
#[test]
fn predictions_reproduce_branin_at_training_points_and_cover_held_out_ones() {
    let mut s = sweep(1);
    let pts = design(30, 3);
    add_results(&mut s, &pts, &mut branin_only);
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    assert_eq!(fits.len(), 1, "one metric, which is also the objective");
    let f = fit_of(&fits, "value");
    assert_eq!((f.n_points, f.n_results, f.unit.as_str()), (30, 30, "au"));

    let ys: Vec<f64> = pts.iter().map(|p| branin(p[0], p[1])).collect();
    let range =
        ys.iter().cloned().fold(f64::MIN, f64::max) - ys.iter().cloned().fold(f64::MAX, f64::min);
    let train: Vec<_> = pts.iter().map(|p| at(p[0], p[1])).collect();
    let preds = query::predict(&fits, &s.spec, &train).expect("predict");
    for (p, y) in preds.iter().zip(&ys) {
        let m = &p.metrics[0];
        assert_eq!(m.metric, "value");
        assert!(
            (m.mean - y).abs() < 0.01 * range,
            "mean {} vs Branin {y}",
            m.mean
        );
        assert!(m.lower95 <= y + 1e-9 * range && *y <= m.upper95 + 1e-9 * range);
        assert!(
            m.sd_ratio < 0.1,
            "sd ratio {} at a training point",
            m.sd_ratio
        );
        assert!(p.warnings.is_empty(), "{:?}", p.warnings);
    }

    // Held out: 200 seeded uniform points inside the sampled box.
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(99);
    let held: Vec<(f64, f64)> = (0..200)
        .map(|_| (rng.random_range(-4.5..9.5), rng.random_range(0.5..14.5)))
        .collect();
    let q: Vec<_> = held.iter().map(|&(a, b)| at(a, b)).collect();
    let preds = query::predict(&fits, &s.spec, &q).expect("predict");
    let covered = preds
        .iter()
        .zip(&held)
        .filter(|(p, &(a, b))| {
            let y = branin(a, b);
            p.metrics[0].lower95 <= y && y <= p.metrics[0].upper95
        })
        .count();
    assert!(
        covered >= 160,
        "95% intervals cover {covered} of 200 held-out points"
    );
}

// Outside the sampled box the surrogate extrapolates; far from all data the
// posterior variance returns to the prior variance (GPML eq. 2.26 as k(x*, X) -> 0),
// so sd / prior sd approaches 1 and the "knows little" warning fires.
#[test]
fn warnings_fire_outside_the_sampled_box_and_far_from_data() {
    let mut s = sweep(1);
    // Only the left half of x1 is sampled: x1 in [-5, 2.5].
    let pts: Vec<Vec<f64>> = tessera_surrogate::design::maximin_lhs(20, 2, 5)
        .iter()
        .map(|u| s.spec.to_natural(&[0.5 * u[0], u[1]]))
        .collect();
    let x1_min = pts.iter().map(|p| p[0]).fold(f64::MAX, f64::min);
    let x1_max = pts.iter().map(|p| p[0]).fold(f64::MIN, f64::max);
    add_results(&mut s, &pts, &mut branin_only);
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");

    let preds = query::predict(&fits, &s.spec, &[at(0.0, 7.5), at(8.0, 7.5), at(50.0, 1.0)])
        .expect("predict");
    assert!(preds[0].warnings.is_empty(), "{:?}", preds[0].warnings);

    let w = preds[1].warnings.join("\n");
    assert!(
        w.contains("x1 = 8 is outside the range sampled so far"),
        "{w}"
    );
    let sampled = format!(
        "[{}, {}] mm",
        query::short_number(x1_min),
        query::short_number(x1_max)
    );
    assert!(
        w.contains(&sampled),
        "names the sampled range {sampled}: {w}"
    );
    assert!(
        w.contains("mm: this is extrapolation; do not trust it"),
        "{w}"
    );
    assert!(
        !w.contains("sweep's range"),
        "8 is inside the sweep's range: {w}"
    );

    let far = &preds[2];
    let w = far.warnings.join("\n");
    assert!(
        w.contains("x1 = 50 is outside the range sampled so far"),
        "{w}"
    );
    assert!(w.contains("outside the sweep's range [-5, 10]"), "{w}");
    // Three box widths away the posterior sd is most of the prior sd (how
    // much depends on the fitted length scales; Branin's are long).
    assert!(
        far.metrics[0].sd_ratio > query::SD_RATIO_WARN,
        "sd ratio {}",
        far.metrics[0].sd_ratio
    );
    assert!(
        w.contains("value: the surrogate knows little here: sd is"),
        "{w}"
    );
    assert!(w.contains("add points near here"), "{w}");
    assert!(
        !far.warnings.iter().any(|x| x.starts_with("x2")),
        "x2 = 1 was sampled: {w}"
    );
}

#[test]
fn unknown_or_missing_parameters_are_refused_with_the_valid_ones() {
    let mut s = sweep(1);
    add_results(&mut s, &design(12, 1), &mut branin_only);
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");

    let mut typo = at(1.0, 2.0);
    typo.insert("x3".into(), 0.0);
    let e = query::predict(&fits, &s.spec, &[at(1.0, 2.0), typo]).expect_err("x3 is unknown");
    assert!(
        matches!(e, QueryError::UnknownParameter { point: 2, .. }),
        "{e:?}"
    );
    let msg = e.to_string();
    assert!(msg.contains("\"x3\""), "{msg}");
    assert!(msg.contains("x1 in [-5, 10] mm, x2 in [0, 15] s"), "{msg}");

    let only_x1 = BTreeMap::from([("x1".to_string(), 1.0)]);
    let e = query::predict(&fits, &s.spec, &[only_x1]).expect_err("x2 is missing");
    assert!(e.to_string().contains("no value for x2"), "{e}");

    let e = query::predict(&fits, &s.spec, &[at(f64::NAN, 1.0)]).expect_err("NaN");
    assert!(
        e.to_string().contains("x1 = NaN is not a finite number"),
        "{e}"
    );
}

// Requirement (fast, reproducible queries; docs/queries.md): a fit is stored with the number of
// results it saw and not redone until that number changes.
#[test]
fn refits_only_when_results_change_and_answers_stay_the_same() {
    let mut s = sweep(1);
    add_results(&mut s, &design(12, 2), &mut branin_only);
    let first = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let sweep_id = s.id;
    let ids = |st: &Store| -> Vec<i64> {
        st.latest_fits(sweep_id)
            .expect("fits")
            .iter()
            .map(|r| r.id)
            .collect()
    };
    let before = ids(&s.store);
    let again = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    assert_eq!(ids(&s.store), before, "no new fit row without new results");
    let q = [at(1.0, 1.0), at(-3.0, 12.0)];
    let a = query::predict(&first, &s.spec, &q).expect("predict");
    let b = query::predict(&again, &s.spec, &q).expect("predict");
    assert_eq!(a, b, "the stored fit gives the same answer bit for bit");

    // Reopening the file reads the same fit back.
    drop(again);
    let reopened = Store::open_read_only(&s.db).expect("reopen");
    let stored = fitter::stored_fits(&reopened, s.id, &s.spec).expect("stored");
    assert_eq!(query::predict(&stored, &s.spec, &q).expect("predict"), a);

    add_results(&mut s, &design(5, 9), &mut branin_only);
    let after = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("refit");
    assert_ne!(ids(&s.store), before, "new results give a new fit");
    assert_eq!(fit_of(&after, "value").n_results, 17);
}

// Stochastic kriging (Ankenman, Nelson & Staum 2010): each point's mean over
// its replicates is fitted, with (sample variance / replicates) as known noise.
#[test]
fn replicates_are_averaged_and_every_reported_metric_is_fitted() {
    let mut s = sweep(4);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(4);
    let pts = design(15, 4);
    add_results(&mut s, &pts, &mut |x, _r| {
        let noise: f64 = rng.random_range(-1.0..1.0);
        BTreeMap::from([
            ("value".to_string(), branin(x[0], x[1]) + noise),
            ("spread".to_string(), x[0] + 0.1 * noise),
        ])
    });
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let names: Vec<&str> = fits.iter().map(|f| f.metric.as_str()).collect();
    assert_eq!(names, ["spread", "value"]);
    let v = fit_of(&fits, "value");
    assert_eq!((v.n_points, v.n_results), (15, 60));
    assert_eq!(fit_of(&fits, "spread").unit, "", "no unit given for spread");
    // The training data of the GP are the replicate means.
    let evals = s.store.evaluations(s.id).expect("evals");
    let first_point: Vec<f64> = evals
        .iter()
        .filter(|e| e.point_idx == 0)
        .map(|e| e.metrics["value"])
        .collect();
    assert_eq!(first_point.len(), 4);
    let mean = first_point.iter().sum::<f64>() / 4.0;
    assert!((v.gp.observed_y()[0] - mean).abs() < 1e-9 * mean.abs().max(1.0));
    // A linear trend with little noise is predicted closely (error well inside 0.5 mm).
    let p = query::predict(&fits, &s.spec, &[at(2.0, 7.0)]).expect("predict");
    let spread = p[0]
        .metrics
        .iter()
        .find(|m| m.metric == "spread")
        .expect("spread");
    assert!((spread.mean - 2.0).abs() < 0.5, "spread {}", spread.mean);
}

// Leave-one-out judgement (Bastos & O'Hagan 2009). Branin on 30 points
// (15 per parameter) is smooth and well predicted; 8 points are fewer than
// the 10 per parameter of Loeppky, Sacks & Welch (2009); a metric that is
// pure independent noise has no predictable part, so its Q2 is near 0 or below.
#[test]
fn check_fit_verdicts_follow_the_leave_one_out_errors() {
    let mut s = sweep(1);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(8);
    add_results(&mut s, &design(30, 6), &mut |x, _r| {
        BTreeMap::from([
            ("value".to_string(), branin(x[0], x[1])),
            ("noise".to_string(), rng.random_range(0.0..1.0)),
        ])
    });
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let verdicts = query::check_fit(&fits);
    let value = verdicts
        .iter()
        .find(|v| v.metric == "value")
        .expect("value");
    assert_eq!(value.verdict, Verdict::Trustworthy, "{}", value.reason);
    assert!(value.q2 > 0.9, "Q2 {}", value.q2);
    assert!(value.reason.contains("Q2 = "), "{}", value.reason);
    let noise = verdicts
        .iter()
        .find(|v| v.metric == "noise")
        .expect("noise");
    // With one run per point nothing separates noise from a rough function.
    assert_eq!(noise.verdict, Verdict::NeedsMorePoints, "{}", noise.reason);
    assert!(noise.q2 < 0.3, "Q2 {}", noise.q2);
    assert!(
        noise
            .reason
            .contains("points left out are predicted poorly"),
        "{}",
        noise.reason
    );

    let mut small = sweep(1);
    add_results(&mut small, &design(8, 6), &mut branin_only);
    let fits = fitter::refit_if_stale(&mut small.store, small.id, &small.spec).expect("fit");
    let v = &query::check_fit(&fits)[0];
    assert_eq!(v.verdict, Verdict::NeedsMorePoints);
    assert!(
        v.reason.contains("8 points for 2 parameters"),
        "{}",
        v.reason
    );
}

// The wire conversion of the Predict call gives the same numbers as the library call.
#[test]
fn predict_answer_through_the_wire_types_equals_the_library_call() {
    let mut s = sweep(1);
    add_results(&mut s, &design(20, 3), &mut branin_only);
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let local = query::predict(&fits, &s.spec, &[at(3.0, 2.5)]).expect("predict");

    let req = wire::predict_request(vec![at(3.0, 2.5)]);
    let reply = wire::answer(&fits, &s.spec, &req).expect("answer");
    assert_eq!(reply, wire::predict_reply(local.clone()));
    assert_eq!(wire::predictions_from_reply(reply), local);

    let bad = wire::predict_request(vec![[("x9".to_string(), 1.0)].into_iter().collect()]);
    let e = wire::answer(&fits, &s.spec, &bad)
        .map_err(wire::query_status)
        .expect_err("unknown parameter");
    assert_eq!(e.code(), tonic::Code::InvalidArgument);
    assert!(e.message().contains("x1 in [-5, 10] mm"), "{}", e.message());
    let e = wire::answer(&fits, &s.spec, &pb::PredictRequest { points: vec![] })
        .map_err(wire::query_status)
        .expect_err("no points");
    assert_eq!(e.code(), tonic::Code::InvalidArgument);
}

// A running coordinator answers Predict from its own fits: what a client
// receives through `QueryClient` equals the library's answer.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn predict_over_grpc_on_a_running_coordinator() {
    use tessera_coordinator::client::QueryClient;
    use tessera_coordinator::engine::{Engine, OpenOptions};
    use tessera_coordinator::server::{self, ServeOptions};
    use tessera_coordinator::service::CoordinatorService;
    use tessera_proto::channel::Dial;

    let mut s = sweep(1);
    add_results(&mut s, &design(20, 3), &mut branin_only);
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let local = query::predict(&fits, &s.spec, &[at(3.0, 2.5), at(50.0, 1.0)]).expect("predict");
    let Sweep {
        _dir, db, store, ..
    } = s;
    drop(store);

    let engine = Engine::open(OpenOptions {
        db: db.clone(),
        spec_text: spec_text(1),
        spec_file: "sweep.toml".into(),
        force: false,
        times: Default::default(),
        reproducible_default: false,
    })
    .expect("open engine");
    let service = CoordinatorService::new(engine.clone());
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind");
    let addr = listener.local_addr().expect("address");
    let stop = tokio_util::sync::CancellationToken::new();
    let server_stop = stop.clone();
    let server = tokio::spawn(server::serve(
        engine,
        service,
        listener,
        ServeOptions::default(),
        async move { server_stop.cancelled().await },
    ));

    let mut client = QueryClient::new(&Dial {
        url: format!("http://{addr}"),
        ..Dial::default()
    })
    .expect("a valid address");
    let remote = client
        .predict(vec![at(3.0, 2.5), at(50.0, 1.0)])
        .await
        .expect("predict over gRPC");
    assert_eq!(remote, local);
    assert!(remote[1]
        .warnings
        .iter()
        .any(|w| w.contains("extrapolation")));

    stop.cancel();
    server.await.expect("server task").expect("server");
}

// Without an objective metric, the calibration discrepancy
// sum ((m - value) / sd)^2 (Craig et al. 1997, squared) gets its own surrogate.
#[test]
fn a_calibration_sweep_also_fits_the_discrepancy() {
    let text = spec_text(1).replace(
        "[objective]\nminimize = \"value\"\n",
        "[[target]]\nmetric = \"value\"\nvalue = 10.0\nsd = 2.0\n",
    );
    let mut s = sweep_from(text);
    assert!(s.spec.objective.is_none() && s.spec.targets.len() == 1);
    let pts = design(12, 2);
    add_results(&mut s, &pts, &mut branin_only);
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let names: Vec<&str> = fits.iter().map(|f| f.metric.as_str()).collect();
    assert_eq!(names, ["calibration discrepancy", "value"]);
    let d = fit_of(&fits, "calibration discrepancy");
    let want = ((branin(pts[0][0], pts[0][1]) - 10.0) / 2.0).powi(2);
    // Fitted on a log scale (it cannot be negative); read back on its own scale.
    assert!((d.observed_natural()[0] - want).abs() < 1e-9 * want.max(1.0));
    assert_eq!(d.unit, "");
}

// With replicates, a metric whose point means differ only by run-to-run noise
// (independent uniform noise on [0, 1], variance 1/12 per run: the variance of
// a mean of 4 runs, 1/48, is the whole spread of the point means) is said to
// barely change, not to need more points; a small real trend on top of a
// large noise (same noise, trend 0 to 3 across x1) is still a trend.
#[test]
fn a_metric_that_is_only_noise_barely_changes() {
    let mut s = sweep(4);
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(9);
    add_results(&mut s, &design(24, 4), &mut |x, _r| {
        BTreeMap::from([
            ("noise".to_string(), rng.random_range(0.0..1.0)),
            (
                "trend".to_string(),
                0.2 * (x[0] + 5.0) + rng.random_range(0.0..1.0),
            ),
        ])
    });
    let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
    let verdicts = query::check_fit(&fits);
    let of = |m: &str| verdicts.iter().find(|v| v.metric == m).expect("metric");
    let noise = of("noise");
    assert_eq!(noise.verdict, Verdict::BarelyChanges, "{}", noise.reason);
    assert!(
        noise.reason.contains("barely changes over the box"),
        "{}",
        noise.reason
    );
    let trend = of("trend");
    assert_ne!(trend.verdict, Verdict::BarelyChanges, "{}", trend.reason);
}

// A positive metric spanning several orders of magnitude (Goldstein-Price,
// 3 to about 10^6 on [-2, 2]^2: Surjanovic & Bingham VLSE) with no declared
// bounds is fitted on a log scale, as Jones, Schonlau & Welch (1998) fitted
// it, and a note says so and how to undo it; on 30 points that predicts 200
// held-out values below 1000 (the region around the minimum) with a smaller
// median error than the fit on its own scale (`transform = "none"`, no note).
// Declared bounds give the same scale without the note, and bounds declared
// open on both sides keep its own scale; Branin (0.4 to 308,
// under three orders of magnitude) stays on its own scale.
#[test]
fn a_positive_metric_over_many_orders_of_magnitude_is_fitted_on_a_log_scale() {
    fn goldstein_price(x1: f64, x2: f64) -> f64 {
        let a = 1.0
            + (x1 + x2 + 1.0).powi(2)
                * (19.0 - 14.0 * x1 + 3.0 * x1 * x1 - 14.0 * x2 + 6.0 * x1 * x2 + 3.0 * x2 * x2);
        let b = 30.0
            + (2.0 * x1 - 3.0 * x2).powi(2)
                * (18.0 - 32.0 * x1 + 12.0 * x1 * x1 + 48.0 * x2 - 36.0 * x1 * x2 + 27.0 * x2 * x2);
        a * b
    }
    let natural = |u: &[f64]| vec![-2.0 + 4.0 * u[0], -2.0 + 4.0 * u[1]];
    let points: Vec<Vec<f64>> = tessera_surrogate::design::maximin_lhs(30, 2, 3)
        .iter()
        .map(|u| natural(u))
        .collect();
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(17);
    let mut held_out: Vec<(Vec<f64>, f64)> = Vec::new();
    while held_out.len() < 200 {
        let u = vec![rng.random::<f64>(), rng.random::<f64>()];
        let x = natural(&u);
        let y = goldstein_price(x[0], x[1]);
        if y < 1000.0 {
            held_out.push((u, y));
        }
    }
    let gp_metrics =
        |x: &[f64], _r: u32| BTreeMap::from([("value".to_string(), goldstein_price(x[0], x[1]))]);
    // (notes, whether on a log scale, median absolute held-out error)
    let fit_with = |extra: &str| -> (Vec<String>, bool, f64) {
        let text = spec_text(1)
            .replace("name = \"branin\"", "name = \"goldstein_price\"")
            .replace("range = [-5.0, 10.0]", "range = [-2.0, 2.0]")
            .replace("range = [0.0, 15.0]", "range = [-2.0, 2.0]")
            + extra;
        let mut s = sweep_from(text);
        add_results(&mut s, &points, &mut |x, r| gp_metrics(x, r));
        let fits = fitter::refit_if_stale(&mut s.store, s.id, &s.spec).expect("fit");
        let fit = fit_of(&fits, "value");
        let xs: Vec<Vec<f64>> = held_out.iter().map(|(u, _)| u.clone()).collect();
        let mut errors: Vec<f64> = fit
            .predict(&xs)
            .iter()
            .zip(&held_out)
            .map(|(p, (_, y))| (p.median - y).abs())
            .collect();
        errors.sort_by(f64::total_cmp);
        (
            query::check_fit(&fits)[0].notes.clone(),
            !fit.transform.is_identity(),
            errors[errors.len() / 2],
        )
    };
    let (notes, log, auto_error) = fit_with("");
    assert!(
        log && notes
            .iter()
            .any(|n| n.contains("fitted on a log scale") && n.contains("transform = \"none\"")),
        "{notes:?}"
    );
    let (notes, log, own_error) = fit_with("transform = \"none\"\n");
    assert!(
        !log && !notes.iter().any(|n| n.contains("log scale")),
        "{notes:?}"
    );
    assert!(
        auto_error < own_error,
        "median error on a log scale {auto_error}, on its own scale {own_error}"
    );
    let (notes, log, _) = fit_with("bounds = [0, inf]\n");
    assert!(
        log && !notes.iter().any(|n| n.contains("log scale")),
        "{notes:?}"
    );
    let (notes, log, _) = fit_with("bounds = [-inf, inf]\n");
    assert!(
        !log && !notes.iter().any(|n| n.contains("log scale")),
        "{notes:?}"
    );
    let mut b = sweep(1);
    add_results(&mut b, &design(30, 3), &mut branin_only);
    let fits = fitter::refit_if_stale(&mut b.store, b.id, &b.spec).expect("fit");
    assert!(fit_of(&fits, "value").transform.is_identity());
    let notes = &query::check_fit(&fits)[0].notes;
    assert!(!notes.iter().any(|n| n.contains("log scale")), "{notes:?}");
}
