//! The gRPC client side shared by the commands that talk to a running server (`send`, `status`,
//! `load`, the live demo): the channel with its TLS and token settings from the environment,
//! the token interceptor, retry with backoff, and the one mapping of a failed call to an error.

use std::time::Duration;

use tonic::transport::{Channel, Endpoint};
use tonic::Code;

pub mod fleet;

/// Environment variable holding the bearer token of client commands (kept out of argv).
pub const TOKEN_ENV: &str = "MTGAUGE_TOKEN";
/// Environment variable naming the server's CA certificate (PEM) for TLS.
pub const TLS_CA_ENV: &str = "MTGAUGE_TLS_CA";
/// Environment variable naming the client certificate (PEM) for mutual TLS.
pub const TLS_CERT_ENV: &str = "MTGAUGE_TLS_CERT";
/// Environment variable naming the client key (PEM) for mutual TLS.
pub const TLS_KEY_ENV: &str = "MTGAUGE_TLS_KEY";
/// How long connecting to the server may take.
pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(5);
/// Attempts of a retried call before giving up.
pub const MAX_ATTEMPTS: u32 = 8;
/// First retry delay; doubles up to [`MAX_BACKOFF`].
pub const FIRST_BACKOFF: Duration = Duration::from_millis(200);
/// Longest retry delay.
pub const MAX_BACKOFF: Duration = Duration::from_secs(5);

/// What a client call can fail with.
#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    /// Bad connection settings (URL, TLS files, token).
    #[error("{0}")]
    Setup(String),
    /// The server answered a call with an error.
    #[error("{what}: {} ({:?})", status.message(), status.code())]
    Call {
        /// What was being done.
        what: String,
        /// The server's answer.
        status: tonic::Status,
    },
}

impl ClientError {
    /// The error of a failed call.
    pub fn call(what: &str, status: tonic::Status) -> ClientError {
        ClientError::Call { what: what.to_owned(), status }
    }
}

/// Adds the bearer token, if any, to every call.
#[derive(Clone)]
pub struct TokenInterceptor(Option<tonic::metadata::MetadataValue<tonic::metadata::Ascii>>);

impl tonic::service::Interceptor for TokenInterceptor {
    fn call(&mut self, mut req: tonic::Request<()>) -> Result<tonic::Request<()>, tonic::Status> {
        if let Some(v) = &self.0 {
            req.metadata_mut().insert("authorization", v.clone());
        }
        Ok(req)
    }
}

/// A client connection: channel plus token.
pub type Conn = tonic::service::interceptor::InterceptedService<Channel, TokenInterceptor>;

/// Connect (lazily) to a server URL; TLS and token settings come from the environment
/// ([`TLS_CA_ENV`], [`TLS_CERT_ENV`], [`TLS_KEY_ENV`], [`TOKEN_ENV`]).
pub fn channel(url: &str) -> Result<Conn, ClientError> {
    channel_to(url, None)
}

/// [`channel`], with TLS checking the server's certificate against `tls_name` instead of the
/// URL's host (a URL made from one of the addresses a name resolved to).
pub fn channel_to(url: &str, tls_name: Option<&str>) -> Result<Conn, ClientError> {
    let mut ep = Endpoint::from_shared(url.to_owned()).map_err(|e| ClientError::Setup(format!("--server {url}: {e}")))?;
    let env_file = |k: &str| -> Result<Option<Vec<u8>>, ClientError> {
        match std::env::var_os(k) {
            Some(p) => std::fs::read(&p).map(Some).map_err(|e| ClientError::Setup(format!("{k}={}: {e}", p.to_string_lossy()))),
            None => Ok(None),
        }
    };
    let ca = env_file(TLS_CA_ENV)?;
    let (cert, key) = (env_file(TLS_CERT_ENV)?, env_file(TLS_KEY_ENV)?);
    if ca.is_some() || url.starts_with("https://") {
        let _ = rustls::crypto::ring::default_provider().install_default();
        let mut tls = tonic::transport::ClientTlsConfig::new();
        if let Some(name) = tls_name {
            tls = tls.domain_name(name);
        }
        if let Some(ca) = ca {
            tls = tls.ca_certificate(tonic::transport::Certificate::from_pem(ca));
        }
        if let (Some(c), Some(k)) = (cert, key) {
            tls = tls.identity(tonic::transport::Identity::from_pem(c, k));
        }
        ep = ep.tls_config(tls).map_err(|e| ClientError::Setup(format!("TLS settings: {e}")))?;
    }
    let token = match std::env::var(TOKEN_ENV) {
        Ok(t) if !t.is_empty() => Some(format!("Bearer {t}").parse().map_err(|_| ClientError::Setup(format!("{TOKEN_ENV} holds characters a header cannot carry")))?),
        _ => None,
    };
    let ch = ep
        .connect_timeout(CONNECT_TIMEOUT)
        .initial_stream_window_size(crate::pb::STREAM_WINDOW_BYTES)
        .initial_connection_window_size(crate::pb::CONNECTION_WINDOW_BYTES)
        .connect_lazy();
    Ok(tonic::service::interceptor::InterceptedService::new(ch, TokenInterceptor(token)))
}

