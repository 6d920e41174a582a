//! `mtgauge serve`: the daemon.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use clap::Args;
use serde::Deserialize;

use super::CliError;
use crate::server::{self, Limits, ServerConfig, StartupRefSet, DEFAULT_LISTEN, DEFAULT_METRICS_LISTEN};
use crate::server::state::{DEFAULT_MAX_BATCH_ITEMS, DEFAULT_MAX_REFSETS, DEFAULT_MAX_REFSET_BYTES, DEFAULT_MAX_SESSIONS, DEFAULT_MAX_STREAMS, DEFAULT_MAX_TEXT_BYTES, DEFAULT_MAX_TOTAL_REFSET_BYTES, DEFAULT_MAX_WATCHERS, DEFAULT_MAX_CONNECTIONS, DEFAULT_CONNECTION_IDLE_SECONDS};
use crate::telemetry::{self, LogFormat};

/// The long help of `serve`, with every limit's default taken from its constant.
pub fn long_about() -> String {
    let limits = [
        ("max_batch_items", DEFAULT_MAX_BATCH_ITEMS.to_string(), "items in one batch"),
        ("max_text_bytes", DEFAULT_MAX_TEXT_BYTES.to_string(), "bytes of one hypothesis or source"),
        ("max_sessions", DEFAULT_MAX_SESSIONS.to_string(), "sessions"),
        ("max_refsets", DEFAULT_MAX_REFSETS.to_string(), "reference sets"),
        ("max_refset_bytes", DEFAULT_MAX_REFSET_BYTES.to_string(), "input bytes of one reference set"),
        ("max_total_refset_bytes", DEFAULT_MAX_TOTAL_REFSET_BYTES.to_string(), "memory of all reference sets"),
        ("max_streams", DEFAULT_MAX_STREAMS.to_string(), "scoring streams open at once"),
        ("max_watchers", DEFAULT_MAX_WATCHERS.to_string(), "watch subscribers at once"),
        ("max_connections", DEFAULT_MAX_CONNECTIONS.to_string(), "connections open at once; more are refused"),
        ("connection_idle_seconds", DEFAULT_CONNECTION_IDLE_SECONDS.to_string(), "seconds of silence that close a connection"),
    ];
    let table: String = limits.iter().map(|(k, d, what)| format!("  {k:<24} {d:>11}  {what}\n")).collect();
    format!(
        "\
Run the monitoring daemon: reference sets in memory, sessions, streaming scoring over gRPC, and \
Prometheus counters of the additive statistics on a separate HTTP listener (GET /metrics).

State (reference sets, sessions, statistics, producer sequence marks) is kept in an embedded ACID \
store under --data-dir (default {data_dir}; one serve per directory) and restored at \
startup; a batch is acknowledged only once it is on disk. --durability none keeps memory only.

Settings come from --config FILE (TOML) and flags; a flag overrides the file. Keys of the file:
  listen, metrics_listen, health_listen, tls_cert, tls_key, tls_client_ca, tokens,
  refset_dir, data_dir, durability, group_commit_ms, drain_seconds,
  log_format, max_message_bytes (default {max_message}),
  [limits] (below), [[refset]] name, paths = [...], source (loaded at startup).

[limits] keys, each at least 1, with their defaults; a request past one is refused with \
RESOURCE_EXHAUSTED or INVALID_ARGUMENT naming its key:
{table}
gRPC health reports SERVING once the startup reference sets are loaded. SIGTERM or SIGINT: \
NOT_SERVING, no new batches, in-flight batches are scored and acknowledged, exit within the \
drain time. Port 0 picks a free port; the bound addresses are logged at startup.",
        data_dir = crate::store::DEFAULT_DATA_DIR,
        max_message = crate::server::DEFAULT_MAX_MESSAGE_BYTES,
    )
}

