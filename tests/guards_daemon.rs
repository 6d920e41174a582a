//! The reference-free guards through a real `mtgauge serve` process (127.0.0.1:0, a store):
//! items that carry a source, matched or not, are checked; acknowledgements, per-item verdicts,
//! GetScores, `status`, the Prometheus counters and a restart all agree with the offline guards.

mod common;

use common::{demo_files, durable_with_ferry, temp_dir, Server};
use mtgauge::cli::demo::scenario::demo_segments;
use mtgauge::guard::{check, Guard, GuardConfig, GuardCounts, GuardScratch, LengthTally};
use mtgauge::pb;
use mtgauge::pb::convert::{config_to_pb, guard_tally_from_pb};
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use tonic::Code;

/// The session's guard configuration, built offline as the daemon builds it: German target,
/// expected length ratio learned from the demo references against their sources.
fn offline_config() -> GuardConfig {
    let mut tally = LengthTally::default();
    for s in demo_segments() {
        for r in &s.refs {
            tally.add(s.source.as_deref().unwrap_or_default(), r);
        }
    }
    let mut c = GuardConfig::default().with_target("de").unwrap();
    c.length_ratio = tally.ratio(c.length_min_chars).unwrap();
    c
}

/// Invented text: a Russian notice, and an English notice that is not in the reference set.
const RUSSIAN: &str = "Паром отправляется от третьего причала через десять минут.";
const UNMATCHED_SOURCE: &str = "The night ferry to the outer islands is fully booked tonight.";

/// (item, its source) for a batch of 40: by source and by id, clean and broken, and items whose
/// source the set does not know (unknown, but checked).
fn items() -> Vec<(pb::ScoreItem, String)> {
    let segs = demo_segments();
    let mut out = Vec::new();
    for (k, seg) in segs.iter().take(40).enumerate() {
        let src = seg.source.clone().unwrap();
        let hyp = match k % 5 {
            0 => seg.refs[0].clone(),
            1 => String::new(),
            2 => src.clone(),
            3 => format!("{} {}", seg.refs[1], ["Fähre"; 6].join(" ")),
            _ => RUSSIAN.to_owned(),
        };
        let key = if k % 2 == 0 { pb::score_item::Key::Source(src.clone()) } else { pb::score_item::Key::SegmentId(seg.id.clone()) };
        out.push((pb::ScoreItem { key: Some(key), hypothesis: hyp, ..Default::default() }, src));
    }
    out.push((pb::ScoreItem { key: Some(pb::score_item::Key::Source(UNMATCHED_SOURCE.into())), hypothesis: RUSSIAN.into(), ..Default::default() }, UNMATCHED_SOURCE.into()));
    // An id the set does not have carries no source: not checked.
    out.push((pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId("no-such-id".into())), hypothesis: RUSSIAN.into(), ..Default::default() }, String::new()));
    out
}

