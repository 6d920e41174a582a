//! Exactly-once across a fleet: real `mtgauge serve` replicas on loopback, producers that pick
//! their replica by the affinity rule (src/affinity.rs) through a multi-replica `--server`, a
//! replica killed with SIGKILL mid-stream and restarted on its data directory, and the summed
//! statistics of all replicas against the offline engine.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::{demo_files, demo_refset, offline_demo, temp_dir, Server};
use mtgauge::cli::demo::scenario::{demo_segments, demo_systems};
use mtgauge::metric::{CorpusStats, ScoreConfig};
use mtgauge::pb;
use mtgauge::pb::convert::stats_from_pb;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::refs::compiled::{Compiled, Scratch};

const WAIT: Duration = Duration::from_secs(120);
const SESSION: &str = "fleet";

/// `passes` passes over every demo system, keyed by segment id.
fn demo_items(passes: usize) -> Vec<(String, String)> {
    let segs = demo_segments();
    (0..passes).flat_map(|_| demo_systems()).flat_map(|s| s.hypotheses.into_iter().enumerate().map(|(i, h)| (segs[i].id.clone(), h)).collect::<Vec<_>>()).collect()
}

/// One producer: its id, its items, and its input files.
struct Producer {
    id: String,
    items: Vec<(String, String)>,
    hyp: PathBuf,
    ids: PathBuf,
}

fn producers(dir: &Path, n: usize, items: &[(String, String)]) -> Vec<Producer> {
    (0..n)
        .map(|k| {
            let mine: Vec<(String, String)> = items.iter().skip(k).step_by(n).cloned().collect();
            let (hyp, ids) = (dir.join(format!("p{k}.hyp.txt")), dir.join(format!("p{k}.ids.txt")));
            std::fs::write(&hyp, mine.iter().map(|(_, h)| format!("{h}\n")).collect::<String>()).unwrap();
            std::fs::write(&ids, mine.iter().map(|(i, _)| format!("{i}\n")).collect::<String>()).unwrap();
            Producer { id: format!("probe-worker-{k}"), items: mine, hyp, ids }
        })
        .collect()
}

fn send(server: &str, p: &Producer, extra: &[&str]) -> Child {
    Command::new(env!("CARGO_BIN_EXE_mtgauge"))
        .args(["send", "--server", server, "--session", SESSION, "--create", "--refset", "ferry", "--batch", "1", "--json", "--producer", &p.id])
        .args(["--hyp", p.hyp.to_str().unwrap(), "--ids", p.ids.to_str().unwrap()])
        .args(extra)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

fn finished(child: Child) -> (serde_json::Value, String) {
    let out: Output = child.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert!(out.status.success(), "send failed: {stderr}");
    (serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("send printed no JSON ({e}): {stderr}")), stderr)
}

async fn cumulative(server: &Server) -> Option<pb::Totals> {
    let ch = server.channel().await;
    ScoringClient::new(ch).get_scores(pb::GetScoresRequest { session: SESSION.into(), ..Default::default() }).await.ok().and_then(|r| r.into_inner().cumulative)
}

/// `n` replicas named r0.. with the fleet declared, each on its own data directory.
struct Fleet {
    names: Vec<String>,
    /// The names joined, as `--fleet` takes them.
    joined: String,
    data: Vec<PathBuf>,
    refs: String,
    servers: Vec<Server>,
}

impl Fleet {
    async fn start(dir: &Path, n: usize) -> Fleet {
        let names: Vec<String> = (0..n).map(|i| format!("r{i}")).collect();
        let data: Vec<PathBuf> = (0..n).map(|i| dir.join(format!("data-{i}"))).collect();
        let refs = format!("ferry={}", dir.join("refs.jsonl").display());
        let joined = names.join(",");
        let mut f = Fleet { names, joined, data, refs, servers: Vec::new() };
        for i in 0..n {
            let s = Server::start(&f.args(i));
            s.wait_serving().await;
            f.servers.push(s);
        }
        f
    }

    fn args(&self, i: usize) -> Vec<&str> {
        vec!["--data-dir", self.data[i].to_str().unwrap(), "--refset", &self.refs, "--replica-name", &self.names[i], "--fleet", &self.joined]
    }

    fn urls(&self) -> String {
        self.servers.iter().map(|s| s.grpc.clone()).collect::<Vec<_>>().join(",")
    }