/// `serve` options.
#[derive(Debug, Args)]
pub struct ServeArgs {
    /// TOML configuration file (see above for its keys).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// gRPC listen address [default: 127.0.0.1:7410].
    #[arg(long, value_name = "ADDR")]
    pub listen: Option<SocketAddr>,
    /// Prometheus listen address [default: 127.0.0.1:7411].
    #[arg(long, value_name = "ADDR")]
    pub metrics_listen: Option<SocketAddr>,
    /// Directory that clients may load reference sets from (RefSets.Load); without it,
    /// server-side loading is refused.
    #[arg(long, value_name = "DIR")]
    pub refset_dir: Option<PathBuf>,
    /// Load a reference set at startup: NAME=PATH[,PATH...] (one .jsonl file, or plain reference
    /// streams; a plain set may name its aligned source file with a last element source:PATH).
    #[arg(long = "refset", value_name = "NAME=PATHS")]
    pub refsets: Vec<String>,
    /// Seconds to wait for in-flight batches at shutdown [default: 10].
    #[arg(long, value_name = "S")]
    pub drain_seconds: Option<u64>,
    /// Directory of the durable store [default: /var/lib/mtgauge].
    #[arg(long, value_name = "DIR")]
    pub data_dir: Option<PathBuf>,
    /// sync: every acknowledged batch is on disk (group commit); none: memory only, nothing
    /// survives a restart [default: sync].
    #[arg(long, value_enum)]
    pub durability: Option<Durability>,
    /// Milliseconds the group commit gathers batches into one transaction [default: 2].
    #[arg(long, value_name = "MS")]
    pub group_commit_ms: Option<u64>,
    /// TLS certificate chain (PEM); with --tls-key, the gRPC port speaks TLS only.
    #[arg(long, value_name = "FILE", requires = "tls_key")]
    pub tls_cert: Option<PathBuf>,
    /// TLS private key (PEM).
    #[arg(long, value_name = "FILE", requires = "tls_cert")]
    pub tls_key: Option<PathBuf>,
    /// Require client certificates signed by this CA (mutual TLS).
    #[arg(long, value_name = "FILE")]
    pub tls_client_ca: Option<PathBuf>,
    /// Also serve gRPC health, in plaintext, on this address (for probes when the main port
    /// uses TLS).
    #[arg(long, value_name = "ADDR")]
    pub health_listen: Option<SocketAddr>,
    /// Require bearer tokens: a file of token hashes and scopes (see `mtgauge token --help`).
    #[arg(long, value_name = "FILE")]
    pub tokens: Option<PathBuf>,
    /// Log format on stderr (level from RUST_LOG, default info) [default: human].
    #[arg(long, value_enum)]
    pub log_format: Option<LogFormat>,
}

