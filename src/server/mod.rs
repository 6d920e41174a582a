//! The gRPC server: reference sets, sessions and streaming scoring over one shared [`State`],
//! gRPC health and reflection, a Prometheus listener, and a bounded graceful shutdown.

pub mod admin;
pub mod alerting;
pub mod auth;
pub mod compare;
pub mod conn;
pub mod error;
pub mod fleet;
pub mod history;
pub mod page;
pub mod limits;
mod services;
pub mod state;
pub mod watchers;

use std::future::Future;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tokio::sync::watch;

pub use error::ServiceError;
use error::NameMessageLimit;
pub use limits::Limits;
pub use state::State;

use crate::pb;

/// gRPC listen address unless configured.
pub const DEFAULT_LISTEN: &str = "127.0.0.1:7410";
/// Prometheus listen address unless configured (loopback: expose it deliberately).
pub const DEFAULT_METRICS_LISTEN: &str = "127.0.0.1:7411";
/// Largest gRPC message in bytes unless configured.
pub const DEFAULT_MAX_MESSAGE_BYTES: usize = 16 * 1024 * 1024;
/// Smallest `max_message_bytes` accepted (a smaller limit would refuse ordinary calls).
pub const MIN_MAX_MESSAGE_BYTES: usize = 1024;
/// How long a shutdown waits for in-flight batches before the process exits.
pub const DEFAULT_DRAIN: Duration = Duration::from_secs(10);
/// Seconds between reports of a watch stream unless asked.
pub const DEFAULT_WATCH_SECONDS: u32 = 5;
pub use crate::pb::{CONNECTION_WINDOW_BYTES, STREAM_WINDOW_BYTES};
/// Acknowledgements buffered per scoring stream before the server waits for the client.
pub const ACK_BUFFER: usize = 16;


/// Time the group-commit thread gathers batches into one transaction unless configured.
pub const DEFAULT_GROUP_COMMIT: Duration = Duration::from_millis(2);

/// A reference set to load at startup.
#[derive(Debug, Clone)]
pub struct StartupRefSet {
    /// Registry name.
    pub name: String,
    /// Files: one JSONL file, or plain reference streams.
    pub paths: Vec<PathBuf>,
    /// Plain text: an aligned source file.
    pub source: Option<PathBuf>,
}

/// Everything `serve` is configured with.
pub struct ServerConfig {
    /// Directory server-side loading may read from.
    pub refset_dir: Option<PathBuf>,
    /// Reference sets loaded before the server reports SERVING.
    pub startup_refsets: Vec<StartupRefSet>,
    /// Limits.
    pub limits: Limits,
    /// Largest message.
    pub max_message_bytes: usize,
    /// Shutdown drain time.
    pub drain: Duration,
    /// Where durable state lives (None: in memory only, nothing survives a restart).
    pub data_dir: Option<PathBuf>,
    /// Group-commit gathering time.
    pub group_commit: Duration,
    /// TLS: certificate chain and key (PEM), and optionally a client CA for mutual TLS.
    pub tls: Option<TlsFiles>,
    /// A plaintext listener serving only gRPC health (for probes when the main port uses TLS).
    pub health_listener: Option<TcpListener>,
    /// Bearer tokens (None: no authentication).
    pub tokens: Option<Arc<auth::Tokens>>,
    /// Bootstrap replicates per session exported to Prometheus.
    pub exported_resamples: usize,
    /// Alert rules the daemon evaluates.
    pub alert_rules: Vec<crate::alerts::rules::Rule>,
    /// Time between two evaluations of the alert rules.
    pub alert_every: Duration,
    /// Where firing and resolved alerts are posted (Alertmanager, webhooks).
    pub alert_targets: Vec<crate::alerts::deliver::Target>,
    /// This replica's name and fleet, for the producer affinity check.
    pub fleet: fleet::Fleet,
    /// How long sessions keep their history.
    pub history: crate::session::history::HistoryConfig,
}

/// PEM files of the server's TLS identity.
#[derive(Debug, Clone)]
pub struct TlsFiles {
    /// Certificate chain.
    pub cert: PathBuf,
    /// Private key.
    pub key: PathBuf,
    /// CA that client certificates must chain to (mutual TLS).
    pub client_ca: Option<PathBuf>,
}

