//! The daemon end to end: a real `mtgauge serve` process on 127.0.0.1:0, driven over gRPC.

mod common;


use common::{demo_files, demo_refset, temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::metric::{CorpusStats, ScoreConfig};
use mtgauge::pb;
use mtgauge::pb::ref_sets_client::RefSetsClient;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use mtgauge::refs::compiled::{Compiled, Scratch};
use mtgauge::rng::SplitMix64;
use mtgauge::pb::convert::{config_to_pb, stats_from_pb};
use tonic::Code;

fn all_metrics() -> ScoreConfig {
    "bleu chrf chrf++".parse().unwrap()
}

/// Every (segment index, hypothesis) of all demo systems: 900 items over 300 segments.
fn demo_items() -> Vec<(usize, String)> {
    demo_systems().into_iter().flat_map(|sys| sys.hypotheses.into_iter().enumerate()).collect()
}

/// The offline engine's statistics of the same items.
fn offline(items: &[(usize, String)], config: ScoreConfig) -> CorpusStats {
    let compiled = Compiled::build(demo_refset(), config);
    let mut scratch = Scratch::default();
    let mut sum = CorpusStats::default();
    for (i, h) in items {
        sum.add_segment(&compiled.score_segment(*i, h, &mut scratch));
    }
    sum
}

async fn create(ch: &tonic::transport::Channel, name: &str, refset: &str, config: ScoreConfig) -> pb::SessionInfo {
    let mut s = SessionsClient::new(ch.clone());
    let labels = [("model".to_string(), "v7".to_string())].into_iter().collect();
    s.create(pb::CreateSessionRequest { name: name.into(), refset: refset.into(), config: Some(config_to_pb(&config)), labels, window: 50, if_not_exists: false, ..Default::default() }).await.expect("create session").into_inner()
}

async fn scores(ch: &tonic::transport::Channel, session: &str) -> pb::ScoresReport {
    ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: session.into(), ..Default::default() }).await.expect("get scores").into_inner()
}

fn item(by_source: bool, seg: usize, hyp: &str) -> pb::ScoreItem {
    let segs = demo_segments();
    let key = if by_source {
        // Live traffic does not send clean text: vary case-preserving white space.
        pb::score_item::Key::Source(format!("  {}\t", segs[seg].source_text().replace(' ', "  ")))
    } else {
        pb::score_item::Key::SegmentId(segs[seg].id.clone())
    };
    pb::ScoreItem { key: Some(key), hypothesis: hyp.to_owned(), ..Default::default() }
}

/// 16 producers, each on its own stream, send shuffled interleaved parts in batches of random
/// sizes; the session's integer statistics must equal the offline engine's over all items.
async fn sixteen_streams(by_source: bool) {
    let dir = temp_dir(if by_source { "streams-src" } else { "streams-id" });
    demo_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let server = Server::start(&["--refset", &refs]);
    let ch = server.wait_serving().await;
    let config = all_metrics();
    create(&ch, "probe", "ferry", config).await;

    let mut items = demo_items();
    let mut rng = SplitMix64::new(if by_source { 2 } else { 1 });
    for i in (1..items.len()).rev() {
        items.swap(i, rng.below(i as u64 + 1) as usize);
    }
    let mut parts: Vec<Vec<(usize, String)>> = vec![Vec::new(); 16];
    for (k, it) in items.iter().enumerate() {
        parts[k % 16].push(it.clone());
    }
    let mut tasks = Vec::new();
    for (p, part) in parts.into_iter().enumerate() {
        let ch = ch.clone();
        let mut rng = SplitMix64::new(100 + p as u64);
        tasks.push(tokio::spawn(async move {
            let mut batches = Vec::new();
            let mut rest = &part[..];
            let mut seq = 0;
            while !rest.is_empty() {
                let n = (1 + rng.below(40) as usize).min(rest.len());
                seq += 1;
                batches.push(pb::ScoreBatch {
                    session: "probe".into(),
                    producer: format!("worker-{p}"),
                    sequence: seq,
                    items: rest[..n].iter().map(|(i, h)| item(by_source, *i, h)).collect(),
                    want_segment_scores: p == 0,
                    ..Default::default()
                });
                rest = &rest[n..];
            }
            let sent: u32 = batches.iter().map(|b| b.items.len() as u32).sum();
            let nb = batches.len();
            let mut acks = ScoringClient::new(ch).stream(tokio_stream::iter(batches)).await.expect("open stream").into_inner();
            let (mut scored, mut count) = (0u32, 0usize);
            while let Some(ack) = acks.message().await.expect("ack") {
                assert_eq!(ack.unknown + ack.rejected, 0, "{ack:?}");
                assert!(!ack.duplicate);
                assert_eq!(ack.sequence, count as u64 + 1, "acks in order");
                if p == 0 {
                    assert_eq!(ack.segment_scores.len() as u32, ack.scored, "segment scores on request");
                    assert!(ack.segment_scores.iter().all(|s| s.scores.get("bleu").is_some_and(|b| (0.0..=100.0).contains(b))));
                }
                scored += ack.scored;
                count += 1;
            }
            assert_eq!(count, nb, "one ack per batch");
            assert_eq!(scored, sent);
            scored
        }));
    }
    let mut total = 0;
    for t in tasks {
        total += t.await.unwrap();
    }
    assert_eq!(total as usize, items.len());
    let report = scores(&ch, "probe").await;
    let got = stats_from_pb(report.cumulative.as_ref().unwrap());
    let want = offline(&items, config);
    assert_eq!(got, want, "server statistics equal the offline engine's");
    assert_eq!(got.segments, 900);
    let recent = stats_from_pb(report.recent.as_ref().unwrap());
    assert_eq!(recent.segments, 50, "window of 50");
    let s = report.cumulative.as_ref().unwrap();
    assert!((s.bleu.as_ref().unwrap().score - want.bleu.score(4).score).abs() < 1e-9);

    // The Prometheus counters carry the same integers.
    let scrape = server.scrape();
    let value = |name: &str, labels: &str| -> u64 {
        let prefix = format!("{name}{{{labels}}} ");
        scrape.lines().find_map(|l| l.strip_prefix(&prefix)).unwrap_or_else(|| panic!("{prefix} not in scrape")).trim().parse::<f64>().unwrap() as u64
    };
    assert_eq!(value("mtgauge_segments_total", "session=\"probe\",outcome=\"scored\""), 900);
    for n in 0..4 {
        assert_eq!(value("mtgauge_bleu_matches_total", &format!("session=\"probe\",order=\"{}\"", n + 1)), want.bleu.matches[n]);
        assert_eq!(value("mtgauge_bleu_ngrams_total", &format!("session=\"probe\",order=\"{}\"", n + 1)), want.bleu.totals[n]);
    }
    assert_eq!(value("mtgauge_hypothesis_tokens_total", "session=\"probe\""), want.bleu.hyp_len);
    assert_eq!(value("mtgauge_reference_tokens_total", "session=\"probe\""), want.bleu.ref_len);
    assert_eq!(value("mtgauge_chrf_matches_total", "session=\"probe\",metric=\"chrf\",kind=\"chars\",order=\"6\""), want.chrf.char.matches[5]);
    assert_eq!(value("mtgauge_chrf_reference_ngrams_total", "session=\"probe\",metric=\"chrf++\",kind=\"words\",order=\"2\""), want.chrfpp.word.reference[1]);
    promtool_check(&scrape);
}

