//! Crash test: 32 producers stream into a durable server; the server is killed with SIGKILL at
//! a seeded moment, restarted on the same data directory, and every producer re-runs its whole
//! input. Every batch acknowledged before the kill must survive (its resend is a duplicate), and
//! the final integer statistics must equal the offline engine's over the corpus exactly.

mod common;

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;

use common::{demo_files, durable_with_ferry, temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::metric::{CorpusStats, ScoreConfig};
use mtgauge::pb;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use mtgauge::refs::compiled::{Compiled, Scratch};
use mtgauge::rng::SplitMix64;
use mtgauge::pb::convert::{config_to_pb, stats_from_pb};

const PRODUCERS: usize = 32;

fn config() -> ScoreConfig {
    "bleu chrf chrf++".parse().unwrap()
}

/// Each producer's batches: all demo items (3 systems x 300 segments), twice, dealt out.
fn plan(seed: u64) -> Vec<Vec<pb::ScoreBatch>> {
    let segs = demo_segments();
    let mut items: Vec<(usize, String)> = Vec::new();
    for _ in 0..2 {
        for sys in demo_systems() {
            items.extend(sys.hypotheses.into_iter().enumerate());
        }
    }
    let mut rng = SplitMix64::new(seed);
    for i in (1..items.len()).rev() {
        items.swap(i, rng.below(i as u64 + 1) as usize);
    }
    let mut per: Vec<Vec<(usize, String)>> = vec![Vec::new(); PRODUCERS];
    for (k, it) in items.into_iter().enumerate() {
        per[k % PRODUCERS].push(it);
    }
    per.into_iter()
        .enumerate()
        .map(|(p, its)| {
            its.chunks(1 + rng.below(6) as usize)
                .enumerate()
                .map(|(b, chunk)| pb::ScoreBatch {
                    session: "crash".into(),
                    producer: format!("producer-{p}"),
                    sequence: b as u64 + 1,
                    items: chunk.iter().map(|(i, h)| pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(segs[*i].id.clone())), hypothesis: h.clone(), ..Default::default() }).collect(),
                    want_segment_scores: false,
                    ..Default::default()
                })
                .collect()
        })
        .collect()
}

fn offline(plan: &[Vec<pb::ScoreBatch>]) -> CorpusStats {
    let set = common::demo_refset();
    let compiled = Compiled::build(Arc::clone(&set), config());
    let mut scratch = Scratch::default();
    let mut sum = CorpusStats::default();
    for b in plan.iter().flatten() {
        for it in &b.items {
            let Some(pb::score_item::Key::SegmentId(id)) = &it.key else { unreachable!() };
            sum.add_segment(&compiled.score_segment(set.find(id).unwrap(), &it.hypothesis, &mut scratch));
        }
    }
    sum
}

/// Stream every producer's batches concurrently; returns per producer the highest acknowledged
/// sequence and the number of acknowledged duplicates. Stops quietly when the server dies.
async fn run_producers(ch: &tonic::transport::Channel, plan: &[Vec<pb::ScoreBatch>], acked_total: Arc<AtomicU64>) -> Vec<(u64, u64)> {
    let mut tasks = Vec::new();
    for batches in plan.iter().cloned() {
        let ch = ch.clone();
        let acked_total = Arc::clone(&acked_total);
        tasks.push(tokio::spawn(async move {
            let (mut high, mut dups) = (0u64, 0u64);
            let Ok(resp) = ScoringClient::new(ch).stream(tokio_stream::iter(batches)).await else { return (high, dups) };
            let mut acks = resp.into_inner();
            while let Ok(Some(ack)) = acks.message().await {
                assert_eq!(ack.sequence, high + 1, "acknowledgements in order");
                high = ack.sequence;
                dups += ack.duplicate as u64;
                acked_total.fetch_add(1, Ordering::Relaxed);
            }
            (high, dups)
        }));
    }
    let mut out = Vec::new();
    for t in tasks {
        out.push(t.await.unwrap());
    }
    out
}

