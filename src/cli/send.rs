//! `mtgauge send`: stream a hypothesis file into a session of a running server.

use std::collections::BTreeMap;

use clap::Args;
use sha2::{Digest, Sha256};

use super::input::{display_name, read_bytes};
use super::progress::Bar;
use super::{stderr_is_terminal, CliError, ScoringArgs};
use crate::client::fleet::{Fleet, DEFAULT_REPLICA_WAIT};
use crate::client::{retryable, Backoff, ClientError, MAX_ATTEMPTS};
use crate::pb;
use crate::pb::scoring_client::ScoringClient;
use crate::pb::sessions_client::SessionsClient;
use crate::refs::split_lines;
use crate::pb::convert::config_to_pb;

/// Items per batch unless told.
pub const DEFAULT_BATCH: usize = 100;
/// Largest acknowledgement or batch message the stream client takes (well above the server's
/// default message limit, so that the server's limit is the one that speaks).
const STREAM_MESSAGE_BYTES: usize = 64 << 20;

pub const LONG_ABOUT: &str = "\
Stream a hypothesis file into a session of a running server and print the acknowledged counts.

Line N of --hyp is the hypothesis of segment id N (the line numbering of plain reference files), \
or of the id on line N of --ids, or, with --source, of the segment whose source matches line N of that file (live-traffic lookup). \
Batches carry a stable producer id (default: derived from the session and the input's content) \
and sequence numbers 1, 2, ...: re-running the identical command after a failure counts nothing \
twice. Unavailable servers are retried with backoff.

A fleet: --server takes several URLs (comma-separated), or a name that resolves to every \
replica. Each replica has a name (serve --replica-name); the producer's batches all go to one \
replica, the one its producer id picks by rendezvous hashing over the replicas' names (README, \
\"Producer affinity\"), and declare that set so that a replica refuses a misrouted batch. That \
replica holds the producer's sequence marks, so nothing counts twice across the fleet. When it \
does not answer, send waits for it (re-resolving the names) for --replica-wait seconds, then \
fails: re-run the same command once it is back. --failover instead goes on with the next \
replica in the producer's order: a batch whose acknowledgement was lost then counts twice, once \
on each replica.

Connection settings come from the environment: MTGAUGE_TOKEN (bearer token), MTGAUGE_TLS_CA \
(server CA, PEM; or use an https:// URL), MTGAUGE_TLS_CERT and MTGAUGE_TLS_KEY (client \
certificate for mutual TLS).

When stderr is a terminal (and without --json), a progress bar there shows the segments \
acknowledged of the total, segments per second and the time left.";

/// `send` options.
#[derive(Debug, Args)]
pub struct SendArgs {
    /// Server URL, e.g. http://127.0.0.1:7410; for a fleet, several URLs separated by commas,
    /// or one whose name resolves to every replica.
    #[arg(long, value_name = "URL[,URL...]")]
    pub server: String,
    /// Fleet: seconds to wait for the producer's replica when it does not answer, before
    /// failing (or, with --failover, going to the next replica).
    #[arg(long, default_value_t = DEFAULT_REPLICA_WAIT.as_secs(), value_name = "S")]
    pub replica_wait: u64,
    /// Fleet: once --replica-wait has passed, send to the next replica in the producer's order
    /// instead of failing. RISK: a batch the first replica applied but whose acknowledgement
    /// was lost is then counted again by the other replica (counted twice).
    #[arg(long)]
    pub failover: bool,
    /// Session to send into.
    #[arg(long, value_name = "NAME")]
    pub session: String,
    /// Hypothesis file, one segment per line ("-" for stdin).
    #[arg(long, value_name = "FILE", required_unless_present = "items")]
    pub hyp: Option<String>,
    /// Items as JSONL instead of --hyp, one object a line: "id" (segment id) or "source",
    /// "hypothesis" (optional when "scores" is given), "scores" ({"NAME": value, ...}: the
    /// session's external metrics), "key" (the item's key for the bootstrap weights of its
    /// scores, needed without id and source) ("-" for stdin).
    #[arg(long, value_name = "FILE.jsonl", conflicts_with_all = ["hyp", "source", "ids"])]
    pub items: Option<String>,
    /// With --create: an external metric the session accepts (repeatable):
    /// NAME:LOW:HIGH, then optionally :better=lower (default higher) and :places=N, the
    /// decimals kept (default DEFAULT_DECIMALS = 6), e.g. qe:0:1 or edit_rate:0:100:better=lower:places=2.
    #[arg(long = "external", value_name = "NAME:LOW:HIGH[:better=lower][:places=N]", requires = "create")]
    pub external: Vec<crate::external::ExternalSpec>,
    /// Key items by the source text on the same line of this file instead of the line number.
    #[arg(long, value_name = "FILE")]
    pub source: Option<String>,
    /// Segment ids, one per line aligned with --hyp (for sets whose ids are not line numbers,
    /// such as JSONL sets with named ids).
    #[arg(long, value_name = "FILE", conflicts_with = "source")]
    pub ids: Option<String>,
    /// Create the session first (no error when an identical one exists); needs --refset, or
    /// for a session without references --target-language (the guards check items that carry
    /// a source: give --source) and/or --external (values only: give --items).
    #[arg(long)]
    pub create: bool,
    /// Reference set of the session to create.
    #[arg(long, value_name = "NAME")]
    pub refset: Option<String>,
    /// Session labels to create it with, KEY=VALUE (repeatable).
    #[arg(long = "label", value_name = "KEY=VALUE")]
    pub labels: Vec<String>,
    /// Items per batch.
    #[arg(long, default_value_t = DEFAULT_BATCH, value_name = "N")]
    pub batch: usize,
    /// Producer id (default: derived from the session and the input's content).
    #[arg(long, value_name = "ID")]
    pub producer: Option<String>,
    /// Print the acknowledged counts as JSON.
    #[arg(long)]
    pub json: bool,
    /// With --create: bootstrap replicates the session keeps for its intervals (0: none; at most
    /// 1000).
    #[arg(long, default_value_t = crate::metric::resample::DAEMON_RESAMPLES, value_name = "N", requires = "create")]
    pub resamples: usize,
    /// With --create: the target language of the hypotheses (ISO 639-1 or 639-3 code), for the
    /// reference-free script and language guards (without it they are undecided).
    #[arg(long = "target-language", value_name = "CODE", requires = "create")]
    pub target_language: Option<String>,
    /// With --create: a guard threshold as KEY=VALUE (repeatable; keys and defaults as in
    /// `mtgauge score --help`, e.g. language-id=off).
    #[arg(long = "guard-setting", value_name = "KEY=VALUE", requires = "create")]
    pub guard_settings: Vec<String>,
    /// With --create: seed of the replicate weights (sessions whose intervals are compared or
    /// summed across replicas use the same).
    #[arg(long, default_value_t = crate::metric::resample::DEFAULT_RESAMPLE_SEED, value_name = "S", requires = "create")]
    pub seed: u64,
    /// Scoring configuration of the session to create.
    #[command(flatten)]
    pub scoring: ScoringArgs,
}

#[derive(Default, Debug, Clone, Copy)]
struct Totals {
    batches: u64,
    scored: u64,
    unknown: u64,
    rejected: u64,
    duplicate_batches: u64,
    /// The reference-free guards' counts of the acknowledged batches.
    guards: crate::guard::GuardCounts,
    external: u64,
}

/// A file of lines aligned with the hypotheses: its bytes (part of the default producer id)
/// and its lines.
fn aligned<'a>(hyp_name: &str, hyps: usize, path: Option<&str>, bytes: &'a Option<Vec<u8>>) -> Result<Option<Vec<&'a str>>, CliError> {
    let (Some(name), Some(b)) = (path, bytes) else { return Ok(None) };
    let lines = split_lines(display_name(name), b)?;
    crate::refs::check_same_length(hyp_name, hyps, display_name(name), lines.len())?;
    Ok(Some(lines))
}

