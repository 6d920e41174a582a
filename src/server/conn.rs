//! Accepted connections: a bound on how many are open at once, and a deadline on silent ones.
//!
//! Every connection holds a permit of one semaphore. Past `limits.max_connections` a new
//! connection is not left waiting unseen in the kernel's backlog: it is handed to a small
//! refusing server that answers every call with RESOURCE_EXHAUSTED naming the limit and closes
//! the connection within seconds (at most [`REFUSING_MAX_CONNECTIONS`] at once; beyond those a
//! connection is closed on arrival without an answer). A connection from
//! which nothing at all has been read for `limits.connection_idle_seconds` is closed. The server
//! pings every connection more often than that (HTTP/2 keepalive, see [`keepalive`]), and every
//! HTTP/2 client answers pings, so a live client, even one that only waits on a watch stream,
//! always has something read within the deadline; what it closes are peers that never speak
//! HTTP/2, stalled handshakes and dead hosts.

use std::future::Future;
use std::io;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Duration;

use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};
use tokio::net::{TcpListener, TcpStream};
use tokio::sync::{mpsc, OwnedSemaphorePermit, Semaphore};
use tokio::time::{Instant, Sleep};
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::server::{Connected, TcpConnectInfo};

use super::error::ServiceError;
use super::limits::Limit;
use crate::telemetry;

/// Pause after a failed `accept` (for example out of file descriptors) before the next one, so
/// that a persistent failure does not spin a core.
pub const ACCEPT_ERROR_PAUSE: Duration = Duration::from_millis(50);
/// Refused connections are logged at most once per this interval (a flood must not become a
/// flood of log lines).
pub const REFUSAL_LOG_INTERVAL: Duration = Duration::from_secs(1);
/// Longest interval between the server's HTTP/2 keepalive pings.
pub const KEEPALIVE_INTERVAL: Duration = Duration::from_secs(30);
/// Longest wait for a ping's acknowledgement before the connection is closed.
pub const KEEPALIVE_TIMEOUT: Duration = Duration::from_secs(20);
/// Longest TLS handshake.
pub const TLS_HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);
/// Connections accepted but not yet taken by the HTTP/2 server.
const ACCEPT_QUEUE: usize = 64;
/// Over-limit connections being told RESOURCE_EXHAUSTED at once.
pub const REFUSING_MAX_CONNECTIONS: usize = 64;
/// Age at which the refusing server closes an over-limit connection (GOAWAY), and the grace
/// after it before the connection is dropped.
pub const REFUSING_CONNECTION_AGE: Duration = Duration::from_secs(2);
/// See [`REFUSING_CONNECTION_AGE`].
pub const REFUSING_CONNECTION_GRACE: Duration = Duration::from_secs(1);

/// Ping interval and acknowledgement timeout for an idle deadline: at least four pings per
/// deadline, and an acknowledgement is awaited for at most half of it.
pub fn keepalive(idle: Duration) -> (Duration, Duration) {
    (KEEPALIVE_INTERVAL.min(idle / 4), KEEPALIVE_TIMEOUT.min(idle / 2))
}

/// Which listener a connection came in on (a label of the connection metrics).
#[derive(Debug, Clone, Copy)]
pub enum Listener {
    /// The main gRPC port.
    Grpc,
    /// The plaintext health port.
    Health,
    /// The Prometheus scrape port (HTTP/1): past its limit a connection is closed on arrival.
    Metrics,
}

impl Listener {
    /// The metric label.
    pub fn label(self) -> &'static str {
        match self {
            Listener::Grpc => "grpc",
            Listener::Health => "health",
            Listener::Metrics => "metrics",
        }
    }

    /// What a client past the limit of `max` connections is told.
    fn refusal(self, max: usize) -> ServiceError {
        match self {
            Listener::Grpc => ServiceError::Limit { what: format!("connection {}", max + 1), limit: max as u64, key: Limit::MaxConnections.key() },
            Listener::Health => ServiceError::Busy(format!("connection limit reached: {max} connections are open on the health listener")),
            Listener::Metrics => ServiceError::Busy(format!("scrape limit reached: {max} scrapes are being answered")),
        }
    }

    /// Whether a client past the limit is answered (gRPC) rather than just closed (HTTP/1).
    fn answers_refusals(self) -> bool {
        !matches!(self, Listener::Metrics)
    }
}