async fn crash_round(seed: u64) {
    let dir = temp_dir(&format!("crash-{seed}"));
    demo_files(&dir);
    let data = dir.join("data");
    let data_s = data.to_str().unwrap().to_owned();
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let args = ["--refset", refs.as_str(), "--data-dir", data_s.as_str()];
    let plan = plan(seed);
    let total_batches: usize = plan.iter().map(Vec::len).sum();

    let mut server = Server::start(&args);
    let ch = server.wait_serving().await;
    SessionsClient::new(ch.clone())
        .create(pb::CreateSessionRequest { name: "crash".into(), refset: "ferry".into(), config: Some(config_to_pb(&config())), labels: Default::default(), window: 100, if_not_exists: true, ..Default::default() })
        .await
        .unwrap();

    // Kill after a seeded number of acknowledgements (between 2% and 90% of the batches).
    let kill_at = (total_batches as u64 * (2 + SplitMix64::new(seed).below(89))) / 100;
    let acked = Arc::new(AtomicU64::new(0));
    let watcher = {
        let acked = Arc::clone(&acked);
        tokio::spawn(async move {
            while acked.load(Ordering::Relaxed) < kill_at {
                tokio::time::sleep(std::time::Duration::from_micros(200)).await;
            }
        })
    };
    let producers = {
        let (ch, plan, acked) = (ch.clone(), plan.clone(), Arc::clone(&acked));
        tokio::spawn(async move { run_producers(&ch, &plan, acked).await })
    };
    watcher.await.unwrap();
    server.child.kill().expect("SIGKILL");
    server.child.wait().unwrap();
    let before: Vec<(u64, u64)> = producers.await.unwrap();
    let acked_before: u64 = before.iter().map(|(h, _)| h).sum();
    assert!(acked_before >= kill_at && (acked_before as usize) < total_batches, "the kill came mid-stream: {acked_before} of {total_batches} acknowledged (kill at {kill_at})");
    drop(server);

    // Restart on the same data directory.
    let server = Server::start(&args);
    let ch = server.wait_serving().await;
    // Every batch acknowledged before the kill is durable: resending exactly those gives only
    // duplicates.
    let acked_plan: Vec<Vec<pb::ScoreBatch>> = plan.iter().zip(&before).map(|(b, (h, _))| b[..*h as usize].to_vec()).collect();
    let resent = run_producers(&ch, &acked_plan, Arc::new(AtomicU64::new(0))).await;
    for ((h, d), (bh, _)) in resent.iter().zip(&before) {
        assert_eq!((h, d), (bh, bh), "an acknowledged batch was lost by the crash");
    }
    // Re-run every producer from the start: nothing lost, nothing doubled.
    let after = run_producers(&ch, &plan, Arc::new(AtomicU64::new(0))).await;
    for ((h, _), b) in after.iter().zip(&plan) {
        assert_eq!(*h as usize, b.len(), "every batch acknowledged on the re-run");
    }
    let report = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "crash".into(), ..Default::default() }).await.unwrap().into_inner();
    let got = stats_from_pb(report.cumulative.as_ref().unwrap());
    let want = offline(&plan);
    assert_eq!(got, want, "final statistics equal the offline engine's (seed {seed})");
    assert_eq!(got.segments, 1800);
    assert_eq!(stats_from_pb(report.recent.as_ref().unwrap()).segments, 100);
    assert!(report.cumulative.as_ref().and_then(|t| t.bleu.as_ref()).is_some_and(|b| b.interval.is_some()), "the replicate sums are rebuilt after a kill");
    assert!(report.interval_note.is_empty(), "{}", report.interval_note);
    eprintln!("crash round seed {seed}: killed after {acked_before} of {total_batches} batches acknowledged; final statistics equal the offline engine's ({} segments, BLEU {:.4})", got.segments, got.bleu.score(4).score);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn kill_nine_loses_nothing_and_counts_nothing_twice() {
    for seed in [1, 2, 3, 4] {
        crash_round(seed).await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn restart_restores_sessions_refsets_and_windows() {
    let dir = temp_dir("restart");
    demo_files(&dir);
    let (server, ch, data_s) = durable_with_ferry(&dir).await;
    let labels = [("model".to_string(), "v7".to_string())].into_iter().collect();
    SessionsClient::new(ch.clone()).create(pb::CreateSessionRequest { name: "keep".into(), refset: "ferry".into(), config: Some(config_to_pb(&config())), labels, window: 7, if_not_exists: false, ..Default::default() }).await.unwrap();
    let plan = plan(9);
    let mut first: Vec<pb::ScoreBatch> = plan[0].clone();
    for b in &mut first {
        b.session = "keep".into();
    }
    run_producers(&ch, &[first.clone()], Arc::new(AtomicU64::new(0))).await;
    let before = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "keep".into(), ..Default::default() }).await.unwrap().into_inner();
    let mut server = server;
    assert!(server.terminate().success());
    // A second server on the same directory while the first runs is refused.
    let again = Server::start(&["--data-dir", &data_s]);
    let ch = again.wait_serving().await;
    let busy = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["serve", "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0", "--data-dir", &data_s]).output().unwrap();
    assert_eq!(busy.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&busy.stderr).contains("in use by another process"), "{}", String::from_utf8_lossy(&busy.stderr));
    let after = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "keep".into(), ..Default::default() }).await.unwrap().into_inner();
    let bleu_interval = |t: &Option<pb::Totals>| t.as_ref().and_then(|t| t.bleu.as_ref()).and_then(|b| b.interval.clone());
    assert!(bleu_interval(&before.cumulative).is_some() && bleu_interval(&before.recent).is_some(), "intervals by default");
    assert_eq!(after.cumulative, before.cumulative, "cumulative statistics survive a restart (intervals included)");
    assert_eq!(after.recent, before.recent, "the window survives a restart");
    assert_eq!((after.unknown, after.refset_digest.clone()), (before.unknown, before.refset_digest.clone()));
    let info = SessionsClient::new(ch.clone()).get(pb::GetSessionRequest { name: "keep".into() }).await.unwrap().into_inner();
    assert_eq!((info.window, info.labels.get("model").map(String::as_str)), (7, Some("v7")));
    // The counters go on from the durable totals, and the info series is back.
    let scrape = again.scrape();
    let scored = after.cumulative.as_ref().unwrap().segments;
    assert!(scrape.lines().any(|l| l == format!("mtgauge_segments_total{{session=\"keep\",outcome=\"scored\"}} {scored}")), "{scrape}");
    let m1 = after.cumulative.as_ref().unwrap().bleu.as_ref().unwrap().matched[0];
    assert!(scrape.lines().any(|l| l == format!("mtgauge_bleu_matches_total{{session=\"keep\",order=\"1\"}} {m1}")), "{scrape}");
    assert!(scrape.lines().any(|l| l.starts_with("mtgauge_session_info{") && l.contains("session=\"keep\"") && l.contains("model=\"v7\"") && l.contains("config=\"tokenizer=nist caseless=no bleu:order=4,") && l.contains("resampling=\"resamples=200,seed=1\"")), "{scrape}");
    let sets = pb::ref_sets_client::RefSetsClient::new(ch.clone()).list(pb::ListRefSetsRequest {}).await.unwrap().into_inner();
    assert_eq!(sets.refsets.len(), 1, "the reference set is rebuilt from the store, without its files");
}