/// The default producer id: stable for the same session, inputs and batch size, so that
/// re-running the same command counts nothing twice. `inputs`: hypotheses, sources, ids.
fn default_producer(session: &str, inputs: [Option<&[u8]>; 4], batch: usize) -> String {
    let mut h = Sha256::new();
    h.update(session.as_bytes());
    for (tag, bytes) in inputs.iter().enumerate() {
        if let Some(b) = bytes {
            // Each input after a tag byte (0 hypotheses, 1 sources, 2 ids), so that the same
            // bytes in another role give another id.
            h.update([tag as u8]);
            h.update(b);
        }
    }
    h.update(batch.to_le_bytes());
    let d = h.finalize();
    format!("send-{}", d.iter().take(8).map(|b| format!("{b:02x}")).collect::<String>())
}

/// Line `line`'s item key: its source, its id from the ids file, or its line number.
fn item_key(line: usize, sources: Option<&[&str]>, ids: Option<&[&str]>) -> pb::score_item::Key {
    match (sources, ids) {
        (Some(s), _) => pb::score_item::Key::Source(s[line].to_owned()),
        (None, Some(ids)) => pb::score_item::Key::SegmentId(ids[line].to_owned()),
        (None, None) => pb::score_item::Key::SegmentId((line + 1).to_string()),
    }
}

