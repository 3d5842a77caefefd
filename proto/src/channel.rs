//! The one way every tessera client dials a coordinator: the address check,
//! TLS with the operator's CA, the bearer token on every call, timeouts and
//! HTTP/2 keepalive. Workers and query commands use the same builder, so a
//! coordinator that a worker can reach can also be asked for its status.

use std::time::Duration;

use tonic::metadata::{Ascii, MetadataValue};
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Endpoint};
use tonic::{Request, Status};

use crate::v1::coordinator_client::CoordinatorClient;

/// How long to wait for a TCP (and TLS) connection.
pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(5);
/// Longest a single call may take (a report of many results included).
pub const CALL_TIMEOUT: Duration = Duration::from_secs(60);
/// HTTP/2 pings on an idle connection, so a dead peer is noticed.
pub const KEEPALIVE: Duration = Duration::from_secs(20);

/// Where and how to reach a coordinator.
#[derive(Clone, Default)]
pub struct Dial {
    /// `http://HOST:PORT`, or `https://HOST:PORT` with TLS.
    pub url: String,
    /// Bearer token, if the coordinator requires one.
    pub token: Option<String>,
    /// PEM certificate of the CA that signed the coordinator's certificate.
    pub ca_pem: Option<Vec<u8>>,
}

impl std::fmt::Debug for Dial {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Dial")
            .field("url", &self.url)
            .field("token", &self.token.as_ref().map(|_| "(set)"))
            .field("ca", &self.ca_pem.as_ref().map(|_| "(set)"))
            .finish()
    }
}

/// Why a coordinator address cannot be dialled.
#[derive(Debug, thiserror::Error)]
#[error("coordinator address {url:?} is not valid: {message}")]
pub struct DialError {
    /// The address given.
    pub url: String,
    /// What is wrong and what would be valid.
    pub message: String,
}

/// Adds `authorization: Bearer <token>` to every call.
#[derive(Clone)]
pub struct Bearer(Option<MetadataValue<Ascii>>);

impl std::fmt::Debug for Bearer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Bearer")
    }
}

impl tonic::service::Interceptor for Bearer {
    fn call(&mut self, mut req: Request<()>) -> Result<Request<()>, Status> {
        if let Some(v) = &self.0 {
            req.metadata_mut().insert("authorization", v.clone());
        }
        Ok(req)
    }
}

/// A client of the `Coordinator` service with the token attached.
pub type Client = CoordinatorClient<InterceptedService<Channel, Bearer>>;

/// Builds a client for `dial`. The connection is made lazily, at the first
/// call, and made again after it breaks; errors here are about the address,
/// the TLS settings or the token, never about the network.
pub fn connect(dial: &Dial) -> Result<Client, DialError> {
    let bad = |message: &str| DialError {
        url: dial.url.clone(),
        message: message.to_string(),
    };
    let url = &dial.url;
    let rest = url
        .strip_prefix("http://")
        .or_else(|| url.strip_prefix("https://"))
        .ok_or_else(|| {
            bad("write it as http://HOST:PORT (or https:// with TLS), for example http://10.0.0.5:7300")
        })?;
    if rest.is_empty() || rest.starts_with(':') || rest.starts_with('/') {
        return Err(bad("it names no host; for example http://10.0.0.5:7300"));
    }
    let mut ep = Endpoint::from_shared(url.clone())
        .map_err(|e| bad(&format!("{e}; expected for example http://10.0.0.5:7300")))?
        .connect_timeout(CONNECT_TIMEOUT)
        .timeout(CALL_TIMEOUT)
        .tcp_nodelay(true)
        .http2_keep_alive_interval(KEEPALIVE)
        .keep_alive_timeout(KEEPALIVE)
        .keep_alive_while_idle(true);
    let https = url.starts_with("https://");
    match (&dial.ca_pem, https) {
        (None, true) => {
            return Err(bad(
                "it uses https://, but no --ca was given: give the CA certificate (PEM) that signed the coordinator's certificate",
            ))
        }
        (Some(_), false) => {
            return Err(bad(
                "--ca was given, so the coordinator uses TLS: write the address with https://",
            ))
        }
        (Some(ca), true) => {
            ep = ep
                .tls_config(ClientTlsConfig::new().ca_certificate(Certificate::from_pem(ca)))
                .map_err(|e| bad(&format!("TLS: {e}")))?;
        }
        (None, false) => {}
    }
    let token = match &dial.token {
        Some(t) => Some(
            format!("Bearer {t}")
                .parse()
                .map_err(|_| bad("the token contains characters not allowed in a header"))?,
        ),
        None => None,
    };
    Ok(CoordinatorClient::with_interceptor(
        ep.connect_lazy(),
        Bearer(token),
    ))
}