/// A store that cannot be written (its file may not grow: RLIMIT_FSIZE) stops the server with
/// exit code 70 and a clear message; the batch that hit it is refused with UNAVAILABLE, never
/// acknowledged; and after a restart with room, exactly the acknowledged batches are there.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_store_that_cannot_be_written_stops_the_server_and_keeps_what_was_acknowledged() {
    let dir = temp_dir("store-full");
    demo_files(&dir);
    let data = dir.join("data");
    let data_s = data.to_str().unwrap().to_owned();
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let args = ["--refset", refs.as_str(), "--data-dir", data_s.as_str()];
    let config = config();
    {
        let mut server = Server::start(&args);
        let ch = server.wait_serving().await;
        // A window as large as allowed: every scored segment adds a stored row.
        let create = pb::CreateSessionRequest { name: "full".into(), refset: "ferry".into(), config: Some(config_to_pb(&config)), labels: Default::default(), window: mtgauge::session::MAX_WINDOW as u32, if_not_exists: false, ..Default::default() };
        SessionsClient::new(ch.clone()).create(create).await.unwrap();
        assert!(server.terminate().success());
    }
    let size = std::fs::metadata(data.join(mtgauge::store::STORE_FILE)).unwrap().len();
    let mut server = Server::start_with_file_size_limit(&args, size + 256 * 1024);
    let ch = server.wait_serving().await;
    let mut scoring = ScoringClient::new(ch.clone());
    let (segs, hyps) = (demo_segments(), &demo_systems()[0].hypotheses);
    let batch = |sequence: u64| {
        let items = (0..50).map(|i| {
            let s = (sequence as usize * 50 + i) % segs.len();
            pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(segs[s].id.clone())), hypothesis: hyps[s].clone(), ..Default::default() }
        });
        pb::ScoreBatch { session: "full".into(), producer: "p".into(), sequence, want_segment_scores: false, items: items.collect(), ..Default::default() }
    };
    let mut acked = 0u64;
    let refused = loop {
        match scoring.submit(batch(acked + 1)).await {
            Ok(ack) => {
                assert_eq!(ack.into_inner().scored, 50);
                acked += 1;
                assert!(acked < 10_000, "the store never ran out of room");
            }
            Err(status) => break status,
        }
    };
    assert!(acked > 0, "no batch fitted before the store was full");
    assert_eq!(refused.code(), tonic::Code::Unavailable, "{refused:?}");
    assert!(refused.message().contains("cannot write its store"), "{}", refused.message());
    let deadline = std::time::Instant::now() + common::STARTUP_TIMEOUT;
    let status = loop {
        if let Some(st) = server.child.try_wait().unwrap() {
            break st;
        }
        assert!(std::time::Instant::now() < deadline, "the server kept running with a store it cannot write");
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    };
    assert_eq!(status.code(), Some(mtgauge::server::EXIT_STORE_FAILURE as i32));
    std::thread::sleep(std::time::Duration::from_millis(100));
    let logs = server.logs.lock().unwrap().join("\n");
    assert!(logs.contains("mtgauge: error: cannot write the store:"), "{logs}");
    drop(server);

    // With room again: exactly the acknowledged batches, and the refused one is new.
    let server = Server::start(&args);
    let ch = server.wait_serving().await;
    let want = {
        let compiled = Compiled::build(common::demo_refset(), config);
        let ids: std::collections::HashMap<&str, usize> = segs.iter().enumerate().map(|(i, s)| (s.id.as_str(), i)).collect();
        let mut scratch = Scratch::default();
        let mut sum = CorpusStats::default();
        for seq in 1..=acked {
            for it in batch(seq).items {
                let Some(pb::score_item::Key::SegmentId(id)) = &it.key else { unreachable!() };
                sum.add_segment(&compiled.score_segment(ids[id.as_str()], &it.hypothesis, &mut scratch));
            }
        }
        sum
    };
    let mut scoring = ScoringClient::new(ch.clone());
    let got = scoring.get_scores(pb::GetScoresRequest { session: "full".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(stats_from_pb(got.cumulative.as_ref().unwrap()), want, "after {acked} acknowledged batches");
    let again = scoring.submit(batch(acked + 1)).await.unwrap().into_inner();
    assert!(!again.duplicate && again.scored == 50, "the refused batch was never applied: {again:?}");
}