/// The hypotheses in batches of `size`, numbered from 1 for `producer`.
fn batches(session: &str, producer: &str, size: usize, hyps: &[&str], sources: Option<&[&str]>, ids: Option<&[&str]>) -> Vec<pb::ScoreBatch> {
    hyps.chunks(size)
        .enumerate()
        .map(|(b, chunk)| pb::ScoreBatch {
            session: session.to_owned(),
            producer: producer.to_owned(),
            sequence: b as u64 + 1,
            items: chunk.iter().enumerate().map(|(i, h)| pb::ScoreItem { key: Some(item_key(b * size + i, sources, ids)), hypothesis: (*h).to_owned(), ..Default::default() }).collect(),
            ..Default::default()
        })
        .collect()
}

/// Items (of `--items`) in batches of `size`, numbered from 1 for `producer`.
fn item_batches(session: &str, producer: &str, size: usize, items: Vec<pb::ScoreItem>) -> Vec<pb::ScoreBatch> {
    let mut out = Vec::with_capacity(items.len().div_ceil(size));
    let mut rest = items.into_iter().peekable();
    while rest.peek().is_some() {
        let chunk: Vec<pb::ScoreItem> = rest.by_ref().take(size).collect();
        out.push(pb::ScoreBatch { session: session.to_owned(), producer: producer.to_owned(), sequence: out.len() as u64 + 1, items: chunk, ..Default::default() });
    }
    out
}

/// `--label KEY=VALUE` flags as a map.
fn labels(flags: &[String]) -> Result<BTreeMap<String, String>, CliError> {
    flags
        .iter()
        .map(|l| l.split_once('=').map(|(k, v)| (k.to_owned(), v.to_owned())).ok_or_else(|| CliError::Usage(format!("--label {l}: expected KEY=VALUE"))))
        .collect()
}

