//! The live demo: the daemon in-process on free loopback ports, the embedded reference set
//! uploaded over gRPC, simulated probe and live-traffic producers streaming into two sessions,
//! and a compact summary each second.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use tokio::sync::mpsc;
use tonic::transport::Channel;

use crate::cli::CliError;
use super::scenario::{degraded_hypothesis, demo_segments};
use crate::refs::SegmentInput;
use crate::metric::{Metric, ScoreConfig};
use crate::pb::convert::{config_from_pb, config_to_pb, interval_of, score_of, stats_from_pb};
use crate::pb;
use crate::pb::ref_sets_client::RefSetsClient;
use crate::pb::scoring_client::ScoringClient;
use crate::pb::sessions_client::SessionsClient;
use crate::report::{stats_lines, PROXY_NOTE};
use crate::rng::SplitMix64;
use crate::server::{self, ServerConfig};
use crate::telemetry;

/// Bytes per message when the demo uploads its reference set.
const UPLOAD_CHUNK_BYTES: usize = 16 * 1024;
/// How long the in-process server may take to report SERVING.
const STARTUP_TIMEOUT: Duration = Duration::from_secs(10);
/// How often the demo asks whether the server is SERVING yet.
const STARTUP_POLL: Duration = Duration::from_millis(20);

/// Items per simulated batch.
const DEMO_BATCH: usize = 6;
/// Pause between a producer's batches.
const DEMO_PAUSE: Duration = Duration::from_millis(120);
/// `recent` window of the demo sessions.
const DEMO_WINDOW: u32 = 300;
/// Share of live-traffic requests whose source is in no reference set.
const UNKNOWN_SHARE: f64 = 0.15;
/// Live-traffic sources that match no segment (invented).
const OFF_SCRIPT: &[&str] = &[
    "Is the sauna on deck 7 open tonight?",
    "Can I bring my kayak on board as luggage?",
    "Where do I collect the parcel I sent ahead?",
    "The vending machine by gate B took my coins.",
];

struct Watched {
    session: &'static str,
    model: &'static str,
    /// Quality before and after the half-way point (see `degraded_hypothesis`).
    quality: (f64, f64),
    /// Share of outputs broken in a way the reference-free guards see (see [`Broken`]), before
    /// and after the half-way point.
    broken: (f64, f64),
}

const SESSIONS: &[Watched] = &[
    Watched { session: "ferry-en-de.model-v7", model: "model-v7", quality: (0.6, 0.6), broken: (0.02, 0.02) },
    Watched { session: "ferry-en-de.model-v8-rc", model: "model-v8-rc", quality: (0.92, 0.35), broken: (0.01, 0.08) },
];

/// The broken outputs of the simulated systems, one kind drawn at random per broken item.
#[derive(Debug, Clone, Copy)]
enum Broken {
    /// Nothing came back.
    Empty,
    /// The English source passed through untranslated.
    CopiedSource,
    /// The first words of the translation looping.
    Loop,
    /// English, but another notice's (a wrong-language output that is no copy).
    WrongLanguage,
}

const BROKEN_KINDS: [Broken; 4] = [Broken::Empty, Broken::CopiedSource, Broken::Loop, Broken::WrongLanguage];
/// Repeats of the looping phrase: above the repetition guard's defaults (4-gram 3 times).
const LOOP_REPEATS: usize = 5;

/// A broken output of `kind` for `seg`, whose good translation would be `good`; `other` is
/// another segment (for the wrong-language output).
fn broken_hypothesis(kind: Broken, seg: &SegmentInput, good: &str, other: &SegmentInput) -> String {
    match kind {
        Broken::Empty => String::new(),
        Broken::CopiedSource => seg.source_text().to_owned(),
        Broken::Loop => {
            let phrase: Vec<&str> = good.split_whitespace().take(4).collect();
            vec![phrase.join(" "); LOOP_REPEATS].join(" ")
        }
        Broken::WrongLanguage => other.source_text().to_owned(),
    }
}

/// The alert rules of the demo, as a config file would declare them (printed at the end).
const DEMO_RULES: &str = r#"alert_eval_seconds = 1

[[alert]]
name = "bleu-floor"
labels = { lang = "en-de" }
when = "below"
threshold = 50.0
min_segments = 100
for_seconds = 2

[[alert]]
name = "candidate-worse-than-production"
session = "ferry-en-de.model-v8-rc"
when = "drop"
baseline = "ferry-en-de.model-v7"
points = 2.0
min_segments = 100
for_seconds = 2
"#;

/// The checked rules of [`DEMO_RULES`].
fn demo_rules() -> Result<(Vec<crate::alerts::rules::Rule>, Duration), CliError> {
    let file = super::super::serve::parse_file("demo rules", DEMO_RULES)?;
    let resolved = super::super::serve::resolve(&Default::default(), file)?;
    Ok((resolved.server.alert_rules, resolved.server.alert_every))
}

