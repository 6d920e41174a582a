//! Accepted connections: a bound on how many are open at once, and a deadline on silent ones.
//!
//! Every connection holds a permit of one semaphore; past `limits.max_connections` a new
//! connection is closed right after it is accepted (the client sees the connection end and
//! retries with its backoff) instead of waiting unseen in the kernel's backlog. A connection from
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

use crate::telemetry;

/// Pause after a failed `accept` (for example out of file descriptors) before the next one, so
/// that a persistent failure does not spin a core.
pub const ACCEPT_ERROR_PAUSE: Duration = Duration::from_millis(50);
/// Longest interval between the server's HTTP/2 keepalive pings.
pub const KEEPALIVE_INTERVAL: Duration = Duration::from_secs(30);
/// Longest wait for a ping's acknowledgement before the connection is closed.
pub const KEEPALIVE_TIMEOUT: Duration = Duration::from_secs(20);
/// Longest TLS handshake.
pub const TLS_HANDSHAKE_TIMEOUT: Duration = Duration::from_secs(10);
/// Connections accepted but not yet taken by the HTTP/2 server.
const ACCEPT_QUEUE: usize = 64;

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
}

impl Listener {
    /// The metric label.
    pub fn label(self) -> &'static str {
        match self {
            Listener::Grpc => "grpc",
            Listener::Health => "health",
        }
    }
}

/// Accept connections on `listener` for tonic's `serve_with_incoming*`: at most `max` open at
/// once, each closed after `idle` without a byte read. Accepting stops when the server drops the
/// stream (shutdown).
pub fn incoming(listener: TcpListener, which: Listener, max: usize, idle: Duration) -> ReceiverStream<io::Result<Guarded>> {
    let (tx, rx) = mpsc::channel(ACCEPT_QUEUE);
    let open = Arc::new(Semaphore::new(max));
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
                if last_warning.is_none_or(|t| t.elapsed() >= Duration::from_secs(1)) {
                    last_warning = Some(Instant::now());
                    tracing::warn!(%peer, listener = which.label(), limit = max, "connection refused: limits.max_connections reached");
                }
                drop(tcp);
                continue;
            };
            let _ = tcp.set_nodelay(true);
            telemetry::connection_opened(which.label());
            if tx.send(Ok(Guarded::new(tcp, permit, which, idle))).await.is_err() {
                break;
            }
        }
    });
    ReceiverStream::new(rx)
}

/// An accepted connection with its permit and its idle deadline.
pub struct Guarded {
    tcp: TcpStream,
    which: Listener,
    idle: Duration,
    last_read: Instant,
    deadline: Pin<Box<Sleep>>,
    _permit: OwnedSemaphorePermit,
}

impl Guarded {
    fn new(tcp: TcpStream, permit: OwnedSemaphorePermit, which: Listener, idle: Duration) -> Guarded {
        let now = Instant::now();
        Guarded { tcp, which, idle, last_read: now, deadline: Box::pin(tokio::time::sleep_until(now + idle)), _permit: permit }
    }
}

impl Drop for Guarded {
    fn drop(&mut self) {
        telemetry::connection_closed(self.which.label());
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
                        telemetry::connection_idle_closed(this.which.label());
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