    /// Kill replica i with SIGKILL and start it again where it was, on its data directory.
    async fn restart(&mut self, i: usize, after: Duration) {
        self.servers[i].kill();
        tokio::time::sleep(after).await;
        let addr = self.servers[i].grpc.trim_start_matches("http://").to_owned();
        let s = Server::start_on(&addr, &self.args(i));
        s.wait_serving().await;
        self.servers[i] = s;
    }

    /// The cumulative statistics of every replica summed.
    async fn sum(&self) -> CorpusStats {
        let mut sum = CorpusStats::default();
        for s in &self.servers {
            if let Some(t) = cumulative(s).await {
                sum += stats_from_pb(&t);
            }
        }
        sum
    }
}

/// Three replicas, 16 producers streaming through the multi-replica `--server`; one replica is
/// killed with SIGKILL in the middle of its producers' streams and restarted on its store; then
/// every producer runs its send again. Each producer reaches the replica the rule names, the
/// second run counts nothing, and the replicas' statistics summed equal the offline engine's
/// exactly: nothing lost, nothing counted twice.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sixteen_producers_survive_a_killed_replica_and_count_everything_once() {
    let dir = temp_dir("fleet-kill");
    demo_files(&dir);
    let items = demo_items(4);
    let ps = producers(&dir, 16, &items);
    let mut fleet = Fleet::start(&dir, 3).await;
    let urls = fleet.urls();
    let owner = |p: &Producer| mtgauge::affinity::owner(&p.id, &fleet.names).unwrap().to_owned();
    let owners: Vec<String> = ps.iter().map(owner).collect();
    let victim = 1usize;
    let victims_items: usize = ps.iter().zip(&owners).filter(|(_, o)| **o == fleet.names[victim]).map(|(p, _)| p.items.len()).sum();
    assert!(victims_items > 0, "no producer belongs to {}", fleet.names[victim]);

    let children: Vec<Child> = ps.iter().map(|p| send(&urls, p, &["--replica-wait", "60"])).collect();
    // Kill the victim once it has counted some, not all, of its producers' items.
    let deadline = Instant::now() + WAIT;
    let counted = loop {
        let n = cumulative(&fleet.servers[victim]).await.map_or(0, |t| t.segments);
        if n > 0 {
            break n;
        }
        assert!(Instant::now() < deadline, "the victim never counted anything");
        tokio::time::sleep(Duration::from_millis(5)).await;
    };
    fleet.restart(victim, Duration::from_millis(800)).await;
    assert!(counted < victims_items as u64, "the kill came before the end of the victim's streams ({counted} of {victims_items})");

    let mut retried = 0;
    for ((child, p), o) in children.into_iter().zip(&ps).zip(&owners) {
        let (summary, stderr) = finished(child);
        assert_eq!(summary["replica"].as_str(), Some(o.as_str()), "{} went to its replica: {stderr}", p.id);
        // One item per batch: batches the victim had committed but not acknowledged when it
        // died are acknowledged as already counted when they are sent again.
        let (scored, dup) = (summary["scored"].as_u64().unwrap(), summary["duplicate_batches"].as_u64().unwrap());
        assert_eq!(scored + dup, p.items.len() as u64, "{}: {summary}", p.id);
        retried += stderr.contains("resuming in") as usize;
    }
    let expected = offline_demo(&items);
    assert_eq!(fleet.sum().await, expected, "the replicas' sums equal the offline statistics exactly");

    // Every producer runs its send again: every batch is acknowledged as already counted.
    let again: Vec<Child> = ps.iter().map(|p| send(&urls, p, &[])).collect();
    for (child, p) in again.into_iter().zip(&ps) {
        let (summary, _) = finished(child);
        assert_eq!((summary["scored"].as_u64(), summary["duplicate_batches"].as_u64()), (Some(0), Some(p.items.len() as u64)), "{}: {summary}", p.id);
    }
    assert_eq!(fleet.sum().await, expected, "the second run counted nothing");

    // Fleet-wide status: the replicas' statistics and replicate sums added up equal one
    // process's, intervals included (the replicate sums of every item, keyed by segment id).
    let status = |extra: &[&str]| Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["status", "--server", &urls, "--session", SESSION, "--json"]).args(extra).output().unwrap();
    let out = status(&[]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["fleet"]["answered"].as_array().map(Vec::len), Some(3), "{}", v["fleet"]);
    assert_eq!(v["fleet"]["partial"], false);
    let config = ScoreConfig::default();
    let want = mtgauge::report::stats_json(&expected, &config);
    let compiled = Compiled::build(demo_refset(), config.clone());
    let index: std::collections::HashMap<String, usize> = demo_segments().into_iter().enumerate().map(|(i, s)| (s.id, i)).collect();
    let mut scratch = Scratch::default();
    let stats: Vec<_> = items.iter().map(|(id, h)| compiled.score_segment(index[id], h, &mut scratch)).collect();
    let keys: Vec<u64> = items.iter().map(|(id, _)| mtgauge::metric::resample::segment_key(id.as_bytes())).collect();
    let one = mtgauge::metric::resample::accumulate(&config, mtgauge::metric::resample::DAEMON_RESAMPLES, mtgauge::metric::resample::DEFAULT_RESAMPLE_SEED, &keys, &stats, 1);
    for metric in config.metric_list() {
        let mut got = v["cumulative"][metric.name()].clone();
        let interval = got.as_object_mut().unwrap().remove("interval").expect("a fleet interval");
        assert_eq!(got, want[metric.name()], "{} statistics of the fleet", metric.name());
        let i = one.interval(metric, 0.95).unwrap();
        assert_eq!((interval["low"].as_f64(), interval["high"].as_f64()), (Some(i.low), Some(i.high)), "{} interval of the fleet", metric.name());
    }
    // One replica down: no fleet figure, unless a partial one is asked for.
    fleet.servers[2].kill();
    let out = status(&[]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success() && err.contains("2 of 3 replicas answered") && err.contains("--partial"), "{err}");
    let out = status(&["--partial"]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["fleet"]["partial"], true);
    let r2: usize = ps.iter().zip(&owners).filter(|(_, o)| **o == "r2").map(|(p, _)| p.items.len()).sum();
    assert_eq!(v["cumulative"]["segments"].as_u64().or(v["cumulative"]["bleu"]["segments"].as_u64()).map(|n| n as usize), Some(items.len() - r2), "{}", v["cumulative"]);
    let per_replica: BTreeMap<&str, usize> = owners.iter().fold(BTreeMap::new(), |mut m, o| {
        *m.entry(o.as_str()).or_default() += 1;
        m
    });
    eprintln!("16 producers over 3 replicas {per_replica:?}; {} items; {} killed after {counted} of its {victims_items} items; {retried} producers resumed; summed statistics equal offline ({} segments)", items.len(), fleet.names[victim], expected.segments);
}

