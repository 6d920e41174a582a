//! `mtgauge load`: a load generator and benchmark for a running server (not a timed test).
//!
//! Uploads a synthetic reference set, creates a session, and drives it from N streams: first as
//! fast as the server acknowledges, then paced at half that rate. Prints acknowledged
//! segments/s, the acknowledgement latency percentiles of both phases, and the offline engine's
//! single-thread throughput on the same corpus, measured in the same run, as the baseline.

use std::collections::VecDeque;
use std::sync::atomic::AtomicUsize;
use std::sync::Arc;
use std::time::{Duration, Instant};

use clap::Args;
use serde_json::json;
use tokio::sync::mpsc;

use super::demo::corpus::{generate, refset, Corpus};
use crate::client::{channel, ClientError, Conn};
use super::CliError;
use crate::pb;
use crate::pb::ref_sets_client::RefSetsClient;
use crate::pb::scoring_client::ScoringClient;
use crate::pb::sessions_client::SessionsClient;
use crate::refs::compiled::Compiled;
use crate::pb::convert::config_to_pb;

/// Streams unless told.
pub const DEFAULT_STREAMS: usize = 16;
/// Items per batch unless told.
pub const DEFAULT_LOAD_BATCH: usize = 100;
/// Seconds per phase unless told.
pub const DEFAULT_LOAD_SECONDS: u64 = 10;
/// Segments of the synthetic reference set unless told.
pub const DEFAULT_LOAD_SEGMENTS: usize = 50_000;
/// Batches a stream keeps in flight in the full-speed phase.
const IN_FLIGHT: usize = 4;
/// Mean tokens per synthetic segment.
const LOAD_TOKENS: usize = 25;
/// Vocabulary of the synthetic corpus.
const LOAD_VOCAB: usize = 20_000;

/// `load` options.
#[derive(Debug, Args)]
pub struct LoadArgs {
    /// Server URL, e.g. http://127.0.0.1:7410.
    #[arg(long, value_name = "URL")]
    pub server: String,
    /// Concurrent scoring streams.
    #[arg(long, default_value_t = DEFAULT_STREAMS, value_name = "N")]
    pub streams: usize,
    /// Items per batch.
    #[arg(long, default_value_t = DEFAULT_LOAD_BATCH, value_name = "B")]
    pub batch: usize,
    /// Seconds of each phase (full speed, then half rate).
    #[arg(long, default_value_t = DEFAULT_LOAD_SECONDS, value_name = "S")]
    pub seconds: u64,
    /// Segments of the synthetic reference set (~25 tokens, one reference).
    #[arg(long, default_value_t = DEFAULT_LOAD_SEGMENTS, value_name = "N")]
    pub segments: usize,
    /// Metric of the load session (and of the offline baseline), repeatable; the syntax of
    /// `score --metric`.
    #[arg(long = "metric", default_value = "bleu", value_name = "SPEC")]
    pub metrics: Vec<String>,
    /// Bootstrap replicates the load session keeps for its intervals (0: none; run once with
    /// and once without to see their cost).
    #[arg(long, default_value_t = crate::metric::resample::DAEMON_RESAMPLES, value_name = "N")]
    pub resamples: usize,
    /// Upload the set with a source per segment (the generated reference of the next segment)
    /// so that the daemon's reference-free guards check every item; run once with and once
    /// without to see their cost.
    #[arg(long)]
    pub guards: bool,
    /// With --guards: the session's target language, for the script and language guards
    /// (without it they are undecided). The generated words are in no language: the verdicts
    /// mean nothing here, only the cost does.
    #[arg(long = "target-language", value_name = "CODE", requires = "guards")]
    pub target_language: Option<String>,
    /// With --guards: a guard setting KEY=VALUE (repeatable; as `send --guard-setting`, e.g.
    /// language-id=off).
    #[arg(long = "guard-setting", value_name = "KEY=VALUE", requires = "guards")]
    pub guard_settings: Vec<String>,
    /// Print the figures as one JSON object.
    #[arg(long)]
    pub json: bool,
}

struct Phase {
    segments: u64,
    seconds: f64,
    latencies: Vec<f64>,
    /// Health-check latencies measured during the phase.
    health: Vec<f64>,
}