/// Accept connections on `listener` for tonic's `serve_with_incoming*`: at most `max` open at
/// once, each closed after `idle` without a byte read. Connections past `max` go to
/// [`serve_refusals`] (speaking `tls` when given, like the listener's server). Accepting stops
/// when the server drops the returned stream (shutdown).
pub fn incoming(listener: TcpListener, which: Listener, max: usize, idle: Duration, tls: Option<tonic::transport::ServerTlsConfig>) -> Result<ReceiverStream<io::Result<Guarded>>, String> {
    let (tx, rx) = mpsc::channel(ACCEPT_QUEUE);
    let (over_tx, over_rx) = mpsc::channel(ACCEPT_QUEUE);
    let open = Arc::new(Semaphore::new(max));
    let refusing = Arc::new(Semaphore::new(REFUSING_MAX_CONNECTIONS));
    let refusal = which.refusal(max).to_string();
    if which.answers_refusals() {
        serve_refusals(ReceiverStream::new(over_rx), tls, which, max)?;
    }
    tokio::spawn(async move {
        // Log refusals at most once per second: a flood must not become a flood of log lines.
        let mut last_warning: Option<Instant> = None;
        loop {
            let accepted = tokio::select! {
                _ = tx.closed() => break,
                a = listener.accept() => a,
            };
            let (tcp, peer) = match accepted {
                Ok(a) => a,
                Err(e) => {
                    tracing::warn!(error = %e, listener = which.label(), "accept failed");
                    tokio::time::sleep(ACCEPT_ERROR_PAUSE).await;
                    continue;
                }
            };
            let Ok(permit) = Arc::clone(&open).try_acquire_owned() else {
                telemetry::connection_refused(which.label());
                if !which.answers_refusals() {
                    telemetry::scrape_refused();
                    continue;
                }
                if last_warning.is_none_or(|t| t.elapsed() >= REFUSAL_LOG_INTERVAL) {
                    last_warning = Some(Instant::now());
                    tracing::warn!(%peer, listener = which.label(), "connection refused: {refusal}");
                }
                // Tell the client why, while few are being told; past that, just close.
                if let Ok(p) = Arc::clone(&refusing).try_acquire_owned() {
                    let _ = over_tx.try_send(Ok(Guarded::new(tcp, p, None, idle.min(REFUSING_CONNECTION_AGE))));
                }
                continue;
            };
            let _ = tcp.set_nodelay(true);
            telemetry::connection_opened(which.label());
            if tx.send(Ok(Guarded::new(tcp, permit, Some(which), idle))).await.is_err() {
                break;
            }
        }
    });
    Ok(ReceiverStream::new(rx))
}

/// Answer every call on over-limit connections with `which`'s refusal (RESOURCE_EXHAUSTED), and close
/// each connection after [`REFUSING_CONNECTION_AGE`]. Ends when `over_limit` does.
fn serve_refusals(over_limit: ReceiverStream<io::Result<Guarded>>, tls: Option<tonic::transport::ServerTlsConfig>, which: Listener, max: usize) -> Result<(), String> {
    let refuse = tonic::service::InterceptorLayer::new(move |_: tonic::Request<()>| -> Result<tonic::Request<()>, tonic::Status> { Err(which.refusal(max).into()) });
    let mut server = tonic::transport::Server::builder();
    if let Some(tls) = tls {
        server = server.tls_config(tls).map_err(|e| format!("TLS configuration: {e}"))?;
    }
    // Some service must be routed to; the interceptor answers before any is reached.
    let (_, placeholder) = tonic_health::server::health_reporter();
    let router = server.max_connection_age(REFUSING_CONNECTION_AGE).max_connection_age_grace(REFUSING_CONNECTION_GRACE).layer(refuse).add_service(placeholder);
    tokio::spawn(async move {
        let _ = router.serve_with_incoming(over_limit).await;
    });
    Ok(())
}

