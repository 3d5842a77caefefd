//! Typed calls to a running coordinator for the query commands: its status
//! and its predictions, as the same domain types the file-based queries
//! give. The channel (address, TLS, token) is built by
//! `tessera_proto::channel`, the builder workers use too.

use crate::query::PointPrediction;
use crate::status::SweepStatus;
use crate::wire;
use std::collections::BTreeMap;
use tessera_proto::channel::{self, Client, Dial, DialError};
use tessera_proto::v1 as pb;

/// Why a call to the coordinator gave no answer.
#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    /// The address, the TLS settings or the token cannot be used.
    #[error(transparent)]
    Dial(#[from] DialError),
    /// The coordinator could not be reached.
    #[error("cannot reach the coordinator at {url}: {message}; is it running, and is the address right?")]
    Unreachable {
        /// The address.
        url: String,
        /// What the transport said.
        message: String,
    },
    /// The coordinator answered with an error.
    #[error("the coordinator at {url} answered: {message}")]
    Refused {
        /// The address.
        url: String,
        /// Its message.
        message: String,
    },
}

/// A client for the query calls of one coordinator.
#[derive(Debug, Clone)]
pub struct QueryClient {
    url: String,
    inner: Client,
}

impl QueryClient {
    /// A client for `dial` (the connection is made at the first call).
    pub fn new(dial: &Dial) -> Result<QueryClient, ClientError> {
        Ok(QueryClient {
            url: dial.url.clone(),
            inner: channel::connect(dial)?,
        })
    }

    fn error(&self, s: tonic::Status) -> ClientError {
        let transport = matches!(
            s.code(),
            tonic::Code::Unavailable | tonic::Code::DeadlineExceeded
        ) && s.message().contains("transport");
        if transport || s.code() == tonic::Code::Unavailable && s.message().is_empty() {
            ClientError::Unreachable {
                url: self.url.clone(),
                message: s.message().to_string(),
            }
        } else {
            ClientError::Refused {
                url: self.url.clone(),
                message: s.message().to_string(),
            }
        }
    }

    /// The sweep's status, with the coordinator's live workers and leases.
    pub async fn status(&mut self) -> Result<SweepStatus, ClientError> {
        match self.inner.status(pb::StatusRequest {}).await {
            Ok(r) => Ok(wire::status_from_reply(r.into_inner())),
            Err(s) => Err(self.error(s)),
        }
    }

    /// Predictions of every fitted metric at `points` (natural units, by
    /// parameter name), from the coordinator's latest surrogates.
    pub async fn predict(
        &mut self,
        points: Vec<BTreeMap<String, f64>>,
    ) -> Result<Vec<PointPrediction>, ClientError> {
        match self.inner.predict(wire::predict_request(points)).await {
            Ok(r) => Ok(wire::predictions_from_reply(r.into_inner())),
            Err(s) => Err(self.error(s)),
        }
    }
}
