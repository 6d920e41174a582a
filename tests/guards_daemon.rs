//! The reference-free guards through a real `mtgauge serve` process (127.0.0.1:0, a store):
//! items that carry a source, matched or not, are checked; acknowledgements, per-item verdicts,
//! GetScores, `status`, the Prometheus counters and a restart all agree with the offline guards.

mod common;

use common::{demo_files, durable_with_ferry, temp_dir, Server};
use mtgauge::cli::demo::scenario::demo_segments;
use mtgauge::guard::{check, Guard, GuardConfig, GuardCounts, GuardScratch, GuardSetup, LengthTally, RatioFrom};
use mtgauge::pb;
use mtgauge::pb::convert::{config_to_pb, guard_tally_from_pb};
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use tonic::Code;

/// The session's guard configuration, built offline as the daemon builds it: German target,
/// expected length ratio learned from the demo references against their sources, the
/// language vocabulary from the references; and what it learned.
fn offline_config() -> (GuardConfig, GuardSetup) {
    let segs = demo_segments();
    let pairs = segs.iter().flat_map(|s| s.refs.iter().map(|r| (s.source.as_deref().unwrap_or_default(), r.as_str())));
    let refs: Vec<&str> = segs.iter().flat_map(|s| s.refs.iter().map(String::as_str)).collect();
    let mut c = GuardConfig::default().with_target("de").unwrap();
    let setup = c.learn_from(pairs, &refs, false);
    // Learned here by hand as well (the definition: references' non-space characters over
    // their sources'), and the vocabulary is used for German.
    let mut tally = LengthTally::default();
    for s in &segs {
        for r in &s.refs {
            tally.add(s.source.as_deref().unwrap_or_default(), r);
        }
    }
    assert_eq!((setup.length_ratio, setup.length_ratio_from), (tally.ratio(1).unwrap(), RatioFrom::Learned));
    assert!(matches!(setup.vocabulary, Ok(words) if words > 100), "{setup:?}");
    (c, setup)
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
    let (c, setup) = offline_config();
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
    // What the session's guards learned from the set, as the offline guards learn it.
    assert_eq!(st["guards"]["length_ratio"].as_f64(), Some(setup.length_ratio));
    assert_eq!(st["guards"]["length_ratio_from"], "learned");
    assert_eq!(st["guards"]["language_vocabulary"]["words"].as_u64(), setup.vocabulary.clone().ok().map(|w| w as u64));
    assert_eq!(info.guard_setup.as_ref().map(|g| g.length_ratio), Some(setup.length_ratio));
    let human = std::process::Command::new(bin).args(["status", "--server", &server.grpc, "--session", "g"]).output().unwrap();
    let human = String::from_utf8_lossy(&human.stdout);
    assert!(human.contains(&format!("guards  {} items checked against their sources, target language de", want.checked)), "{human}");
    let line = format!("(expected length ratio {:.3}, learned from the references and their sources; language vocabulary of {} words from the references)", setup.length_ratio, setup.vocabulary.clone().unwrap());
    assert!(human.contains(&line), "{human}");

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
    let fast_setup = info.guard_setup.clone().expect("a guard setup");
    assert_eq!((fast_setup.vocabulary_words, fast_setup.no_vocabulary_because.as_str()), (0, "language identification is off"));
    assert_eq!((fast_setup.length_ratio, fast_setup.length_ratio_from.as_str()), (setup.length_ratio, "learned"));
    let mut c_fast = offline_config().0;
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
    assert_eq!(fast.guard_setup, info.guard_setup, "learned again after a restart");
    let scrape = again.scrape();
    assert!(scrape.lines().any(|l| l == format!("mtgauge_guard_checked_total{{session=\"g\"}} {}", want.checked)), "{scrape}");
    // A reset zeroes them like every other count.
    SessionsClient::new(ch.clone()).reset(pb::ResetSessionRequest { name: "g".into() }).await.unwrap();
    let reset = ScoringClient::new(ch).get_scores(pb::GetScoresRequest { session: "g".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(tally(&reset.guards), GuardCounts::default());
}

/// A reference-free session: declared with its target language and no reference set; every
/// item is unknown (nothing to score against) and those with a source are checked, through the
/// API, `send`, `status` and a restart.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn reference_free_session_checks_items_with_a_source() {
    let dir = temp_dir("guards-free");
    let data = dir.join("data");
    let data_s = data.to_str().unwrap().to_owned();
    let server = Server::start(&["--data-dir", &data_s]);
    let ch = server.wait_serving().await;
    let mut sessions = SessionsClient::new(ch.clone());
    let req = |name: &str, lang: &str| pb::CreateSessionRequest { name: name.into(), config: Some(config_to_pb(&Default::default())), target_language: lang.into(), ..Default::default() };
    // Without references the target language is required (the guards are all it has).
    let e = sessions.create(req("free", "")).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("target language"), "{}", e.message());
    let info = sessions.create(req("free", "de")).await.unwrap().into_inner();
    assert_eq!((info.refset.as_str(), info.target_language.as_str()), ("", "de"));

    // The same pathologies as above, every item keyed by its source; no learned length ratio
    // (no references): the guards' defaults.
    let items: Vec<(pb::ScoreItem, String)> = items()
        .into_iter()
        .filter(|(_, src)| !src.is_empty())
        .map(|(it, src)| (pb::ScoreItem { key: Some(pb::score_item::Key::Source(src.clone())), hypothesis: it.hypothesis, ..Default::default() }, src))
        .collect();
    let c = GuardConfig::default().with_target("de").unwrap();
    let mut want = GuardCounts::default();
    let mut scratch = GuardScratch::default();
    for (it, src) in &items {
        want.add(check(&c, src, &it.hypothesis, &mut scratch));
    }
    assert_eq!(want.checked, 41);
    assert_eq!((want.flagged_by(Guard::Empty), want.flagged_by(Guard::Copy), want.flagged_by(Guard::Script)), (8, 8, 9));
    let batch = pb::ScoreBatch { session: "free".into(), producer: "p".into(), sequence: 1, items: items.iter().map(|(it, _)| it.clone()).collect(), want_segment_scores: true, ..Default::default() };
    let ack = ScoringClient::new(ch.clone()).submit(batch).await.unwrap().into_inner();
    assert_eq!((ack.scored, ack.unknown), (0, 41));
    assert_eq!(tally(&ack.guards), want);
    assert_eq!(ack.guard_verdicts.len(), 41);

    // `send` creates one from files (no --refset) and reports the guards' counts.
    let (src_path, hyp_path) = (dir.join("src.txt"), dir.join("hyp.txt"));
    std::fs::write(&src_path, items.iter().map(|(_, s)| format!("{s}\n")).collect::<String>()).unwrap();
    // Empty hypotheses are lines too; the file keeps one line per item.
    std::fs::write(&hyp_path, items.iter().map(|(it, _)| format!("{}\n", it.hypothesis)).collect::<String>()).unwrap();
    let bin = env!("CARGO_BIN_EXE_mtgauge");
    let p = |x: &std::path::Path| x.to_str().unwrap().to_owned();
    let send = |extra: &[&str]| {
        let mut args = vec!["send".to_owned(), "--server".into(), server.grpc.clone(), "--session".into(), "free2".into(), "--hyp".into(), p(&hyp_path), "--source".into(), p(&src_path), "--json".into()];
        args.extend(extra.iter().map(|s| s.to_string()));
        std::process::Command::new(bin).args(&args).output().unwrap()
    };
    let refused = send(&["--create"]);
    assert_eq!(refused.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&refused.stderr).contains("--target-language"), "{}", String::from_utf8_lossy(&refused.stderr));
    let out = send(&["--create", "--target-language", "de"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let sent: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!((sent["scored"].as_u64(), sent["unknown"].as_u64()), (Some(0), Some(41)));
    assert_eq!(sent["guards"]["checked"], 41);
    for g in Guard::ALL {
        assert_eq!(sent["guards"]["by_guard"][g.name()]["flagged"], want.flagged_by(g), "{g}");
    }
    let status = std::process::Command::new(bin).args(["status", "--server", &server.grpc, "--session", "free2", "--json"]).output().unwrap();
    assert!(status.status.success(), "{}", String::from_utf8_lossy(&status.stderr));
    let st: serde_json::Value = serde_json::from_slice(&status.stdout).unwrap();
    assert_eq!(st["guards"]["checked"], 41);
    assert_eq!(st["guards"]["target_language"], "de");
    assert_eq!(st["guards"]["by_guard"]["repetition"]["flagged"], want.flagged_by(Guard::Repetition));
    // Nothing to learn from: the default ratio, no vocabulary, and why.
    assert_eq!((st["guards"]["length_ratio"].as_f64(), st["guards"]["length_ratio_from"].as_str()), (Some(1.0), Some("default")));
    assert_eq!(st["guards"]["language_vocabulary"]["none_because"], "no references");

    // Durable like any session: after a restart (the empty set is kept for it).
    let mut server = server;
    assert!(server.terminate().success());
    let again = Server::start(&["--data-dir", &data_s]);
    let ch = again.wait_serving().await;
    for name in ["free", "free2"] {
        let after = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: name.into(), ..Default::default() }).await.unwrap().into_inner();
        assert_eq!(tally(&after.guards), want, "{name}");
        assert_eq!(after.target_language, "de");
    }
}