fn tally(counts: &Option<pb::GuardTally>) -> GuardCounts {
    guard_tally_from_pb(counts.as_ref().expect("a guard tally"))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn guards_in_acks_verdicts_scores_status_counters_and_after_restart() {
    let dir = temp_dir("guards");
    demo_files(&dir);
    let (server, ch, data_s) = durable_with_ferry(&dir).await;

    // The target language is a session setting; an unknown one is refused.
    let mut sessions = SessionsClient::new(ch.clone());
    let req = |name: &str, lang: &str| pb::CreateSessionRequest {
        name: name.into(),
        refset: "ferry".into(),
        config: Some(config_to_pb(&Default::default())),
        target_language: lang.into(),
        ..Default::default()
    };
    let bad = sessions.create(req("bad", "tlh")).await.unwrap_err();
    assert_eq!(bad.code(), Code::InvalidArgument);
    assert!(bad.message().contains("tlh"), "{}", bad.message());
    let info = sessions.create(req("g", "deu")).await.unwrap().into_inner();
    assert_eq!(info.target_language, "de");
    // Re-creating with another target is a different definition.
    let mut other = req("g", "fr");
    other.if_not_exists = true;
    assert_eq!(sessions.create(other).await.unwrap_err().code(), Code::AlreadyExists);

    // Expected verdicts: the offline guards on (source, hypothesis) of the checked items.
    let items = items();
    let c = offline_config();
    let mut scratch = GuardScratch::default();
    let mut want = GuardCounts::default();
    let mut want_verdicts = Vec::new();
    for (i, (it, src)) in items.iter().enumerate() {
        if src.is_empty() {
            continue;
        }
        let v = check(&c, src, &it.hypothesis, &mut scratch);
        want.add(v);
        want_verdicts.push((i as u32, v));
    }
    // The injected pathologies (8 of each in the first 40, plus the unmatched Russian item).
    assert_eq!(want.checked, 41);
    assert_eq!((want.flagged_by(Guard::Empty), want.flagged_by(Guard::Copy), want.flagged_by(Guard::Repetition)), (8, 8, 8));
    assert_eq!(want.flagged_by(Guard::Script), 9);

    // Two batches from one producer; the first asks for per-item verdicts.
    let mut scoring = ScoringClient::new(ch.clone());
    let (a, b) = items.split_at(20);
    let batch = |seq: u64, part: &[(pb::ScoreItem, String)], want_segment_scores: bool| pb::ScoreBatch {
        session: "g".into(),
        producer: "p".into(),
        sequence: seq,
        items: part.iter().map(|(it, _)| it.clone()).collect(),
        want_segment_scores,
        ..Default::default()
    };
    let ack1 = scoring.submit(batch(1, a, true)).await.unwrap().into_inner();
    let ack2 = scoring.submit(batch(2, b, false)).await.unwrap().into_inner();
    let mut acked = tally(&ack1.guards);
    acked += tally(&ack2.guards);
    assert_eq!(acked, want, "acks add up to the offline guards' counts");
    assert!(ack2.guard_verdicts.is_empty(), "verdicts only when asked for");
    let got: Vec<(u32, Vec<String>)> = ack1.guard_verdicts.iter().map(|v| (v.index, v.flagged.clone())).collect();
    let expected: Vec<(u32, Vec<String>)> =
        want_verdicts.iter().filter(|(i, _)| *i < 20).map(|(i, v)| (*i, v.flagged_guards().map(|g| g.name().to_owned()).collect())).collect();
    assert_eq!(got, expected);
    // A resent batch counts nothing.
    let dup = scoring.submit(batch(2, b, false)).await.unwrap().into_inner();
    assert!(dup.duplicate);
    assert_eq!(dup.guards.map(|g| g.checked).unwrap_or(0), 0);

    // GetScores, status and the counters.
    let report = scoring.get_scores(pb::GetScoresRequest { session: "g".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(tally(&report.guards), want);
    assert_eq!(report.target_language, "de");
    let scrape = server.scrape();
    assert!(scrape.lines().any(|l| l == format!("mtgauge_guard_checked_total{{session=\"g\"}} {}", want.checked)), "{scrape}");
    for g in Guard::ALL {
        let line = format!("mtgauge_guard_flagged_total{{session=\"g\",guard=\"{}\"}} {}", g.name(), want.flagged_by(g));
        assert!(scrape.lines().any(|l| l == line), "missing {line}");
    }
    let bin = env!("CARGO_BIN_EXE_mtgauge");
    let status = std::process::Command::new(bin).args(["status", "--server", &server.grpc, "--session", "g", "--json"]).output().unwrap();
    assert!(status.status.success(), "{}", String::from_utf8_lossy(&status.stderr));
    let st: serde_json::Value = serde_json::from_slice(&status.stdout).unwrap();
    assert_eq!(st["guards"]["checked"], want.checked);
    assert_eq!(st["guards"]["target_language"], "de");
    assert_eq!(st["guards"]["by_guard"]["copy"]["flagged"], want.flagged_by(Guard::Copy));
    let human = std::process::Command::new(bin).args(["status", "--server", &server.grpc, "--session", "g"]).output().unwrap();
    let human = String::from_utf8_lossy(&human.stdout);
    assert!(human.contains(&format!("guards  {} items checked against their sources, target language de", want.checked)), "{human}");

    // Guard settings are part of a session's definition: a bad one is refused; with
    // language-id=off the language guard only flags text in another script.
    let mut bad = req("bad", "de");
    bad.guard_settings = vec!["repeat-count=1".into()];
    let e = SessionsClient::new(ch.clone()).create(bad).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("repeat-count"), "{}", e.message());
    let mut fast = req("fast", "de");
    fast.guard_settings = vec!["language-id=off".into(), "repeat-count=4".into()];
    let info = SessionsClient::new(ch.clone()).create(fast).await.unwrap().into_inner();
    assert_eq!(info.guard_settings, ["language-id=off", "repeat-count=4"]);
    let mut c_fast = offline_config();
    c_fast.set("language-id=off").unwrap();
    c_fast.set("repeat-count=4").unwrap();
    let mut want_fast = GuardCounts::default();
    for (it, src) in items.iter().filter(|(_, src)| !src.is_empty()) {
        want_fast.add(check(&c_fast, src, &it.hypothesis, &mut scratch));
    }
    let mut all = batch(1, &items, false);
    all.session = "fast".into();
    let ack = scoring.submit(all).await.unwrap().into_inner();
    assert_eq!(tally(&ack.guards), want_fast);
    assert_eq!(want_fast.flagged_by(Guard::Language), want.flagged_by(Guard::Script), "only the wrong-script items");

    // The counts are durable with the session's statistics.
    let mut server = server;
    assert!(server.terminate().success());
    let again = Server::start(&["--data-dir", &data_s]);
    let ch = again.wait_serving().await;
    let after = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "g".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(tally(&after.guards), want);
    assert_eq!(after.target_language, "de");
    let fast = SessionsClient::new(ch.clone()).get(pb::GetSessionRequest { name: "fast".into() }).await.unwrap().into_inner();
    assert_eq!(fast.guard_settings, ["language-id=off", "repeat-count=4"]);
    let scrape = again.scrape();
    assert!(scrape.lines().any(|l| l == format!("mtgauge_guard_checked_total{{session=\"g\"}} {}", want.checked)), "{scrape}");
    // A reset zeroes them like every other count.
    SessionsClient::new(ch.clone()).reset(pb::ResetSessionRequest { name: "g".into() }).await.unwrap();
    let reset = ScoringClient::new(ch).get_scores(pb::GetScoresRequest { session: "g".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(tally(&reset.guards), GuardCounts::default());
}