pub(super) fn run(seconds: u64, linger: bool) -> Result<(), CliError> {
    let rt = tokio::runtime::Builder::new_multi_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    rt.block_on(live(seconds.max(1), linger))
}

fn usage<E: std::fmt::Display>(what: &str) -> impl FnOnce(E) -> CliError + '_ {
    move |e| CliError::Usage(format!("demo: {what}: {e}"))
}

async fn live(seconds: u64, linger: bool) -> Result<(), CliError> {
    let grpc = tokio::net::TcpListener::bind("127.0.0.1:0").await.map_err(usage("bind"))?;
    let metrics = tokio::net::TcpListener::bind("127.0.0.1:0").await.map_err(usage("bind"))?;
    let (g, m) = (grpc.local_addr().map_err(usage("address"))?, metrics.local_addr().map_err(usage("address"))?);
    let handle = telemetry::install_metrics().map_err(CliError::Usage)?;
    let (stop_tx, stop_rx) = tokio::sync::oneshot::channel::<()>();
    let (alert_rules, alert_every) = demo_rules()?;
    let server = tokio::spawn(server::run(ServerConfig { drain: Duration::from_secs(2), alert_rules, alert_every, ..Default::default() }, grpc, Some((metrics, handle)), async move {
        let _ = stop_rx.await;
    }));
    let url = format!("http://{g}");
    let ch = tonic::transport::Endpoint::from_shared(url.clone()).map_err(usage("endpoint"))?.connect_lazy();
    wait_serving(&ch).await?;

    println!("mtgauge demo: the daemon runs in this process on {url} (Prometheus: http://{m}/metrics)");
    println!("status page: http://{m}/ (history charts per session; {})", if linger { "kept serving after the run with --linger" } else { "add --linger to keep it up after the run" });
    println!("scenario: Nordhavn Ferries passenger notices, English -> German; two model versions watched live;");
    println!("model-v8-rc starts to degrade half-way (a simulated bad deploy). Running {seconds} s.");
    println!("a few outputs come back broken (empty, the source copied, a loop, English): the reference-free");
    println!("guards count them per session (`status`, mtgauge_guard_flagged_total), with or without a reference.");
    println!("each output also carries a simulated quality-estimation score ({DEMO_QE}, 0-1), counted like an external");
    println!("segment metric: exact fixed-point sums, a bootstrap interval of the mean, mtgauge_external_*_total.\n");

    // Upload the embedded reference set over the API, as a client would.
    let segments = Arc::new(demo_segments());
    let jsonl = segments.iter().map(|s| serde_json::to_string(s).map(|l| l + "\n")).collect::<Result<String, _>>().map_err(|e| CliError::Usage(format!("demo: {e}")))?;
    let header = pb::UploadRefSetChunk { part: Some(pb::upload_ref_set_chunk::Part::Header(pb::UploadHeader { name: "ferry-notices".into(), format: pb::RefFormat::Jsonl as i32, files: 1, has_source: false, replace: false })) };
    let chunks: Vec<pb::UploadRefSetChunk> = std::iter::once(header)
        .chain(jsonl.as_bytes().chunks(UPLOAD_CHUNK_BYTES).map(|c| pb::UploadRefSetChunk { part: Some(pb::upload_ref_set_chunk::Part::Data(pb::UploadData { file: 0, data: c.to_vec() })) }))
        .collect();
    let info = RefSetsClient::new(ch.clone()).upload(tokio_stream::iter(chunks)).await.map_err(usage("upload"))?.into_inner();
    println!("reference set {}: {} segments, {} references, digest {}", info.name, info.segments, info.references, &info.digest[..16]);
    for w in SESSIONS {
        let config = config_to_pb(&ScoreConfig::default());
        let labels = [("model".to_string(), w.model.to_string()), ("lang".to_string(), "en-de".to_string())].into_iter().collect();
        SessionsClient::new(ch.clone())
            .create(pb::CreateSessionRequest {
                name: w.session.into(),
                refset: "ferry-notices".into(),
                config: Some(config),
                labels,
                window: DEMO_WINDOW,
                if_not_exists: true,
                resampling: None,
                target_language: "de".into(),
                guard_settings: Vec::new(),
                external: vec![demo_qe_spec()],
            })
            .await
            .map_err(usage("create session"))?;
    }
    println!("sessions: {} (window: last {DEMO_WINDOW} segments)\n", SESSIONS.iter().map(|w| w.session).collect::<Vec<_>>().join(", "));

    let degraded = Arc::new(AtomicBool::new(false));
    let stop = Arc::new(AtomicBool::new(false));
    let mut producers = Vec::new();
    for (k, w) in SESSIONS.iter().enumerate() {
        for (p, by_source) in [(0, false), (1, false), (2, true)] {
            let seed = 1000 * k as u64 + p;
            producers.push(tokio::spawn(produce(ch.clone(), w, by_source, seed, Arc::clone(&segments), Arc::clone(&degraded), Arc::clone(&stop))));
        }
    }

    let start = Instant::now();
    let mut tick = tokio::time::interval(Duration::from_secs(1));
    tick.tick().await;
    println!("{:>5}  {:<26} {:>8} {:>8} {:>13} {:>8} {:>9} {:>8}", "time", "session", "BLEU", "recent", "recent 95%", "chrF", "segments", "unknown");
    let mut alert_states: std::collections::HashMap<(String, String), String> = std::collections::HashMap::new();
    for t in 1..=seconds {
        tick.tick().await;
        if t == seconds.div_ceil(2) && !degraded.swap(true, Ordering::Relaxed) {
            println!("  -- {:>3}s: model-v8-rc is redeployed with a broken tokenizer setting; watch its recent BLEU --", t);
        }
        for w in SESSIONS {
            let r = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: w.session.into(), level: 0.0, ..Default::default() }).await.map_err(usage("get scores"))?.into_inner();
            let (c, rec) = (r.cumulative.unwrap_or_default(), r.recent.unwrap_or_default());
            let range = interval_of(&rec, Metric::Bleu).map_or_else(|| "-".to_owned(), |i| format!("{:.1}..{:.1}", i.low, i.high));
            println!(
                "{:>4}s  {:<26} {:>8.2} {:>8.2} {:>13} {:>8.2} {:>9} {:>8}",
                t,
                w.session,
                score_of(&c, Metric::Bleu).unwrap_or(0.0),
                score_of(&rec, Metric::Bleu).unwrap_or(0.0),
                range,
                score_of(&rec, Metric::Chrf).unwrap_or(0.0),
                c.segments,
                r.unknown
            );
            for a in &r.alerts {
                let before = alert_states.insert((w.session.to_owned(), a.rule.clone()), a.state.clone());
                let was_firing = before.as_deref() == Some("firing");
                if (a.state == "firing") != was_firing {
                    let verb = if was_firing { "resolved" } else { "FIRING" };
                    println!("  !! alert {} {verb} on {}: {} (now {:.2}, interval up to {:.2}); shown by `status`, in mtgauge_alert_firing and the log", a.rule, w.session, a.condition, a.value.unwrap_or(f64::NAN), a.high.unwrap_or(f64::NAN));
                }
            }
        }
    }
    stop.store(true, Ordering::Relaxed);
    for p in producers {
        let _ = p.await;
    }
    let elapsed = start.elapsed().as_secs_f64();
    for w in SESSIONS {
        let r = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: w.session.into(), level: 0.0, ..Default::default() }).await.map_err(usage("get scores"))?.into_inner();
        let config = config_from_pb(r.config.as_ref()).map_err(|e| CliError::Usage(format!("demo: {e}")))?;
        println!("\n{} at the end, cumulative:", w.session);
        let c = r.cumulative.unwrap_or_default();
        for line in stats_lines(&stats_from_pb(&c), &config, "  ") {
            println!("{line}");
        }
        for m in config.metric_list() {
            if let Some(i) = interval_of(&c, m) {
                println!("  {:<8}{:>6.2} .. {:.2}   95% bootstrap interval ({} resamples over segments)", m.title(), i.low, i.high, i.resamples);
            }
        }
        let (_, external) = crate::cli::status::external_view(Some(&c), "  ");
        for line in external {
            println!("{line}   (a simulated quality-estimation score)");
        }
        let guards = crate::pb::convert::guard_tally_from_pb(&r.guards.clone().unwrap_or_default());
        for line in crate::report::guard_lines(&guards, Some(&r.target_language).filter(|t| !t.is_empty()).map(String::as_str), "  ") {
            println!("{line}");
        }
    }
    if linger {
        println!("\nstill serving: status page http://{m}/, gRPC {url}; Ctrl-C (or SIGTERM) stops it");
        use std::io::Write;
        let _ = std::io::stdout().flush();
        crate::cli::serve::shutdown_signal().await;
    }
    let _ = stop_tx.send(());
    let _ = server.await;
    println!("\nran {elapsed:.0} s. 'recent' is the exact BLEU of the last {DEMO_WINDOW} segments; the cumulative score moves slowly by design.");
    println!("'recent 95%' is its bootstrap interval: a move inside it can be chance alone (which segments happened to come).");
    println!("\nthe alert rules of this demo, as a `serve --config` file declares them:\n{DEMO_RULES}");
    println!("{PROXY_NOTE}\n");
    println!("try it against a real server:");
    println!("  mtgauge demo --offline --write-files demo-data");
    println!("  mtgauge serve --refset ferry=demo-data/refs.jsonl &");
    println!("  mtgauge send --server http://127.0.0.1:7410 --session v7 --create --refset ferry --hyp demo-data/hyp.model-v7.de.txt --source demo-data/source.en.txt");
    println!("  mtgauge status --server http://127.0.0.1:7410 --session v7");
    println!("  curl -s http://127.0.0.1:7411/metrics | grep mtgauge_score");
    Ok(())
}

