//! External segment metrics end to end: a real `mtgauge serve` process, sessions that declare
//! them, items that carry them (with a hypothesis, with an unmatched source, or alone).

mod common;

use common::{demo_files, durable_with_ferry, temp_dir, Server};
use mtgauge::cli::demo::scenario::demo_segments;
use mtgauge::pb;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use mtgauge::rng::SplitMix64;
use tonic::Code;

fn declaration() -> Vec<pb::ExternalMetric> {
    vec![
        pb::ExternalMetric { name: "qe".into(), low: 0.0, high: 1.0, ..Default::default() },
        pb::ExternalMetric { name: "edit_rate".into(), low: 0.0, high: 100.0, lower_is_better: true, decimals: Some(2) },
    ]
}

async fn create(ch: &tonic::transport::Channel, name: &str) {
    let req = pb::CreateSessionRequest { name: name.into(), refset: "ferry".into(), external: declaration(), ..Default::default() };
    let info = SessionsClient::new(ch.clone()).create(req).await.expect("create").into_inner();
    assert_eq!(info.external.len(), 2);
    assert_eq!(info.external[0].decimals, Some(6), "the default is filled in");
}

async fn external(ch: &tonic::transport::Channel, session: &str) -> Vec<pb::ExternalResult> {
    let r = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: session.into(), ..Default::default() }).await.expect("scores").into_inner();
    r.cumulative.expect("cumulative").external
}

/// The external results over a session's `recent` window.
async fn recent_external(ch: &tonic::transport::Channel, session: &str) -> Vec<pb::ExternalResult> {
    let r = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: session.into(), ..Default::default() }).await.expect("scores").into_inner();
    r.recent.expect("recent").external
}

/// Round `num / den` half to even, integers only.
fn round_half_even(num: i128, den: i128) -> i128 {
    let (q, r) = (num.div_euclid(den), num.rem_euclid(den));
    match (2 * r).cmp(&den) {
        std::cmp::Ordering::Less => q,
        std::cmp::Ordering::Greater => q + 1,
        std::cmp::Ordering::Equal => q + (q & 1),
    }
}

/// 600 items: a third by segment id with a hypothesis, a third by a source no segment has, a
/// third with only external values and an item key. qe = n / 10^7 (one decimal more than
/// kept, so a tenth of them sit on a rounding half), edit_rate = m / 1000. Returns the items
/// and the expected fixed-point values (qe at 10^6, edit_rate at 10^2).
fn items() -> (Vec<pb::ScoreItem>, Vec<(i128, i128)>) {
    let segs = demo_segments();
    let mut rng = SplitMix64::new(18);
    let (mut out, mut want) = (Vec::new(), Vec::new());
    for i in 0..600usize {
        let n = rng.below(10_000_001) as i64;
        let m = rng.below(100_001) as i64;
        let mut it = pb::ScoreItem { external: [("qe".to_string(), n as f64 / 1e7), ("edit_rate".to_string(), m as f64 / 1e3)].into_iter().collect(), ..Default::default() };
        match i % 3 {
            0 => {
                let s = &segs[i % segs.len()];
                it.key = Some(pb::score_item::Key::SegmentId(s.id.clone()));
                it.hypothesis = s.refs[0].clone();
            }
            1 => {
                it.key = Some(pb::score_item::Key::Source(format!("Kein Eintrag {i}")));
                it.hypothesis = "Die Fähre fährt.".into();
            }
            _ => {
                it.item_key = format!("call-{i}");
                it.values_only = true;
            }
        }
        out.push(it);
        want.push((round_half_even(i128::from(n), 10), round_half_even(i128::from(m), 10)));
    }
    (out, want)
}

/// Poll a sample of the server's scrape until it equals `want` (telemetry follows the
/// acknowledgements); bounded: 500 polls.
async fn sample_reaches(server: &Server, series: &str, want: f64) -> f64 {
    let mut got = 0.0;
    for _ in 0..500 {
        got = server.sample(series);
        if got == want {
            break;
        }
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    }
    got
}

fn batch(session: &str, producer: &str, sequence: u64, items: Vec<pb::ScoreItem>) -> pb::ScoreBatch {
    pb::ScoreBatch { session: session.into(), producer: producer.into(), sequence, items, ..Default::default() }
}