/// The same with failover: the victim stays down past the producers' wait, so its producers
/// go on with their next replica. What that costs: batches the victim applied but did not
/// acknowledge are counted again on the other replica. The test reports the doubled count and
/// checks that nothing was lost.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn with_failover_nothing_is_lost_and_the_doubled_count_is_reported() {
    let dir = temp_dir("fleet-failover");
    demo_files(&dir);
    let items = demo_items(2);
    let ps = producers(&dir, 8, &items);
    let mut fleet = Fleet::start(&dir, 2).await;
    let urls = fleet.urls();
    let victim = (0..2).find(|&v| ps.iter().any(|p| mtgauge::affinity::owner(&p.id, &fleet.names) == Some(&fleet.names[v]))).unwrap();
    let children: Vec<Child> = ps.iter().map(|p| send(&urls, p, &["--replica-wait", "2", "--failover"])).collect();
    let deadline = Instant::now() + WAIT;
    while cumulative(&fleet.servers[victim]).await.map_or(0, |t| t.segments) == 0 {
        assert!(Instant::now() < deadline, "the victim never counted anything");
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    fleet.servers[victim].kill();
    let mut failed_over = 0;
    let results: Vec<(serde_json::Value, String)> = children.into_iter().map(finished).collect();
    for (summary, stderr) in &results {
        failed_over += stderr.contains("failing over to replica") as usize;
        assert_eq!(summary["duplicate_batches"].as_u64(), Some(0), "{summary}");
    }
    assert!(failed_over > 0, "some producer failed over");
    // Bring the victim back to read what it had counted.
    let addr = fleet.servers[victim].grpc.trim_start_matches("http://").to_owned();
    fleet.servers[victim] = Server::start_on(&addr, &fleet.args(victim));
    fleet.servers[victim].wait_serving().await;
    let expected = offline_demo(&items);
    let sum = fleet.sum().await;
    assert!(sum.segments >= expected.segments, "nothing lost: {} of {} segments", sum.segments, expected.segments);
    let doubled = sum.segments - expected.segments;
    // At most what was in flight on the victim's streams when it died: each producer sends one
    // item per batch and the server answers in order, so a stream has at most the batches it
    // pipelined (common practice bound: the whole remainder of the failed-over producers).
    let moved: usize = ps.iter().filter(|p| mtgauge::affinity::owner(&p.id, &fleet.names) == Some(&fleet.names[victim])).map(|p| p.items.len()).sum();
    assert!(doubled as usize <= moved, "{doubled} doubled of {moved} moved items");
    eprintln!("failover: {failed_over} producers failed over from {}; {} segments counted for {} sent: {doubled} counted twice", fleet.names[victim], sum.segments, expected.segments);
}