async fn wait_serving(ch: &Channel) -> Result<(), CliError> {
    let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone());
    let deadline = Instant::now() + STARTUP_TIMEOUT;
    loop {
        let ok = health.check(tonic_health::pb::HealthCheckRequest { service: String::new() }).await.is_ok_and(|r| r.into_inner().status == tonic_health::pb::health_check_response::ServingStatus::Serving as i32);
        if ok {
            return Ok(());
        }
        if Instant::now() > deadline {
            return Err(CliError::Usage("demo: the in-process server did not start".into()));
        }
        tokio::time::sleep(STARTUP_POLL).await;
    }
}

/// The simulated quality-estimation score the demo's producers attach to every output, as a
/// team's own pipeline would (an external segment metric, 0 to 1, higher is better).
pub const DEMO_QE: &str = "ferry_qe";
/// Decimals the simulated score is given with.
const DEMO_QE_DECIMALS: i32 = 4;

fn demo_qe_spec() -> pb::ExternalMetric {
    let spec = crate::external::ExternalSpec { name: DEMO_QE.into(), low: 0.0, high: 1.0, higher_is_better: true, decimals: DEMO_QE_DECIMALS as u32 };
    crate::pb::external::spec_to_pb(&spec)
}

/// The simulated estimator: it follows the model's quality setting `q` (0 to 1) with noise, and
/// scores broken outputs low; rounded to [`DEMO_QE_DECIMALS`].
fn demo_qe(q: f64, broken: bool, rng: &mut SplitMix64) -> f64 {
    let noise = (rng.next_u64() >> 11) as f64 / (1u64 << 53) as f64 - 0.5;
    let v = if broken { 0.05 + 0.1 * (noise + 0.5) } else { 0.3 + 0.6 * q + 0.16 * noise };
    let scale = 10f64.powi(DEMO_QE_DECIMALS);
    (v.clamp(0.0, 1.0) * scale).round() / scale
}