#[tokio::test]
async fn shuffled_shards_from_several_producers_give_the_sums_of_one() {
    let dir = temp_dir("external-shards");
    demo_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let server = Server::start(&["--refset", &refs]);
    let ch = server.wait_serving().await;
    create(&ch, "ferry-v8").await;
    create(&ch, "ferry-v8-canary").await;
    let (items, want) = items();

    // One producer, in order, batches of 50.
    let mut scoring = ScoringClient::new(ch.clone());
    for (k, chunk) in items.chunks(50).enumerate() {
        let ack = scoring.submit(batch("ferry-v8", "one", k as u64 + 1, chunk.to_vec())).await.unwrap().into_inner();
        assert_eq!((ack.rejected, ack.external as usize), (0, chunk.len()), "{ack:?}");
    }

    // Four producers, shuffled shards, concurrent streams of uneven batches.
    let mut order: Vec<usize> = (0..items.len()).collect();
    let mut rng = SplitMix64::new(7);
    for i in (1..order.len()).rev() {
        order.swap(i, rng.below(i as u64 + 1) as usize);
    }
    let mut tasks = Vec::new();
    for p in 0..4usize {
        let shard: Vec<pb::ScoreItem> = order.iter().skip(p).step_by(4).map(|&i| items[i].clone()).collect();
        let ch = ch.clone();
        tasks.push(tokio::spawn(async move {
            let mut batches = Vec::new();
            let (mut rest, mut seq, mut rng) = (&shard[..], 0, SplitMix64::new(p as u64));
            while !rest.is_empty() {
                let n = (1 + rng.below(30) as usize).min(rest.len());
                seq += 1;
                batches.push(batch("ferry-v8-canary", &format!("worker-{p}"), seq, rest[..n].to_vec()));
                rest = &rest[n..];
            }
            let mut acks = ScoringClient::new(ch).stream(tokio_stream::iter(batches)).await.unwrap().into_inner();
            while let Some(ack) = acks.message().await.unwrap() {
                assert_eq!(ack.rejected, 0, "{ack:?}");
            }
        }));
    }
    for t in tasks {
        t.await.unwrap();
    }

    let (one, shards) = (external(&ch, "ferry-v8").await, external(&ch, "ferry-v8-canary").await);
    assert_eq!(one, shards, "sums, means and intervals do not depend on the split or the order");
    let (qe, rate) = (&one[0], &one[1]);
    assert_eq!((qe.metric.as_str(), rate.metric.as_str()), ("qe", "edit_rate"));
    assert_eq!((qe.count, rate.count), (600, 600), "items of all three kinds are counted");
    let sum = |f: fn(&(i128, i128)) -> i128| want.iter().map(f).sum::<i128>().to_string();
    assert_eq!(qe.sum, sum(|w| w.0));
    assert_eq!(qe.squares, sum(|w| w.0 * w.0));
    assert_eq!(rate.sum, sum(|w| w.1));
    assert_eq!(rate.squares, sum(|w| w.1 * w.1));
    assert!(rate.lower_is_better && !qe.lower_is_better);
    let mean = qe.mean.unwrap();
    let iv = qe.interval.as_ref().expect("an interval from the session's replicates");
    assert!(iv.low < mean && mean < iv.high && iv.resamples > 0, "{iv:?} {mean}");

    // Prometheus counters of both sessions: offsets from low = 0, so the sums as above; the
    // squares over 10^decimals, rounded half to even once. Every value here is below 2^53.
    let round_div = |q: i128, d: i128| {
        let (a, r) = (q / d, q % d);
        if 2 * r > d || (2 * r == d && a % 2 == 1) { a + 1 } else { a }
    };
    for s in ["ferry-v8", "ferry-v8-canary"] {
        let series = |name: &str, metric: &str| format!("{name}{{session=\"{s}\",metric=\"{metric}\"}}");
        assert_eq!(sample_reaches(&server, &series("mtgauge_external_count_total", "qe"), 600.0).await, 600.0);
        let want_sum = want.iter().map(|w| w.0).sum::<i128>() as f64;
        assert_eq!(sample_reaches(&server, &series("mtgauge_external_sum_total", "qe"), want_sum).await, want_sum);
        let want_sq = round_div(want.iter().map(|w| w.1 * w.1).sum::<i128>(), 100) as f64;
        assert_eq!(sample_reaches(&server, &series("mtgauge_external_squares_total", "edit_rate"), want_sq).await, want_sq);
    }
}

#[tokio::test]
async fn bad_values_reject_the_item_naming_the_metric_and_count_nothing() {
    let dir = temp_dir("external-bad");
    demo_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let server = Server::start(&["--refset", &refs]);
    let ch = server.wait_serving().await;
    create(&ch, "ferry-v8").await;
    let it = |vals: &[(&str, f64)], key: &str| pb::ScoreItem { external: vals.iter().map(|(k, v)| (k.to_string(), *v)).collect(), item_key: key.into(), values_only: true, ..Default::default() };
    let many: Vec<(String, f64)> = (0..=mtgauge::external::MAX_EXTERNAL_METRICS).map(|i| (format!("m{i}"), 0.5)).collect();
    let too_many = pb::ScoreItem { external: many.into_iter().collect(), item_key: "k".into(), values_only: true, ..Default::default() };
    let items = vec![
        it(&[("qe", 0.5), ("bleurt_like", 0.1)], "a"),
        it(&[("qe", f64::NAN)], "b"),
        it(&[("edit_rate", f64::INFINITY)], "c"),
        it(&[("qe", 1.5)], "d"),
        it(&[("edit_rate", -0.5), ("qe", 0.5)], "e"),
        too_many,
        it(&[("qe", 0.5)], ""),
        it(&[("qe", 0.25)], "good"),
        // Over limits.max_text_bytes (64 KiB by default): the key and the source are bounded too.
        it(&[("qe", 0.5)], &"k".repeat(70_000)),
        pb::ScoreItem { key: Some(pb::score_item::Key::Source("s".repeat(70_000))), ..it(&[("qe", 0.5)], "") },
    ];
    let ack = ScoringClient::new(ch.clone()).submit(batch("ferry-v8", "p", 1, items)).await.unwrap().into_inner();
    let reasons: Vec<(u32, String)> = ack.rejections.iter().map(|r| (r.index, r.reason.clone())).collect();
    assert_eq!((ack.rejected, ack.external), (9, 1), "{reasons:?}");
    assert!(reasons.iter().any(|(i, r)| *i == 8 && r.contains("item_key of 70000 bytes")), "{reasons:?}");
    assert!(reasons.iter().any(|(i, r)| *i == 9 && r.contains("source of 70000 bytes")), "{reasons:?}");
    for (index, metric) in [(0, "bleurt_like"), (1, "qe"), (2, "edit_rate"), (3, "qe"), (4, "edit_rate")] {
        let (_, reason) = reasons.iter().find(|(i, _)| *i == index).expect("rejected");
        assert!(reason.contains(&format!("'{metric}'")), "{index}: {reason}");
    }
    assert!(reasons.iter().any(|(i, r)| *i == 5 && r.contains("more than")), "{reasons:?}");
    assert!(reasons.iter().any(|(i, r)| *i == 6 && r.contains("item_key")), "{reasons:?}");
    let ext = external(&ch, "ferry-v8").await;
    // Only the good item: qe 0.25, nothing from the rejected ones (item 0 and 4 had a good qe).
    assert_eq!((ext[0].count, ext[0].sum.as_str(), ext[1].count), (1, "250000", 0));

    // A bad declaration is refused naming the metric.
    let bad = pb::CreateSessionRequest { name: "ferry-v9".into(), refset: "ferry".into(), external: vec![pb::ExternalMetric { name: "qe".into(), low: 1.0, high: 0.0, ..Default::default() }], ..Default::default() };
    let e = SessionsClient::new(ch.clone()).create(bad).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("'qe'"), "{}", e.message());
}