/// The server's side of the rule: Identify names the replica and its fleet; a batch that
/// declares the fleet is refused (FAILED_PRECONDITION, naming the rule) by a replica its
/// producer does not belong to, and accepted by the one it does; a batch that declares nothing
/// is accepted anywhere (one server, older clients).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_misrouted_batch_is_refused_naming_the_rule() {
    let dir = temp_dir("fleet-refuse");
    demo_files(&dir);
    let fleet = Fleet::start(&dir, 2).await;
    let names = fleet.names.clone();
    let producer = (0..).map(|k| format!("probe-worker-{k}")).find(|p| mtgauge::affinity::owner(p, &names) == Some("r1")).unwrap();
    let seg = demo_segments().remove(0);
    let batch = |seq: u64, declared: Vec<String>| pb::ScoreBatch { session: SESSION.into(), producer: producer.clone(), sequence: seq, items: vec![pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId(seg.id.clone())), hypothesis: "Die Fähre fährt um neun.".into(), ..Default::default() }], replicas: declared, ..Default::default() };
    for s in &fleet.servers {
        let ch = s.channel().await;
        mtgauge::pb::sessions_client::SessionsClient::new(ch).create(pb::CreateSessionRequest { name: SESSION.into(), refset: "ferry".into(), ..Default::default() }).await.unwrap();
    }
    let (r0, r1) = (ScoringClient::new(fleet.servers[0].channel().await), ScoringClient::new(fleet.servers[1].channel().await));
    let id = r0.clone().identify(pb::IdentifyRequest {}).await.unwrap().into_inner();
    assert_eq!((id.replica.as_str(), id.fleet.clone()), ("r0", names.clone()));
    let e = r0.clone().submit(batch(1, names.clone())).await.unwrap_err();
    assert_eq!(e.code(), tonic::Code::FailedPrecondition, "{e:?}");
    assert!(e.message().contains(&format!("producer '{producer}' belongs to replica r1, not to this replica (r0)")) && e.message().contains("Producer affinity"), "{}", e.message());
    let ack = r1.clone().submit(batch(1, names.clone())).await.unwrap().into_inner();
    assert_eq!((ack.scored, ack.duplicate), (1, false));
    let e = r1.clone().submit(batch(2, vec!["r1".into()])).await.unwrap_err();
    assert!(e.code() == tonic::Code::FailedPrecondition && e.message().contains("this replica's fleet is [r0, r1]"), "{e:?}");
    let ack = r0.clone().submit(batch(1, Vec::new())).await.unwrap().into_inner();
    assert_eq!(ack.scored, 1, "nothing declared: accepted as before");
}

