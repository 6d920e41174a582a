//! The server under pressure that is not traffic it can score: many connections, silent
//! connections, a flood of unknown segment ids, a subscriber that stops reading, and a client
//! whose server goes away and comes back. Memory must stay bounded, nothing may be lost or
//! doubled, and the server must keep answering.
//!
//! Memory figures are resident set sizes of the real server process (Linux /proc); the bounds are
//! set far below what keeping the offending input would cost, and are stated beside each check.

mod common;

use std::io::Read;
use std::net::TcpStream;
use std::time::{Duration, Instant};

use common::{demo_files, offline_demo, temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::pb;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use mtgauge::pb::convert::stats_from_pb;
use tonic::transport::{Channel, Endpoint};

/// Longest a test waits for the server to reach a state it must reach.
const WAIT: Duration = Duration::from_secs(60);

/// Poll `f` until it is true (bounded by [`WAIT`]); `what` names the awaited state.
async fn until(what: &str, mut f: impl FnMut() -> bool) {
    let deadline = Instant::now() + WAIT;
    while !f() {
        assert!(Instant::now() < deadline, "never reached: {what}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

fn config_file(dir: &std::path::Path, limits: &str) -> String {
    let p = dir.join("serve.toml");
    std::fs::write(&p, format!("durability = \"none\"\n[limits]\n{limits}\n")).unwrap();
    p.to_str().unwrap().to_owned()
}

async fn health(ch: &Channel) -> Result<(), tonic::Status> {
    tonic_health::pb::health_client::HealthClient::new(ch.clone()).check(tonic_health::pb::HealthCheckRequest { service: String::new() }).await.map(|_| ())
}

/// Whether the server has closed this raw connection (end of file or reset), waiting at most
/// `wait` for it to do so.
fn closed_by_server(mut s: &TcpStream, wait: Duration) -> bool {
    s.set_read_timeout(Some(wait)).unwrap();
    let mut b = [0u8; 1024];
    loop {
        match s.read(&mut b) {
            Ok(0) => return true,
            // The server's HTTP/2 preface (SETTINGS) arrives on an accepted connection.
            Ok(_) => continue,
            Err(e) if matches!(e.kind(), std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut) => return false,
            Err(_) => return true,
        }
    }
}

const OPEN: &str = "mtgauge_connections_open{listener=\"grpc\"}";
const ACCEPTED: &str = "mtgauge_connections_accepted_total{listener=\"grpc\"}";
const REFUSED: &str = "mtgauge_connections_refused_total{listener=\"grpc\"}";
const IDLE_CLOSED: &str = "mtgauge_connections_idle_closed_total{listener=\"grpc\"}";

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn connections_past_the_limit_are_refused_and_memory_stays_bounded() {
    const MAX: usize = 40;
    const FLOOD: usize = 200;
    let dir = temp_dir("conn-limit");
    let server = Server::start(&["--config", &config_file(&dir, &format!("max_connections = {MAX}"))]);
    let ch = server.wait_serving().await;
    let rss_before = server.rss_kib();

    // Raw TCP connections that never speak: MAX - 1 are taken (the health channel holds one
    // place), the rest are refused. The kernel hands connections over in the order they were
    // made, so the first MAX - 1 are the accepted ones.
    let mut raw: Vec<TcpStream> = (0..FLOOD).map(|_| TcpStream::connect(server.grpc.trim_start_matches("http://")).unwrap()).collect();
    until("every connection accepted or refused", || server.sample(ACCEPTED) + server.sample(REFUSED) >= (FLOOD + 1) as f64).await;
    assert_eq!(server.sample(ACCEPTED), MAX as f64, "accepted up to the limit");
    assert_eq!(server.sample(REFUSED), (FLOOD + 1 - MAX) as f64, "refused past the limit");
    assert_eq!(server.sample(OPEN), MAX as f64);
    for (i, s) in raw.iter().enumerate() {
        if i < MAX - 1 {
            assert!(!closed_by_server(s, Duration::from_millis(100)), "accepted connection {i} stays open");
        } else {
            // Closed on arrival, or after the refusing server's few seconds.
            assert!(closed_by_server(s, WAIT), "refused connection {i} is closed by the server");
        }
    }
    assert!(server.logs.lock().unwrap().iter().any(|l| l.contains("limits.max_connections")), "the refusal is logged naming the key");

    // The open connection keeps working; a gRPC client over the limit is told why.
    health(&ch).await.expect("an accepted connection is served");
    let extra = Endpoint::from_shared(server.grpc.clone()).unwrap().connect().await.expect("the connection is taken, to be refused over gRPC");
    let refusal = health(&extra).await.expect_err("past the limit, a new connection is not served");
    assert_eq!(refusal.code(), tonic::Code::ResourceExhausted, "{refusal:?}");
    assert!(refusal.message().contains("limits.max_connections") && refusal.message().contains(&MAX.to_string()), "{refusal:?}");
    drop(extra);

    // Memory: the held connections cost little each. 256 KiB per connection is far above what
    // an idle HTTP/2 connection needs (buffers of a few KiB; common practice, from memory) and
    // bounds the whole at MAX * 256 KiB = 10 MiB, whatever the number of attempts.
    let rss_full = server.rss_kib();
    let grown = rss_full.saturating_sub(rss_before);
    eprintln!("RSS {rss_before} KiB -> {rss_full} KiB with {MAX} connections held and {} refused", FLOOD + 1 - MAX);
    assert!(grown < (MAX as u64) * 256, "memory grew {grown} KiB for {MAX} connections");

    // Closing connections gives their places back.
    raw.clear();
    until("closed connections give their places back", || server.sample(OPEN) == 1.0).await;
    let fresh: Vec<Channel> = {
        let mut v = Vec::new();
        for _ in 0..MAX - 1 {
            let c = Endpoint::from_shared(server.grpc.clone()).unwrap().connect().await.expect("connect below the limit");
            health(&c).await.expect("served below the limit");
            v.push(c);
        }
        v
    };
    assert_eq!(server.sample(OPEN), MAX as f64);
    let rss_http2 = server.rss_kib();
    eprintln!("RSS {rss_http2} KiB with {MAX} HTTP/2 connections that made a call");
    assert!(rss_http2.saturating_sub(rss_before) < (MAX as u64) * 256, "memory grew {} KiB for {MAX} HTTP/2 connections", rss_http2 - rss_before);
    drop(fresh);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn silent_connections_are_closed_and_live_idle_clients_stay() {
    // Pings every second, an acknowledgement awaited up to two (loaded CI machines answer late).
    const IDLE_SECONDS: u64 = 4;
    let dir = temp_dir("conn-idle");
    let server = Server::start(&["--config", &config_file(&dir, &format!("connection_idle_seconds = {IDLE_SECONDS}"))]);
    let probe = server.wait_serving().await;
    let raw: Vec<TcpStream> = (0..10).map(|_| TcpStream::connect(server.grpc.trim_start_matches("http://")).unwrap()).collect();
    let mut live = Vec::new();
    for _ in 0..5 {
        let c = Endpoint::from_shared(server.grpc.clone()).unwrap().connect().await.unwrap();
        health(&c).await.unwrap();
        live.push(c);
    }
    until("the ten silent connections are closed", || server.sample(IDLE_CLOSED) >= 10.0).await;
    for s in &raw {
        assert!(closed_by_server(s, Duration::from_secs(5)), "a silent connection is closed by the server");
    }
    let accepted = server.sample(ACCEPTED);
    assert_eq!(accepted, 16.0, "probe + 10 silent + 5 live");

    // Three idle periods without a call: the server's keepalive pings are answered by the
    // clients' HTTP/2 stacks, so the live connections stay open and are used again, not
    // replaced (no new connection is accepted).
    tokio::time::sleep(Duration::from_secs(3 * IDLE_SECONDS)).await;
    assert_eq!(server.sample(IDLE_CLOSED), 10.0, "no live client was closed for silence");
    for c in live.iter().chain([&probe]) {
        health(c).await.expect("a live idle client is still served");
    }
    assert_eq!(server.sample(ACCEPTED), accepted, "the live clients kept their connections");
    assert_eq!(server.sample(OPEN), 6.0);
}

async fn create_session(ch: &Channel, name: &str) {
    SessionsClient::new(ch.clone())
        .create(pb::CreateSessionRequest { name: name.into(), refset: "ferry".into(), config: None, labels: Default::default(), window: 0, if_not_exists: false, ..Default::default() })
        .await
        .expect("create session");
}

async fn report(ch: &Channel, session: &str) -> pb::ScoresReport {
    ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: session.into(), ..Default::default() }).await.unwrap().into_inner()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_flood_of_unknown_ids_and_sources_is_counted_and_keeps_nothing() {
    const BATCH: usize = 5_000;
    const WARM: usize = 20;
    const FLOOD: usize = 200;
    let dir = temp_dir("unknown-flood");
    demo_files(&dir);
    let server = Server::start(&["--durability", "none", "--refset", &format!("ferry={}", dir.join("refs.jsonl").display())]);
    let ch = server.wait_serving().await;
    create_session(&ch, "flood").await;
    let mut scoring = ScoringClient::new(ch.clone()).max_encoding_message_size(64 << 20);
    // Every key is new: a server that kept anything per unknown id or source would grow with
    // the flood. Even batches are keyed by id, odd ones by source text (the lookup normalises
    // it first).
    let batch = |b: usize| pb::ScoreBatch {
        session: "flood".into(),
        producer: "flooder".into(),
        sequence: b as u64 + 1,
        want_segment_scores: false,
        items: (0..BATCH)
            .map(|i| {
                let key = if b.is_multiple_of(2) { pb::score_item::Key::SegmentId(format!("no-such-segment-{b:06}-{i:06}")) } else { pb::score_item::Key::Source(format!("  Unknown  notice {b:06} {i:06}  ")) };
                pb::ScoreItem { key: Some(key), hypothesis: "die fähre fährt um neun".into(), ..Default::default() }
            })
            .collect(),
        ..Default::default()
    };
    let send = |from: usize, to: usize| {
        let batches: Vec<pb::ScoreBatch> = (from..to).map(batch).collect();
        let mut scoring = scoring.clone();
        async move {
            let mut acks = scoring.stream(tokio_stream::iter(batches)).await.unwrap().into_inner();
            let mut n = 0;
            while let Some(a) = acks.message().await.unwrap() {
                assert_eq!((a.scored, a.unknown, a.rejected, a.duplicate), (0, BATCH as u32, 0, false));
                assert!(a.rejections.is_empty() && a.segment_scores.is_empty(), "an ack does not echo unknown ids");
                n += 1;
            }
            assert_eq!(n, to - from);
        }
    };
    // Warm up the allocator and the buffers with the same batch shape, then measure.
    send(0, WARM).await;
    let rss_warm = server.rss_kib();
    send(WARM, WARM + FLOOD).await;
    let rss_after = server.rss_kib();
    let items = (WARM + FLOOD) * BATCH;
    let r = report(&ch, "flood").await;
    assert_eq!(r.unknown, items as u64, "every unknown item is counted");
    assert_eq!(stats_from_pb(r.cumulative.as_ref().unwrap()).segments, 0, "nothing was scored");
    assert_eq!(server.sample("mtgauge_segments_total{session=\"flood\",outcome=\"unknown\"}"), items as f64);
    // Keeping the keys alone would take FLOOD * BATCH * (about 29 bytes + a 24-byte String) = 53 MB;
    // 8 MiB leaves room for allocator noise only (two malloc arenas and a fixed mmap threshold,
    // see tests/common).
    let grown = rss_after.saturating_sub(rss_warm);
    eprintln!("RSS {rss_warm} KiB -> {rss_after} KiB over {} unknown items", FLOOD * BATCH);
    assert!(grown < 8 * 1024, "memory grew {grown} KiB over a flood of unknown ids and sources");
    // And the server still scores.
    let segs = demo_segments();
    let ok = pb::ScoreBatch { session: "flood".into(), producer: "after".into(), sequence: 1, want_segment_scores: false, items: vec![pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(segs[0].id.clone())), hypothesis: segs[0].refs[0].clone(), ..Default::default() }], ..Default::default() };
    let ack = scoring.submit(ok).await.unwrap().into_inner();
    assert_eq!(ack.scored, 1);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_subscriber_that_stops_reading_skips_reports_instead_of_queueing_them() {
    let dir = temp_dir("slow-watch");
    demo_files(&dir);
    let server = Server::start(&["--durability", "none", "--refset", &format!("ferry={}", dir.join("refs.jsonl").display())]);
    let ch = server.wait_serving().await;
    create_session(&ch, "w").await;
    // A subscriber with a tiny HTTP/2 receive window: once a report or two are in flight, the
    // server cannot send it more until it reads.
    let slow_ch = Endpoint::from_shared(server.grpc.clone()).unwrap().initial_stream_window_size(256).initial_connection_window_size(65_535).connect().await.unwrap();
    let mut slow = ScoringClient::new(slow_ch).watch_scores(pb::WatchScoresRequest { session: "w".into(), interval_seconds: 1, ..Default::default() }).await.unwrap().into_inner();
    let mut fast = ScoringClient::new(ch.clone()).watch_scores(pb::WatchScoresRequest { session: "w".into(), interval_seconds: 1, ..Default::default() }).await.unwrap().into_inner();

    // Traffic while the slow one does not read: one batch per report the fast one receives.
    let segs = demo_segments();
    let hyps = &demo_systems()[0].hypotheses;
    let mut scoring = ScoringClient::new(ch.clone());
    for b in 0..8u64 {
        let items = (0..10).map(|i| {
            let s = (b as usize * 10 + i) % segs.len();
            pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(segs[s].id.clone())), hypothesis: hyps[s].clone(), ..Default::default() }
        });
        scoring.submit(pb::ScoreBatch { session: "w".into(), producer: "p".into(), sequence: b + 1, want_segment_scores: false, items: items.collect(), ..Default::default() }).await.unwrap();
        fast.message().await.unwrap().expect("the reading subscriber gets its reports");
    }
    let final_segments = report(&ch, "w").await.cumulative.unwrap().segments;
    assert_eq!(final_segments, 80);
    until("reports skipped for the slow subscriber", || server.sample("mtgauge_watch_reports_skipped_total") >= 5.0).await;
    // Reading again: only the reports already in flight are stale, however long the stall was
    // (at most one in the client's receive window, one partly sent, one encoded and one in the
    // subscriber's channel of one); the next ones are current.
    let mut stale = 0;
    loop {
        let r = slow.message().await.unwrap().expect("the slow subscriber is still subscribed");
        if r.cumulative.unwrap().segments == final_segments {
            break;
        }
        stale += 1;
        assert!(stale <= 4, "more than 4 stale reports were kept for a subscriber that did not read");
    }
    eprintln!("{stale} stale reports, {} skipped", server.sample("mtgauge_watch_reports_skipped_total"));

    // One that goes away is dropped (counted as closed); one that stops reading for good is
    // ended after MAX_UNREAD_REPORTS reports in a row, counted as stalled, and told why.
    drop(fast);
    until("the subscriber that went away is dropped", || server.sample(r#"mtgauge_watch_subscribers_dropped_total{reason="closed"}"#) >= 1.0).await;
    until("the stalled subscriber is ended", || server.sample(r#"mtgauge_watch_subscribers_dropped_total{reason="stalled"}"#) >= 1.0).await;
    let mut stale = 0;
    let status = loop {
        match slow.message().await {
            Ok(Some(_)) => stale += 1,
            Ok(None) => panic!("the ended watch closed without saying why"),
            Err(status) => break status,
        }
        assert!(stale <= 4, "more than 4 reports after the watch was ended");
    };
    assert_eq!(status.code(), tonic::Code::ResourceExhausted, "{status:?}");
    assert!(status.message().contains(&format!("{} reports in a row were left unread", mtgauge::server::watchers::MAX_UNREAD_REPORTS)), "{}", status.message());
    assert!(matches!(slow.message().await, Ok(None) | Err(_)), "nothing follows the closing status");
}

/// `send` against a server that is down when it starts, and again in the middle of its stream:
/// it retries on UNAVAILABLE, reconnects on its own, resumes after the last acknowledged batch,
/// and the session ends with exactly the offline statistics (nothing lost, nothing doubled).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn send_rides_out_a_server_restart() {
    let dir = temp_dir("send-retry");
    demo_files(&dir);
    let data = dir.join("data");
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let args = ["--data-dir", data.to_str().unwrap(), "--refset", &refs];
    // Two passes over all demo systems, keyed by id: 1,800 items sent one per batch, so the
    // stream lasts long enough to be cut.
    let segs = demo_segments();
    let items: Vec<(String, String)> = (0..2).flat_map(|_| demo_systems()).flat_map(|s| s.hypotheses.into_iter().enumerate().map(|(i, h)| (segs[i].id.clone(), h)).collect::<Vec<_>>()).collect();
    std::fs::write(dir.join("ids.txt"), items.iter().map(|(i, _)| format!("{i}\n")).collect::<String>()).unwrap();
    std::fs::write(dir.join("hyp.txt"), items.iter().map(|(_, h)| format!("{h}\n")).collect::<String>()).unwrap();

    // Learn a free port, then take the server down before `send` starts.
    let mut first = Server::start(&args);
    first.wait_serving().await;
    let addr = first.grpc.trim_start_matches("http://").to_owned();
    first.kill();
    let p = |n: &str| dir.join(n).to_str().unwrap().to_owned();
    let mut send = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge"))
        .args(["send", "--server", &format!("http://{addr}"), "--session", "retry", "--create", "--refset", "ferry", "--hyp", &p("hyp.txt"), "--ids", &p("ids.txt"), "--batch", "1", "--json"])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    // Let it fail a few times (200 + 400 + 800 ms of backoff), then bring the server back.
    tokio::time::sleep(Duration::from_millis(1500)).await;
    assert!(send.try_wait().unwrap().is_none(), "send waits for the server instead of giving up");
    let mut second = Server::start_on(&addr, &args);
    let ch = second.wait_serving().await;

    // Cut the stream in the middle: kill the server once some, not all, batches are counted.
    let mut counted = 0;
    let deadline = Instant::now() + WAIT;
    while counted == 0 {
        if let Ok(r) = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: "retry".into(), ..Default::default() }).await {
            counted = r.into_inner().cumulative.unwrap().segments;
        }
        assert!(Instant::now() < deadline, "send never delivered");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    second.kill();
    assert!(counted < items.len() as u64, "the kill came before the end of the stream ({counted} of {} counted)", items.len());
    tokio::time::sleep(Duration::from_millis(500)).await;
    let third = Server::start_on(&addr, &args);
    let ch = third.wait_serving().await;

    let out = tokio::task::spawn_blocking(move || send.wait_with_output().unwrap()).await.unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "send failed: {stderr}");
    assert!(stderr.contains("retrying in") && stderr.contains("Unavailable"), "send says it retries while the server is down: {stderr}");
    assert!(stderr.contains("resuming in"), "send says it resumes a cut stream: {stderr}");
    let summary: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(summary["unknown"].as_u64(), Some(0));
    let r = report(&ch, "retry").await;
    assert_eq!(stats_from_pb(r.cumulative.as_ref().unwrap()), offline_demo(&items), "exactly the offline statistics: nothing lost, nothing doubled");
    eprintln!("killed after {counted} of {} items were counted; final {} segments; send said:\n{stderr}", items.len(), r.cumulative.unwrap().segments);
}

/// The scrape port takes at most 16 connections at once (src/server/admin.rs): one more is
/// closed on arrival without an answer and counted; when the silent ones go, scrapes are served.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn scrapes_past_the_limit_are_closed_on_arrival_and_counted() {
    const SCRAPE_LIMIT: usize = 16;
    let server = Server::start(&["--durability", "none"]);
    server.wait_serving().await;
    let before = server.sample("mtgauge_metrics_requests_refused_total");
    let silent: Vec<TcpStream> = (0..SCRAPE_LIMIT).map(|_| TcpStream::connect(&server.metrics).unwrap()).collect();
    // Kernel order: the silent ones are accepted first; give the accept loop time to take them.
    let extra = TcpStream::connect(&server.metrics).unwrap();
    assert!(closed_by_server(&extra, WAIT), "a connection past the scrape limit is closed");
    for s in &silent[..4] {
        assert!(!closed_by_server(s, Duration::from_millis(50)), "a connection within the limit stays open");
    }
    drop(silent);
    until("the silent connections are released", || {
        std::net::TcpStream::connect(&server.metrics).is_ok_and(|mut s| {
            use std::io::{Read, Write};
            let mut out = String::new();
            s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n").is_ok() && s.read_to_string(&mut out).is_ok() && out.starts_with("HTTP/1.1 200")
        })
    })
    .await;
    assert!(server.sample("mtgauge_metrics_requests_refused_total") >= before + 1.0, "the refusal is counted");
    assert!(server.sample("mtgauge_connections_refused_total{listener=\"metrics\"}") >= 1.0);
}