pub(super) fn run(a: SendArgs) -> Result<(), CliError> {
    if a.batch == 0 {
        return Err(CliError::Usage("--batch must be at least 1".into()));
    }
    if a.create && a.refset.is_none() && a.target_language.is_none() && a.external.is_empty() {
        return Err(CliError::Usage("--create needs --refset, or for a session without references --target-language or --external".into()));
    }
    let (producer, batches, sent) = match (&a.items, &a.hyp) {
        (Some(path), _) => {
            let bytes = read_bytes(path)?;
            let items = super::send_items::parse_items(display_name(path), &bytes)?;
            // Tag 3: an items file, apart from the three line-file roles.
            let producer = a.producer.clone().unwrap_or_else(|| default_producer(&a.session, [None, None, None, Some(&bytes)], a.batch));
            let n = items.len();
            (producer.clone(), item_batches(&a.session, &producer, a.batch, items), n)
        }
        (None, Some(hyp)) => {
            let hyp_bytes = read_bytes(hyp)?;
            let hyp_name = display_name(hyp);
            let hyps = split_lines(hyp_name, &hyp_bytes)?;
            let src_bytes = a.source.as_deref().map(read_bytes).transpose()?;
            let sources = aligned(hyp_name, hyps.len(), a.source.as_deref(), &src_bytes)?;
            let id_bytes = a.ids.as_deref().map(read_bytes).transpose()?;
            let ids = aligned(hyp_name, hyps.len(), a.ids.as_deref(), &id_bytes)?;
            let producer = a.producer.clone().unwrap_or_else(|| default_producer(&a.session, [Some(&hyp_bytes), src_bytes.as_deref(), id_bytes.as_deref(), None], a.batch));
            let b = batches(&a.session, &producer, a.batch, &hyps, sources.as_deref(), ids.as_deref());
            (producer, b, hyps.len())
        }
        (None, None) => return Err(CliError::Usage("give --hyp or --items".into())),
    };
    let config = a.scoring.config()?;
    let labels = labels(&a.labels)?;
    let show = stderr_is_terminal() && !a.json;
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| CliError::Usage(format!("cannot start the runtime: {e}")))?;
    let fleet = Fleet::parse(&a.server, std::time::Duration::from_secs(a.replica_wait), a.failover)?;
    let create = a.create.then(|| pb::CreateSessionRequest {
        name: a.session.clone(),
        refset: a.refset.clone().unwrap_or_default(),
        config: Some(config_to_pb(&config)),
        labels: labels.into_iter().collect(),
        window: 0,
        if_not_exists: true,
        resampling: Some(pb::Resampling { resamples: Some(a.resamples as u32), seed: Some(a.seed) }),
        target_language: a.target_language.clone().unwrap_or_default(),
        guard_settings: a.guard_settings.clone(),
        external: a.external.iter().map(crate::pb::external::spec_to_pb).collect(),
    });
    let mut bar = show.then(|| Bar::new("sending", "segments", sent));
    let streamed = rt.block_on(stream_all(&fleet, &producer, create.as_ref(), &batches, bar.as_mut()));
    if let Some(b) = &mut bar {
        b.end();
    }
    let (totals, replica) = streamed?;
    let line = if a.json {
        serde_json::json!({
            "session": a.session, "producer": producer, "replica": replica, "batches": totals.batches, "scored": totals.scored,
            "unknown": totals.unknown, "rejected": totals.rejected, "duplicate_batches": totals.duplicate_batches,
            "guards": crate::report::guards_json(&totals.guards, None),
            "with_external_values": totals.external,
        })
        .to_string()
    } else {
        let mut line = format!(
            "sent {} segments in {} batches to session {} as producer {}: {} scored, {} unknown, {} rejected, {} batches already counted",
            sent, totals.batches, a.session, producer, totals.scored, totals.unknown, totals.rejected, totals.duplicate_batches
        );
        if totals.external > 0 {
            line += &format!(", {} with external values counted", totals.external);
        }
        if totals.guards.checked > 0 {
            let flagged: Vec<String> = crate::guard::Guard::ALL.iter().filter(|&&g| totals.guards.flagged_by(g) > 0).map(|&g| format!("{} {g}", totals.guards.flagged_by(g))).collect();
            line += &format!("; guards checked {}, flagged: {}", totals.guards.checked, if flagged.is_empty() { "none".to_owned() } else { flagged.join(", ") });
        }
        line
    };
    println!("{line}");
    Ok(())
}

