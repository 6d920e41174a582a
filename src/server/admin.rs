//! The admin listeners, apart from the data path: the Prometheus scrape port (`GET /metrics`)
//! and the optional plaintext gRPC health port (for probes when the main port speaks TLS). Both
//! take their connections from [`super::conn::incoming`], so they share its bound on open
//! connections, its idle deadline and its accounting.

use std::time::Duration;

use metrics_exporter_prometheus::PrometheusHandle;
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWrite, AsyncWriteExt};
use tokio::net::TcpListener;
use tokio::sync::watch;
use tokio_stream::StreamExt;

use super::conn::{self, Listener};

/// Scrape connections served at once; more are closed on arrival (Prometheus scrapes each target
/// over one connection at a time, so a few cover several scrapers).
pub const METRICS_MAX_CONNECTIONS: usize = 16;
/// Most bytes of a scrape's request head read (a longer head is answered from what was read).
pub const SCRAPE_HEAD_BYTES: usize = 4096;
/// Longest time one scrape connection may take, reading the request and writing the answer.
pub const METRICS_REQUEST_TIMEOUT: Duration = Duration::from_secs(10);
/// Connections open at once on the plaintext health listener (probes open one at a time).
pub const HEALTH_MAX_CONNECTIONS: usize = 64;

/// Series rendered at scrape time and appended to the recorder's (the per-replicate counters).
pub type ExtraSeries = std::sync::Arc<dyn Fn() -> String + Send + Sync>;

/// What the status page reads: the state, and the tokens a reader must present (None: no
/// authentication, like the scrape).
#[derive(Clone)]
pub struct PageSource {
    /// The server's state.
    pub state: super::State,
    /// Bearer tokens (scope `read`).
    pub tokens: Option<std::sync::Arc<super::auth::Tokens>>,
}

/// Serve `GET /metrics` (Prometheus text format) and, with `page`, the status page (`GET /`
/// and `GET /api/v1/overview`, see [`super::page`]) on `listener` until the returned task is
/// aborted.
pub fn serve_metrics(listener: TcpListener, handle: PrometheusHandle, extra: ExtraSeries, page: Option<PageSource>) -> Result<tokio::task::JoinHandle<()>, String> {
    let mut admitted = conn::incoming(listener, Listener::Metrics, METRICS_MAX_CONNECTIONS, METRICS_REQUEST_TIMEOUT, None)?;
    Ok(tokio::spawn(async move {
        while let Some(sock) = admitted.next().await {
            let Ok(mut sock) = sock else { continue };
            let (handle, extra, page) = (handle.clone(), extra.clone(), page.clone());
            tokio::spawn(async move {
                let _ = tokio::time::timeout(METRICS_REQUEST_TIMEOUT, answer_scrape(&mut sock, &handle, &extra, page.as_ref())).await;
            });
        }
    }))
}

/// Read one request head and answer it: the metrics for `GET /metrics`, 404 for anything else.
async fn answer_scrape<S: AsyncRead + AsyncWrite + Unpin>(sock: &mut S, handle: &PrometheusHandle, extra: &ExtraSeries, page: Option<&PageSource>) {
    let mut buf = vec![0u8; SCRAPE_HEAD_BYTES];
    let mut n = 0;
    // Read the request head (bounded); the body, if any, is ignored.
    while n < buf.len() {
        match sock.read(&mut buf[n..]).await {
            Ok(0) | Err(_) => return,
            Ok(k) => n += k,
        }
        if buf[..n].windows(4).any(|w| w == b"\r\n\r\n") {
            break;
        }
    }
    let head = String::from_utf8_lossy(&buf[..n]);
    let path = head.split_whitespace().nth(1).unwrap_or("");
    let (status, ctype, body) = if head.starts_with("GET ") && (path == "/metrics" || path.starts_with("/metrics?")) {
        let extra = std::sync::Arc::clone(extra);
        let more = tokio::task::spawn_blocking(move || extra()).await.unwrap_or_default();
        ("200 OK", "text/plain; version=0.0.4; charset=utf-8", handle.render() + &more)
    } else if let (true, Some(page), Some(which)) = (head.starts_with("GET "), page, page_path(path)) {
        match page_allowed(&head, page) {
            Err(message) => ("401 Unauthorized", "text/plain; charset=utf-8", message + "\n"),
            Ok(()) => {
                let state = page.state.clone();
                let query = path.split_once('?').map_or(String::new(), |(_, q)| q.to_owned());
                let body = tokio::task::spawn_blocking(move || match which {
                    PagePath::Page => super::page::page_html(&state, &query),
                    PagePath::Overview => super::page::overview_json(&state, &query),
                    PagePath::Compare => super::page::comparison_json(&state, &query),
                })
                .await
                .unwrap_or_default();
                ("200 OK", if which == PagePath::Page { "text/html; charset=utf-8" } else { "application/json" }, body)
            }
        }
    } else {
        ("404 Not Found", "text/plain; charset=utf-8", "not found: try /metrics\n".to_string())
    };
    let resp = format!("HTTP/1.1 {status}\r\nContent-Type: {ctype}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}", body.len());
    let _ = sock.write_all(resp.as_bytes()).await;
    let _ = sock.shutdown().await;
}

/// What the status page serves.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum PagePath {
    /// `GET /`: the page.
    Page,
    /// `GET /api/v1/overview`: every session's card, as JSON.
    Overview,
    /// `GET /api/v1/compare?a=NAME&b=NAME`: two sessions compared, as JSON.
    Compare,
}

/// What `path` asks of the page, if anything.
fn page_path(path: &str) -> Option<PagePath> {
    match path.split('?').next().unwrap_or("") {
        "/" | "/index.html" => Some(PagePath::Page),
        "/api/v1/overview" => Some(PagePath::Overview),
        "/api/v1/compare" => Some(PagePath::Compare),
        _ => None,
    }
}

/// With tokens on, the page needs a bearer token with the `read` scope (as GetScores does).
fn page_allowed(head: &str, page: &PageSource) -> Result<(), String> {
    let Some(tokens) = &page.tokens else { return Ok(()) };
    let mut req = tonic::Request::new(());
    let bearer = head.lines().find_map(|l| l.split_once(':').filter(|(k, _)| k.trim().eq_ignore_ascii_case("authorization")).map(|(_, v)| v.trim().to_owned()));
    if let Some(v) = bearer.and_then(|v| v.parse().ok()) {
        req.metadata_mut().insert("authorization", v);
    }
    tokens.check(&req, super::auth::Scope::Read).map_err(|e| e.to_string())
}

/// Serve gRPC health alone, in plaintext, on `listener` (the same status as the main port's)
/// until `stop` turns true.
pub fn serve_health(listener: TcpListener, health: &tonic_health::server::HealthReporter, idle: Duration, mut stop: watch::Receiver<bool>) -> Result<(), String> {
    let service = tonic_health::pb::health_server::HealthServer::new(tonic_health::server::HealthService::from_health_reporter(health.clone()));
    let admitted = conn::incoming(listener, Listener::Health, HEALTH_MAX_CONNECTIONS, idle, None)?;
    let (ping_every, ping_wait) = conn::keepalive(idle);
    tokio::spawn(async move {
        let _ = tonic::transport::Server::builder()
            .http2_keepalive_interval(Some(ping_every))
            .http2_keepalive_timeout(Some(ping_wait))
            .add_service(service)
            .serve_with_incoming_shutdown(admitted, async move {
                let _ = stop.wait_for(|s| *s).await;
            })
            .await;
    });
    Ok(())
}