#[tokio::test]
async fn a_durable_server_keeps_the_sums_across_a_restart() {
    let dir = temp_dir("external-durable");
    demo_files(&dir);
    let (mut server, ch, data) = durable_with_ferry(&dir).await;
    create(&ch, "ferry-v8").await;
    let (items, _) = items();
    let mut scoring = ScoringClient::new(ch.clone());
    for (k, chunk) in items.chunks(40).enumerate() {
        scoring.submit(batch("ferry-v8", "one", k as u64 + 1, chunk.to_vec())).await.unwrap();
    }
    let before = external(&ch, "ferry-v8").await;
    assert_eq!(before[0].count, 600);
    server.kill();

    let server = Server::start(&["--data-dir", &data, "--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    assert_eq!(external(&ch, "ferry-v8").await, before, "sums, replicates and so the interval come back");
    let count = r#"mtgauge_external_count_total{session="ferry-v8",metric="qe"}"#;
    assert_eq!(sample_reaches(&server, count, 600.0).await, 600.0, "the counters go on from the stored sums");
    let info = SessionsClient::new(ch.clone()).get(pb::GetSessionRequest { name: "ferry-v8".into() }).await.unwrap().into_inner();
    assert_eq!(info.external, declaration().into_iter().map(|m| pb::ExternalMetric { decimals: Some(m.decimals.unwrap_or(6)), ..m }).collect::<Vec<_>>());

    // A reset zeroes them, durably.
    SessionsClient::new(ch.clone()).reset(pb::ResetSessionRequest { name: "ferry-v8".into() }).await.unwrap();
    assert_eq!(external(&ch, "ferry-v8").await[0].count, 0);
    // A replayed batch is a duplicate: nothing counted twice.
    let ack = ScoringClient::new(ch.clone()).submit(batch("ferry-v8", "one", 1, items[..40].to_vec())).await.unwrap().into_inner();
    assert!(ack.duplicate && ack.external == 0, "{ack:?}");
    assert_eq!(external(&ch, "ferry-v8").await[0].count, 0);
}

/// `send --items` with `--create --external` into two replicas, then `status` over both: the
/// fleet sums are the sums of all items, exactly.
#[tokio::test]
async fn status_over_two_replicas_adds_the_sums() {
    const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
    let dir = temp_dir("external-fleet");
    demo_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let (a, b) = (Server::start(&["--refset", &refs]), Server::start(&["--refset", &refs]));
    a.wait_serving().await;
    b.wait_serving().await;
    let run = |args: &[&str]| {
        let out = std::process::Command::new(BIN).args(args).output().unwrap();
        assert!(out.status.success(), "{args:?}: {}", String::from_utf8_lossy(&out.stderr));
        String::from_utf8(out.stdout).unwrap()
    };
    for (server, lines) in [(&a, "{\"key\": \"c1\", \"scores\": {\"qe\": 0.25}}\n{\"id\": \"notice-0001\", \"hypothesis\": \"Boje.\", \"scores\": {\"qe\": 0.5}}\n"), (&b, "{\"key\": \"c3\", \"scores\": {\"qe\": 0.7500005}}\n")] {
        let path = dir.join(format!("items-{}.jsonl", server.grpc.len() + lines.len()));
        std::fs::write(&path, lines).unwrap();
        run(&["send", "--server", &server.grpc, "--session", "ferry-v8", "--create", "--refset", "ferry", "--external", "qe:0:1", "--items", path.to_str().unwrap()]);
    }
    let both = format!("{},{}", a.grpc, b.grpc);
    let j: serde_json::Value = serde_json::from_str(&run(&["status", "--server", &both, "--session", "ferry-v8", "--json"])).unwrap();
    let qe = &j["external"][0];
    // 0.7500005 at six places: a half, to the even 750000.
    assert_eq!((qe["values"].as_u64(), qe["fixed_point"]["sum"].as_str()), (Some(3), Some("1500000")), "{j}");
    assert_eq!(qe["mean"].as_f64(), Some(0.5));
    let human = run(&["status", "--server", &both, "--session", "ferry-v8"]);
    // With the fleet interval (from the replicas' replicate sums) between the mean and the rest.
    assert!(human.contains("qe          mean 0.500000 (") && human.contains("95% interval), stddev 0.250000, 3 values, higher is better"), "{human}");
}

/// An empty translation that carries a quality-estimation value is still a translation: it is
/// scored (and its value counted); only an item marked values_only is counted for its values
/// alone, and the marker is refused on an item with a hypothesis or without values.
#[tokio::test]
async fn an_empty_translation_with_a_value_is_scored_and_values_only_is_explicit() {
    let dir = temp_dir("external-empty");
    demo_files(&dir);
    let server = Server::start(&["--refset", &format!("ferry={}", dir.join("refs.jsonl").display())]);
    let ch = server.wait_serving().await;
    create(&ch, "ferry-empty").await;
    let seg = demo_segments()[0].id.clone();
    let qe = |v: f64| [("qe".to_string(), v)].into_iter().collect();
    let items = vec![
        pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(seg.clone())), hypothesis: String::new(), external: qe(0.1), ..Default::default() },
        pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(seg.clone())), external: qe(0.2), values_only: true, ..Default::default() },
        pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(seg.clone())), hypothesis: "Die Fähre.".into(), external: qe(0.3), values_only: true, ..Default::default() },
        pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(seg)), values_only: true, ..Default::default() },
    ];
    let ack = ScoringClient::new(ch.clone()).submit(batch("ferry-empty", "p", 1, items)).await.unwrap().into_inner();
    let reasons: Vec<(u32, String)> = ack.rejections.iter().map(|r| (r.index, r.reason.clone())).collect();
    assert_eq!((ack.scored, ack.external, ack.rejected), (1, 2, 2), "{reasons:?}");
    assert!(reasons.iter().any(|(i, r)| *i == 2 && r.contains("carries a hypothesis")), "{reasons:?}");
    assert!(reasons.iter().any(|(i, r)| *i == 3 && r.contains("no external values")), "{reasons:?}");
}