/// A `flag-rate` alert rule on a real server: it fires on the session whose copy rate's Wilson
/// lower bound is above the threshold, and stays inactive on the clean one; the measurement is
/// the rate and its Wilson interval in percent.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn flag_rate_rule_fires_on_the_session_copying_its_sources() {
    let dir = temp_dir("guards-alert");
    let config = dir.join("mtgauge.toml");
    std::fs::write(
        &config,
        "alert_eval_seconds = 1\n\n[[alert]]\nname = \"copies\"\nlabels = { lang = \"en-de\" }\nwhen = \"flag-rate\"\nguard = \"copy\"\nthreshold = 5\nmin_segments = 30\nfor_seconds = 0\n",
    )
    .unwrap();
    // A data directory of its own (with --config, Server::start adds none).
    let data = dir.join("data");
    let server = Server::start(&["--config", config.to_str().unwrap(), "--data-dir", data.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let segs = demo_segments();
    for (name, copy_every) in [("copying", 2usize), ("clean", 0)] {
        let create = pb::CreateSessionRequest { name: name.into(), config: Some(config_to_pb(&Default::default())), target_language: "de".into(), labels: [("lang".to_owned(), "en-de".to_owned())].into(), ..Default::default() };
        SessionsClient::new(ch.clone()).create(create).await.unwrap();
        // 40 items: in "copying" every second one is its source (20 of 40: 50%).
        let items = segs
            .iter()
            .take(40)
            .enumerate()
            .map(|(k, s)| {
                let hyp = if copy_every > 0 && k % copy_every == 0 { s.source_text().to_owned() } else { s.refs[0].clone() };
                pb::ScoreItem { key: Some(pb::score_item::Key::Source(s.source_text().to_owned())), hypothesis: hyp, ..Default::default() }
            })
            .collect();
        let ack = ScoringClient::new(ch.clone()).submit(pb::ScoreBatch { session: name.into(), producer: "p".into(), sequence: 1, items, ..Default::default() }).await.unwrap().into_inner();
        assert_eq!(tally(&ack.guards).flagged_by(Guard::Copy), if copy_every > 0 { 20 } else { 0 }, "{name}");
    }
    let alert_of = |r: pb::ScoresReport| r.alerts.into_iter().find(|a| a.rule == "copies");
    // Bounded poll: the evaluator runs every second.
    let mut firing = None;
    for _ in 0..100 {
        let r = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "copying".into(), ..Default::default() }).await.unwrap().into_inner();
        if let Some(a) = alert_of(r).filter(|a| a.state == "firing") {
            firing = Some(a);
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(100)).await;
    }
    let a = firing.expect("the copy-rate alert fires on the copying session");
    let (lo, hi) = mtgauge::alerts::rules::wilson(20, 40, mtgauge::alerts::rules::WILSON_Z95).unwrap();
    assert_eq!(a.value, Some(50.0));
    assert!((a.low.unwrap() - 100.0 * lo).abs() < 1e-9 && (a.high.unwrap() - 100.0 * hi).abs() < 1e-9, "{a:?}");
    assert!(a.condition.contains("copy guard"), "{}", a.condition);
    let clean = alert_of(ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "clean".into(), ..Default::default() }).await.unwrap().into_inner()).expect("the rule watches the clean session too");
    assert_eq!(clean.state, "inactive");
    assert_eq!(clean.value, Some(0.0), "judged (40 decided items), rate 0");
}