/// `promtool check metrics` (Debian package prometheus) on a live scrape. CI sets
/// MTGAUGE_REQUIRE_PROMTOOL=1 so that a missing promtool fails instead of being skipped.
fn promtool_check(scrape: &str) {
    use std::io::Write;
    let required = std::env::var_os("MTGAUGE_REQUIRE_PROMTOOL").is_some();
    let child = std::process::Command::new("promtool").args(["check", "metrics"]).stdin(std::process::Stdio::piped()).stdout(std::process::Stdio::piped()).stderr(std::process::Stdio::piped()).spawn();
    let mut child = match child {
        Ok(c) => c,
        Err(e) if !required => {
            eprintln!("promtool not found ({e}); set MTGAUGE_REQUIRE_PROMTOOL=1 to require it");
            return;
        }
        Err(e) => panic!("promtool required but not runnable: {e}"),
    };
    child.stdin.take().unwrap().write_all(scrape.as_bytes()).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "promtool check metrics failed:\n{}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn sixteen_streams_by_segment_id_equal_the_offline_engine() {
    sixteen_streams(false).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn sixteen_streams_by_source_lookup_equal_the_offline_engine() {
    sixteen_streams(true).await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn lifecycle_unknown_reset_close_replace_watch() {
    let dir = temp_dir("lifecycle");
    demo_files(&dir);
    let server = Server::start(&["--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let mut refsets = RefSetsClient::new(ch.clone());
    let load = |paths: Vec<&str>, replace: bool| pb::LoadRefSetRequest { name: "ferry".into(), format: pb::RefFormat::Plain as i32, paths: paths.into_iter().map(String::from).collect(), source_path: "source.en.txt".into(), replace };
    let one = refsets.load(load(vec!["ref1.de.txt"], false)).await.unwrap().into_inner();
    assert_eq!((one.segments, one.references, one.with_source), (300, 300, 300));
    let err = refsets.load(load(vec!["ref1.de.txt"], false)).await.unwrap_err();
    assert_eq!(err.code(), Code::AlreadyExists);

    let config = all_metrics();
    let v1 = create(&ch, "old", "ferry", config).await;
    assert_eq!(v1.refset_digest, one.digest);
    let mut scoring = ScoringClient::new(ch.clone());
    let hyp = &demo_systems()[1].hypotheses;
    let batch = |seq: u64, ids: &[&str]| pb::ScoreBatch {
        session: "old".into(),
        producer: "p".into(),
        sequence: seq,
        items: ids.iter().enumerate().map(|(k, id)| pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId((*id).into())), hypothesis: hyp[k].clone(), ..Default::default() }).collect(),
        want_segment_scores: false,
        ..Default::default()
    };
    // Plain sets are keyed by line number.
    let ack = scoring.submit(batch(1, &["1", "2", "no-such-id", "301"])).await.unwrap().into_inner();
    assert_eq!((ack.scored, ack.unknown, ack.rejected), (2, 2, 0));

    // Watch: a report per interval.
    let mut watch = scoring.watch_scores(pb::WatchScoresRequest { session: "old".into(), interval_seconds: 1, ..Default::default() }).await.unwrap().into_inner();
    let first = watch.message().await.unwrap().unwrap();
    assert_eq!(first.cumulative.unwrap().segments, 2);

    // Replace the set while the session exists: the session keeps its version.
    let two = refsets.load(load(vec!["ref1.de.txt", "ref2.de.txt"], true)).await.unwrap().into_inner();
    assert_ne!(two.digest, one.digest);
    assert_eq!(two.references, 600);
    let still = SessionsClient::new(ch.clone()).get(pb::GetSessionRequest { name: "old".into() }).await.unwrap().into_inner();
    assert_eq!(still.refset_digest, one.digest);
    let v2 = create(&ch, "new", "ferry", config).await;
    assert_eq!(v2.refset_digest, two.digest);
    let ack = scoring.submit(batch(2, &["3"])).await.unwrap().into_inner();
    assert_eq!(ack.scored, 1);
    let after = scores(&ch, "old").await;
    assert_eq!(after.cumulative.unwrap().segments, 3);
    assert_eq!(after.unknown, 2);
    let second = watch.message().await.unwrap().unwrap();
    assert!(second.unix_time >= first.unix_time);

    // Reset zeroes statistics, keeps sequence marks.
    SessionsClient::new(ch.clone()).reset(pb::ResetSessionRequest { name: "old".into() }).await.unwrap();
    let zero = scores(&ch, "old").await;
    assert_eq!(zero.cumulative.unwrap().segments, 0);
    let dup = scoring.submit(batch(2, &["3"])).await.unwrap().into_inner();
    assert!(dup.duplicate);
    assert_eq!(scores(&ch, "old").await.cumulative.unwrap().segments, 0);

    // Close: gone, and the watch ends with NOT_FOUND.
    SessionsClient::new(ch.clone()).close(pb::CloseSessionRequest { name: "old".into() }).await.unwrap();
    let err = scoring.get_scores(pb::GetScoresRequest { session: "old".into(), ..Default::default() }).await.unwrap_err();
    assert_eq!(err.code(), Code::NotFound);
    loop {
        match watch.message().await {
            Ok(Some(_)) => continue,
            Ok(None) => panic!("watch ended without a status"),
            Err(s) => {
                assert_eq!(s.code(), Code::NotFound);
                break;
            }
        }
    }
    let list = refsets.list(pb::ListRefSetsRequest {}).await.unwrap().into_inner();
    assert_eq!(list.refsets.len(), 1);
    assert_eq!(list.refsets[0].sessions, 1, "only 'new' uses the current version");
    refsets.delete(pb::DeleteRefSetRequest { name: "ferry".into() }).await.unwrap();
    // Sessions keep scoring against their version after the set is deleted.
    let mut b = batch(1, &["4"]);
    b.session = "new".into();
    assert_eq!(scoring.submit(b).await.unwrap().into_inner().scored, 1);
}

fn code<T: std::fmt::Debug>(r: Result<tonic::Response<T>, tonic::Status>) -> Code {
    let s = r.expect_err("must fail");
    assert!(!s.message().is_empty());
    s.code()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn bad_requests_get_precise_statuses() {
    let dir = temp_dir("errors");
    demo_files(&dir);
    std::fs::create_dir_all(dir.join("sets")).unwrap();
    std::fs::copy(dir.join("refs.jsonl"), dir.join("sets/refs.jsonl")).unwrap();
    std::os::unix::fs::symlink(dir.join("ref1.de.txt"), dir.join("sets/outside.txt")).unwrap();
    let cfg = dir.join("mtgauge.toml");
    std::fs::write(&cfg, format!("refset_dir = {:?}\ndata_dir = {:?}\nmax_message_bytes = 65536\n[limits]\nmax_batch_items = 50\nmax_text_bytes = 2000\n", dir.join("sets"), dir.join("data"))).unwrap();
    let server = Server::start(&["--config", cfg.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let mut refsets = RefSetsClient::new(ch.clone());
    let mut sessions = SessionsClient::new(ch.clone());
    let mut scoring = ScoringClient::new(ch.clone());
    let load = |name: &str, path: &str| pb::LoadRefSetRequest { name: name.into(), format: pb::RefFormat::Jsonl as i32, paths: vec![path.into()], source_path: String::new(), replace: false };
    refsets.load(load("ferry", "refs.jsonl")).await.expect("load inside the dir");

    assert_eq!(code(refsets.load(load("x", "../ref1.de.txt")).await), Code::PermissionDenied);
    assert_eq!(code(refsets.load(load("x", dir.join("ref1.de.txt").to_str().unwrap())).await), Code::PermissionDenied);
    assert_eq!(code(refsets.load(load("x", "outside.txt")).await), Code::PermissionDenied, "symlink leaving the dir");
    assert_eq!(code(refsets.load(load("x", "missing.jsonl")).await), Code::InvalidArgument);
    assert_eq!(code(refsets.load(load("bad name", "refs.jsonl")).await), Code::InvalidArgument);
    assert_eq!(code(refsets.describe(pb::DescribeRefSetRequest { name: "nope".into() }).await), Code::NotFound);

    let req = |name: &str, refset: &str| pb::CreateSessionRequest { name: name.into(), refset: refset.into(), config: None, labels: Default::default(), window: 0, if_not_exists: false, ..Default::default() };
    assert_eq!(code(sessions.create(req("v7", "nope")).await), Code::NotFound);
    for bad in ["", "a b", "quote\"d", "new\nline", &"x".repeat(65)] {
        assert_eq!(code(sessions.create(req(bad, "ferry")).await), Code::InvalidArgument, "{bad:?}");
    }
    let mut r = req("v7", "ferry");
    r.labels = [("bad-label".to_string(), "x".to_string())].into_iter().collect();
    assert_eq!(code(sessions.create(r).await), Code::InvalidArgument);
    let mut r = req("v7", "ferry");
    r.config = Some(pb::ScoreConfig { tokenizer: "no-such-tokenizer".into(), ..Default::default() });
    assert_eq!(code(sessions.create(r).await), Code::InvalidArgument);
    sessions.create(req("v7", "ferry")).await.unwrap();
    assert_eq!(code(sessions.create(req("v7", "ferry")).await), Code::AlreadyExists);
    let mut again = req("v7", "ferry");
    again.if_not_exists = true;
    sessions.create(again.clone()).await.expect("identical definition with if_not_exists");
    // A re-create is idempotent only for the whole definition: other labels or another window
    // are refused, naming what differs (one rule, also when two creates race).
    let mut labelled = again.clone();
    labelled.labels = [("model".to_string(), "v8".to_string())].into_iter().collect();
    let mut wider = again.clone();
    wider.window = 77;
    let mut both = labelled.clone();
    both.window = 77;
    for (r, want) in [(labelled, "with another definition (differs in labels)"), (wider, "with another definition (differs in window)"), (both, "with another definition (differs in labels, window)")] {
        let e = sessions.create(r).await.unwrap_err();
        assert_eq!(e.code(), Code::AlreadyExists, "{e:?}");
        assert!(e.message().contains(&format!("'v7' already exists {want}")), "{}", e.message());
    }
    let e = sessions.create(req("v7", "ferry")).await.unwrap_err();
    assert!(e.message().contains("(ask with if_not_exists to reuse it)"), "{}", e.message());

    let batch = |session: &str, items: Vec<pb::ScoreItem>| pb::ScoreBatch { session: session.into(), producer: String::new(), sequence: 0, items, want_segment_scores: false, ..Default::default() };
    let it = |id: &str, hyp: &str| pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(id.into())), hypothesis: hyp.into(), ..Default::default() };
    assert_eq!(code(scoring.submit(batch("nope", vec![it("notice-0001", "x")])).await), Code::NotFound);
    assert_eq!(code(scoring.submit(batch("v7", vec![])).await), Code::InvalidArgument);
    let many = (0..51).map(|_| it("notice-0001", "x")).collect();
    let s = scoring.submit(batch("v7", many)).await.unwrap_err();
    assert_eq!(s.code(), Code::ResourceExhausted);
    assert!(s.message().contains("limits.max_batch_items"), "{}", s.message());
    let huge = "Fähre ".repeat(20_000);
    let s = scoring.submit(batch("v7", vec![it("notice-0001", &huge)])).await.unwrap_err();
    assert_eq!(s.code(), Code::ResourceExhausted, "oversize message: {s:?}");
    assert!(s.message().contains("max_message_bytes"), "oversize message: {s:?}");
    let ack = scoring.submit(batch("v7", vec![pb::ScoreItem { key: None, hypothesis: "x".into(), ..Default::default() }, it("notice-0001", &"x".repeat(2001)), it("notice-0001", "Hunde")])).await.unwrap().into_inner();
    assert_eq!((ack.scored, ack.rejected), (1, 2));
    assert!(ack.rejections[0].reason.contains("neither"));
    assert!(ack.rejections[1].reason.contains("limits.max_text_bytes"));

    // A second live stream of the same producer into the same session is refused.
    let (tx, rx) = tokio::sync::mpsc::channel(4);
    let mut first = scoring.stream(tokio_stream::wrappers::ReceiverStream::new(rx)).await.unwrap().into_inner();
    let mut b = batch("v7", vec![it("notice-0002", "x")]);
    (b.producer, b.sequence) = ("same".into(), 1);
    tx.send(b.clone()).await.unwrap();
    assert_eq!(first.message().await.unwrap().unwrap().scored, 1);
    b.sequence = 2;
    let mut second = ScoringClient::new(ch.clone()).stream(tokio_stream::iter(vec![b])).await.unwrap().into_inner();
    let s = second.message().await.unwrap_err();
    assert_eq!(s.code(), Code::FailedPrecondition);
    drop(tx);
    assert!(first.message().await.unwrap().is_none());

    // The server survived all of it.
    let info = sessions.get(pb::GetSessionRequest { name: "v7".into() }).await.unwrap().into_inner();
    assert_eq!((info.scored, info.rejected), (2, 2));
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sigterm_reports_not_serving_and_exits() {
    let dir = temp_dir("sigterm");
    demo_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let mut server = Server::start(&["--refset", &refs, "--drain-seconds", "5"]);
    let ch = server.wait_serving().await;
    create(&ch, "s", "ferry", all_metrics()).await;
    let status = server.terminate();
    assert!(status.success(), "clean exit: {status:?}");
    let logs = server.logs.lock().unwrap().join("\n");
    assert!(logs.contains("NOT_SERVING"), "{logs}");
}

#[test]
fn live_demo_shows_the_degrading_model() {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["demo", "--seconds", "6"]).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8_lossy(&out.stdout);
    // Rows: "<t>s  <session> <BLEU> <recent> <low..high> <chrF> <segments> <unknown>".
    let recent = |session: &str| -> Vec<f64> {
        text.lines().filter(|l| l.split_whitespace().nth(1) == Some(session)).map(|l| l.split_whitespace().nth(3).unwrap().parse().unwrap()).collect()
    };
    let rc = recent("ferry-en-de.model-v8-rc");
    let v7 = recent("ferry-en-de.model-v7");
    assert_eq!((rc.len(), v7.len()), (6, 6), "{text}");
    assert!(rc[0] > 80.0 && *rc.last().unwrap() < rc[0] - 20.0, "the candidate degrades: {rc:?}");
    assert!((v7[0] - v7.last().unwrap()).abs() < 10.0, "the production model stays: {v7:?}");
    assert!(text.contains("mtgauge status --server"), "ends with commands to try");
    let ranges: Vec<(f64, f64)> = text
        .lines()
        .filter(|l| l.split_whitespace().nth(1) == Some("ferry-en-de.model-v7"))
        .map(|l| {
            let (lo, hi) = l.split_whitespace().nth(4).unwrap().split_once("..").unwrap();
            (lo.parse().unwrap(), hi.parse().unwrap())
        })
        .collect();
    assert!(ranges.iter().all(|(lo, hi)| lo < hi), "a recent interval on every row: {ranges:?}");
    // Some outputs come back broken: each session's summary shows the guards' counts, and each
    // kind of broken output was flagged (at 1-8% of some 900 items per session, a kind left
    // out of both sessions has a chance of about e^-13).
    assert_eq!(text.matches("items checked against their sources, target language de").count(), 2, "{text}");
    for guard in ["empty", "copy", "repetition", "language"] {
        let flagged: u64 = text
            .lines()
            .map(|l| l.split_whitespace().collect::<Vec<_>>())
            .filter(|w| w.len() >= 3 && w[0] == guard && w[2] == "flagged")
            .map(|w| w[1].parse::<u64>().unwrap())
            .sum();
        assert!(flagged > 0, "no {guard} flags in the demo: {text}");
    }
    // Each output carries a simulated quality-estimation score (an external segment metric):
    // each summary shows its mean inside its interval, over every item sent.
    let qe: Vec<Vec<&str>> = text.lines().map(|l| l.split_whitespace().collect::<Vec<_>>()).filter(|w| w.first() == Some(&"ferry_qe")).collect();
    assert_eq!(qe.len(), 2, "{text}");
    for w in qe {
        // "ferry_qe mean M (LO .. HI, 95% interval), stddev S, N values, ..."
        let num = |s: &str| s.trim_matches(|c: char| c == '(' || c == ',').parse::<f64>().unwrap();
        let (mean, lo, hi, n) = (num(w[2]), num(w[3]), num(w[5]), num(w[10]));
        assert!(0.0 < lo && lo <= mean && mean <= hi && hi < 1.0, "{w:?}");
        assert!(n > 100.0, "{w:?}");
    }
}

/// `demo --linger`: the status page's URL is printed at the start, and after the run the
/// daemon keeps serving it (with both demo sessions and their charts) until SIGTERM.
#[test]
fn demo_lingers_with_its_status_page_until_told_to_stop() {
    use std::io::{BufRead, Read, Write};
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["demo", "--seconds", "2", "--linger"]).stdout(std::process::Stdio::piped()).stderr(std::process::Stdio::null()).spawn().unwrap();
    let mut lines = std::io::BufReader::new(child.stdout.take().unwrap()).lines();
    let mut page = None;
    for line in lines.by_ref() {
        let line = line.unwrap();
        if let Some(rest) = line.strip_prefix("status page: http://") {
            page = rest.split('/').next().map(str::to_owned);
        }
        if line.starts_with("still serving: status page http://") {
            break;
        }
    }
    let addr = page.expect("the status page's address is printed at the start");
    let mut conn = std::net::TcpStream::connect(&addr).unwrap();
    conn.write_all(b"GET / HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n").unwrap();
    let mut body = String::new();
    conn.read_to_string(&mut body).unwrap();
    assert!(body.starts_with("HTTP/1.1 200"), "{}", &body[..body.len().min(200)]);
    for session in ["ferry-en-de.model-v8-rc", "ferry-en-de.model-v7"] {
        assert!(body.contains(session), "{session} on the page");
    }
    assert!(body.contains("<svg"), "a chart on the page");
    assert!(child.try_wait().unwrap().is_none(), "still serving after the run");
    let _ = std::process::Command::new("kill").args(["-TERM", &child.id().to_string()]).status();
    let status = child.wait().unwrap();
    assert!(status.success(), "clean exit on SIGTERM: {status:?}");
    let rest: Vec<String> = lines.map_while(Result::ok).collect();
    assert!(rest.iter().any(|l| l.contains("mtgauge status --server")), "ends as a normal run does: {rest:?}");
}

fn mtgauge(args: &[&str]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(args).output().unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn send_twice_counts_once_and_status_matches_score() {
    let dir = temp_dir("send");
    demo_files(&dir);
    let refs = dir.join("refs.jsonl");
    let ids: String = demo_segments().iter().map(|s| s.id.clone() + "\n").collect();
    std::fs::write(dir.join("ids.txt"), ids).unwrap();
    let server = Server::start(&["--refset", &format!("ferry={}", refs.display()), "--log-format", "json"]);
    server.wait_serving().await;
    let p = |n: &str| dir.join(n).to_str().unwrap().to_owned();
    let send = ["send", "--server", &server.grpc, "--session", "v7", "--create", "--refset", "ferry", "--hyp", &p("hyp.model-v7.de.txt"), "--ids", &p("ids.txt"), "--batch", "64", "--json"];
    let first = mtgauge(&send);
    assert!(first.status.success(), "{}", String::from_utf8_lossy(&first.stderr));
    let a: serde_json::Value = serde_json::from_slice(&first.stdout).unwrap();
    assert_eq!((a["scored"].as_u64(), a["batches"].as_u64(), a["duplicate_batches"].as_u64()), (Some(300), Some(5), Some(0)));
    // The identical command again (after a crash, say) counts nothing twice.
    let again = mtgauge(&send);
    let b: serde_json::Value = serde_json::from_slice(&again.stdout).unwrap();
    assert_eq!((b["scored"].as_u64(), b["duplicate_batches"].as_u64()), (Some(0), Some(5)));
    assert_eq!(a["producer"], b["producer"], "stable default producer id");

    let status = mtgauge(&["status", "--server", &server.grpc, "--session", "v7", "--json"]);
    assert!(status.status.success(), "{}", String::from_utf8_lossy(&status.stderr));
    let st: serde_json::Value = serde_json::from_slice(&status.stdout).unwrap();
    // The daemon's default replicates (200, seed 1) weigh each segment as `score --interval`
    // does with the same settings (weights keyed by segment id): the intervals are equal.
    let score = mtgauge(&["score", "--ref", refs.to_str().unwrap(), "--hyp", &p("hyp.model-v7.de.txt"), "--json", "--interval", "--resamples", "200", "--seed", "1"]);
    let sc: serde_json::Value = serde_json::from_slice(&score.stdout).unwrap();
    let cum = &st["cumulative"];
    assert_eq!(cum["segments"], sc["segments"]);
    assert_eq!(cum["bleu"], sc["bleu"], "status cumulative has score --json's BLEU fields and values, interval included");
    assert!(cum["bleu"]["interval"]["low"].as_f64().unwrap() < cum["bleu"]["score"].as_f64().unwrap());
    assert_eq!(cum["chrf"], sc["chrf"]);
    assert_eq!(st["config"], sc["config"]);
    assert_eq!(st["refset"]["digest"], sc["refset"]["digest"]);
    assert_eq!(st["refset"]["name"], "ferry");
    assert_eq!(st["recent"]["segments"], 300);
    assert_eq!(st["recent"]["bleu"]["interval"], cum["bleu"]["interval"], "the window holds every segment: the same interval");

    // Human status and an unknown session.
    let human = mtgauge(&["status", "--server", &server.grpc]);
    assert!(String::from_utf8_lossy(&human.stdout).contains("session v7 (reference set ferry"));
    let missing = mtgauge(&["status", "--server", &server.grpc, "--session", "nope"]);
    assert_eq!(missing.status.code(), Some(2));
    assert!(missing.stdout.is_empty());
    assert!(String::from_utf8_lossy(&missing.stderr).contains("NotFound"), "{}", String::from_utf8_lossy(&missing.stderr));

    // --log-format json: every log line is a JSON object.
    let logs = server.logs.lock().unwrap().clone();
    let parsed: Vec<serde_json::Value> = logs.iter().map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("not JSON ({e}): {l}"))).collect();
    // The events of this run are there, with their fields as JSON fields.
    assert!(parsed.iter().any(|v| v["fields"]["message"] == "session ready" && v["fields"]["session"] == "v7"), "no 'session ready' event for v7: {logs:?}");
    assert!(parsed.iter().any(|v| v["fields"]["message"] == "serving"), "no 'serving' event: {logs:?}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn each_limit_is_enforced_and_named() {
    let dir = temp_dir("limits");
    demo_files(&dir);
    let cfg = dir.join("limits.toml");
    // refs.jsonl of the demo is ~90 KB on disk; its memory is of the same order.
    std::fs::write(
        &cfg,
        format!(
            "refset_dir = {:?}\ndata_dir = {:?}\n[limits]\nmax_sessions = 2\nmax_refsets = 2\nmax_refset_bytes = 150000\nmax_total_refset_bytes = 120000\nmax_streams = 2\nmax_watchers = 1\n",
            dir,
            dir.join("data")
        ),
    )
    .unwrap();
    let server = Server::start(&["--config", cfg.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let mut refsets = RefSetsClient::new(ch.clone());
    let load = |name: &str, paths: Vec<&str>| pb::LoadRefSetRequest { name: name.into(), format: pb::RefFormat::Plain as i32, paths: paths.into_iter().map(String::from).collect(), source_path: String::new(), replace: false };
    let limit_of = |s: tonic::Status| {
        assert_eq!(s.code(), Code::ResourceExhausted, "{s:?}");
        s.message().to_owned()
    };
    refsets.load(load("a", vec!["ref1.de.txt"])).await.unwrap();
    // One set of two streams: more than max_total_refset_bytes together with "a".
    let m = limit_of(refsets.load(load("b", vec!["ref1.de.txt", "ref2.de.txt"])).await.unwrap_err());
    assert!(m.contains("limits.max_total_refset_bytes"), "{m}");
    let m = limit_of(refsets.load(load("big", vec!["ref1.de.txt", "ref2.de.txt", "ref1.de.txt", "ref2.de.txt", "ref1.de.txt"])).await.unwrap_err());
    assert!(m.contains("limits.max_refset_bytes"), "{m}");
    refsets.load(load("c", vec!["ref2.de.txt"])).await.unwrap();
    // A third set, so small that the memory of all sets stays under its limit: the count speaks.
    std::fs::write(dir.join("tiny.de.txt"), "Tor C\n").unwrap();
    let m = limit_of(refsets.load(load("d", vec!["tiny.de.txt"])).await.unwrap_err());
    assert!(m.contains("limits.max_refsets") && m.contains("3 reference sets"), "{m}");

    let mut sessions = SessionsClient::new(ch.clone());
    let req = |name: &str| pb::CreateSessionRequest { name: name.into(), refset: "a".into(), config: None, labels: Default::default(), window: 0, if_not_exists: false, ..Default::default() };
    sessions.create(req("s1")).await.unwrap();
    sessions.create(req("s2")).await.unwrap();
    let m = limit_of(sessions.create(req("s3")).await.unwrap_err());
    assert!(m.contains("limits.max_sessions"), "{m}");

    // Streams: two open, the third refused; closing one frees its place.
    let mut scoring = ScoringClient::new(ch.clone());
    let (tx1, rx1) = tokio::sync::mpsc::channel::<pb::ScoreBatch>(1);
    let (tx2, rx2) = tokio::sync::mpsc::channel::<pb::ScoreBatch>(1);
    let s1 = scoring.stream(tokio_stream::wrappers::ReceiverStream::new(rx1)).await.unwrap();
    let _s2 = scoring.stream(tokio_stream::wrappers::ReceiverStream::new(rx2)).await.unwrap();
    let m = limit_of(scoring.stream(tokio_stream::iter(Vec::<pb::ScoreBatch>::new())).await.unwrap_err());
    assert!(m.contains("limits.max_streams"), "{m}");
    drop(tx1);
    let mut s1 = s1.into_inner();
    assert!(s1.message().await.unwrap().is_none());
    let mut ok = false;
    for _ in 0..50 {
        if scoring.stream(tokio_stream::iter(Vec::<pb::ScoreBatch>::new())).await.is_ok() {
            ok = true;
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    }
    assert!(ok, "a closed stream gives its place back");
    drop(tx2);

    // Watchers: one at a time.
    let _w = scoring.watch_scores(pb::WatchScoresRequest { session: "s1".into(), interval_seconds: 1, ..Default::default() }).await.unwrap();
    let m = limit_of(scoring.watch_scores(pb::WatchScoresRequest { session: "s1".into(), interval_seconds: 1, ..Default::default() }).await.unwrap_err());
    assert!(m.contains("limits.max_watchers"), "{m}");
}

#[test]
fn zero_or_negative_limits_are_refused_naming_the_key() {
    let dir = temp_dir("badlimits");
    for (body, key) in [("[limits]\nmax_streams = 0\n", "limits.max_streams"), ("[limits]\nmax_watchers = -3\n", "limits.max_watchers"), ("[limits]\nmax_total_refset_bytes = 0\n", "limits.max_total_refset_bytes"), ("no_such_key = 1\n", "no_such_key")] {
        let cfg = dir.join("bad.toml");
        std::fs::write(&cfg, body).unwrap();
        let out = mtgauge(&["serve", "--config", cfg.to_str().unwrap(), "--durability", "none", "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0"]);
        assert_eq!(out.status.code(), Some(2), "{body}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(err.contains(key), "{body}: {err}");
    }
}

/// The server as a library: `server::run` on a listener the test bound, with a startup
/// reference set, scores a batch exactly, stops when its shutdown future resolves, and returns.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn run_in_process_serves_until_its_shutdown_future_resolves() {
    let dir = temp_dir("in-process");
    demo_files(&dir);
    let config = mtgauge::server::ServerConfig { startup_refsets: vec![mtgauge::server::StartupRefSet { name: "ferry".into(), paths: vec![dir.join("refs.jsonl")], source: None }], ..Default::default() };
    let server = common::InProcess::start(config).await;
    let ch = server.wait_serving().await;
    create(&ch, "inproc", "ferry", all_metrics()).await;
    let items: Vec<(usize, String)> = demo_items().into_iter().take(40).collect();
    let batch = pb::ScoreBatch { session: "inproc".into(), producer: "p".into(), sequence: 1, want_segment_scores: false, items: items.iter().map(|(i, h)| item(false, *i, h)).collect(), ..Default::default() };
    let ack = ScoringClient::new(ch.clone()).submit(batch).await.unwrap().into_inner();
    assert_eq!((ack.scored, ack.duplicate), (40, false));
    let got = scores(&ch, "inproc").await;
    assert_eq!(stats_from_pb(got.cumulative.as_ref().unwrap()), offline(&items, all_metrics()));
    let grpc = server.grpc.clone();
    server.stop().await.expect("a clean stop");
    let after = tonic::transport::Endpoint::from_shared(grpc).unwrap().connect().await;
    assert!(after.is_err(), "the listener is closed after run returns");
}

/// `compare --server`: two sessions on the same reference set compared over their windows
/// give exactly what `compare` gives offline on the same files (the windows hold every segment,
/// the weights and swap coins are keyed by segment id, so the order segments arrived in does
/// not matter); identical systems differ by 0 with p = 1; sessions of another configuration
/// are refused.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn compare_live_equals_compare_offline() {
    let dir = temp_dir("compare");
    demo_files(&dir);
    let refs = dir.join("refs.jsonl");
    let ids: String = demo_segments().iter().map(|s| s.id.clone() + "\n").collect();
    std::fs::write(dir.join("ids.txt"), ids).unwrap();
    let server = Server::start(&["--refset", &format!("ferry={}", refs.display())]);
    server.wait_serving().await;
    let p = |n: &str| dir.join(n).to_str().unwrap().to_owned();
    let send = |session: &str, hyp: &str, extra: &[&str]| {
        let mut args = vec!["send", "--server", &server.grpc, "--session", session, "--create", "--refset", "ferry", "--ids"];
        let (ids, hyp) = (p("ids.txt"), p(hyp));
        args.extend([ids.as_str(), "--hyp", hyp.as_str(), "--batch", "37"]);
        args.extend(extra);
        let out = mtgauge(&args);
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    };
    send("v7", "hyp.model-v7.de.txt", &[]);
    send("v7-again", "hyp.model-v7.de.txt", &[]);
    send("fallback", "hyp.fallback-dictionary.de.txt", &[]);
    send("v7-caseless", "hyp.model-v7.de.txt", &["--caseless"]);
    let live = |a: &str, b: &str| -> serde_json::Value {
        let out = mtgauge(&["compare", "--server", &server.grpc, "--session", a, "--session", b, "--json", "--trials", "2000"]);
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        serde_json::from_slice(&out.stdout).unwrap()
    };
    let worse = live("v7", "fallback");
    let offline = mtgauge(&["compare", "--ref", refs.to_str().unwrap(), "--hyp", &p("hyp.model-v7.de.txt"), "--hyp", &p("hyp.fallback-dictionary.de.txt"), "--json", "--trials", "2000", "--resamples", "200"]);
    assert!(offline.status.success(), "{}", String::from_utf8_lossy(&offline.stderr));
    let offline: serde_json::Value = serde_json::from_slice(&offline.stdout).unwrap();
    assert_eq!(worse["segments"], 300);
    assert_eq!((&worse["recent"]["a"], &worse["recent"]["b"]), (&serde_json::json!(300), &serde_json::json!(300)));
    for m in ["bleu", "chrf"] {
        assert_eq!(worse[m], offline[m], "{m}: live and offline comparisons agree exactly");
    }
    assert_eq!(worse["config"]["comparison"], offline["config"]["comparison"]);
    assert!(worse["bleu"]["difference"].as_f64().unwrap() > 5.0 && worse["bleu"]["p_value"].as_f64().unwrap() < 0.01);
    assert!(worse["bleu"]["interval"]["low"].as_f64().unwrap() > 0.0, "the interval excludes 0: {}", worse["bleu"]);
    // B vs A: the negation.
    let back = live("fallback", "v7");
    assert_eq!(back["bleu"]["difference"].as_f64(), worse["bleu"]["difference"].as_f64().map(|d| -d));
    assert_eq!(back["bleu"]["interval"]["low"].as_f64(), worse["bleu"]["interval"]["high"].as_f64().map(|d| -d));
    assert_eq!(back["bleu"]["p_value"], worse["bleu"]["p_value"]);
    // The same output in two sessions.
    let same = live("v7", "v7-again");
    assert_eq!((same["bleu"]["difference"].as_f64(), same["bleu"]["p_value"].as_f64()), (Some(0.0), Some(1.0)));
    assert!(same["bleu"]["interval"]["low"].as_f64().unwrap() <= 0.0 && same["bleu"]["interval"]["high"].as_f64().unwrap() >= 0.0);
    // Another configuration: refused, naming both.
    let refused = mtgauge(&["compare", "--server", &server.grpc, "--session", "v7", "--session", "v7-caseless"]);
    assert_eq!(refused.status.code(), Some(2));
    let err = String::from_utf8_lossy(&refused.stderr);
    assert!(err.contains("different configurations") && err.contains("caseless=yes"), "{err}");
    let human = mtgauge(&["compare", "--server", &server.grpc, "--session", "v7", "--session", "fallback", "--trials", "500"]);
    let text = String::from_utf8_lossy(&human.stdout);
    assert!(text.contains("300 segments in both recent windows") && text.contains("A = session v7") && text.contains("proxy"), "{text}");
}

/// Alert rules of the config file, evaluated by the daemon: the degraded system fires both its
/// floor rule (its whole interval below the threshold) and its drop rule against production;
/// production itself fires nothing. States show in `status` and in the metrics.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn alert_rules_fire_on_the_degraded_session_only() {
    let dir = temp_dir("alerts");
    demo_files(&dir);
    let refs = dir.join("refs.jsonl");
    let ids: String = demo_segments().iter().map(|s| s.id.clone() + "\n").collect();
    std::fs::write(dir.join("ids.txt"), ids).unwrap();
    let config = dir.join("mtgauge.toml");
    std::fs::write(
        &config,
        r#"
alert_eval_seconds = 1

[[alert]]
name = "floor"
labels = { tier = "watched" }
metric = "bleu"
when = "below"
threshold = 45.0
min_segments = 100
for_seconds = 1
severity = "page"

[[alert]]
name = "worse-than-production"
session = "fallback"
when = "drop"
baseline = "v7"
points = 5
min_segments = 100
for_seconds = 0
[alert.extra_labels]
team = "ferry-mt"
"#,
    )
    .unwrap();
    let server = Server::start(&["--refset", &format!("ferry={}", refs.display()), "--config", config.to_str().unwrap()]);
    server.wait_serving().await;
    let p = |n: &str| dir.join(n).to_str().unwrap().to_owned();
    for (session, hyp) in [("v7", "hyp.model-v7.de.txt"), ("fallback", "hyp.fallback-dictionary.de.txt")] {
        let out = mtgauge(&["send", "--server", &server.grpc, "--session", session, "--create", "--refset", "ferry", "--label", "tier=watched", "--ids", &p("ids.txt"), "--hyp", &p(hyp)]);
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    }
    let states = |session: &str| -> Vec<(String, String)> {
        let out = mtgauge(&["status", "--server", &server.grpc, "--session", session, "--json"]);
        let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        v["alerts"].as_array().unwrap().iter().map(|a| (a["rule"].as_str().unwrap().to_owned(), a["state"].as_str().unwrap().to_owned())).collect()
    };
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    loop {
        let f = states("fallback");
        if f.iter().filter(|(_, s)| s == "firing").count() == 2 {
            break;
        }
        assert!(std::time::Instant::now() < deadline, "the degraded session's rules did not fire: {f:?}");
        std::thread::sleep(std::time::Duration::from_millis(300));
    }
    assert_eq!(states("v7"), vec![("floor".to_owned(), "inactive".to_owned())], "production fires nothing, and has no drop rule");
    let human = mtgauge(&["status", "--server", &server.grpc, "--session", "fallback"]);
    let text = String::from_utf8_lossy(&human.stdout);
    assert!(text.contains("alert   FIRING   floor [page]: recent bleu 95% interval entirely below 45"), "{text}");
    let scrape = server.scrape();
    assert!(scrape.lines().any(|l| l == "mtgauge_alert_firing{rule=\"worse-than-production\",session=\"fallback\"} 1"), "{scrape}");
    assert!(scrape.lines().any(|l| l == "mtgauge_alert_firing{rule=\"floor\",session=\"v7\"} 0"), "{scrape}");
    assert!(scrape.lines().any(|l| l == "mtgauge_alert_state{rule=\"floor\",session=\"fallback\",state=\"firing\"} 1"), "{scrape}");
    // The shipped example parses, every rule checked.
    let example = concat!(env!("CARGO_MANIFEST_DIR"), "/deploy/alerts/mtgauge-alert-rules.example.toml");
    let out = mtgauge(&["serve", "--config", example, "--show-config"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let shown: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(shown["settings"]["alert"].as_array().map(Vec::len), Some(4));
    // A rule with a mistake is refused at startup, naming the rule and the key.
    std::fs::write(&config, "[[alert]]\nname = \"bad\"\nsession = \"x\"\nwhen = \"below\"\n").unwrap();
    let out = mtgauge(&["serve", "--config", config.to_str().unwrap(), "--show-config"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("alert rule 'bad': `when = \"below\"` needs `threshold`"), "{}", String::from_utf8_lossy(&out.stderr));
}