/// An accepted connection with its permit and its idle deadline.
pub struct Guarded {
    tcp: TcpStream,
    /// The listener whose open-connection gauge counts it (None: an over-limit connection).
    which: Option<Listener>,
    idle: Duration,
    last_read: Instant,
    deadline: Pin<Box<Sleep>>,
    _permit: OwnedSemaphorePermit,
}

impl Guarded {
    fn new(tcp: TcpStream, permit: OwnedSemaphorePermit, which: Option<Listener>, idle: Duration) -> Guarded {
        let now = Instant::now();
        Guarded { tcp, which, idle, last_read: now, deadline: Box::pin(tokio::time::sleep_until(now + idle)), _permit: permit }
    }
}

impl Drop for Guarded {
    fn drop(&mut self) {
        if let Some(w) = self.which {
            telemetry::connection_closed(w.label());
        }
    }
}

impl Connected for Guarded {
    type ConnectInfo = TcpConnectInfo;

    fn connect_info(&self) -> TcpConnectInfo {
        self.tcp.connect_info()
    }
}

impl AsyncRead for Guarded {
    fn poll_read(self: Pin<&mut Self>, cx: &mut Context<'_>, buf: &mut ReadBuf<'_>) -> Poll<io::Result<()>> {
        let this = self.get_mut();
        let before = buf.filled().len();
        match Pin::new(&mut this.tcp).poll_read(cx, buf) {
            Poll::Ready(r) => {
                if buf.filled().len() > before {
                    // The timer is moved only when it fires (below), not on every read.
                    this.last_read = Instant::now();
                }
                Poll::Ready(r)
            }
            Poll::Pending => loop {
                let due = this.last_read + this.idle;
                if this.deadline.deadline() != due {
                    this.deadline.as_mut().reset(due);
                }
                match this.deadline.as_mut().poll(cx) {
                    Poll::Pending => return Poll::Pending,
                    Poll::Ready(()) if Instant::now() >= due => {
                        if let Some(w) = this.which {
                            telemetry::connection_idle_closed(w.label());
                        }
                        tracing::debug!(idle_seconds = this.idle.as_secs_f64(), "closing a connection on which nothing was received");
                        return Poll::Ready(Err(io::Error::new(io::ErrorKind::TimedOut, "nothing received within limits.connection_idle_seconds")));
                    }
                    Poll::Ready(()) => {}
                }
            },
        }
    }
}

impl AsyncWrite for Guarded {
    fn poll_write(self: Pin<&mut Self>, cx: &mut Context<'_>, buf: &[u8]) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().tcp).poll_write(cx, buf)
    }

    fn poll_write_vectored(self: Pin<&mut Self>, cx: &mut Context<'_>, bufs: &[io::IoSlice<'_>]) -> Poll<io::Result<usize>> {
        Pin::new(&mut self.get_mut().tcp).poll_write_vectored(cx, bufs)
    }

    fn is_write_vectored(&self) -> bool {
        self.tcp.is_write_vectored()
    }

    fn poll_flush(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().tcp).poll_flush(cx)
    }

    fn poll_shutdown(self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Pin::new(&mut self.get_mut().tcp).poll_shutdown(cx)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keepalive_pings_several_times_per_deadline() {
        assert_eq!(keepalive(Duration::from_secs(300)), (KEEPALIVE_INTERVAL, KEEPALIVE_TIMEOUT));
        let (every, wait) = keepalive(Duration::from_secs(2));
        assert_eq!(every, Duration::from_millis(500));
        assert_eq!(wait, Duration::from_secs(1));
    }
}