/// Durability of acknowledged batches.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Durability {
    /// Written to the store (fsync per group commit) before the acknowledgement.
    Sync,
    /// Memory only.
    None,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileConfig {
    tls_cert: Option<PathBuf>,
    tls_key: Option<PathBuf>,
    tls_client_ca: Option<PathBuf>,
    health_listen: Option<SocketAddr>,
    tokens: Option<PathBuf>,
    data_dir: Option<PathBuf>,
    durability: Option<Durability>,
    group_commit_ms: Option<u64>,
    listen: Option<SocketAddr>,
    metrics_listen: Option<SocketAddr>,
    refset_dir: Option<PathBuf>,
    drain_seconds: Option<u64>,
    log_format: Option<String>,
    max_message_bytes: Option<u64>,
    #[serde(default)]
    limits: FileLimits,
    #[serde(default)]
    refset: Vec<FileRefSet>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileLimits {
    max_batch_items: Option<i64>,
    max_text_bytes: Option<i64>,
    max_sessions: Option<i64>,
    max_refsets: Option<i64>,
    max_refset_bytes: Option<i64>,
    max_total_refset_bytes: Option<i64>,
    max_streams: Option<i64>,
    max_watchers: Option<i64>,
    max_connections: Option<i64>,
    connection_idle_seconds: Option<i64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileRefSet {
    name: String,
    paths: Vec<PathBuf>,
    source: Option<PathBuf>,
}

/// A positive limit from the file, or the default.
fn limit(key: &str, v: Option<i64>, default: u64) -> Result<u64, CliError> {
    match v {
        None => Ok(default),
        Some(n) if n >= 1 => Ok(n as u64),
        Some(n) => Err(CliError::Usage(format!("config key {key} must be at least 1, got {n}"))),
    }
}

/// Parse `NAME=PATH[,PATH...][,source:PATH]`.
pub fn parse_refset_flag(s: &str) -> Result<StartupRefSet, CliError> {
    let (name, paths) = s.split_once('=').ok_or_else(|| CliError::Usage(format!("--refset {s}: expected NAME=PATH[,PATH...]")))?;
    let mut out = StartupRefSet { name: name.to_owned(), paths: Vec::new(), source: None };
    for p in paths.split(',').filter(|p| !p.is_empty()) {
        match p.strip_prefix("source:") {
            Some(src) => out.source = Some(PathBuf::from(src)),
            None => out.paths.push(PathBuf::from(p)),
        }
    }
    if out.paths.is_empty() {
        return Err(CliError::Usage(format!("--refset {s}: no reference file given")));
    }
    Ok(out)
}

pub(super) fn run(a: ServeArgs) -> Result<(), CliError> {
    let file: FileConfig = match &a.config {
        Some(p) => {
            let text = std::fs::read_to_string(p).map_err(|e| CliError::Usage(format!("{}: {e}", p.display())))?;
            toml::from_str(&text).map_err(|e| {
                // One line on stderr: the parser's multi-line snippet is folded.
                let text = e.to_string();
                let msg: Vec<&str> = text.lines().map(str::trim).filter(|l| !l.is_empty() && *l != "|").collect();
                CliError::Usage(format!("{}: {}", p.display(), msg.join(" ")))
            })?
        }
        None => FileConfig::default(),
    };
    let log_format = match (a.log_format, file.log_format.as_deref()) {
        (Some(f), _) => f,
        (None, None | Some("human")) => LogFormat::Human,
        (None, Some("json")) => LogFormat::Json,
        (None, Some(other)) => return Err(CliError::Usage(format!("config key log_format must be human or json, got '{other}'"))),
    };
    let l = &file.limits;
    let limits = Limits {
        max_batch_items: limit("limits.max_batch_items", l.max_batch_items, DEFAULT_MAX_BATCH_ITEMS as u64)? as usize,
        max_text_bytes: limit("limits.max_text_bytes", l.max_text_bytes, DEFAULT_MAX_TEXT_BYTES as u64)? as usize,
        max_sessions: limit("limits.max_sessions", l.max_sessions, DEFAULT_MAX_SESSIONS as u64)? as usize,
        max_refsets: limit("limits.max_refsets", l.max_refsets, DEFAULT_MAX_REFSETS as u64)? as usize,
        max_refset_bytes: limit("limits.max_refset_bytes", l.max_refset_bytes, DEFAULT_MAX_REFSET_BYTES)?,
        max_total_refset_bytes: limit("limits.max_total_refset_bytes", l.max_total_refset_bytes, DEFAULT_MAX_TOTAL_REFSET_BYTES)?,
        max_streams: limit("limits.max_streams", l.max_streams, DEFAULT_MAX_STREAMS as u64)? as usize,
        max_watchers: limit("limits.max_watchers", l.max_watchers, DEFAULT_MAX_WATCHERS as u64)? as usize,
        max_connections: limit("limits.max_connections", l.max_connections, DEFAULT_MAX_CONNECTIONS as u64)? as usize,
        connection_idle: Duration::from_secs(limit("limits.connection_idle_seconds", l.connection_idle_seconds, DEFAULT_CONNECTION_IDLE_SECONDS)?),
    };
    let mut startup: Vec<StartupRefSet> = file.refset.into_iter().map(|r| StartupRefSet { name: r.name, paths: r.paths, source: r.source }).collect();
    for s in &a.refsets {
        startup.push(parse_refset_flag(s)?);
    }
    let mut config = ServerConfig { refset_dir: a.refset_dir.or(file.refset_dir), startup_refsets: startup, limits, ..Default::default() };
    if let Some(m) = file.max_message_bytes {
        config.max_message_bytes = usize::try_from(m).ok().filter(|&m| m >= 1024).ok_or_else(|| CliError::Usage(format!("config key max_message_bytes must be at least 1024, got {m}")))?;
    }
    config.data_dir = match a.durability.or(file.durability).unwrap_or(Durability::Sync) {
        Durability::Sync => Some(a.data_dir.or(file.data_dir).unwrap_or_else(|| PathBuf::from(crate::store::DEFAULT_DATA_DIR))),
        Durability::None => None,
    };
    if let Some(ms) = a.group_commit_ms.or(file.group_commit_ms) {
        config.group_commit = Duration::from_millis(ms);
    }
    if let Some(d) = a.drain_seconds.or(file.drain_seconds) {
        config.drain = Duration::from_secs(d);
    }
    let default_addr = |s: &str| s.parse::<SocketAddr>().expect("valid default address");
    let listen = a.listen.or(file.listen).unwrap_or_else(|| default_addr(DEFAULT_LISTEN));
    let metrics_listen = a.metrics_listen.or(file.metrics_listen).unwrap_or_else(|| default_addr(DEFAULT_METRICS_LISTEN));

    config.tls = match (a.tls_cert.or(file.tls_cert), a.tls_key.or(file.tls_key)) {
        (Some(cert), Some(key)) => Some(server::TlsFiles { cert, key, client_ca: a.tls_client_ca.or(file.tls_client_ca) }),
        (None, None) => None,
        _ => return Err(CliError::Usage("TLS needs both a certificate (tls_cert) and a key (tls_key)".into())),
    };
    if let Some(p) = a.tokens.or(file.tokens) {
        let text = std::fs::read_to_string(&p).map_err(|e| CliError::Usage(format!("{}: {e}", p.display())))?;
        config.tokens = Some(std::sync::Arc::new(server::auth::Tokens::parse(&p.display().to_string(), &text).map_err(CliError::Usage)?));
    }
    let health_listen = a.health_listen.or(file.health_listen);

    telemetry::init_logs(log_format);
    let rt = tokio::runtime::Builder::new_multi_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    rt.block_on(async move {
        let grpc = tokio::net::TcpListener::bind(listen).await.map_err(|e| CliError::Usage(format!("cannot listen on {listen}: {e}")))?;
        let metrics = tokio::net::TcpListener::bind(metrics_listen).await.map_err(|e| CliError::Usage(format!("cannot listen on {metrics_listen} (metrics): {e}")))?;
        let handle = telemetry::install_metrics().map_err(CliError::Usage)?;
        let (g, m) = (grpc.local_addr().unwrap_or(listen), metrics.local_addr().unwrap_or(metrics_listen));
        if let Some(h) = health_listen {
            let l = tokio::net::TcpListener::bind(h).await.map_err(|e| CliError::Usage(format!("cannot listen on {h} (health): {e}")))?;
            tracing::info!(health = %l.local_addr().unwrap_or(h), "plaintext health listener");
            config.health_listener = Some(l);
        }
        telemetry::log_listening(g, m);
        server::run(config, grpc, Some((metrics, handle)), shutdown_signal()).await.map_err(CliError::Usage)
    })?;
    tracing::info!("stopped");
    Ok(())
}

/// Resolves on SIGTERM or SIGINT.
async fn shutdown_signal() {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        match signal(SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = term.recv() => {}
                    _ = tokio::signal::ctrl_c() => {}
                }
            }
            Err(_) => {
                let _ = tokio::signal::ctrl_c().await;
            }
        }
    }
    #[cfg(not(unix))]
    {
        let _ = tokio::signal::ctrl_c().await;
    }
}