/// One simulated producer: batches of random segments at a steady pace over one stream.
async fn produce(ch: Channel, w: &'static Watched, by_source: bool, seed: u64, segments: Arc<Vec<SegmentInput>>, degraded: Arc<AtomicBool>, stop: Arc<AtomicBool>) {
    let (tx, rx) = mpsc::channel::<pb::ScoreBatch>(4);
    let producer = format!("{}-{}", if by_source { "live" } else { "probe" }, seed);
    let Ok(resp) = ScoringClient::new(ch).stream(tokio_stream::wrappers::ReceiverStream::new(rx)).await else { return };
    let mut acks = resp.into_inner();
    let drain = tokio::spawn(async move { while let Ok(Some(_)) = acks.message().await {} });
    let mut rng = SplitMix64::new(seed);
    let mut seq = 0;
    while !stop.load(Ordering::Relaxed) {
        seq += 1;
        let late = degraded.load(Ordering::Relaxed);
        let (q, broken) = if late { (w.quality.1, w.broken.1) } else { (w.quality.0, w.broken.0) };
        let items = (0..DEMO_BATCH)
            .map(|_| {
                let seg = &segments[rng.index(segments.len())];
                let mut hypothesis = degraded_hypothesis(seg, q, rng.next_u64());
                let is_broken = rng.chance(broken);
                if is_broken {
                    let kind = BROKEN_KINDS[rng.index(BROKEN_KINDS.len())];
                    hypothesis = broken_hypothesis(kind, seg, &hypothesis, &segments[rng.index(segments.len())]);
                }
                let external = [(DEMO_QE.to_owned(), demo_qe(q, is_broken, &mut rng))].into_iter().collect();
                let key = if !by_source {
                    pb::score_item::Key::SegmentId(seg.id.clone())
                } else if rng.chance(UNKNOWN_SHARE) {
                    pb::score_item::Key::Source(OFF_SCRIPT[rng.index(OFF_SCRIPT.len())].into())
                } else {
                    pb::score_item::Key::Source(seg.source_text().to_owned())
                };
                pb::ScoreItem { key: Some(key), hypothesis, external, ..Default::default() }
            })
            .collect();
        let batch = pb::ScoreBatch { session: w.session.into(), producer: producer.clone(), sequence: seq, items, want_segment_scores: false, replicas: Vec::new() };
        if tx.send(batch).await.is_err() {
            break;
        }
        tokio::time::sleep(DEMO_PAUSE).await;
    }
    drop(tx);
    let _ = drain.await;
}
