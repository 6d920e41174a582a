//! Bad inputs over the gRPC API and the command line, table by table: each gets a clear error
//! (status code or exit code 2, and a message naming the file and line, the key or the limit)
//! and leaves existing state as it was (reference sets, sessions and their scores are compared
//! before and after every case; the command line writes no output and no file).
//!
//! Every test prints its table of "input -> error" on stderr at the end (`cargo test --test
//! bad_input -- --nocapture` shows them). Test text is invented for this file (a harbour with a
//! lighthouse and a buoy).

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::{demo_files, temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::pb;
use mtgauge::pb::ref_sets_client::RefSetsClient;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use tonic::transport::Channel;
use tonic::Code;

const BIN: &str = env!("CARGO_BIN_EXE_mtgauge");
/// Prefix of every command-line error (src/cli/mod.rs, `run`).
const ERROR_PREFIX: &str = "mtgauge: error: ";

/// Rows of the printed table.
#[derive(Default)]
struct Table {
    title: &'static str,
    rows: Vec<(String, String)>,
}

impl Table {
    fn new(title: &'static str) -> Table {
        Table { title, rows: Vec::new() }
    }
    fn add(&mut self, input: impl Into<String>, outcome: impl Into<String>) {
        // One line per outcome in the table (TOML errors span several lines).
        let outcome: String = outcome.into();
        // Lines of only the snippet's gutter or caret marks carry nothing in one line.
        let noise = |l: &str| l.chars().all(|c| matches!(c, '|' | '^' | ' '));
        let flat = outcome.lines().map(str::trim).filter(|l| !noise(l)).collect::<Vec<_>>().join(" / ");
        self.rows.push((input.into(), flat));
    }
    fn print(&self) {
        let width = self.rows.iter().map(|(i, _)| i.chars().count()).max().unwrap_or(0);
        eprintln!("\n{} ({} cases): input -> error", self.title, self.rows.len());
        for (input, outcome) in &self.rows {
            let shown: String = outcome.chars().take(300).collect();
            eprintln!("  {input:<width$} -> {shown}");
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Server state before and after
// ---------------------------------------------------------------------------------------------

/// Everything a bad request must leave as it was: every reference set, every session with its
/// counters, and every session's scores (less the report's clock).
#[derive(Debug, Clone, PartialEq)]
struct Snapshot {
    refsets: Vec<pb::RefSetInfo>,
    sessions: Vec<pb::SessionInfo>,
    scores: Vec<pb::ScoresReport>,
}

async fn snapshot(ch: &Channel) -> Snapshot {
    let mut refsets = RefSetsClient::new(ch.clone()).list(pb::ListRefSetsRequest {}).await.expect("list reference sets").into_inner().refsets;
    refsets.sort_by(|a, b| a.name.cmp(&b.name));
    let mut sessions = SessionsClient::new(ch.clone()).list(pb::ListSessionsRequest {}).await.expect("list sessions").into_inner().sessions;
    sessions.sort_by(|a, b| a.name.cmp(&b.name));
    let mut scores = Vec::new();
    for s in &sessions {
        let mut r = ScoringClient::new(ch.clone()).get_scores(pb::GetScoresRequest { session: s.name.clone(), ..Default::default() }).await.expect("get scores").into_inner();
        r.unix_time = 0;
        scores.push(r);
    }
    Snapshot { refsets, sessions, scores }
}

/// The status of a failed call: its code must be `code` and its message must hold every needle.
fn failed<T: std::fmt::Debug>(what: &str, r: Result<tonic::Response<T>, tonic::Status>, code: Code, needles: &[&str]) -> String {
    let s = match r {
        Ok(ok) => panic!("{what}: accepted, expected {code:?}: {:?}", ok.into_inner()),
        Err(s) => s,
    };
    assert_eq!(s.code(), code, "{what}: {s:?}");
    for n in needles {
        assert!(s.message().contains(n), "{what}: message {:?} does not contain {n:?}", s.message());
    }
    format!("{:?}: {}", s.code(), s.message())
}

fn chunk_header(name: &str, format: pb::RefFormat, streams: usize, has_source: bool, replace: bool) -> pb::UploadRefSetChunk {
    pb::UploadRefSetChunk {
        part: Some(pb::upload_ref_set_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: format as i32, files: streams as u32, has_source, replace })),
    }
}

/// RefSets/Upload of `files` (reference streams, then the source file when `has_source`), each
/// in chunks of at most 7 bytes so that a bad byte may sit anywhere in a chunk.
async fn upload(ch: &Channel, name: &str, format: pb::RefFormat, files: &[&[u8]], has_source: bool, replace: bool) -> Result<tonic::Response<pb::RefSetInfo>, tonic::Status> {
    let mut msgs = vec![chunk_header(name, format, files.len() - usize::from(has_source), has_source, replace)];
    for (i, f) in files.iter().enumerate() {
        for part in f.chunks(7) {
            msgs.push(pb::UploadRefSetChunk { part: Some(pb::upload_ref_set_chunk::Part::Data(pb::UploadData { file: i as u32, data: part.to_vec() })) });
        }
    }
    RefSetsClient::new(ch.clone()).upload(tokio_stream::iter(msgs)).await
}

fn load_req(name: &str, format: pb::RefFormat, paths: &[&str], source: &str, replace: bool) -> pb::LoadRefSetRequest {
    pb::LoadRefSetRequest { name: name.into(), format: format as i32, paths: paths.iter().map(|p| p.to_string()).collect(), source_path: source.into(), replace }
}

fn by_id(id: &str, hyp: &str) -> pb::ScoreItem {
    pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(id.into())), hypothesis: hyp.into(), ..Default::default() }
}

