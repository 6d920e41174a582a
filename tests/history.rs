//! The History call against a real `mtgauge serve`: steps summed from the session's buckets
//! give the same statistics, score and interval as the cumulative report of the same segments.

mod common;

use common::{demo_files, temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::pb;
use mtgauge::pb::history_client::HistoryClient;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use tonic::Code;

fn now() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs() as i64
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn history_steps_equal_the_cumulative_statistics_of_the_same_segments() {
    let dir = temp_dir("history-grpc");
    demo_files(&dir);
    let server = Server::start(&["--refset", &format!("ferry={}", dir.join("refs.jsonl").display())]);
    let ch = server.wait_serving().await;
    SessionsClient::new(ch.clone()).create(pb::CreateSessionRequest { name: "v8".into(), refset: "ferry".into(), ..Default::default() }).await.unwrap();
    let segs = demo_segments();
    let system = &demo_systems()[0];
    let before = now();
    let mut scoring = ScoringClient::new(ch.clone());
    let mut sent = 0u64;
    for (k, chunk) in segs.iter().zip(&system.hypotheses).collect::<Vec<_>>().chunks(40).take(5).enumerate() {
        let items = chunk.iter().map(|(s, h)| pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(s.id.clone())), hypothesis: (*h).clone(), ..Default::default() }).collect::<Vec<_>>();
        sent += items.len() as u64;
        scoring.submit(pb::ScoreBatch { session: "v8".into(), producer: "p".into(), sequence: k as u64 + 1, items, ..Default::default() }).await.unwrap();
    }
    let after = now();
    let report = scoring.get_scores(pb::GetScoresRequest { session: "v8".into(), ..Default::default() }).await.unwrap().into_inner();
    let cumulative = report.cumulative.unwrap();
    let bleu = cumulative.bleu.unwrap();

    let mut history = HistoryClient::new(ch.clone());
    // One step of whole hours covering every batch: the hourly buckets summed.
    let from = before.div_euclid(3600) * 3600;
    let step = ((after + 1 - from) as u32).div_ceil(3600) * 3600;
    let one = history.get_history(pb::GetHistoryRequest { session: "v8".into(), metric: "bleu".into(), from_unix: from, until_unix: from + i64::from(step), step_seconds: step, level: 0.0, ..Default::default() }).await.unwrap().into_inner();
    assert_eq!((one.resolution.as_str(), one.points.len()), ("hour", 1));
    let p = &one.points[0];
    assert_eq!(p.segments, sent);
    assert_eq!(p.segments, cumulative.segments);
    assert_eq!(p.score, Some(bleu.score), "the score of the summed buckets is the cumulative score");
    assert_eq!(p.interval, bleu.interval, "replicate sums of the bucket equal the cumulative ones");
    assert!(p.interval.is_some());
    assert!(one.memory_bytes > 0);

    // Minute steps over the same span: the segments add up to the same count.
    let minutes = history.get_history(pb::GetHistoryRequest { session: "v8".into(), metric: "chrf".into(), from_unix: before - 60, until_unix: after + 60, step_seconds: 60, level: 0.9, ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(minutes.resolution, "minute");
    assert_eq!(minutes.points.iter().map(|p| p.segments).sum::<u64>(), sent);
    for p in minutes.points.iter().filter(|p| p.segments > 0) {
        let iv = p.interval.as_ref().expect("young minute buckets keep their replicate sums");
        assert_eq!(iv.level, 0.9);
        let s = p.score.unwrap();
        assert!(iv.low <= s && s <= iv.high, "{iv:?} {s}");
    }
    assert!(minutes.points.iter().filter(|p| p.segments == 0).all(|p| p.score.is_none() && p.interval.is_none()));

    // Refusals name what is wrong.
    let bad = |step: u32, metric: &str, session: &str| pb::GetHistoryRequest { session: session.into(), metric: metric.into(), step_seconds: step, ..Default::default() };
    let e = history.get_history(bad(90, "bleu", "v8")).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("90 seconds"), "{}", e.message());
    let e = history.get_history(bad(60, "chrf++", "v8")).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument, "the default configuration has no chrF++");
    assert_eq!(history.get_history(bad(60, "", "nope")).await.unwrap_err().code(), Code::NotFound);
}