/// The `recent` window of a session keeps the external values of its last `window` items (of
/// all three kinds: scored, unmatched, values-only): its count, exact sums and mean are those of
/// the last 90 items' rounded values, computed here from the inputs; it has its own interval;
/// and it comes back after a restart.
#[tokio::test]
async fn the_recent_window_holds_the_last_items_values() {
    const WINDOW: usize = 90;
    let dir = temp_dir("external-recent");
    demo_files(&dir);
    let (mut server, ch, data) = durable_with_ferry(&dir).await;
    let req = pb::CreateSessionRequest { name: "ferry-v8".into(), refset: "ferry".into(), external: declaration(), window: WINDOW as u32, ..Default::default() };
    SessionsClient::new(ch.clone()).create(req).await.expect("create");
    let (items, want) = items();
    let mut scoring = ScoringClient::new(ch.clone());
    // Uneven batches (7 to 60 items): the window turns over inside batches and between them.
    let (mut done, mut rng, mut seq) = (0, SplitMix64::new(3), 0);
    while done < 500 {
        let n = (7 + rng.below(54) as usize).min(500 - done);
        seq += 1;
        let ack = scoring.submit(batch("ferry-v8", "one", seq, items[done..done + n].to_vec())).await.unwrap().into_inner();
        assert_eq!((ack.rejected, ack.external as usize), (0, n), "{ack:?}");
        done += n;
    }
    let check = |recent: &[pb::ExternalResult], upto: usize| {
        let last = &want[upto - WINDOW..upto];
        let (qe, rate) = (&recent[0], &recent[1]);
        assert_eq!((qe.metric.as_str(), qe.count, rate.count), ("qe", WINDOW as u64, WINDOW as u64));
        let qe_sum: i128 = last.iter().map(|w| w.0).sum();
        assert_eq!(qe.sum, qe_sum.to_string());
        assert_eq!(qe.squares, last.iter().map(|w| w.0 * w.0).sum::<i128>().to_string());
        assert_eq!(rate.sum, last.iter().map(|w| w.1).sum::<i128>().to_string());
        // The mean of the last 90 rounded values: sum / (90 x 10^6), as one division of the
        // exact integer sum.
        assert_eq!(qe.mean, Some(qe_sum as f64 / (WINDOW as f64 * 1e6)));
        let iv = qe.interval.as_ref().expect("an interval of the window's mean");
        assert!(iv.low < qe.mean.unwrap() && qe.mean.unwrap() < iv.high, "{iv:?}");
    };
    let recent = recent_external(&ch, "ferry-v8").await;
    check(&recent, 500);
    let cumulative = external(&ch, "ferry-v8").await;
    assert_eq!(cumulative[0].count, 500);
    assert_ne!(recent[0].interval, cumulative[0].interval, "the window has its own replicates");

    // `status --json` and the human view show it.
    const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
    let status = |args: &[&str]| {
        let out = std::process::Command::new(BIN).args(["status", "--server", &server.grpc, "--session", "ferry-v8"]).args(args).output().unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        String::from_utf8(out.stdout).unwrap()
    };
    let j: serde_json::Value = serde_json::from_str(&status(&["--json"])).unwrap();
    assert_eq!((j["recent_external"][0]["values"].as_u64(), j["recent_external"][0]["fixed_point"]["sum"].as_str()), (Some(WINDOW as u64), Some(recent[0].sum.as_str())), "{j}");
    assert_eq!(j["external"][0]["values"].as_u64(), Some(500));
    let human = status(&[]);
    assert!(human.contains(&format!("external metrics (recent: the last {WINDOW} items that carried values):")), "{human}");

    // Restart: the window comes back, then goes on turning over.
    server.kill();
    let server = Server::start(&["--data-dir", &data, "--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    assert_eq!(recent_external(&ch, "ferry-v8").await, recent, "items, sums and replicates come back");
    let ack = ScoringClient::new(ch.clone()).submit(batch("ferry-v8", "one", seq + 1, items[500..].to_vec())).await.unwrap().into_inner();
    assert_eq!(ack.external, 100);
    check(&recent_external(&ch, "ferry-v8").await, 600);
    // A reset empties it.
    SessionsClient::new(ch.clone()).reset(pb::ResetSessionRequest { name: "ferry-v8".into() }).await.unwrap();
    assert_eq!(recent_external(&ch, "ferry-v8").await[0].count, 0);
}

/// `Compare` of two sessions pairs their external values by item key: B's are A's plus 0.05
/// and some noise, sent in another order and other batches, with items of A's that B lacks.
/// The difference is the exact mean difference over the shared keys (computed here from the
/// integers sent), its interval holds it; sessions with no key in common have nothing to
/// compare.
#[tokio::test]
async fn compare_pairs_external_values_by_item_key() {
    let dir = temp_dir("external-compare");
    demo_files(&dir);
    let server = Server::start(&["--refset", &format!("ferry={}", dir.join("refs.jsonl").display())]);
    let ch = server.wait_serving().await;
    for s in ["ferry-v8", "ferry-v9", "other-calls"] {
        create(&ch, s).await;
    }
    let mut rng = SplitMix64::new(31);
    // Six decimals exactly: k / 10^6 reads back as that decimal, so its fixed point is k.
    let a: Vec<i64> = (0..240).map(|_| rng.below(900_001) as i64).collect();
    let b: Vec<i64> = a.iter().map(|&x| x + 50_000 + rng.below(40_001) as i64 - 20_000).collect();
    let item = |key: String, k: i64| pb::ScoreItem { item_key: key, external: [("qe".to_string(), k as f64 / 1e6)].into_iter().collect(), values_only: true, ..Default::default() };
    let mut scoring = ScoringClient::new(ch.clone());
    let items_a: Vec<pb::ScoreItem> = a.iter().enumerate().map(|(i, &k)| item(format!("call-{i}"), k)).collect();
    for (n, chunk) in items_a.chunks(64).enumerate() {
        scoring.submit(batch("ferry-v8", "a", n as u64 + 1, chunk.to_vec())).await.unwrap();
    }
    // B holds the first 200 keys only, newest first, in batches of 30.
    let items_b: Vec<pb::ScoreItem> = (0..200).rev().map(|i| item(format!("call-{i}"), b[i])).collect();
    for (n, chunk) in items_b.chunks(30).enumerate() {
        scoring.submit(batch("ferry-v9", "b", n as u64 + 1, chunk.to_vec())).await.unwrap();
    }
    let others: Vec<pb::ScoreItem> = (0..50).map(|i| item(format!("other-{i}"), a[i])).collect();
    scoring.submit(batch("other-calls", "c", 1, others)).await.unwrap();

    let compare = |x: &str, y: &str| pb::CompareRequest { session_a: x.into(), session_b: y.into(), resamples: Some(400), trials: Some(3000), ..Default::default() };
    let r = scoring.compare(compare("ferry-v8", "ferry-v9")).await.unwrap().into_inner();
    let qe = r.external.iter().find(|e| e.metric == "qe").expect("qe compared");
    let (sa, sb): (i64, i64) = (a[..200].iter().sum(), b[..200].iter().sum());
    let want = (sa - sb) as f64 / (200.0 * 1e6);
    assert_eq!((qe.items, qe.difference), (200, Some(want)), "{qe:?}");
    assert!((-0.055..-0.045).contains(&want), "the shift of 0.05 with noise averaging near 0: {want}");
    assert_eq!((qe.a, qe.b), (Some(sa as f64 / 200e6), Some(sb as f64 / 200e6)));
    let iv = qe.interval.as_ref().expect("paired interval");
    assert!(iv.low < want && want < iv.high && iv.high < 0.0, "{iv:?}");
    assert_eq!(qe.p_value, Some(1.0 / 3001.0), "no trial comes as far apart: {qe:?}");
    // edit_rate is declared by both but no item carries it.
    let rate = r.external.iter().find(|e| e.metric == "edit_rate").unwrap();
    assert_eq!((rate.items, rate.difference, rate.note.as_str()), (0, None, mtgauge::external::compare::NO_COMMON_ITEMS));

    // No key in common.
    let r = scoring.compare(compare("ferry-v8", "other-calls")).await.unwrap().into_inner();
    let qe = &r.external[0];
    assert_eq!((qe.metric.as_str(), qe.items, qe.difference, qe.interval.is_none(), qe.note.as_str()), ("qe", 0, None, true, mtgauge::external::compare::NO_COMMON_ITEMS));

    // The command line shows both.
    const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
    let run = |args: &[&str]| {
        let out = std::process::Command::new(BIN).args(["compare", "--server", &server.grpc, "--session", "ferry-v8", "--session"]).args(args).output().unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        String::from_utf8(out.stdout).unwrap()
    };
    let j: serde_json::Value = serde_json::from_str(&run(&["ferry-v9", "--json"])).unwrap();
    assert_eq!((j["external"][0]["metric"].as_str(), j["external"][0]["items"].as_u64(), j["external"][0]["difference"].as_f64()), (Some("qe"), Some(200), Some(want)), "{j}");
    let human = run(&["other-calls"]);
    assert!(human.contains(&format!("qe          {}", mtgauge::external::compare::NO_COMMON_ITEMS)), "{human}");
    let human = run(&["ferry-v9"]);
    assert!(human.contains(&format!("A - B {want:+.6}")) && human.contains("200 items, higher is better"), "{human}");
}

/// Run the command line, which must succeed; its standard output.
fn cli(args: &[&str]) -> String {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(args).output().unwrap();
    assert!(out.status.success(), "{args:?}: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8(out.stdout).unwrap()
}

/// Two replicas and one more process, each with the demo's reference set, serving.
async fn two_replicas_and_one(dir: &std::path::Path) -> (Server, Server, Server) {
    demo_files(dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let (a, b, one) = (Server::start(&["--refset", &refs]), Server::start(&["--refset", &refs]), Server::start(&["--refset", &refs]));
    for s in [&a, &b, &one] {
        s.wait_serving().await;
    }
    (a, b, one)
}

/// `send --items` of JSONL `lines` (written to `file` in `dir`) into `session`, created with
/// `--external qe:0:1` when new.
fn send_lines(dir: &std::path::Path, server: &Server, session: &str, lines: &[String], file: &str) {
    let path = dir.join(file);
    std::fs::write(&path, lines.join("\n") + "\n").unwrap();
    cli(&["send", "--server", &server.grpc, "--session", session, "--create", "--refset", "ferry", "--external", "qe:0:1", "--items", path.to_str().unwrap()]);
}

/// Two replicas, each holding part of the items, report through `status` the same external
/// means and intervals (cumulative and recent) as one process holding all of them: the
/// replicas send their external replicate sums, which add up exactly.
#[tokio::test]
async fn a_fleet_of_two_reports_the_interval_of_one_process() {
    let dir = temp_dir("external-fleet-interval");
    let (a, b, one) = two_replicas_and_one(&dir).await;
    let mut rng = SplitMix64::new(44);
    let lines: Vec<String> = (0..150).map(|i| format!("{{\"key\": \"call-{i}\", \"scores\": {{\"qe\": {}}}}}", rng.below(1_000_001) as f64 / 1e6)).collect();
    send_lines(&dir, &a, "ferry-v8", &lines[..60], "part-a.jsonl");
    send_lines(&dir, &b, "ferry-v8", &lines[60..], "part-b.jsonl");
    send_lines(&dir, &one, "ferry-v8", &lines, "all.jsonl");
    let status = |servers: &str| -> serde_json::Value { serde_json::from_str(&cli(&["status", "--server", servers, "--session", "ferry-v8", "--json"])).unwrap() };
    let (fleet, single) = (status(&format!("{},{}", a.grpc, b.grpc)), status(&one.grpc));
    for key in ["external", "recent_external"] {
        let (f, s) = (&fleet[key][0], &single[key][0]);
        assert_eq!(f["values"].as_u64(), Some(150), "{key}: {fleet}");
        assert!(s["interval"]["low"].as_f64().is_some(), "{key}: {single}");
        // The interval is derived from the summed replicate sums: equal to one process's.
        for field in ["mean", "interval", "fixed_point"] {
            assert_eq!(f[field], s[field], "{key}.{field}");
        }
    }
    assert!(fleet["interval_note"].is_null(), "{fleet}");
    // `report --metric qe` over the fleet: each step's count, sum and squares added up over the
    // replicas, the same points (mean, count, interval) as the one process's.
    let points = |servers: &str, file: &str| -> Vec<String> {
        let out = dir.join(file);
        cli(&["report", "--server", servers, "--session", "ferry-v8", "--metric", "qe", "--since", "2h", "--step", "1h", "--out", out.to_str().unwrap()]);
        let svg = std::fs::read_to_string(&out).unwrap();
        assert!(svg.contains("150 values of qe"), "{svg}");
        svg.split("<circle class=\"pt\"").skip(1).map(|p| p.split("</circle>").next().unwrap_or("").to_owned()).collect()
    };
    let (fleet_pts, single_pts) = (points(&format!("{},{}", a.grpc, b.grpc), "fleet.svg"), points(&one.grpc, "one.svg"));
    if fleet_pts.len() == 1 && single_pts.len() == 1 {
        assert_eq!(fleet_pts, single_pts, "the fleet's hour equals the one process's");
        assert!(fleet_pts[0].contains("(150 values)"), "{fleet_pts:?}");
    } else {
        eprintln!("the sends straddled an hour: steps differ by where they fell ({} and {} points)", fleet_pts.len(), single_pts.len());
    }
}

/// `compare` over a fleet: two replicas each hold part of both sessions' items (some keys on
/// both replicas), one process holds all of them; the fleet comparison of the external metric
/// equals the one process's (the same keys, values, weights and coins).
#[tokio::test]
async fn a_fleet_compares_external_values_as_one_process() {
    let dir = temp_dir("external-fleet-compare");
    let (a, b, one) = two_replicas_and_one(&dir).await;
    let mut rng = SplitMix64::new(52);
    let base: Vec<u64> = (0..120).map(|_| rng.below(900_001)).collect();
    let line = |i: usize, k: u64| format!("{{\"key\": \"call-{i}\", \"scores\": {{\"qe\": {}}}}}", k as f64 / 1e6);
    let v8: Vec<String> = base.iter().enumerate().map(|(i, &k)| line(i, k)).collect();
    let v9: Vec<String> = base.iter().enumerate().map(|(i, &k)| line(i, k + 30_000 + rng.below(20_001))).collect();
    let send = |server: &Server, session: &str, part: &[String], name: &str| send_lines(&dir, server, session, part, name);
    // Replica a: v8's items 0..70, v9's 30..120; replica b: v8's 50..120 (50..70 on both, the
    // same values), v9's 0..40.
    send(&a, "v8", &v8[..70], "a8.jsonl");
    send(&a, "v9", &v9[30..], "a9.jsonl");
    send(&b, "v8", &v8[50..], "b8.jsonl");
    send(&b, "v9", &v9[..40], "b9.jsonl");
    send(&one, "v8", &v8, "o8.jsonl");
    send(&one, "v9", &v9, "o9.jsonl");
    let compare = |servers: &str| -> serde_json::Value { serde_json::from_str(&cli(&["compare", "--server", servers, "--session", "v8", "--session", "v9", "--json"])).unwrap() };
    let (fleet, single) = (compare(&format!("{},{}", a.grpc, b.grpc)), compare(&one.grpc));
    let (f, s) = (&fleet["external"][0], &single["external"][0]);
    assert_eq!(f["items"].as_u64(), Some(120), "{fleet}");
    assert!(s["interval"]["low"].as_f64().is_some() && s["p_value"].as_f64().is_some(), "{single}");
    for field in ["items", "a", "b", "difference", "interval", "p_value", "extreme_trials"] {
        assert_eq!(f[field], s[field], "{field}");
    }
}

/// The history of an external metric through GetHistory: one step over every batch gives the
/// mean of the values sent (recomputed here from them), their count, and the normal-theory
/// interval of the mean (mean ± 1.96 s / sqrt(n) for 600 values: the normal 0.975 quantile,
/// NIST/SEMATECH e-Handbook of Statistical Methods, table 1.3.6.7.1; s by two passes over
/// the values); minute steps whose batches fell wholly in one minute equal those batches'
/// means. A reset keeps it, a restart brings it back unchanged, a closed session's goes.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn external_history_survives_a_restart_and_equals_the_values_sent() {
    use mtgauge::pb::history_client::HistoryClient;
    let now = || std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs() as i64;
    let dir = temp_dir("external-history");
    demo_files(&dir);
    let (mut server, ch, data) = durable_with_ferry(&dir).await;
    create(&ch, "ferry-v8").await;
    let (items, want) = items();
    let mut scoring = ScoringClient::new(ch.clone());
    let first = now();
    // (minute of the batch when it fell wholly in one, its qe values)
    let mut batches: Vec<(Option<i64>, Vec<f64>)> = Vec::new();
    for (k, chunk) in items.chunks(40).enumerate() {
        let t0 = now();
        scoring.submit(batch("ferry-v8", "one", k as u64 + 1, chunk.to_vec())).await.unwrap();
        let t1 = now();
        let values = want[k * 40..k * 40 + chunk.len()].iter().map(|(q, _)| *q as f64 / 1e6).collect();
        batches.push(((t0 / 60 == t1 / 60).then_some(t0 / 60 * 60), values));
    }
    let last = now();
    let from = first.div_euclid(3600) * 3600;
    let step = ((last + 1 - from) as u32).div_ceil(3600) * 3600;
    let query = |metric: &str, from: i64, until: i64, step: u32| pb::GetHistoryRequest { session: "ferry-v8".into(), metric: metric.into(), from_unix: from, until_unix: until, step_seconds: step, ..Default::default() };
    let mut history = HistoryClient::new(ch.clone());
    let one = history.get_history(query("qe", from, from + i64::from(step), step)).await.unwrap().into_inner();
    assert_eq!((one.metric.as_str(), one.resolution.as_str(), one.points.len()), ("qe", "hour", 1));
    let values: Vec<f64> = batches.iter().flat_map(|(_, v)| v.iter().copied()).collect();
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    let sd = (values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0)).sqrt();
    let p = &one.points[0];
    assert_eq!(p.segments, 600, "the count of values");
    assert!((p.score.unwrap() - mean).abs() < 1e-9, "{:?} {mean}", p.score);
    let iv = p.interval.as_ref().expect("an interval from 600 values");
    let half = 1.96 * sd / n.sqrt();
    assert!((iv.low - (mean - half)).abs() < 1e-9 && (iv.high - (mean + half)).abs() < 1e-9, "{iv:?} {mean} {half}");
    assert_eq!((iv.method.as_str(), iv.level, iv.resamples), ("student-t-mean", 0.95, 0));
    assert!(one.memory_bytes > 0);

    // Minute steps: counts add up; a minute whose batches are all known has their mean.
    let minutes = history.get_history(query("qe", first - 60, last + 60, 60)).await.unwrap().into_inner();
    assert_eq!(minutes.resolution, "minute");
    assert_eq!(minutes.points.iter().map(|p| p.segments).sum::<u64>(), 600);
    let mut checked = 0;
    for p in minutes.points.iter().filter(|p| p.segments > 0) {
        let in_it: Vec<&(Option<i64>, Vec<f64>)> = batches.iter().filter(|(m, _)| *m == Some(p.start_unix)).collect();
        let count: usize = in_it.iter().map(|(_, v)| v.len()).sum();
        if count as u64 != p.segments {
            continue; // a batch that straddled a minute boundary may be in it
        }
        let m = in_it.iter().flat_map(|(_, v)| v.iter()).sum::<f64>() / count as f64;
        assert!((p.score.unwrap() - m).abs() < 1e-9, "minute {}: {:?} {m}", p.start_unix, p.score);
        checked += 1;
    }
    assert!(checked > 0, "at least one minute is checked against its batches");

    // Refusals name the metric; an external metric's intervals are at 0.95 only.
    let e = history.get_history(query("fluency", 0, 0, 60)).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("'fluency'") && e.message().contains("qe, edit_rate"), "{}", e.message());
    let e = history.get_history(pb::GetHistoryRequest { level: 0.9, ..query("qe", 0, 0, 60) }).await.unwrap_err();
    assert!(e.message().contains("0.95"), "{}", e.message());

    // A reset keeps the history; a restart brings it back as it was.
    SessionsClient::new(ch.clone()).reset(pb::ResetSessionRequest { name: "ferry-v8".into() }).await.unwrap();
    let after_reset = history.get_history(query("edit_rate", first - 60, last + 60, 60)).await.unwrap().into_inner();
    assert_eq!(after_reset.points.iter().map(|p| p.segments).sum::<u64>(), 600);
    server.kill();
    let server = Server::start(&["--data-dir", &data, "--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let mut history = HistoryClient::new(ch.clone());
    let back = history.get_history(query("qe", from, from + i64::from(step), step)).await.unwrap().into_inner();
    assert_eq!(back.points, one.points, "the hourly buckets come back");
    let back = history.get_history(query("edit_rate", first - 60, last + 60, 60)).await.unwrap().into_inner();
    assert_eq!(back.points, after_reset.points, "the minute buckets come back");

    // `report --metric qe`: the same minutes drawn in the metric's units.
    let out = dir.join("qe.svg");
    let report = |server: &str| std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["report", "--server", server, "--session", "ferry-v8", "--metric", "qe", "--since", "2h", "--step", "1m", "--out", out.to_str().unwrap()]).output().unwrap();
    let run = report(&server.grpc);
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let svg = std::fs::read_to_string(&out).unwrap();
    assert!(svg.contains("qe (0\u{2013}1)"), "the axis caption in the metric's units");
    assert!(svg.contains("600 values of qe"), "the footer counts the values");
    assert_eq!(svg.matches("class=\"pt\"").count(), minutes.points.iter().filter(|p| p.segments > 0).count(), "one point per minute with values");

    // A session closed and created anew starts with an empty history.
    SessionsClient::new(ch.clone()).close(pb::CloseSessionRequest { name: "ferry-v8".into() }).await.unwrap();
    create(&ch, "ferry-v8").await;
    let fresh = history.get_history(query("qe", from, from + i64::from(step), step)).await.unwrap().into_inner();
    assert_eq!(fresh.points[0].segments, 0);
    // ... also in the store.
    let mut server = server;
    server.kill();
    let server = Server::start(&["--data-dir", &data, "--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let fresh = HistoryClient::new(ch).get_history(query("qe", from, from + i64::from(step), step)).await.unwrap().into_inner();
    assert_eq!(fresh.points[0].segments, 0, "the closed session's buckets were removed from the store");
}

/// A session of external values alone: no reference set and no target language, only the
/// declared metrics (`send --create --external` without `--refset`). Values-only lines are
/// counted, and so is the value of a line with a hypothesis (which has nothing to be scored
/// against); the sums survive a restart. Without a reference set, a target language or an
/// external metric, creation is refused.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_session_of_values_alone_needs_no_reference_set() {
    let dir = temp_dir("external-values-only");
    demo_files(&dir);
    let (mut server, _ch, data) = durable_with_ferry(&dir).await;
    let lines: Vec<String> = (0..50).map(|i| format!("{{\"key\": \"call-{i}\", \"scores\": {{\"qe\": {}}}}}", f64::from(i) / 100.0)).chain(["{\"source\": \"The ferry leaves at nine.\", \"hypothesis\": \"Die Fähre fährt um neun.\", \"scores\": {\"qe\": 0.5}}".to_string()]).collect();
    let path = dir.join("values.jsonl");
    std::fs::write(&path, lines.join("\n") + "\n").unwrap();
    cli(&["send", "--server", &server.grpc, "--session", "qe-only", "--create", "--external", "qe:0:1:places=2", "--items", path.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let got = external(&ch, "qe-only").await;
    // 0.00 + 0.01 + ... + 0.49 = 12.25, and 0.5: 12.75 over 51 values.
    assert_eq!(got[0].count, 51);
    assert!((got[0].mean.unwrap() - 12.75 / 51.0).abs() < 1e-12, "{got:?}");
    let info = SessionsClient::new(ch.clone()).get(pb::GetSessionRequest { name: "qe-only".into() }).await.unwrap().into_inner();
    assert!(info.refset.is_empty(), "{info:?}");
    server.kill();
    let server = Server::start(&["--data-dir", &data, "--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    assert_eq!(external(&ch, "qe-only").await, got, "the sums come back after a restart");
    // Nothing to count: refused, by the server and by `send`.
    let e = SessionsClient::new(ch.clone()).create(pb::CreateSessionRequest { name: "nothing".into(), ..Default::default() }).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument);
    assert!(e.message().contains("external metrics"), "{}", e.message());
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["send", "--server", &server.grpc, "--session", "nothing", "--create", "--items", path.to_str().unwrap()]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("--external"), "{}", String::from_utf8_lossy(&out.stderr));
}