impl Default for ServerConfig {
    fn default() -> Self {
        ServerConfig { refset_dir: None, startup_refsets: Vec::new(), limits: Limits::default(), max_message_bytes: DEFAULT_MAX_MESSAGE_BYTES, drain: DEFAULT_DRAIN, data_dir: None, group_commit: DEFAULT_GROUP_COMMIT, tls: None, health_listener: None, tokens: None, exported_resamples: crate::telemetry::DEFAULT_EXPORTED_RESAMPLES, alert_rules: Vec::new(), alert_every: Duration::from_secs(crate::alerts::rules::DEFAULT_EVAL_SECONDS), alert_targets: Vec::new(), fleet: fleet::Fleet::default(), history: Default::default() }
    }
}

/// Read and parse a startup reference set from local files (the operator's own paths).
fn load_startup(state: &State, r: &StartupRefSet) -> Result<(), ServiceError> {
    let read = |p: &PathBuf| -> Result<(String, Vec<u8>), ServiceError> {
        let name = p.display().to_string();
        std::fs::read(p).map(|b| (name.clone(), b)).map_err(|e| ServiceError::Input(crate::refs::InputError::file(&name, e.to_string())))
    };
    let files: Vec<(String, Vec<u8>)> = r.paths.iter().map(read).collect::<Result<_, _>>()?;
    let source = r.source.as_ref().map(read).transpose()?;
    let set = state.parse_refset(crate::refs::RefFormat::detect(&r.paths), &files, source.as_ref())?;
    let loaded = state.insert_refset(&r.name, set, true)?;
    crate::telemetry::record_refset(&loaded.name, loaded.set.len(), loaded.set.memory_bytes());
    tracing::info!(refset = %loaded.name, segments = loaded.set.len(), digest = %loaded.set.digest_hex(), "reference set loaded");
    Ok(())
}

/// Exit code of the process when the store cannot be written: acknowledged batches must be
/// durable, so the server stops rather than acknowledge what it could not keep.
pub const EXIT_STORE_FAILURE: u8 = 70;

/// Why [`run`] returned an error.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    /// The server could not start (store, TLS, listeners, startup reference sets).
    #[error("{0}")]
    Setup(String),
    /// The gRPC server failed while serving.
    #[error("gRPC server failed: {0}")]
    Serve(String),
    /// The store could not be written while serving: nothing more can be acknowledged.
    #[error("cannot write the store: {0}")]
    Store(String),
}

impl RunError {
    /// The process exit code this error calls for (`default` unless it has its own).
    pub fn exit_code(&self, default: u8) -> u8 {
        match self {
            RunError::Store(_) => EXIT_STORE_FAILURE,
            _ => default,
        }
    }
}

fn setup<E: std::fmt::Display>(e: E) -> RunError {
    RunError::Setup(e.to_string())
}

/// The per-replicate counters of every session with complete cumulative replicates, rendered
/// at each scrape.
fn replicate_series(state: &State, exported: usize) -> admin::ExtraSeries {
    let state = state.clone();
    Arc::new(move || {
        if exported == 0 {
            return String::new();
        }
        let sessions: Vec<_> = state.sessions().into_iter().filter_map(|s| s.cumulative_replicates().map(|r| (s.spec().name.clone(), s.spec().config, r))).collect();
        crate::telemetry::render_replicates(&sessions, exported)
    })
}