/// Interval of the responsiveness probe.
const PROBE_EVERY: Duration = Duration::from_millis(20);
/// Bytes per message when the load reference set is uploaded.
const UPLOAD_CHUNK_BYTES: usize = 1 << 20;

async fn probe_health(ch: Conn, end: Instant) -> Vec<f64> {
    let mut health = tonic_health::pb::health_client::HealthClient::new(ch);
    let mut out = Vec::new();
    while Instant::now() < end {
        let t = Instant::now();
        if health.check(tonic_health::pb::HealthCheckRequest { service: String::new() }).await.is_ok() {
            out.push(t.elapsed().as_secs_f64());
        }
        tokio::time::sleep(PROBE_EVERY).await;
    }
    out
}

fn quantile(v: &[f64], q: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    let mut v = v.to_vec();
    v.sort_by(|a, b| a.total_cmp(b));
    v[((v.len() - 1) as f64 * q).round() as usize]
}

impl Phase {
    fn rate(&self) -> f64 {
        self.segments as f64 / self.seconds
    }
    fn quantile(&self, q: f64) -> f64 {
        quantile(&self.latencies, q)
    }
}

pub(super) fn run(a: LoadArgs) -> Result<(), CliError> {
    if a.streams == 0 || a.batch == 0 || a.seconds == 0 || a.segments == 0 {
        return Err(CliError::Usage("--streams, --batch, --seconds and --segments must be at least 1".into()));
    }
    let log = |s: String| {
        if !a.json {
            eprintln!("{s}");
        }
    };
    log(format!("generating {} segments (~{LOAD_TOKENS} tokens, one reference)", a.segments));
    let corpus = Arc::new(generate(a.segments, LOAD_TOKENS, LOAD_VOCAB, 1, 11));
    let config = super::metric_config(crate::text::DEFAULT_TOKENIZER, false, &a.metrics)?;

    // Baseline: the offline engine on one thread, same corpus and configuration.
    let set = Arc::new(refset(&corpus));
    let compiled = Compiled::build(Arc::clone(&set), config);
    let hyps: Vec<&str> = corpus.hyps.iter().map(String::as_str).collect();
    let t = Instant::now();
    compiled.score_corpus(&hyps, 1, &AtomicUsize::new(0));
    let offline = hyps.len() as f64 / t.elapsed().as_secs_f64();
    drop(compiled);

    let rt = tokio::runtime::Builder::new_multi_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    let (session, full, half, guards) = rt.block_on(async {
        let ch = channel(&a.server)?;
        let name = format!("load-{}", std::process::id());
        log(format!("uploading the reference set as '{name}'{}", if a.guards { " with sources" } else { "" }));
        upload(&ch, &name, &corpus, a.guards).await?;
        let create = pb::CreateSessionRequest {
            name: name.clone(),
            refset: name.clone(),
            config: Some(config_to_pb(&config)),
            resampling: Some(pb::Resampling { resamples: Some(a.resamples as u32), seed: None }),
            target_language: a.target_language.clone().unwrap_or_default(),
            guard_settings: a.guard_settings.clone(),
            ..Default::default()
        };
        SessionsClient::new(ch.clone()).create(create).await.map_err(|s| ClientError::call("create session", s))?;
        log(format!("phase 1: {} streams, batches of {}, as fast as acknowledged, {} s", a.streams, a.batch, a.seconds));
        // Meanwhile, a health check every PROBE_EVERY on a connection of its own shows whether
        // the server's async runtime stays responsive while it scores at full speed.
        let probe_end = Instant::now() + Duration::from_secs(a.seconds);
        let probe = probe_health(channel(&a.server)?, probe_end);
        let (full, probes) = tokio::join!(drive(&ch, &name, &corpus, &a, None), probe);
        let mut full = full?;
        full.health = probes;
        let per_stream = full.rate() / 2.0 / a.streams as f64 / a.batch as f64;
        log(format!("phase 2: the same at half that rate ({:.0} segments/s), {} s", full.rate() / 2.0, a.seconds));
        let half = drive(&ch, &name, &corpus, &a, Some(Duration::from_secs_f64(1.0 / per_stream.max(1e-3)))).await?;
        let report = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: name.clone(), ..Default::default() }).await.map_err(|s| ClientError::call("get scores", s))?.into_inner();
        let guards = crate::pb::convert::guard_tally_from_pb(&report.guards.unwrap_or_default());
        Ok::<_, CliError>((name, full, half, guards))
    })?;
    let target = a.target_language.as_deref();
    let figures = json!({
        "session": session,
        "streams": a.streams,
        "batch": a.batch,
        "seconds_per_phase": a.seconds,
        "config": config.describe(),
        "resamples": a.resamples,
        "offline_1_thread_segments_per_s": offline,
        "daemon_segments_per_s": full.rate(),
        "ratio_daemon_vs_offline_1_thread": full.rate() / offline,
        "full_speed_ack_ms": {"p50": 1e3 * full.quantile(0.5), "p99": 1e3 * full.quantile(0.99)},
        "health_check_ms_under_full_load": {"p50": 1e3 * quantile(&full.health, 0.5), "p99": 1e3 * quantile(&full.health, 0.99), "count": full.health.len()},
        "half_rate_segments_per_s": half.rate(),
        "half_rate_ack_ms": {"p50": 1e3 * half.quantile(0.5), "p99": 1e3 * half.quantile(0.99)},
        "refset_bytes_per_segment": set.memory_bytes() as f64 / set.len() as f64,
        "guards_on": a.guards,
        "guard_settings": a.guard_settings,
        "guards": crate::report::guards_json(&guards, target),
    });
    if a.json {
        println!("{}", serde_json::to_string_pretty(&figures).unwrap_or_default());
    } else {
        let f = |k: &str| figures[k].as_f64().unwrap_or(f64::NAN);
        println!("mtgauge load: {} streams x batches of {} ({}, {} bootstrap replicates), {} s per phase", a.streams, a.batch, config.describe(), a.resamples, a.seconds);
        println!("  offline engine, 1 thread      {:>10.0} segments/s", f("offline_1_thread_segments_per_s"));
        println!("  daemon, full speed            {:>10.0} segments/s -> {:.2}x the offline 1-thread rate", f("daemon_segments_per_s"), f("ratio_daemon_vs_offline_1_thread"));
        println!("    acknowledgement latency     p50 {:.2} ms, p99 {:.2} ms", 1e3 * full.quantile(0.5), 1e3 * full.quantile(0.99));
        println!("    health check meanwhile      p50 {:.2} ms, p99 {:.2} ms (runtime responsiveness)", 1e3 * quantile(&full.health, 0.5), 1e3 * quantile(&full.health, 0.99));
        println!("  daemon, half rate             {:>10.0} segments/s", half.rate());
        println!("    acknowledgement latency     p50 {:.2} ms, p99 {:.2} ms", 1e3 * half.quantile(0.5), 1e3 * half.quantile(0.99));
        match a.guards {
            true => println!("  guards on ({}): {} items checked, target language {}", if a.guard_settings.is_empty() { "default settings".to_owned() } else { a.guard_settings.join(" ") }, guards.checked, target.unwrap_or("not declared")),
            false => println!("  guards off (no sources sent; --guards to compare)"),
        }
    }
    Ok(())
}

