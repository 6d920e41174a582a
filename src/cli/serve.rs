//! `mtgauge serve`: the daemon.

use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use clap::Args;
use serde::Deserialize;

use super::CliError;
use crate::server::limits::{Limit, LimitsSection};
use crate::server::{self, Limits, ServerConfig, StartupRefSet, DEFAULT_LISTEN, DEFAULT_METRICS_LISTEN};
use crate::telemetry::{self, LogFormat};

/// The long help of `serve`, with every limit's default taken from its constant.
pub fn long_about() -> String {
    let table: String = Limit::ALL.iter().map(|l| format!("  {:<24} {:>11}  {}\n", l.name(), l.default_value(), l.help())).collect();
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
  log_format, max_message_bytes (default {max_message}), exported_resamples (default {exported}),
  alert_eval_seconds (default {eval}), [[alert]] (alert rules the daemon evaluates: see README),
  [[alert_target]] kind = alertmanager|webhook, url, bearer_token_file, ca_file (where alerts go),
  [limits] (below), [[refset]] name, paths = [...], source (loaded at startup),
  replica_name, fleet = [...] (a replica's name and its fleet's: see --replica-name),
  [history] minute_days (default {h_min}), hour_days (default {h_hour}), minute_interval_minutes
  (default {h_min_iv}), hour_interval_hours (default {h_hour_iv}): how long each session keeps
  one-minute and hourly buckets of its statistics, and their replicate sums (intervals).

[limits] keys, each at least 1, with their defaults; a request past one is refused with \
RESOURCE_EXHAUSTED or INVALID_ARGUMENT naming its key:
{table}
gRPC health reports SERVING once the startup reference sets are loaded. SIGTERM or SIGINT: \
NOT_SERVING, no new batches, in-flight batches are scored and acknowledged, exit within the \
drain time. Port 0 picks a free port; the bound addresses are logged at startup. \
--show-config prints the settings this command line and file resolve to (every default \
filled in), the keys the file accepts and the metrics the server exports, as JSON, and exits.",
        data_dir = crate::store::DEFAULT_DATA_DIR,
        max_message = crate::server::DEFAULT_MAX_MESSAGE_BYTES,
        exported = telemetry::DEFAULT_EXPORTED_RESAMPLES,
        eval = crate::alerts::rules::DEFAULT_EVAL_SECONDS,
        h_min = crate::session::history::DEFAULT_MINUTE_RETENTION_SECS / 86_400,
        h_hour = crate::session::history::DEFAULT_HOUR_RETENTION_SECS / 86_400,
        h_min_iv = crate::session::history::DEFAULT_MINUTE_INTERVAL_SECS / 60,
        h_hour_iv = crate::session::history::DEFAULT_HOUR_INTERVAL_SECS / 3600,
    )
}

/// `serve` options.
#[derive(Debug, Default, Args)]
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
    /// Bootstrap replicates per session exported to Prometheus as per-replicate counters (the
    /// first N of each session's; 0: none). Each costs (1 + 2 x order + 2 + 3 x chrF orders)
    /// series per session [default: 100].
    #[arg(long, value_name = "N")]
    pub exported_resamples: Option<usize>,
    /// This replica's name in a fleet (e.g. the pod name): producers pick their replica by
    /// hashing over these names (README, "Producer affinity"), and a named replica refuses a
    /// batch that belongs to another one.
    #[arg(long, value_name = "NAME")]
    pub replica_name: Option<String>,
    /// Every replica name of the fleet, comma-separated (this one included): clients hash over
    /// this set even while a replica is down, and a batch routed over another set is refused.
    #[arg(long, value_name = "NAME,NAME...", value_delimiter = ',')]
    pub fleet: Vec<String>,
    /// Print the resolved settings (file, flags and defaults), the accepted config keys and
    /// the exported metric names as JSON, then exit without serving.
    #[arg(long)]
    pub show_config: bool,
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

/// The config file's top-level keys (what `FileConfig` reads).
const FILE_KEYS: [&str; 23] = [
    "tls_cert", "tls_key", "tls_client_ca", "health_listen", "tokens", "data_dir", "durability", "group_commit_ms", "listen",
    "metrics_listen", "refset_dir", "drain_seconds", "log_format", "max_message_bytes", "exported_resamples", "alert_eval_seconds", "limits", "refset",
    "alert", "alert_target", "replica_name", "fleet", "history",
];
/// The keys of one `[[alert_target]]` entry.
const TARGET_KEYS: [&str; 4] = ["kind", "url", "bearer_token_file", "ca_file"];
/// The keys of one `[[refset]]` entry.
const REFSET_KEYS: [&str; 3] = ["name", "paths", "source"];

