//! The `Predict` gRPC call: conversion between the wire messages and the
//! query types, and the function the coordinator's service calls.

use super::predict::{predict, MetricPrediction, PointPrediction};
use super::{describe_params, open_sweep, QueryError};
use crate::fitter::{self, MetricFit};
use crate::spec::Spec;
use crate::store::Store;
use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use tessera_proto::v1 as pb;
use tonic::Status;

/// Answers `Predict` requests (the same type as `service::PredictFn`).
pub type PredictFn =
    Arc<dyn Fn(pb::PredictRequest) -> Result<pb::PredictReply, Status> + Send + Sync>;

/// The points of a request, keyed by parameter name.
pub fn request_points(req: &pb::PredictRequest) -> Vec<BTreeMap<String, f64>> {
    req.points
        .iter()
        .map(|p| p.values.iter().map(|(k, v)| (k.clone(), *v)).collect())
        .collect()
}

/// The wire form of predictions.
pub fn predict_reply(predictions: Vec<PointPrediction>) -> pb::PredictReply {
    pb::PredictReply {
        predictions: predictions
            .into_iter()
            .map(|p| pb::PointPrediction {
                point: Some(pb::PointValues {
                    values: p.point.into_iter().collect(),
                }),
                metrics: p
                    .metrics
                    .into_iter()
                    .map(|m| pb::MetricPrediction {
                        metric: m.metric,
                        unit: m.unit,
                        mean: m.mean,
                        sd: m.sd,
                        lower95: m.lower95,
                        upper95: m.upper95,
                        sd_ratio: m.sd_ratio,
                    })
                    .collect(),
                warnings: p.warnings,
            })
            .collect(),
    }
}

/// Predictions back from their wire form (for `tessera predict --coordinator`).
pub fn predictions_from_reply(reply: pb::PredictReply) -> Vec<PointPrediction> {
    reply
        .predictions
        .into_iter()
        .map(|p| PointPrediction {
            point: p
                .point
                .map(|v| v.values.into_iter().collect())
                .unwrap_or_default(),
            metrics: p
                .metrics
                .into_iter()
                .map(|m| MetricPrediction {
                    metric: m.metric,
                    unit: m.unit,
                    mean: m.mean,
                    sd: m.sd,
                    lower95: m.lower95,
                    upper95: m.upper95,
                    sd_ratio: m.sd_ratio,
                })
                .collect(),
            warnings: p.warnings,
        })
        .collect()
}

/// The gRPC status for a query error.
pub fn status_of(e: QueryError) -> Status {
    match e {
        QueryError::UnknownParameter { .. }
        | QueryError::MissingParameters { .. }
        | QueryError::BadValue { .. }
        | QueryError::BadAssignment { .. }
        | QueryError::NoPoints { .. }
        | QueryError::NotAParameter { .. }
        | QueryError::NoSuchMetric { .. } => Status::invalid_argument(e.to_string()),
        QueryError::NoFits { .. } | QueryError::NoSweep { .. } => {
            Status::failed_precondition(e.to_string())
        }
        QueryError::Store(_) => Status::unavailable(e.to_string()),
        QueryError::StoredSpec { .. } | QueryError::DamagedFit { .. } | QueryError::Internal(_) => {
            Status::internal(e.to_string())
        }
    }
}

/// Answers a request from fits already loaded.
pub fn answer(
    fits: &[MetricFit],
    spec: &Spec,
    req: &pb::PredictRequest,
) -> Result<pb::PredictReply, QueryError> {
    let points = request_points(req);
    if points.is_empty() {
        return Err(QueryError::NoPoints {
            valid: describe_params(spec),
        });
    }
    Ok(predict_reply(predict(fits, spec, &points)?))
}

/// Fits read from the database, remembered by the row ids of the fits.
struct Cached {
    ids: Vec<i64>,
    spec: Spec,
    fits: Vec<MetricFit>,
}

/// Loads the latest stored fits, reusing the cached ones if no new fit was stored.
fn current(
    db: &std::path::Path,
    cache: &Mutex<Option<Cached>>,
) -> Result<(Spec, Vec<MetricFit>), QueryError> {
    let store = Store::open_existing(db)?;
    let (sweep_id, spec) = open_sweep(&store)?;
    let records = store.latest_fits(sweep_id)?;
    let ids: Vec<i64> = records.iter().map(|r| r.id).collect();
    let mut guard = cache.lock().unwrap_or_else(|p| p.into_inner());
    if let Some(c) = guard.as_ref() {
        if c.ids == ids && c.spec == spec {
            return Ok((c.spec.clone(), c.fits.clone()));
        }
    }
    let names: Vec<String> = spec.params.iter().map(|p| p.name.clone()).collect();
    let fits: Vec<MetricFit> = records
        .iter()
        .filter_map(|r| match MetricFit::from_record(r) {
            Ok(f) if f.params == names => Some(f),
            Ok(_) => None,
            Err(e) => {
                tracing::warn!(error = %e, "skipping a stored fit");
                None
            }
        })
        .collect();
    if fits.is_empty() {
        return Err(QueryError::NoFits {
            reason: format!(
                "the coordinator has not fitted one yet (it needs results at {} or more points); try again later",
                fitter::MIN_POINTS
            ),
        });
    }
    *guard = Some(Cached {
        ids,
        spec: spec.clone(),
        fits: fits.clone(),
    });
    Ok((spec, fits))
}

/// A `Predict` handler over the sweep database `db`: each call reads the
/// latest stored fits (made by the coordinator's background refits, see
/// [`fitter::refit_if_stale`]); fits are parsed again only when a new one
/// was stored. It never fits itself, so a call is fast.
pub fn predict_fn(db: PathBuf) -> PredictFn {
    let cache: Mutex<Option<Cached>> = Mutex::new(None);
    Arc::new(move |req: pb::PredictRequest| {
        let (spec, fits) = current(&db, &cache).map_err(status_of)?;
        answer(&fits, &spec, &req).map_err(status_of)
    })
}