/// Run the server on bound listeners until `shutdown` resolves, then drain (bounded by
/// `config.drain`). `metrics`: the scrape listener and the recorder's handle. Used by `serve`
/// and, in process, by the tests' server helper.
pub async fn run(mut config: ServerConfig, grpc: TcpListener, metrics: Option<(TcpListener, metrics_exporter_prometheus::PrometheusHandle)>, shutdown: impl Future<Output = ()> + Send + 'static) -> Result<(), RunError> {
    let state = open_state(&config).await?;
    let (health, health_service) = tonic_health::server::health_reporter();
    health.set_service_status("", tonic_health::ServingStatus::NotServing).await;
    let page = admin::PageSource { state: state.clone(), tokens: config.tokens.clone() };
    let metrics_task = metrics.map(|(l, h)| admin::serve_metrics(l, h, replicate_series(&state, config.exported_resamples), Some(page))).transpose().map_err(RunError::Setup)?;
    let (stop_tx, stop_rx) = watch::channel(false);
    let tls = tls_config(config.tls.as_ref())?;
    let idle = config.limits.connection_idle;
    if let Some(l) = config.health_listener.take() {
        admin::serve_health(l, &health, idle, stop_rx.clone()).map_err(RunError::Setup)?;
    }
    let delivery = match config.alert_targets.is_empty() {
        true => None,
        false => Some(Arc::new(crate::alerts::deliver::Delivery::start(crate::alerts::deliver::DeliveryConfig::new(config.alert_targets.clone())).map_err(setup)?)),
    };
    alerting::start(state.clone(), config.alert_rules.clone(), config.alert_every, state.alerts().clone(), delivery.clone(), stop_rx.clone());
    let router = router(&config, &state, stop_rx, tls.clone(), health_service)?;

    // Graceful part: when `shutdown` fires, report NOT_SERVING, tell streams to finish their
    // current batch and end, and let tonic stop accepting.
    let (graceful_tx, graceful_rx) = tokio::sync::oneshot::channel::<()>();
    let health_for_stop = health.clone();
    let failed = state.clone();
    tokio::spawn(async move {
        // A store that cannot be written stops the server the same way: every batch that
        // reaches it from now on is refused, and the answers in flight still go out.
        tokio::select! {
            _ = shutdown => {}
            _ = failed.store_failure() => {}
        }
        tracing::info!("shutting down: NOT_SERVING, finishing in-flight batches");
        health_for_stop.set_service_status("", tonic_health::ServingStatus::NotServing).await;
        let _ = stop_tx.send(true);
        let _ = graceful_tx.send(());
    });
    let (drain_tx, drain_rx) = watch::channel(false);
    let admitted = conn::incoming(grpc, conn::Listener::Grpc, config.limits.max_connections, idle, tls).map_err(RunError::Setup)?;
    let serving = tokio::spawn(router.serve_with_incoming_shutdown(admitted, async move {
        let _ = graceful_rx.await;
        let _ = drain_tx.send(true);
    }));

    if let Err(e) = load_startup_sets(&state, config.startup_refsets.clone()).await {
        serving.abort();
        return Err(e);
    }
    health.set_service_status("", tonic_health::ServingStatus::Serving).await;
    tracing::info!("serving");
    let result = serve_until_done(serving, drain_rx, config.drain, &state).await;
    if let Some(d) = &delivery {
        // What is queued goes out before the process ends (bounded like the drain).
        d.shutdown(config.drain).await;
    }
    if let Some(t) = metrics_task {
        t.abort();
    }
    result
}

/// Open the store (when durable) and restore the state it holds.
async fn open_state(config: &ServerConfig) -> Result<State, RunError> {
    let store = match config.data_dir.clone() {
        Some(dir) => Some(Arc::new(tokio::task::spawn_blocking(move || crate::store::Store::open(&dir)).await.map_err(setup)?.map_err(setup)?)),
        None => None,
    };
    let state = State::with_store(config.refset_dir.clone(), config.limits, store, config.group_commit).map_err(setup)?;
    state.set_fleet(config.fleet.clone());
    state.set_history_config(config.history);
    if let Some(store) = state.store() {
        let st = state.clone();
        let n = tokio::task::spawn_blocking(move || st.restore()).await.map_err(setup)?.map_err(setup)?;
        tracing::info!(store = %store.path().display(), sessions = n, "durable state restored");
    } else {
        tracing::warn!("durability none: state is kept in memory only and is lost on exit");
    }
    Ok(state)
}