/// The config file as read (every key optional).
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FileConfig {
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
    exported_resamples: Option<usize>,
    alert_eval_seconds: Option<u64>,
    replica_name: Option<String>,
    fleet: Option<Vec<String>>,
    #[serde(default)]
    alert: Vec<crate::alerts::rules::RuleEntry>,
    #[serde(default)]
    alert_target: Vec<FileTarget>,
    #[serde(default)]
    limits: LimitsSection,
    #[serde(default)]
    refset: Vec<FileRefSet>,
    #[serde(default)]
    history: crate::session::history::HistorySection,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileTarget {
    kind: String,
    url: String,
    bearer_token_file: Option<PathBuf>,
    ca_file: Option<PathBuf>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileRefSet {
    name: String,
    paths: Vec<PathBuf>,
    source: Option<PathBuf>,
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

/// Read a config file's text (`name` for errors); a parse error is one line.
pub fn parse_file(name: &str, text: &str) -> Result<FileConfig, CliError> {
    toml::from_str(text).map_err(|e| {
        // One line on stderr: the parser's multi-line snippet is folded.
        let text = e.to_string();
        let msg: Vec<&str> = text.lines().map(str::trim).filter(|l| !l.is_empty() && *l != "|").collect();
        CliError::Usage(format!("{name}: {}", msg.join(" ")))
    })
}

/// Everything `serve` runs with, resolved from the flags, the config file and the defaults.
pub struct Resolved {
    /// The server's settings (without the parts that need I/O: tokens and the health listener).
    pub server: ServerConfig,
    /// gRPC address.
    pub listen: SocketAddr,
    /// Prometheus address.
    pub metrics_listen: SocketAddr,
    /// Plaintext health address.
    pub health_listen: Option<SocketAddr>,
    /// Tokens file.
    pub tokens: Option<PathBuf>,
    /// Log format.
    pub log_format: LogFormat,
    /// Bearer-token files of the alert targets, by their index in `server.alert_targets`.
    pub alert_token_files: Vec<(usize, PathBuf)>,
}

/// Resolve flags over the file over the defaults; no I/O (tests call this).
pub fn resolve(a: &ServeArgs, file: FileConfig) -> Result<Resolved, CliError> {
    let log_format = match (a.log_format, file.log_format.as_deref()) {
        (Some(f), _) => f,
        (None, None | Some("human")) => LogFormat::Human,
        (None, Some("json")) => LogFormat::Json,
        (None, Some(other)) => return Err(CliError::Usage(format!("config key log_format must be human or json, got '{other}'"))),
    };
    let limits = Limits::from_section(&file.limits.0).map_err(|e| CliError::Usage(e.to_string()))?;
    let mut startup: Vec<StartupRefSet> = file.refset.into_iter().map(|r| StartupRefSet { name: r.name, paths: r.paths, source: r.source }).collect();
    for s in &a.refsets {
        startup.push(parse_refset_flag(s)?);
    }
    let mut config = ServerConfig { refset_dir: a.refset_dir.clone().or(file.refset_dir), startup_refsets: startup, limits, ..Default::default() };
    if let Some(m) = file.max_message_bytes {
        config.max_message_bytes = usize::try_from(m).ok().filter(|&m| m >= server::MIN_MAX_MESSAGE_BYTES).ok_or_else(|| {
            CliError::Usage(format!("config key max_message_bytes must be at least {}, got {m}", server::MIN_MAX_MESSAGE_BYTES))
        })?;
    }
    config.data_dir = match a.durability.or(file.durability).unwrap_or(Durability::Sync) {
        Durability::Sync => Some(a.data_dir.clone().or(file.data_dir).unwrap_or_else(|| PathBuf::from(crate::store::DEFAULT_DATA_DIR))),
        Durability::None => None,
    };
    if let Some(ms) = a.group_commit_ms.or(file.group_commit_ms) {
        config.group_commit = Duration::from_millis(ms);
    }
    if let Some(n) = a.exported_resamples.or(file.exported_resamples) {
        config.exported_resamples = n;
    }
    config.alert_rules = crate::alerts::rules::check_rules(&file.alert).map_err(|e| CliError::Usage(e.to_string()))?;
    let mut alert_token_files = Vec::new();
    for (i, t) in file.alert_target.iter().enumerate() {
        let kind = match t.kind.as_str() {
            "alertmanager" => crate::alerts::deliver::TargetKind::Alertmanager,
            "webhook" => crate::alerts::deliver::TargetKind::Webhook,
            k => return Err(CliError::Usage(format!("alert_target {}: kind '{k}' is not alertmanager or webhook", i + 1))),
        };
        if let Some(p) = &t.bearer_token_file {
            alert_token_files.push((i, p.clone()));
        }
        config.alert_targets.push(crate::alerts::deliver::Target { kind, url: t.url.clone(), bearer_token: None, ca_file: t.ca_file.clone() });
    }
    if let Some(s) = file.alert_eval_seconds {
        if s == 0 {
            return Err(CliError::Usage("config key alert_eval_seconds must be at least 1".into()));
        }
        config.alert_every = Duration::from_secs(s);
    }
    let fleet = if a.fleet.is_empty() { file.fleet.unwrap_or_default() } else { a.fleet.clone() };
    config.fleet = crate::server::fleet::Fleet::new(a.replica_name.clone().or(file.replica_name), fleet).map_err(CliError::Usage)?;
    if let Some(d) = a.drain_seconds.or(file.drain_seconds) {
        config.drain = Duration::from_secs(d);
    }
    config.history = file.history.resolve().map_err(|e| CliError::Usage(format!("config section [history]: {e}")))?;
    let default_addr = |s: &str| s.parse::<SocketAddr>().map_err(|e| CliError::Usage(format!("default address {s}: {e}")));
    let listen = match a.listen.or(file.listen) {
        Some(l) => l,
        None => default_addr(DEFAULT_LISTEN)?,
    };
    let metrics_listen = match a.metrics_listen.or(file.metrics_listen) {
        Some(l) => l,
        None => default_addr(DEFAULT_METRICS_LISTEN)?,
    };
    config.tls = match (a.tls_cert.clone().or(file.tls_cert), a.tls_key.clone().or(file.tls_key)) {
        (Some(cert), Some(key)) => Some(server::TlsFiles { cert, key, client_ca: a.tls_client_ca.clone().or(file.tls_client_ca) }),
        (None, None) => None,
        _ => return Err(CliError::Usage("TLS needs both a certificate (tls_cert) and a key (tls_key)".into())),
    };
    Ok(Resolved { server: config, listen, metrics_listen, health_listen: a.health_listen.or(file.health_listen), tokens: a.tokens.clone().or(file.tokens), log_format, alert_token_files })
}

/// What `--show-config` prints: the resolved settings, the accepted keys and the metrics.
pub fn show_config(r: &Resolved) -> serde_json::Value {
    let c = &r.server;
    let path = |p: &Option<PathBuf>| p.as_ref().map(|p| p.display().to_string());
    let refsets: Vec<serde_json::Value> = c
        .startup_refsets
        .iter()
        .map(|s| serde_json::json!({"name": s.name, "paths": s.paths.iter().map(|p| p.display().to_string()).collect::<Vec<_>>(), "source": path(&s.source)}))
        .collect();
    serde_json::json!({
        "settings": {
            "listen": r.listen.to_string(),
            "metrics_listen": r.metrics_listen.to_string(),
            "health_listen": r.health_listen.map(|a| a.to_string()),
            "refset_dir": path(&c.refset_dir),
            "durability": if c.data_dir.is_some() { "sync" } else { "none" },
            "data_dir": path(&c.data_dir),
            "group_commit_ms": c.group_commit.as_millis() as u64,
            "drain_seconds": c.drain.as_secs(),
            "max_message_bytes": c.max_message_bytes,
            "exported_resamples": c.exported_resamples,
            "alert_eval_seconds": c.alert_every.as_secs(),
            "history": {"minute_days": c.history.minute_retention / 86_400, "hour_days": c.history.hour_retention / 86_400, "minute_interval_minutes": c.history.minute_intervals / 60, "hour_interval_hours": c.history.hour_intervals / 3600},
            "alert": c.alert_rules,
            "alert_target": c.alert_targets.iter().map(|t| serde_json::json!({"kind": format!("{:?}", t.kind).to_lowercase(), "url": t.url, "ca_file": path(&t.ca_file)})).collect::<Vec<_>>(),
            "log_format": match r.log_format { LogFormat::Human => "human", LogFormat::Json => "json" },
            "tls_cert": c.tls.as_ref().map(|t| t.cert.display().to_string()),
            "tls_key": c.tls.as_ref().map(|t| t.key.display().to_string()),
            "tls_client_ca": c.tls.as_ref().and_then(|t| t.client_ca.as_ref()).map(|p| p.display().to_string()),
            "tokens": path(&r.tokens),
            "limits": c.limits.section(),
            "refset": refsets,
            "replica_name": c.fleet.name,
            "fleet": c.fleet.members,
        },
        "keys": { "top": FILE_KEYS, "limits": crate::server::limits::LIMIT_NAMES, "refset": REFSET_KEYS, "alert": crate::alerts::rules::RULE_KEYS, "alert_target": TARGET_KEYS, "history": crate::session::history::HISTORY_KEYS },
        "metrics": telemetry::METRIC_NAMES.as_slice(),
    })
}

pub(super) fn run(a: ServeArgs) -> Result<(), CliError> {
    let file = match &a.config {
        Some(p) => {
            let text = std::fs::read_to_string(p).map_err(|e| CliError::Usage(format!("{}: {e}", p.display())))?;
            parse_file(&p.display().to_string(), &text)?
        }
        None => FileConfig::default(),
    };
    let r = resolve(&a, file)?;
    if a.show_config {
        println!("{}", serde_json::to_string_pretty(&show_config(&r)).unwrap_or_default());
        return Ok(());
    }
    let Resolved { server: mut config, listen, metrics_listen, health_listen, tokens, log_format, alert_token_files } = r;
    for (i, p) in alert_token_files {
        let text = std::fs::read_to_string(&p).map_err(|e| CliError::Usage(format!("alert_target {}: bearer_token_file {}: {e}", i + 1, p.display())))?;
        config.alert_targets[i].bearer_token = Some(text.trim().to_owned());
    }
    if let Some(p) = tokens {
        let text = std::fs::read_to_string(&p).map_err(|e| CliError::Usage(format!("{}: {e}", p.display())))?;
        config.tokens = Some(std::sync::Arc::new(server::auth::Tokens::parse(&p.display().to_string(), &text).map_err(CliError::Usage)?));
    }

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
        server::run(config, grpc, Some((metrics, handle)), shutdown_signal()).await.map_err(CliError::Server)
    })?;
    tracing::info!("stopped");
    Ok(())
}

/// Resolves on SIGTERM or SIGINT.
pub(super) async fn shutdown_signal() {
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

#[cfg(test)]
mod tests {
    use super::*;

    fn resolved(args: ServeArgs, file: &str) -> Result<Resolved, CliError> {
        resolve(&args, parse_file("test.toml", file)?)
    }

    #[test]
    fn defaults_come_from_the_constants() {
        let r = resolved(ServeArgs::default(), "").unwrap();
        assert_eq!(r.listen.to_string(), DEFAULT_LISTEN);
        assert_eq!(r.metrics_listen.to_string(), DEFAULT_METRICS_LISTEN);
        assert_eq!(r.server.data_dir, Some(PathBuf::from(crate::store::DEFAULT_DATA_DIR)));
        assert_eq!((r.server.drain, r.server.group_commit), (server::DEFAULT_DRAIN, server::DEFAULT_GROUP_COMMIT));
        assert_eq!(r.server.limits, Limits::default());
        let shown = show_config(&r);
        assert_eq!(shown["settings"]["drain_seconds"], server::DEFAULT_DRAIN.as_secs());
        assert_eq!(shown["settings"]["limits"]["max_streams"], Limit::MaxStreams.default_value());
        assert_eq!(shown["keys"]["limits"].as_array().map(Vec::len), Some(Limit::ALL.len()));
        assert!(shown["metrics"].as_array().unwrap().iter().any(|m| m == "mtgauge_segments_total"));
    }

    #[test]
    fn flags_override_the_file_and_bad_values_name_their_key() {
        let file = "listen = \"127.0.0.1:9000\"\ndrain_seconds = 4\ndurability = \"none\"\n[limits]\nmax_streams = 7\n";
        let args = ServeArgs { listen: Some("127.0.0.1:9100".parse().unwrap()), group_commit_ms: Some(9), ..Default::default() };
        let r = resolved(args, file).unwrap();
        assert_eq!(r.listen.port(), 9100, "the flag wins");
        assert_eq!((r.server.drain.as_secs(), r.server.group_commit.as_millis(), r.server.data_dir.is_none()), (4, 9, true));
        assert_eq!(r.server.limits.max_streams, 7);
        let e = |file: &str| resolved(ServeArgs::default(), file).err().map(|e| e.to_string()).unwrap_or_default();
        assert_eq!(e("[limits]\nmax_watchers = 0\n"), "config key limits.max_watchers must be at least 1, got 0");
        assert!(e("[limits]\nmax_batch = 5\n").contains("unknown field `max_batch`, expected one of `max_batch_items`"));
        assert_eq!(e("max_message_bytes = 10\n"), "config key max_message_bytes must be at least 1024, got 10");
        assert!(e("tls_cert = \"a.pem\"\n").contains("TLS needs both"));
        assert_eq!(e("[limits]\nmax_streams = 1\nmax_streams = 2\n").is_empty(), false, "a key twice is refused");
    }
}