/// Whether a failed call may succeed when tried again (the server was unreachable, restarting
/// or went away mid-call); every other status is final.
pub fn retryable(s: &tonic::Status) -> bool {
    matches!(s.code(), Code::Unavailable | Code::Unknown | Code::Cancelled | Code::DeadlineExceeded)
}

/// Exponential backoff between attempts: [`FIRST_BACKOFF`], doubling up to [`MAX_BACKOFF`].
#[derive(Debug, Clone, Copy)]
pub struct Backoff {
    delay: Duration,
}

impl Default for Backoff {
    fn default() -> Self {
        Backoff { delay: FIRST_BACKOFF }
    }
}

impl Backoff {
    /// The delay before the next attempt.
    pub fn delay(&self) -> Duration {
        self.delay
    }

    /// Double the delay, up to [`MAX_BACKOFF`].
    pub fn advance(&mut self) {
        self.delay = (self.delay * 2).min(MAX_BACKOFF);
    }

    /// Wait the current delay, then double it.
    pub async fn wait(&mut self) {
        tokio::time::sleep(self.delay).await;
        self.advance();
    }
}

/// Run `call` until it succeeds, retrying retryable failures with backoff up to
/// [`MAX_ATTEMPTS`] times; each retry is said on stderr.
pub async fn with_retry<T, F, Fut>(what: &str, mut call: F) -> Result<T, ClientError>
where
    F: FnMut() -> Fut,
    Fut: std::future::Future<Output = Result<tonic::Response<T>, tonic::Status>>,
{
    let mut backoff = Backoff::default();
    let mut attempt = 1;
    loop {
        match call().await {
            Ok(r) => return Ok(r.into_inner()),
            Err(s) if retryable(&s) && attempt < MAX_ATTEMPTS => {
                eprintln!("mtgauge: {what}: {} ({:?}); retrying in {:.1} s (attempt {} of {MAX_ATTEMPTS})", s.message(), s.code(), backoff.delay().as_secs_f64(), attempt + 1);
                backoff.wait().await;
                attempt += 1;
            }
            Err(s) => return Err(ClientError::call(what, s)),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn backoff_doubles_up_to_the_bound() {
        let mut b = Backoff::default();
        let mut seen = Vec::new();
        for _ in 0..7 {
            seen.push(b.delay());
            b.advance();
        }
        assert_eq!(seen[..3], [FIRST_BACKOFF, FIRST_BACKOFF * 2, FIRST_BACKOFF * 4]);
        assert_eq!(*seen.last().unwrap(), MAX_BACKOFF);
    }

    #[test]
    fn call_errors_name_what_failed_and_the_code() {
        let e = ClientError::call("get scores", tonic::Status::not_found("no session named 'x'"));
        assert_eq!(e.to_string(), "get scores: no session named 'x' (NotFound)");
        assert!(!retryable(&tonic::Status::not_found("x")) && retryable(&tonic::Status::unavailable("x")));
        assert!(matches!(channel("not a url"), Err(ClientError::Setup(m)) if m.contains("--server not a url")));
    }
}