/// The TLS settings of the gRPC listener, read from their PEM files.
fn tls_config(files: Option<&TlsFiles>) -> Result<Option<tonic::transport::ServerTlsConfig>, RunError> {
    let Some(t) = files else { return Ok(None) };
    let _ = rustls::crypto::ring::default_provider().install_default();
    let read = |p: &PathBuf| std::fs::read(p).map_err(|e| RunError::Setup(format!("{}: {e}", p.display())));
    let mut tls = tonic::transport::ServerTlsConfig::new().timeout(conn::TLS_HANDSHAKE_TIMEOUT).identity(tonic::transport::Identity::from_pem(read(&t.cert)?, read(&t.key)?));
    if let Some(ca) = &t.client_ca {
        tls = tls.client_ca_root(tonic::transport::Certificate::from_pem(read(ca)?));
    }
    Ok(Some(tls))
}

/// Every gRPC service (ours, health, reflection) on one router with the transport settings.
fn router(config: &ServerConfig, state: &State, stop: watch::Receiver<bool>, tls: Option<tonic::transport::ServerTlsConfig>, health: tonic_health::pb::health_server::HealthServer<impl tonic_health::pb::health_server::Health>) -> Result<tonic::transport::server::Router, RunError> {
    let reflection_v1 = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(setup)?;
    let reflection_v1alpha = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(pb::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1alpha()
        .map_err(setup)?;
    let max = config.max_message_bytes;
    let svc = services::Services::new(state.clone(), stop, config.tokens.clone(), max);
    let history = pb::history_server::HistoryServer::new(history::HistoryService::new(state.clone(), config.tokens.clone()));
    let mut builder = tonic::transport::Server::builder();
    if let Some(tls) = tls {
        builder = builder.tls_config(tls).map_err(|e| RunError::Setup(format!("TLS configuration: {e}")))?;
    }
    let (ping_every, ping_wait) = conn::keepalive(config.limits.connection_idle);
    Ok(builder
        .http2_keepalive_interval(Some(ping_every))
        .http2_keepalive_timeout(Some(ping_wait))
        .initial_stream_window_size(STREAM_WINDOW_BYTES)
        .initial_connection_window_size(CONNECTION_WINDOW_BYTES)
        .add_service(health)
        .add_service(reflection_v1)
        .add_service(reflection_v1alpha)
        .add_service(NameMessageLimit::new(pb::ref_sets_server::RefSetsServer::new(svc.clone()).max_decoding_message_size(max).max_encoding_message_size(max), max))
        .add_service(NameMessageLimit::new(pb::sessions_server::SessionsServer::new(svc.clone()).max_decoding_message_size(max).max_encoding_message_size(max), max))
        .add_service(NameMessageLimit::new(history.max_decoding_message_size(max).max_encoding_message_size(max), max))
        .add_service(NameMessageLimit::new(pb::scoring_server::ScoringServer::new(svc).max_decoding_message_size(max).max_encoding_message_size(max), max)))
}

/// Load the startup reference sets (before SERVING).
async fn load_startup_sets(state: &State, sets: Vec<StartupRefSet>) -> Result<(), RunError> {
    let st = state.clone();
    let loaded = tokio::task::spawn_blocking(move || sets.iter().try_for_each(|r| load_startup(&st, r))).await.map_err(setup)?;
    loaded.map_err(|e| RunError::Setup(format!("cannot load startup reference set: {e}")))
}

/// Wait for the server to end: after a graceful shutdown (bounded by `drain`), or when it
/// fails; a store that could not be written is the error then.
async fn serve_until_done(mut serving: tokio::task::JoinHandle<Result<(), tonic::transport::Error>>, mut drain_rx: watch::Receiver<bool>, drain: Duration, state: &State) -> Result<(), RunError> {
    let result = tokio::select! {
        r = &mut serving => r,
        _ = async { let _ = drain_rx.wait_for(|d| *d).await; tokio::time::sleep(drain).await } => {
            tracing::warn!(drain_seconds = drain.as_secs_f64(), "drain time over; closing remaining connections");
            serving.abort();
            Ok(Ok(()))
        }
    };
    if let Some(message) = state.failed() {
        return Err(RunError::Store(message));
    }
    match result {
        Ok(Ok(())) => Ok(()),
        Ok(Err(e)) => Err(RunError::Serve(e.to_string())),
        Err(e) if e.is_cancelled() => Ok(()),
        Err(e) => Err(RunError::Serve(format!("task failed: {e}"))),
    }
}