/// `--server` as one name that resolves to every replica: inside a mount namespace the test
/// makes (util-linux unshare, as root), /etc/hosts gives fleet.mtgauge.test two loopback
/// addresses, one replica listening on each with the same port.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_name_that_resolves_to_every_replica_routes_each_producer_to_its_own() {
    let probe = Command::new("unshare").args(["--mount", "true"]).output();
    if !probe.is_ok_and(|o| o.status.success()) {
        assert!(std::env::var_os("CI").is_none(), "CI runs as root with unshare: this test must run there");
        eprintln!("skipped: `unshare --mount` is not allowed here (run as root)");
        return;
    }
    let dir = temp_dir("fleet-dns");
    demo_files(&dir);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let port = std::net::TcpListener::bind("127.0.0.2:0").unwrap().local_addr().unwrap().port();
    let names = ["r0", "r1"];
    let mut servers = Vec::new();
    for (i, name) in names.iter().enumerate() {
        let data = dir.join(format!("data-{i}"));
        let s = Server::start_on(&format!("127.0.0.{}:{port}", i + 2), &["--data-dir", data.to_str().unwrap(), "--refset", &refs, "--replica-name", name, "--fleet", "r0,r1"]);
        s.wait_serving().await;
        servers.push(s);
    }
    let hosts = dir.join("hosts");
    std::fs::write(&hosts, "127.0.0.1 localhost\n127.0.0.2 fleet.mtgauge.test\n127.0.0.3 fleet.mtgauge.test\n").unwrap();
    let items = demo_items(1);
    let ps = producers(&dir, 6, &items);
    let fleet_names: Vec<String> = names.iter().map(|s| s.to_string()).collect();
    for p in &ps {
        let script = format!(
            "mount --bind {} /etc/hosts && exec {} send --server http://fleet.mtgauge.test:{port} --session {SESSION} --create --refset ferry --json --producer {} --hyp {} --ids {}",
            hosts.display(), env!("CARGO_BIN_EXE_mtgauge"), p.id, p.hyp.display(), p.ids.display()
        );
        let child = Command::new("unshare").args(["--mount", "sh", "-c", &script]).stdout(Stdio::piped()).stderr(Stdio::piped()).spawn().unwrap();
        let (summary, stderr) = finished(child);
        let owner = mtgauge::affinity::owner(&p.id, &fleet_names).unwrap();
        assert_eq!(summary["replica"].as_str(), Some(owner), "{}: {stderr}", p.id);
    }
    let mut sum = CorpusStats::default();
    for s in &servers {
        sum += stats_from_pb(&cumulative(s).await.unwrap_or_default());
    }
    assert_eq!(sum, offline_demo(&items), "each item counted once, on its producer's replica");

    // One unnamed server reached under a name with two addresses (as `localhost` can be ::1 and
    // 127.0.0.1): a lone server, used as the URL says, not a fleet.
    let lone = Server::start_on("0.0.0.0:0", &["--durability", "none", "--refset", &refs]);
    lone.wait_serving().await;
    let lone_port = lone.grpc.rsplit(':').next().unwrap().to_owned();
    std::fs::write(&hosts, "127.0.0.1 localhost\n127.0.0.2 lone.mtgauge.test\n127.0.0.3 lone.mtgauge.test\n").unwrap();
    let p = &ps[0];
    let script = format!(
        "mount --bind {} /etc/hosts && exec {} send --server http://lone.mtgauge.test:{lone_port} --session {SESSION} --create --refset ferry --json --producer {} --hyp {} --ids {}",
        hosts.display(), env!("CARGO_BIN_EXE_mtgauge"), p.id, p.hyp.display(), p.ids.display()
    );
    let child = Command::new("unshare").args(["--mount", "sh", "-c", &script]).stdout(Stdio::piped()).stderr(Stdio::piped()).spawn().unwrap();
    let (summary, stderr) = finished(child);
    assert_eq!((summary["replica"].clone(), summary["scored"].as_u64()), (serde_json::Value::Null, Some(p.items.len() as u64)), "{stderr}");
}