fn batch(session: &str, producer: &str, sequence: u64, items: Vec<pb::ScoreItem>) -> pb::ScoreBatch {
    pb::ScoreBatch { session: session.into(), producer: producer.into(), sequence, items, want_segment_scores: false, ..Default::default() }
}

fn create_req(name: &str, refset: &str, labels: &[(&str, &str)]) -> pb::CreateSessionRequest {
    pb::CreateSessionRequest {
        name: name.into(),
        refset: refset.into(),
        config: None,
        labels: labels.iter().map(|(k, v)| (k.to_string(), v.to_string())).collect(),
        window: 20,
        if_not_exists: false,
        ..Default::default()
    }
}

// Reference files with one defect each, written into the server's reference-set directory and
// used by the command line too.
const BAD_UTF8_PLAIN: &[u8] = b"Der Leuchtturm blinkt zweimal.\nDie Boje \xFF treibt im Hafen.\nEbbe kommt um drei.\n";
const BAD_UTF8_JSONL: &[u8] = b"{\"id\": \"kai-1\", \"refs\": [\"Der Leuchtturm blinkt.\"]}\n{\"id\": \"kai-2\", \"refs\": [\"Die Boje \xFF treibt.\"]}\n";
const GAP_JSONL: &[u8] = b"{\"id\": \"kai-1\", \"refs\": [\"Der Leuchtturm blinkt.\"]}\n\n{\"id\": \"kai-3\", \"refs\": [\"Ebbe um drei.\"]}\n";
const DUP_JSONL: &[u8] = b"{\"id\": \"kai-1\", \"refs\": [\"Der Leuchtturm blinkt.\"]}\n{\"id\": \"kai-2\", \"refs\": [\"Die Boje treibt.\"]}\n{\"id\": \"kai-1\", \"refs\": [\"Ebbe um drei.\"]}\n";
const EMPTY_LINE_PLAIN: &[u8] = b"Der Leuchtturm blinkt zweimal.\n\nEbbe kommt um drei.\n";

fn write_bad_files(dir: &Path) {
    for (name, bytes) in [("bad-utf8.txt", BAD_UTF8_PLAIN), ("bad-utf8.jsonl", BAD_UTF8_JSONL), ("gap.jsonl", GAP_JSONL), ("dup.jsonl", DUP_JSONL), ("empty-line.txt", EMPTY_LINE_PLAIN)] {
        std::fs::write(dir.join(name), bytes).unwrap();
    }
}