/// Stream every batch to the producer's replica (creating the session there first when
/// asked), resuming after the last acknowledged batch when a call fails (the replica's
/// per-producer sequence marks make a resent batch count once), drawing the acknowledged
/// items on `bar`. Returns the totals and the replica's name (None: a lone server).
async fn stream_all(fleet: &Fleet, producer: &str, create: Option<&pb::CreateSessionRequest>, batches: &[pb::ScoreBatch], mut bar: Option<&mut Bar>) -> Result<(Totals, Option<String>), CliError> {
    let mut totals = Totals::default();
    let mut next = 0usize;
    // Items of the acknowledged batches.
    let mut done = 0usize;
    let mut backoff = Backoff::default();
    let mut failures = 0u32;
    let mut route = fleet.route(producer).await?;
    let mut created_on: Option<String> = None;
    loop {
        let before = next;
        let result = async {
            if let Some(req) = create.filter(|_| created_on.as_deref() != Some(route.url.as_str())) {
                SessionsClient::new(route.conn.clone()).create(req.clone()).await.map_err(|s| ("create session", s))?;
                created_on = Some(route.url.clone());
            }
            if next >= batches.len() {
                return Ok(());
            }
            let mut client = ScoringClient::new(route.conn.clone()).max_decoding_message_size(STREAM_MESSAGE_BYTES).max_encoding_message_size(STREAM_MESSAGE_BYTES);
            let outbound: Vec<pb::ScoreBatch> = batches[next..].iter().map(|b| pb::ScoreBatch { replicas: route.declared.clone(), ..b.clone() }).collect();
            let mut acks = client.stream(tokio_stream::iter(outbound)).await.map_err(|s| ("scoring stream", s))?.into_inner();
            while let Some(ack) = acks.message().await.map_err(|s| ("scoring stream", s))? {
                totals.batches += 1;
                totals.scored += ack.scored as u64;
                totals.unknown += ack.unknown as u64;
                totals.rejected += ack.rejected as u64;
                totals.duplicate_batches += ack.duplicate as u64;
                if let Some(g) = &ack.guards {
                    totals.guards += crate::pb::convert::guard_tally_from_pb(g);
                }
                totals.external += u64::from(ack.external);
                done += batches.get(next).map_or(0, |b| b.items.len());
                next += 1;
                if let Some(b) = bar.as_deref_mut() {
                    b.update(done);
                }
            }
            Ok::<(), (&str, tonic::Status)>(())
        }
        .await;
        let (what, last) = match result {
            Ok(()) if next >= batches.len() => break,
            // The server ended the stream early (shutting down): reconnect and resume.
            Ok(()) => ("scoring stream", "the server ended the stream".to_owned()),
            Err((what, s)) if !retryable(&s) => return Err(ClientError::call(what, s).into()),
            Err((what, s)) => (what, format!("{} ({:?})", s.message(), s.code())),
        };
        if next > before {
            (failures, backoff) = (0, Backoff::default());
        }
        failures += 1;
        if failures >= MAX_ATTEMPTS {
            return Err(CliError::Usage(format!("gave up after {MAX_ATTEMPTS} attempts ({what}: {last}); {next} of {} batches acknowledged (re-run the same command to resume)", batches.len())));
        }
        if let Some(b) = bar.as_deref_mut() {
            b.end();
        }
        let (delay, attempt) = (backoff.delay().as_secs_f64(), failures + 1);
        if what == "create session" {
            eprintln!("mtgauge: {what}: {last}; retrying in {delay:.1} s (attempt {attempt} of {MAX_ATTEMPTS})");
        } else {
            eprintln!("mtgauge: {what}: {last}; {next} of {} batches acknowledged, resuming in {delay:.1} s (attempt {attempt} of {MAX_ATTEMPTS})", batches.len());
        }
        backoff.wait().await;
        // Find the producer's replica again (it may have come back at another address, or,
        // with failover, be another one now).
        route = fleet.route(producer).await?;
    }
    Ok((totals, route.replica))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_producer_ids_are_stable() {
        // Values of the formula (SHA-256 over the session, 0 + hypotheses, 1 + sources, 2 +
        // ids, the batch size as 8 little-endian bytes; first 8 bytes in hex), computed with
        // Python's hashlib: a re-run after an upgrade keeps its producer id.
        let hyp = "Die Fähre.\n".as_bytes();
        assert_eq!(default_producer("v7", [Some(hyp), Some(b"The ferry.\n"), None, None], 100), "send-15fad8dc936f7382");
        assert_eq!(default_producer("v7", [Some(hyp), None, None, None], 100), "send-c9595bb27b1bfd38");
        assert_ne!(default_producer("v7", [Some(hyp), None, None, None], 10), default_producer("v7", [Some(hyp), None, None, None], 100));
    }

    #[test]
    fn batches_number_from_one_and_key_items() {
        let b = batches("s", "p", 2, &["a", "b", "c"], None, None);
        assert_eq!(b.iter().map(|b| (b.sequence, b.items.len())).collect::<Vec<_>>(), [(1, 2), (2, 1)]);
        assert_eq!(b[1].items[0].key, Some(pb::score_item::Key::SegmentId("3".into())));
        let by_source = batches("s", "p", 5, &["a"], Some(&["Gate C"]), None);
        assert_eq!(by_source[0].items[0].key, Some(pb::score_item::Key::Source("Gate C".into())));
        assert!(labels(&["model=v7".into()]).unwrap()["model"] == "v7" && labels(&["oops".into()]).is_err());
    }
}