/// Upload the corpus' references as `name`; `with_sources`: each segment's source is the
/// reference of the next one (same invented words, another sentence).
async fn upload(ch: &Conn, name: &str, corpus: &Corpus, with_sources: bool) -> Result<(), CliError> {
    let text: String = corpus.refs.iter().map(|r| r[0].clone() + "\n").collect();
    let n = corpus.refs.len();
    let sources: String = if with_sources { (0..n).map(|i| corpus.refs[(i + 1) % n][0].clone() + "\n").collect() } else { String::new() };
    // One reference stream (file 0); the source file, when sent, comes after the references.
    let header = pb::UploadRefSetChunk { part: Some(pb::upload_ref_set_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::RefFormat::Plain as i32, files: 1, has_source: with_sources, replace: true })) };
    let data = |file: u32, text: &str| -> Vec<pb::UploadRefSetChunk> {
        text.as_bytes().chunks(UPLOAD_CHUNK_BYTES).map(|c| pb::UploadRefSetChunk { part: Some(pb::upload_ref_set_chunk::Part::Data(pb::UploadData { file, data: c.to_vec() })) }).collect()
    };
    let mut chunks = vec![header];
    chunks.extend(data(0, &text));
    if with_sources {
        chunks.extend(data(1, &sources));
    }
    RefSetsClient::new(ch.clone()).upload(tokio_stream::iter(chunks)).await.map_err(|s| ClientError::call("upload", s))?;
    Ok(())
}