/// A server with the demo set "ferry" and a session "probe" that has scored a few segments.
async fn server_with_probe(tag: &str) -> (Server, Channel, PathBuf) {
    let dir = temp_dir(tag);
    demo_files(&dir);
    write_bad_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let server = Server::start(&["--refset-dir", dir.to_str().unwrap(), "--refset", &refs]);
    let ch = server.wait_serving().await;
    SessionsClient::new(ch.clone()).create(create_req("probe", "ferry", &[("model", "v7")])).await.expect("create probe");
    let segs = demo_segments();
    let hyps = &demo_systems()[0].hypotheses;
    let items = (0..5).map(|i| by_id(&segs[i].id, &hyps[i])).collect();
    let ack = ScoringClient::new(ch.clone()).submit(batch("probe", "seed", 1, items)).await.expect("seed batch").into_inner();
    assert_eq!(ack.scored, 5);
    (server, ch, dir)
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn api_bad_inputs_get_clear_statuses_and_change_nothing() {
    let (_server, ch, _dir) = server_with_probe("bad-api").await;
    let mut table = Table::new("gRPC API");
    let before = snapshot(&ch).await;
    assert_eq!(before.scores[0].cumulative.as_ref().unwrap().segments, 5, "the probe has state to lose");
    let mut refsets = RefSetsClient::new(ch.clone());
    let mut sessions = SessionsClient::new(ch.clone());
    let mut scoring = ScoringClient::new(ch.clone());
    use pb::RefFormat::{Jsonl, Plain};

    // --- Reference sets: RefSets/Load (files under --refset-dir) --------------------------------
    let loads: Vec<(&str, pb::LoadRefSetRequest, Vec<&str>)> = vec![
        ("Load plain, 0xFF on line 2", load_req("beacon", Plain, &["bad-utf8.txt"], "", false), vec!["bad-utf8.txt:2: invalid UTF-8 at byte 10 of the line"]),
        ("Load plain, good stream + 0xFF stream", load_req("beacon", Plain, &["empty-line.txt", "bad-utf8.txt"], "", false), vec!["bad-utf8.txt:2: invalid UTF-8"]),
        ("Load plain, 0xFF in the source file", load_req("beacon", Plain, &["empty-line.txt"], "bad-utf8.txt", false), vec!["bad-utf8.txt:2: invalid UTF-8"]),
        ("Load JSONL, 0xFF on line 2", load_req("beacon", Jsonl, &["bad-utf8.jsonl"], "", false), vec!["bad-utf8.jsonl:2: invalid UTF-8 at byte"]),
        ("Load JSONL, 0xFF, replace=true over 'ferry'", load_req("ferry", Jsonl, &["bad-utf8.jsonl"], "", true), vec!["bad-utf8.jsonl:2: invalid UTF-8"]),
        ("Load JSONL, empty line 2", load_req("beacon", Jsonl, &["gap.jsonl"], "", false), vec!["gap.jsonl:2: empty line"]),
        ("Load JSONL, id 'kai-1' on lines 1 and 3", load_req("beacon", Jsonl, &["dup.jsonl"], "", false), vec!["dup.jsonl", "duplicate segment id 'kai-1'", "1 and 3"]),
        ("Load JSONL, duplicate ids, replace 'ferry'", load_req("ferry", Jsonl, &["dup.jsonl"], "", true), vec!["dup.jsonl", "'kai-1'", "1 and 3"]),
    ];
    for (what, req, needles) in loads {
        let out = failed(what, refsets.load(req).await, Code::InvalidArgument, &needles);
        assert_eq!(snapshot(&ch).await, before, "{what}: state changed");
        table.add(what, out);
    }
    let out = failed("Load, unknown file", refsets.load(load_req("beacon", Plain, &["no-such-file.txt"], "", false)).await, Code::InvalidArgument, &["no-such-file.txt"]);
    table.add("Load plain, missing file", out);

    // --- Reference sets: RefSets/Upload (bytes from the client) ----------------------------------
    let good_plain: &[u8] = b"Der Leuchtturm blinkt.\nDie Boje treibt.\nEbbe um drei.\n";
    let bad_third: &[u8] = b"Der Leuchtturm blinkt.\nDie Boje treibt.\nEbbe \xFF um drei.\n";
    // (case, format, files, has_source, replace, set name, what the message must hold)
    type UploadCase<'a> = (&'a str, pb::RefFormat, Vec<&'a [u8]>, bool, bool, &'a str, Vec<&'a str>);
    let uploads: Vec<UploadCase> = vec![
        ("Upload plain, 0xFF on line 2", Plain, vec![BAD_UTF8_PLAIN], false, false, "beacon", vec!["beacon[file 0]:2: invalid UTF-8 at byte 10"]),
        ("Upload plain, 2nd stream 0xFF on line 3", Plain, vec![good_plain, bad_third], false, false, "beacon", vec!["beacon[file 1]:3: invalid UTF-8 at byte 6"]),
        ("Upload plain, source 0xFF on line 3", Plain, vec![good_plain, bad_third], true, false, "beacon", vec!["beacon[file 1]:3: invalid UTF-8"]),
        ("Upload plain, 0xFF, replace 'ferry'", Plain, vec![BAD_UTF8_PLAIN], false, true, "ferry", vec!["ferry[file 0]:2: invalid UTF-8"]),
        ("Upload plain, lone 0xFF byte", Plain, vec![b"\xFF"], false, false, "beacon", vec!["beacon[file 0]:1: invalid UTF-8 at byte 1"]),
        ("Upload JSONL, 0xFF on line 2", Jsonl, vec![BAD_UTF8_JSONL], false, false, "beacon", vec!["beacon[file 0]:2: invalid UTF-8"]),
        ("Upload JSONL, 0xFF, replace 'ferry'", Jsonl, vec![BAD_UTF8_JSONL], false, true, "ferry", vec!["ferry[file 0]:2: invalid UTF-8"]),
        ("Upload JSONL, empty line 2", Jsonl, vec![GAP_JSONL], false, false, "beacon", vec!["beacon[file 0]:2: empty line"]),
        ("Upload JSONL, white-space line 2", Jsonl, vec![b"{\"id\": 1, \"refs\": [\"x\"]}\n \t\r\n{\"id\": 2, \"refs\": [\"y\"]}\n"], false, false, "beacon", vec!["beacon[file 0]:2: empty line"]),
        ("Upload JSONL, id 'kai-1' on lines 1 and 3", Jsonl, vec![DUP_JSONL], false, false, "beacon", vec!["duplicate segment id 'kai-1'", "1 and 3"]),
        ("Upload JSONL, ids 7 and \"7\" (lines 1, 2)", Jsonl, vec![b"{\"id\": 7, \"refs\": [\"x\"]}\n{\"id\": \"7\", \"refs\": [\"y\"]}\n"], false, false, "beacon", vec!["duplicate segment id '7'", "1 and 2"]),
    ];
    for (what, format, files, has_source, replace, name, needles) in uploads {
        let out = failed(what, upload(&ch, name, format, &files, has_source, replace).await, Code::InvalidArgument, &needles);
        assert_eq!(snapshot(&ch).await, before, "{what}: state changed");
        table.add(what, out);
    }

    // Empty lines in plain references are empty references, not errors: the set loads with one
    // segment per line, and scoring against the empty one works. (Deleted again afterwards.)
    for what in ["Load plain with an empty line 2", "Upload plain with an empty line 2"] {
        let r = if what.starts_with("Load") {
            refsets.load(load_req("blank", Plain, &["empty-line.txt"], "", false)).await
        } else {
            upload(&ch, "blank", Plain, &[EMPTY_LINE_PLAIN], false, false).await
        };
        let info = r.unwrap_or_else(|s| panic!("{what}: {s:?}")).into_inner();
        assert_eq!((info.segments, info.references, info.max_refs_per_segment), (3, 3, 1), "{what}");
        sessions.create(create_req("blank-probe", "blank", &[])).await.expect("session on the set with an empty reference");
        let ack = scoring.submit(batch("blank-probe", "", 0, vec![by_id("2", "Die Boje treibt."), by_id("2", ""), by_id("3", "Ebbe kommt um drei.")])).await.unwrap().into_inner();
        assert_eq!((ack.scored, ack.unknown, ack.rejected), (3, 0, 0), "{what}: {ack:?}");
        let rep = scoring.get_scores(pb::GetScoresRequest { session: "blank-probe".into(), ..Default::default() }).await.unwrap().into_inner();
        let cum = rep.cumulative.unwrap();
        // Segment 2's reference has no token: the effective reference length is 0 + 0 + 5
        // ("Ebbe kommt um drei ." of segment 3).
        assert_eq!((cum.segments, cum.bleu.unwrap().tokens.unwrap().reference), (3, 5), "{what}");
        sessions.close(pb::CloseSessionRequest { name: "blank-probe".into() }).await.unwrap();
        refsets.delete(pb::DeleteRefSetRequest { name: "blank".into() }).await.unwrap();
        assert_eq!(snapshot(&ch).await, before, "{what}: load, score, close and delete leave the rest as it was");
        table.add(what, format!("accepted: {} segments, line 2 an empty reference (hypotheses against it score; ref length 0)", info.segments));
    }

    // --- Unknown sessions and reference sets: NOT_FOUND -----------------------------------------
    let ghost = "no session named 'ghost'";
    let out = failed("Get ghost", sessions.get(pb::GetSessionRequest { name: "ghost".into() }).await, Code::NotFound, &[ghost]);
    table.add("Sessions/Get 'ghost'", out);
    let out = failed("Reset ghost", sessions.reset(pb::ResetSessionRequest { name: "ghost".into() }).await, Code::NotFound, &[ghost]);
    table.add("Sessions/Reset 'ghost'", out);
    let out = failed("Close ghost", sessions.close(pb::CloseSessionRequest { name: "ghost".into() }).await, Code::NotFound, &[ghost]);
    table.add("Sessions/Close 'ghost'", out);
    let out = failed("GetScores ghost", scoring.get_scores(pb::GetScoresRequest { session: "ghost".into(), ..Default::default() }).await, Code::NotFound, &[ghost]);
    table.add("Scoring/GetScores 'ghost'", out);
    let out = failed("WatchScores ghost", scoring.watch_scores(pb::WatchScoresRequest { session: "ghost".into(), interval_seconds: 1, ..Default::default() }).await, Code::NotFound, &[ghost]);
    table.add("Scoring/WatchScores 'ghost'", out);
    let out = failed("Submit ghost", scoring.submit(batch("ghost", "p", 1, vec![by_id("notice-0001", "Hunde an Deck.")])).await, Code::NotFound, &[ghost]);
    table.add("Scoring/Submit to 'ghost'", out);
    for producer in ["", "lamp-7"] {
        let mut acks = scoring.stream(tokio_stream::iter(vec![batch("ghost", producer, 1, vec![by_id("notice-0001", "Hunde an Deck.")])])).await.expect("open stream").into_inner();
        let s = acks.message().await.expect_err("a batch for an unknown session ends the stream");
        assert_eq!(s.code(), Code::NotFound, "{s:?}");
        assert!(s.message().contains(ghost), "{s:?}");
        table.add(format!("Scoring/Stream to 'ghost', producer {producer:?}"), format!("{:?}: {}", s.code(), s.message()));
    }
    let out = failed("Create on unknown set", sessions.create(create_req("harbour", "no-such-set", &[])).await, Code::NotFound, &["no reference set named 'no-such-set'"]);
    table.add("Sessions/Create on refset 'no-such-set'", out);
    let out = failed("Describe unknown set", refsets.describe(pb::DescribeRefSetRequest { name: "no-such-set".into() }).await, Code::NotFound, &["no-such-set"]);
    table.add("RefSets/Describe 'no-such-set'", out);
    let out = failed("Delete unknown set", refsets.delete(pb::DeleteRefSetRequest { name: "no-such-set".into() }).await, Code::NotFound, &["no-such-set"]);
    table.add("RefSets/Delete 'no-such-set'", out);
    assert_eq!(snapshot(&ch).await, before, "unknown names changed state");

    // --- Names and labels: INVALID_ARGUMENT -----------------------------------------------------
    for name in ["quo\"te", "it's", "new\nline", "cr\rname", "tab\tname", "two words", "", "-dash-first", "ümlaut", "x/../y"] {
        let what = format!("Sessions/Create name {name:?}");
        let out = failed(&what, sessions.create(create_req(name, "ferry", &[])).await, Code::InvalidArgument, &["session name", "is not valid"]);
        assert!(!out.contains('\n'), "{what}: the message shows the name escaped: {out}");
        table.add(what, out);
    }
    for name in ["quo\"te", "new\nline"] {
        let what = format!("RefSets/Upload name {name:?}");
        let out = failed(&what, upload(&ch, name, Plain, &[good_plain], false, false).await, Code::InvalidArgument, &["reference set name", "is not valid"]);
        table.add(what, out);
    }
    for label in ["bad-label", "1model", "__meta", "session", "order", "", "mödel", "a b", "quo\"te"] {
        let what = format!("Sessions/Create label {label:?}");
        let out = failed(&what, sessions.create(create_req("harbour", "ferry", &[(label, "v1")])).await, Code::InvalidArgument, &["label name"]);
        table.add(what, out);
    }
    let out = failed("label value too long", sessions.create(create_req("harbour", "ferry", &[("model", &"v".repeat(257))])).await, Code::InvalidArgument, &["label 'model'", "longer than 256"]);
    table.add("Sessions/Create label value of 257 bytes", out);
    let many: Vec<(String, String)> = (0..17).map(|i| (format!("l{i}"), "x".into())).collect();
    let many: Vec<(&str, &str)> = many.iter().map(|(k, v)| (k.as_str(), v.as_str())).collect();
    let out = failed("17 labels", sessions.create(create_req("harbour", "ferry", &many)).await, Code::InvalidArgument, &["17 labels", "at most 16"]);
    table.add("Sessions/Create with 17 labels", out);
    // A bad redefinition of the existing session must not touch it either.
    let out = failed("probe redefined", sessions.create(create_req("probe", "ferry", &[("model", "v8")])).await, Code::AlreadyExists, &["'probe' already exists"]);
    table.add("Sessions/Create 'probe' again, other labels", out);
    assert_eq!(snapshot(&ch).await, before, "bad names or labels changed state");

    // --- 10 MB lines -----------------------------------------------------------------------------
    // A 10 MiB hypothesis fits the 16 MiB message limit and is rejected as an item, by name of
    // the limit; only the session's rejected counter moves.
    let ten_mb: String = "Die Boje treibt im Hafen. ".repeat(10 * 1024 * 1024 / 26 + 1);
    let ack = scoring.submit(batch("probe", "big", 1, vec![by_id("notice-0002", &ten_mb)])).await.expect("10 MiB hypothesis").into_inner();
    assert_eq!((ack.scored, ack.unknown, ack.rejected), (0, 0, 1), "{ack:?}");
    let reason = &ack.rejections[0].reason;
    assert!(reason.contains("limits.max_text_bytes") && reason.contains(&format!("hypothesis of {} bytes", ten_mb.len())), "{reason}");
    let mut want = before.clone();
    want.sessions[0].rejected += 1;
    want.scores[0].rejected += 1;
    assert_eq!(snapshot(&ch).await, want, "a rejected item only counts as rejected");
    table.add(format!("Submit: hypothesis of {} bytes (10 MiB)", ten_mb.len()), format!("ack scored 0, rejected 1: {reason}"));
    // The same as a source key.
    let ack = scoring.submit(batch("probe", "big", 2, vec![pb::ScoreItem { key: Some(pb::score_item::Key::Source(ten_mb.clone())), hypothesis: "Boje.".into(), ..Default::default() }])).await.unwrap().into_inner();
    assert_eq!(ack.rejected, 1, "{ack:?}");
    assert!(ack.rejections[0].reason.contains("source of") && ack.rejections[0].reason.contains("limits.max_text_bytes"), "{ack:?}");
    want.sessions[0].rejected += 1;
    want.scores[0].rejected += 1;
    assert_eq!(snapshot(&ch).await, want);
    table.add("Submit: source key of 10 MiB", format!("ack rejected 1: {}", ack.rejections[0].reason));
    // Past the 16 MiB message limit the whole request is refused before it is decoded.
    let seventeen_mb = "Ebbe. ".repeat(17 * 1024 * 1024 / 6);
    let big = batch("probe", "big", 3, vec![by_id("notice-0002", &seventeen_mb)]);
    let limit_named = |s: &tonic::Status| {
        assert_eq!(s.code(), Code::ResourceExhausted, "{s:?}");
        assert!(s.message().contains("max_message_bytes") && s.message().contains("16777216"), "{s:?}");
    };
    let s = scoring.clone().max_encoding_message_size(64 << 20).submit(big.clone()).await.expect_err("17 MiB message");
    limit_named(&s);
    table.add("Submit: message of 17 MiB (limit 16 MiB)", format!("{:?}: {}", s.code(), s.message()));
    // The same batch on the bidirectional stream: the stream ends with the same status.
    let mut streaming = scoring.clone().max_encoding_message_size(64 << 20);
    let s = match streaming.stream(tokio_stream::iter(vec![big])).await {
        Err(s) => s,
        Ok(r) => r.into_inner().message().await.expect_err("the stream ends with an error"),
    };
    limit_named(&s);
    table.add("Stream: batch of 17 MiB", format!("{:?}: {}", s.code(), s.message()));
    // And one upload chunk of 17 MiB.
    let chunks = vec![
        chunk_header("huge", pb::RefFormat::Plain, 1, false, false),
        pb::UploadRefSetChunk { part: Some(pb::upload_ref_set_chunk::Part::Data(pb::UploadData { file: 0, data: seventeen_mb.clone().into_bytes() })) },
    ];
    let s = RefSetsClient::new(ch.clone()).max_encoding_message_size(64 << 20).upload(tokio_stream::iter(chunks)).await.expect_err("17 MiB chunk");
    limit_named(&s);
    table.add("RefSets/Upload: chunk of 17 MiB", format!("{:?}: {}", s.code(), s.message()));
    assert_eq!(snapshot(&ch).await, want, "a refused message changes nothing");
    drop(ten_mb);

    // Other whole-batch refusals.
    let out = failed("empty batch", scoring.submit(batch("probe", "p", 1, vec![])).await, Code::InvalidArgument, &["empty batch"]);
    table.add("Submit: batch without items", out);
    let ack = scoring.submit(batch("probe", "p", 1, vec![pb::ScoreItem { key: None, hypothesis: "Boje.".into(), ..Default::default() }])).await.unwrap().into_inner();
    assert!(ack.rejected == 1 && ack.rejections[0].reason.contains("neither segment_id nor source"), "{ack:?}");
    want.sessions[0].rejected += 1;
    want.scores[0].rejected += 1;
    table.add("Submit: item without a key", format!("ack rejected 1: {}", ack.rejections[0].reason));
    assert_eq!(snapshot(&ch).await, want);
    table.print();
}

// ---------------------------------------------------------------------------------------------
// The command line
// ---------------------------------------------------------------------------------------------

/// Run mtgauge with a deadline (a command that should fail at once but starts serving instead
/// is killed and fails the test).
fn mtgauge(args: &[&str], timeout: Duration) -> Output {
    let mut child = Command::new(BIN).args(args).stdin(Stdio::null()).stdout(Stdio::piped()).stderr(Stdio::piped()).spawn().expect("run mtgauge");
    let deadline = Instant::now() + timeout;
    loop {
        if child.try_wait().expect("wait").is_some() {
            return child.wait_with_output().expect("output");
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            let out = child.wait_with_output().expect("output");
            panic!("mtgauge {args:?} still running after {timeout:?}; stderr: {}", String::from_utf8_lossy(&out.stderr));
        }
        std::thread::sleep(Duration::from_millis(10));
    }
}

/// A failed command: exit code 2, nothing on stdout, stderr starting with the error prefix and
/// containing every needle. Returns the error text without the prefix.
fn cli_failed(what: &str, out: &Output, needles: &[&str]) -> String {
    let err = String::from_utf8_lossy(&out.stderr).into_owned();
    assert_eq!(out.status.code(), Some(2), "{what}: {err}");
    assert!(out.stdout.is_empty(), "{what}: stdout not empty: {}", String::from_utf8_lossy(&out.stdout));
    assert!(err.starts_with(ERROR_PREFIX), "{what}: {err}");
    for n in needles {
        assert!(err.contains(n), "{what}: stderr {err:?} does not contain {n:?}");
    }
    err.trim_end().strip_prefix(ERROR_PREFIX).unwrap_or(&err).to_owned()
}

fn p(dir: &Path, name: &str) -> String {
    dir.join(name).to_str().unwrap().to_owned()
}

#[test]
fn score_command_bad_inputs() {
    let dir = temp_dir("bad-score");
    write_bad_files(&dir);
    let mut table = Table::new("mtgauge score");
    let three = "Der Leuchtturm blinkt.\nDie Boje treibt.\nEbbe um drei.\n";
    std::fs::write(dir.join("hyp3.txt"), three).unwrap();
    std::fs::write(dir.join("hyp2.txt"), "Der Leuchtturm blinkt.\nDie Boje treibt.\n").unwrap();
    std::fs::write(dir.join("ref3.txt"), three).unwrap();
    std::fs::write(dir.join("bad-hyp.txt"), b"Der Leuchtturm blinkt.\nDie Boje treibt.\nEbbe um \xC3\x28 drei.\n").unwrap();
    let per_segment = p(&dir, "segments.jsonl");
    let cases: Vec<(&str, Vec<String>, Vec<String>)> = vec![
        ("plain ref, 0xFF on line 2", vec![p(&dir, "bad-utf8.txt"), p(&dir, "hyp3.txt")], vec![format!("{}:2: invalid UTF-8 at byte 10 of the line", p(&dir, "bad-utf8.txt"))]),
        ("second plain ref, 0xFF on line 2", vec![p(&dir, "ref3.txt"), p(&dir, "bad-utf8.txt"), p(&dir, "hyp3.txt")], vec![format!("{}:2: invalid UTF-8", p(&dir, "bad-utf8.txt"))]),
        ("JSONL ref, 0xFF on line 2", vec![p(&dir, "bad-utf8.jsonl"), p(&dir, "hyp2.txt")], vec![format!("{}:2: invalid UTF-8 at byte", p(&dir, "bad-utf8.jsonl"))]),
        ("hypothesis, bad UTF-8 on line 3", vec![p(&dir, "ref3.txt"), p(&dir, "bad-hyp.txt")], vec![format!("{}:3: invalid UTF-8 at byte 9 of the line", p(&dir, "bad-hyp.txt"))]),
        ("JSONL ref, empty line 2", vec![p(&dir, "gap.jsonl"), p(&dir, "hyp3.txt")], vec![format!("{}:2: empty line", p(&dir, "gap.jsonl"))]),
        ("JSONL ref, id 'kai-1' on lines 1 and 3", vec![p(&dir, "dup.jsonl"), p(&dir, "hyp3.txt")], vec![p(&dir, "dup.jsonl"), "duplicate segment id 'kai-1'".into(), "1 and 3".into()]),
        ("hypothesis file with a line less", vec![p(&dir, "ref3.txt"), p(&dir, "hyp2.txt")], vec![format!("{}:3: file ends after 2 lines", p(&dir, "hyp2.txt"))]),
        ("missing reference file", vec![p(&dir, "nowhere.txt"), p(&dir, "hyp3.txt")], vec![format!("{}: cannot read", p(&dir, "nowhere.txt"))]),
    ];
    for (what, files, needles) in cases {
        let (refs, hyp) = files.split_at(files.len() - 1);
        let mut args = vec!["score".to_string()];
        for r in refs {
            args.extend(["--ref".into(), r.clone()]);
        }
        args.extend(["--hyp".into(), hyp[0].clone(), "--json".into(), "--per-segment".into(), per_segment.clone()]);
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        let out = mtgauge(&args, Duration::from_secs(30));
        let needles: Vec<&str> = needles.iter().map(String::as_str).collect();
        let msg = cli_failed(what, &out, &needles);
        assert_eq!(String::from_utf8_lossy(&out.stderr).lines().count(), 1, "{what}: one line on stderr");
        assert!(!Path::new(&per_segment).exists(), "{what}: a failed score wrote its --per-segment file");
        table.add(format!("score: {what}"), msg.replace(dir.to_str().unwrap(), "$DIR"));
    }

    // Empty lines in plain references: empty references, one segment each (not an error).
    let out = mtgauge(&["score", "--ref", &p(&dir, "empty-line.txt"), "--hyp", &p(&dir, "hyp3.txt"), "--json"], Duration::from_secs(30));
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["segments"], 3, "{v}");
    assert_eq!(v["refset"]["references"], 3, "{v}");
    table.add("score: plain ref with an empty line 2", format!("exit 0: {} segments, {} references (line 2 an empty reference)", v["segments"], v["refset"]["references"]));

    // A 10 MiB reference line: scored like any other (no limit applies offline), no crash.
    const UNIT: &str = "Der Leuchtturm blinkt zweimal, die Boje treibt. ";
    let reps = 10 * 1024 * 1024 / UNIT.len() + 1;
    let big_ref = UNIT.repeat(reps);
    std::fs::write(dir.join("big-ref.txt"), format!("{big_ref}\nEbbe kommt um drei.\n")).unwrap();
    std::fs::write(dir.join("big-hyp.txt"), "Der Leuchtturm blinkt zweimal.\nEbbe kommt um drei.\n").unwrap();
    let started = Instant::now();
    let out = mtgauge(&["score", "--ref", &p(&dir, "big-ref.txt"), "--hyp", &p(&dir, "big-hyp.txt"), "--json", "--metric", "bleu", "--metric", "chrf"], Duration::from_secs(60));
    assert!(out.status.success(), "10 MiB reference line: {}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    // NIST tokens: 9 per repetition ("zweimal," and "treibt." split off their punctuation), plus
    // the 5 of line 2's reference ("Ebbe kommt um drei .").
    assert_eq!(v["bleu"]["tokens"]["reference"].as_u64(), Some(reps as u64 * 9 + 5), "{}", v["bleu"]);
    assert_eq!(v["segments"], 2);
    table.add(format!("score: reference line of {} bytes", big_ref.len()), format!("exit 0 in {:.1} s: scored, reference length {} tokens", started.elapsed().as_secs_f64(), v["bleu"]["tokens"]["reference"]));
    table.print();
}

// ---------------------------------------------------------------------------------------------
// mtgauge send
// ---------------------------------------------------------------------------------------------

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn send_command_bad_inputs_change_nothing() {
    let (server, ch, dir) = server_with_probe("bad-send").await;
    let mut table = Table::new("mtgauge send");
    std::fs::write(dir.join("hyp3.txt"), "Der Leuchtturm blinkt.\nDie Boje treibt.\nEbbe um drei.\n").unwrap();
    std::fs::write(dir.join("bad-hyp.txt"), b"Der Leuchtturm blinkt.\n\xFF\xFE\n").unwrap();
    let before = snapshot(&ch).await;
    let hyp = p(&dir, "hyp3.txt");
    let url = server.grpc.clone();
    let base = |session: &str, hyp: &str| -> Vec<String> { ["send", "--server", &url, "--session", session, "--hyp", hyp].iter().map(|s| s.to_string()).collect() };
    let with = |mut v: Vec<String>, more: &[&str]| {
        v.extend(more.iter().map(|s| s.to_string()));
        v
    };
    let cases: Vec<(&str, Vec<String>, Vec<&str>)> = vec![
        ("unknown session 'ghost', no --create", base("ghost", &hyp), vec!["scoring stream: no session named 'ghost' (NotFound)"]),
        ("--batch 0", with(base("probe", &hyp), &["--batch", "0"]), vec!["--batch must be at least 1"]),
        ("--create on unknown --refset", with(base("harbour", &hyp), &["--create", "--refset", "no-such-set"]), vec!["create session: no reference set named 'no-such-set' (NotFound)"]),
        ("--create, session name with a quote", with(base("quo\"te", &hyp), &["--create", "--refset", "ferry"]), vec!["session name", "is not valid", "(InvalidArgument)"]),
        ("--create, label bad-label=x", with(base("harbour", &hyp), &["--create", "--refset", "ferry", "--label", "bad-label=x"]), vec!["label name 'bad-label' is not valid", "(InvalidArgument)"]),
        ("--label without '='", with(base("harbour", &hyp), &["--create", "--refset", "ferry", "--label", "model"]), vec!["--label model: expected KEY=VALUE"]),
        ("--create 'probe' with other labels", with(base("probe", &hyp), &["--create", "--refset", "ferry", "--label", "model=v8"]), vec!["'probe' already exists", "(AlreadyExists)"]),
    ];
    let bad = p(&dir, "bad-hyp.txt");
    let mut cases = cases;
    cases.push(("hypothesis with bad UTF-8 on line 2", base("probe", &bad), vec!["bad-hyp.txt:2: invalid UTF-8 at byte 1 of the line"]));
    for (what, args, needles) in cases {
        let out = tokio::task::spawn_blocking(move || mtgauge(&args.iter().map(String::as_str).collect::<Vec<_>>(), Duration::from_secs(30))).await.unwrap();
        let msg = cli_failed(what, &out, &needles);
        assert_eq!(snapshot(&ch).await, before, "send {what}: state changed");
        table.add(format!("send: {what}"), msg.replace(dir.to_str().unwrap(), "$DIR").replace(&url, "$URL"));
    }
    table.print();
}

// ---------------------------------------------------------------------------------------------
// mtgauge serve --config
// ---------------------------------------------------------------------------------------------

#[test]
fn serve_config_bad_inputs_exit_2_naming_the_key() {
    let dir = temp_dir("bad-config");
    let mut table = Table::new("mtgauge serve --config");
    let data_dir = dir.join("data-never-created");
    let mut cases: Vec<(String, Vec<u8>, Vec<String>)> = Vec::new();
    let keys = ["max_batch_items", "max_text_bytes", "max_sessions", "max_refsets", "max_refset_bytes", "max_total_refset_bytes", "max_streams", "max_watchers", "max_connections", "connection_idle_seconds"];
    for (i, key) in keys.iter().enumerate() {
        for v in [0i64, -5] {
            // Alone, and after valid keys (the bad one is found wherever it is).
            let body = if i % 2 == 0 { format!("[limits]\n{key} = {v}\n") } else { format!("drain_seconds = 3\n[limits]\nmax_batch_items = 10\n{key} = {v}\n") };
            cases.push((format!("[limits] {key} = {v}"), body.into_bytes(), vec![format!("config key limits.{key} must be at least 1, got {v}")]));
        }
    }
    let more: Vec<(&str, &[u8], Vec<&str>)> = vec![
        ("unknown top-level key no_such_key", b"listen = \"127.0.0.1:0\"\nno_such_key = 1\n", vec!["TOML parse error at line 2", "unknown field `no_such_key`"]),
        ("unknown [limits] key max_batch", b"[limits]\nmax_batch = 5\n", vec!["unknown field `max_batch`", "expected one of `max_batch_items`"]),
        ("unknown [[refset]] key colour", b"[[refset]]\nname = \"a\"\npaths = [\"x\"]\ncolour = \"red\"\n", vec!["TOML parse error at line 4", "unknown field `colour`"]),
        ("misspelt section [limit]", b"[limit]\nmax_batch_items = 5\n", vec!["unknown field `limit`"]),
        ("string for a number", b"[limits]\nmax_batch_items = \"many\"\n", vec!["TOML parse error at line 2", "max_batch_items", "invalid type: string \"many\""]),
        ("limit past i64", b"[limits]\nmax_streams = 99999999999999999999\n", vec!["TOML parse error at line 2", "max_streams"]),
        ("negative drain_seconds", b"drain_seconds = -1\n", vec!["TOML parse error at line 1", "drain_seconds", "invalid value"]),
        ("max_message_bytes = 10", b"max_message_bytes = 10\n", vec!["config key max_message_bytes must be at least 1024, got 10"]),
        ("log_format = \"xml\"", b"log_format = \"xml\"\n", vec!["config key log_format must be human or json, got 'xml'"]),
        ("listen = \"not an address\"", b"listen = \"not an address\"\n", vec!["TOML parse error at line 1", "listen", "invalid socket address"]),
        ("durability = \"often\"", b"durability = \"often\"\n", vec!["TOML parse error at line 1", "durability", "unknown variant `often`"]),
        ("not TOML: YAML", b"listen: 127.0.0.1:7410\nlimits:\n  max_batch_items: 5\n", vec!["TOML parse error at line 1", "expected `=`"]),
        ("not TOML: JSON", b"{\"limits\": {\"max_batch_items\": 5}}\n", vec!["TOML parse error at line 1"]),
        ("not TOML: unclosed table", b"[limits\nmax_batch_items = 5\n", vec!["TOML parse error at line 1"]),
        ("not TOML: binary bytes", b"\x00\xFF\xFEmtgauge\x01\n", vec!["stream did not contain valid UTF-8"]),
    ];
    for (what, body, needles) in more {
        cases.push((what.to_owned(), body.to_vec(), needles.into_iter().map(str::to_owned).collect()));
    }
    for (what, body, needles) in &cases {
        let cfg = dir.join("bad.toml");
        std::fs::write(&cfg, body).unwrap();
        let cfg = cfg.to_str().unwrap();
        let out = mtgauge(&["serve", "--config", cfg, "--data-dir", data_dir.to_str().unwrap(), "--listen", "127.0.0.1:0", "--metrics-listen", "127.0.0.1:0"], Duration::from_secs(10));
        let needles: Vec<&str> = needles.iter().map(String::as_str).collect();
        let msg = cli_failed(what, &out, &needles);
        // Parse errors name the file, on the first line.
        if msg.contains("TOML parse error") || msg.contains("UTF-8") {
            assert!(msg.lines().next().unwrap().starts_with(&format!("{cfg}: ")), "{what}: {msg}");
        }
        assert!(!data_dir.exists(), "{what}: a refused configuration created the data directory");
        table.add(format!("serve --config: {what}"), msg.replace(dir.to_str().unwrap(), "$DIR"));
    }
    let missing = p(&dir, "missing.toml");
    let out = mtgauge(&["serve", "--config", &missing, "--data-dir", data_dir.to_str().unwrap()], Duration::from_secs(10));
    let msg = cli_failed("missing config", &out, &[&format!("{missing}: No such file")]);
    table.add("serve --config: missing file", msg.replace(dir.to_str().unwrap(), "$DIR"));
    assert!(!data_dir.exists());
    table.print();
}