/// `send` of one producer's items to `session`.
fn send_to(server: &str, session: &str, p: &Producer) -> Child {
    Command::new(env!("CARGO_BIN_EXE_mtgauge"))
        .args(["send", "--server", server, "--session", session, "--create", "--refset", "ferry", "--batch", "7", "--json", "--producer", &p.id])
        .args(["--hyp", p.hyp.to_str().unwrap(), "--ids", p.ids.to_str().unwrap()])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

fn cli(args: &[&str]) -> (bool, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(args).output().unwrap();
    (out.status.success(), String::from_utf8_lossy(&out.stdout).into_owned(), String::from_utf8_lossy(&out.stderr).into_owned())
}

/// The chart of a report file: the nested chart, without the title and footer (which name the
/// replicas).
fn chart_of(svg: &str) -> &str {
    let (a, b) = (svg.find("x=\"20\" y=\"50\" width=\"640\"").expect("a chart"), svg.find("<text class=\"foot\"").expect("a footer"));
    &svg[a..b]
}

/// Fleet-wide `compare` and `report`: two sessions (two demo systems) streamed by 8 producers
/// each over two replicas, and the same items sent to one process. The fleet comparison (the
/// replicas' recent windows joined by segment) equals the one process's Compare exactly, and
/// the fleet report's chart (each step's statistics and replicate sums added over the
/// replicas) is the one process's chart, point for point and band for band. With a replica
/// down, both refuse unless --partial.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn fleet_compare_and_report_equal_one_process() {
    let dir = temp_dir("fleet-compare");
    demo_files(&dir);
    let segs = demo_segments();
    let systems = demo_systems();
    let items = |k: usize| -> Vec<(String, String)> { systems[k].hypotheses.iter().enumerate().map(|(i, h)| (segs[i].id.clone(), h.clone())).collect() };
    let (a_items, b_items) = (items(0), items(systems.len() - 1));
    let (da, db) = (dir.join("a"), dir.join("b"));
    std::fs::create_dir_all(&da).unwrap();
    std::fs::create_dir_all(&db).unwrap();
    let (pa, pb_) = (producers(&da, 8, &a_items), producers(&db, 8, &b_items));
    let mut fleet = Fleet::start(&dir, 2).await;
    let urls = fleet.urls();
    let one = Server::start(&["--refset", &fleet.refs]);
    one.wait_serving().await;
    for (session, ps) in [("fleet-a", &pa), ("fleet-b", &pb_)] {
        let children: Vec<Child> = ps.iter().map(|p| send_to(&urls, session, p)).chain(ps.iter().map(|p| send_to(&one.grpc, session, p))).collect();
        for c in children {
            finished(c);
        }
    }
    // Both replicas hold part of each session (else the test would prove nothing).
    let owners: std::collections::BTreeSet<&str> = pa.iter().map(|p| mtgauge::affinity::owner(&p.id, &fleet.names).unwrap()).collect();
    assert_eq!(owners.len(), 2, "the producers of a session are spread over both replicas");

    let compare = |server: &str, extra: &[&str]| cli(&[&["compare", "--server", server, "--session", "fleet-a", "--session", "fleet-b", "--json", "--trials", "2000"], extra].concat());
    let (ok, fleet_out, err) = compare(&urls, &[]);
    assert!(ok, "{err}");
    let (ok, one_out, err) = compare(&one.grpc, &[]);
    assert!(ok, "{err}");
    let (f, o): (serde_json::Value, serde_json::Value) = (serde_json::from_str(&fleet_out).unwrap(), serde_json::from_str(&one_out).unwrap());
    assert_eq!(f["fleet"]["answered"].as_array().map(Vec::len), Some(2), "{}", f["fleet"]);
    assert_eq!(f["fleet"]["on_several_replicas"], serde_json::json!({"a": 0, "b": 0}));
    assert!(f["segments"].as_u64().unwrap() > 0);
    for key in ["segments", "metrics", "recent", "refset", "config"] {
        assert_eq!(f[key], o[key], "fleet and one process: {key}");
    }

    // Reports end at the same moment, so both have the same steps.
    let until = (std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_secs() + 60).to_string();
    let report = |server: &str, out: &Path, extra: &[&str]| cli(&[&["report", "--server", server, "--session", "fleet-a", "--since", "2h", "--step", "1m", "--until", &until, "--out", out.to_str().unwrap()], extra].concat());
    let (fr, or) = (dir.join("fleet.svg"), dir.join("one.svg"));
    let (ok, _, err) = report(&urls, &fr, &[]);
    assert!(ok, "{err}");
    let (ok, _, err) = report(&one.grpc, &or, &[]);
    assert!(ok, "{err}");
    let (fs, os) = (std::fs::read_to_string(&fr).unwrap(), std::fs::read_to_string(&or).unwrap());
    assert!(fs.contains("fleet: 2 of 2 replicas answered"), "the footer names the replicas summed");
    assert!(chart_of(&fs).contains("class=\"pt\"") && chart_of(&fs).contains("class=\"band\""), "points and a band: {}", chart_of(&fs));
    assert_eq!(chart_of(&fs), chart_of(&os), "the fleet chart is the one process's");

    // One replica down: both refuse, and --partial shows what the other holds.
    fleet.servers[1].kill();
    let (ok, _, err) = compare(&urls, &[]);
    assert!(!ok && err.contains("1 of 2 replicas answered") && err.contains("--partial"), "{err}");
    let (ok, out, err) = compare(&urls, &["--partial"]);
    assert!(ok, "{err}");
    let p: serde_json::Value = serde_json::from_str(&out).unwrap();
    assert_eq!(p["fleet"]["partial"], true);
    assert!(p["segments"].as_u64() < f["segments"].as_u64(), "partial holds fewer segments: {}", p["segments"]);
    let (ok, _, err) = report(&urls, &fr, &[]);
    assert!(!ok && err.contains("1 of 2 replicas answered") && err.contains("--partial"), "{err}");
    let (ok, _, err) = report(&urls, &fr, &["--partial"]);
    assert!(ok, "{err}");
    assert!(std::fs::read_to_string(&fr).unwrap().contains("PARTIAL"), "the partial report says so");
    eprintln!("fleet compare over {} segments equals one process; fleet report chart equals one process's", f["segments"]);
}