/// Run every stream for `a.seconds`; `pace`: time between a stream's batches (None: as fast as
/// acknowledgements allow, `IN_FLIGHT` batches outstanding).
async fn drive(ch: &Conn, session: &str, corpus: &Arc<Corpus>, a: &LoadArgs, pace: Option<Duration>) -> Result<Phase, CliError> {
    let end = Instant::now() + Duration::from_secs(a.seconds);
    let started = Instant::now();
    // Batches are built once and cloned per send, so that the generator spends its CPU on the
    // wire, not on formatting.
    let n = corpus.hyps.len();
    let prebuilt: Arc<Vec<pb::ScoreBatch>> = Arc::new(
        (0..n.div_ceil(a.batch))
            .map(|b| pb::ScoreBatch {
                session: session.to_owned(),
                producer: String::new(),
                sequence: 0,
                items: (b * a.batch..((b + 1) * a.batch).min(n))
                    .map(|i| pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId((i + 1).to_string())), hypothesis: corpus.hyps[i].clone(), ..Default::default() })
                    .collect(),
                ..Default::default()
            })
            .collect(),
    );
    let mut tasks = Vec::new();
    for s in 0..a.streams {
        let (ch, prebuilt, streams) = (ch.clone(), Arc::clone(&prebuilt), a.streams);
        tasks.push(tokio::spawn(async move {
            let (tx, rx) = mpsc::channel::<pb::ScoreBatch>(IN_FLIGHT);
            let mut acks = ScoringClient::new(ch).stream(tokio_stream::wrappers::ReceiverStream::new(rx)).await?.into_inner();
            let sent: Arc<std::sync::Mutex<VecDeque<Instant>>> = Default::default();
            let permits = Arc::new(tokio::sync::Semaphore::new(IN_FLIGHT));
            let (sent2, permits2) = (Arc::clone(&sent), Arc::clone(&permits));
            let producer = tokio::spawn(async move {
                let mut next = (s * 7919) % prebuilt.len();
                // Paced streams start staggered over one period, like independent producers.
                let streams = streams as u32;
                let mut tick = pace.map(|p| {
                    let first = tokio::time::Instant::now() + p * s as u32 / streams;
                    let mut i = tokio::time::interval_at(first, p);
                    i.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
                    i
                });
                while Instant::now() < end {
                    match &mut tick {
                        Some(t) => {
                            t.tick().await;
                        }
                        None => permits2.acquire().await.map(|p| p.forget()).unwrap_or(()),
                    }
                    let batch = prebuilt[next].clone();
                    next = (next + 1) % prebuilt.len();
                    sent2.lock().unwrap_or_else(|e| e.into_inner()).push_back(Instant::now());
                    if tx.send(batch).await.is_err() {
                        break;
                    }
                }
            });
            let (mut segments, mut lat) = (0u64, Vec::new());
            while let Some(ack) = acks.message().await? {
                let t0 = sent.lock().unwrap_or_else(|e| e.into_inner()).pop_front();
                if let Some(t0) = t0 {
                    lat.push(t0.elapsed().as_secs_f64());
                }
                segments += ack.scored as u64;
                permits.add_permits(1);
            }
            let _ = producer.await;
            Ok::<_, tonic::Status>((segments, lat))
        }));
    }
    let mut phase = Phase { segments: 0, seconds: 0.0, latencies: Vec::new(), health: Vec::new() };
    for t in tasks {
        let (s, l) = t.await.map_err(|e| CliError::Usage(format!("load stream failed: {e}")))?.map_err(|s| ClientError::call("scoring stream", s))?;
        phase.segments += s;
        phase.latencies.extend(l);
    }
    phase.seconds = started.elapsed().as_secs_f64();
    Ok(phase)
}
