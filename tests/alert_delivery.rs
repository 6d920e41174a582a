//! Alert delivery against a small HTTP receiver written here (127.0.0.1, port 0) that answers
//! each request with a status chosen by the test, and, with `--ignored` and
//! MTGAUGE_ALERTMANAGER_URL set, against a real Alertmanager (tests/python/test_alertmanager.py
//! starts one and runs `real_alertmanager`).
//!
//! Outside facts used here, each from memory: Alertmanager's API v2 takes `POST /api/v2/alerts`
//! with a JSON array of objects with `labels`, `annotations`, `startsAt`, `endsAt` and
//! `generatorURL`, and lists alerts at `GET /api/v2/alerts` (accepting `filter=label="value"`),
//! each with `status.state` ("active", "suppressed", "unprocessed"), leaving resolved ones out.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime};

use mtgauge::alerts::deliver::{AlertEvent, Delivery, DeliveryConfig, DeliveryHandle, Target, TargetKind, TargetStats};
use tokio::io::{AsyncRead, AsyncReadExt, AsyncWrite, AsyncWriteExt};
use tokio::net::TcpListener;
use tokio::sync::Notify;

/// One request as the receiver read it.
#[derive(Debug, Clone)]
struct Received {
    method: String,
    path: String,
    headers: BTreeMap<String, String>,
    body: Vec<u8>,
}

impl Received {
    fn json(&self) -> serde_json::Value {
        serde_json::from_slice(&self.body).unwrap_or_else(|e| panic!("body is no JSON ({e}): {:?}", String::from_utf8_lossy(&self.body)))
    }
}

/// Answers requests in order with the scripted (status, body) pairs, then with 200; request
/// number `hold` (0-based) is answered only after `release` is notified.
struct Receiver {
    url: String,
    got: Arc<Mutex<Vec<Received>>>,
    arrived: Arc<Notify>,
    release: Arc<Notify>,
}

impl Receiver {
    async fn start(script: Vec<(u16, &'static str)>, hold: Option<usize>) -> Receiver {
        Self::start_with(script, hold, None).await
    }

    async fn start_with(script: Vec<(u16, &'static str)>, hold: Option<usize>, tls: Option<tokio_rustls::TlsAcceptor>) -> Receiver {
        let listener = TcpListener::bind("127.0.0.1:0").await.unwrap();
        let addr = listener.local_addr().unwrap();
        let got = Arc::new(Mutex::new(Vec::new()));
        let arrived = Arc::new(Notify::new());
        let release = Arc::new(Notify::new());
        let (g, a, r) = (got.clone(), arrived.clone(), release.clone());
        let scheme = if tls.is_some() { "https" } else { "http" };
        tokio::spawn(async move {
            let mut n = 0usize;
            loop {
                let Ok((tcp, _)) = listener.accept().await else { return };
                let (status, body) = script.get(n).copied().unwrap_or((200, ""));
                let held = hold == Some(n);
                n += 1;
                let (g, a, r) = (g.clone(), a.clone(), r.clone());
                let tls = tls.clone();
                tokio::spawn(async move {
                    match tls {
                        None => serve_one(tcp, status, body, held, g, a, r).await,
                        Some(acc) => {
                            if let Ok(s) = acc.accept(tcp).await {
                                serve_one(s, status, body, held, g, a, r).await
                            }
                        }
                    }
                });
            }
        });
        Receiver { url: format!("{scheme}://{addr}"), got, arrived, release }
    }

    fn requests(&self) -> Vec<Received> {
        self.got.lock().unwrap().clone()
    }
}

async fn serve_one<S: AsyncRead + AsyncWrite + Unpin>(mut s: S, status: u16, body: &str, held: bool, got: Arc<Mutex<Vec<Received>>>, arrived: Arc<Notify>, release: Arc<Notify>) {
    let mut buf = Vec::new();
    let mut chunk = [0u8; 4096];
    let head_end = loop {
        if let Some(i) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            break i + 4;
        }
        match s.read(&mut chunk).await {
            Ok(0) | Err(_) => return,
            Ok(k) => buf.extend_from_slice(&chunk[..k]),
        }
    };
    let head = String::from_utf8_lossy(&buf[..head_end]).to_string();
    let mut lines = head.split("\r\n");
    let mut first = lines.next().unwrap_or("").split(' ');
    let (method, path) = (first.next().unwrap_or("").to_owned(), first.next().unwrap_or("").to_owned());
    let headers: BTreeMap<String, String> = lines.filter_map(|l| l.split_once(':')).map(|(k, v)| (k.trim().to_ascii_lowercase(), v.trim().to_owned())).collect();
    let len: usize = headers.get("content-length").and_then(|v| v.parse().ok()).unwrap_or(0);
    while buf.len() < head_end + len {
        match s.read(&mut chunk).await {
            Ok(0) | Err(_) => return,
            Ok(k) => buf.extend_from_slice(&chunk[..k]),
        }
    }
    got.lock().unwrap().push(Received { method, path, headers, body: buf[head_end..head_end + len].to_vec() });
    arrived.notify_one();
    if held {
        release.notified().await;
    }
    let answer = format!("HTTP/1.1 {status} Scripted\r\nContent-Type: text/plain\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}", body.len());
    let _ = s.write_all(answer.as_bytes()).await;
    let _ = s.shutdown().await;
}

fn event(alertname: &str, firing: bool) -> AlertEvent {
    let mut labels = BTreeMap::new();
    labels.insert("alertname".to_owned(), alertname.to_owned());
    labels.insert("session".to_owned(), "ferry-en-de.model-v7".to_owned());
    let mut annotations = BTreeMap::new();
    annotations.insert("summary".to_owned(), "recent BLEU of the Kiel-Oslo crossing announcements fell below 28".to_owned());
    let starts_at = SystemTime::now() - Duration::from_secs(120);
    AlertEvent {
        labels,
        annotations,
        starts_at,
        ends_at: if firing { None } else { Some(SystemTime::now()) },
        generator_url: "http://mtgauge.ferry.test:9464/alerts".to_owned(),
    }
}

fn target(kind: TargetKind, url: &str) -> Target {
    Target { kind, url: url.to_owned(), bearer_token: None, ca_file: None }
}

fn fast(targets: Vec<Target>) -> DeliveryConfig {
    let mut c = DeliveryConfig::new(targets);
    c.initial_backoff = Duration::from_millis(20);
    c.max_backoff = Duration::from_millis(80);
    c.timeout = Duration::from_secs(5);
    c
}

/// Wait (at most 10 s) until the first target's counts satisfy `done`.
async fn wait_stats(h: &DeliveryHandle, done: impl Fn(&TargetStats) -> bool) -> TargetStats {
    let t0 = Instant::now();
    loop {
        let s = h.stats().remove(0);
        if done(&s) {
            return s;
        }
        assert!(t0.elapsed() < Duration::from_secs(10), "counts did not get there: {s:?}");
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
}

/// Is `s` an RFC 3339 UTC time as `YYYY-MM-DDTHH:MM:SS[.fff]Z`?
fn is_rfc3339_utc(s: &str) -> bool {
    let b = s.as_bytes();
    let digits = |r: std::ops::Range<usize>| r.clone().all(|i| b.get(i).is_some_and(|c| c.is_ascii_digit()));
    b.len() >= 20
        && digits(0..4)
        && b[4] == b'-'
        && digits(5..7)
        && b[7] == b'-'
        && digits(8..10)
        && b[10] == b'T'
        && digits(11..13)
        && b[13] == b':'
        && digits(14..16)
        && b[16] == b':'
        && digits(17..19)
        && s.ends_with('Z')
        && (b.len() == 20 || (b[19] == b'.' && digits(20..b.len() - 1)))
}

#[tokio::test]
async fn alertmanager_shape_bearer_token_and_flush_at_shutdown() {
    let rx = Receiver::start(vec![], None).await;
    let mut t = target(TargetKind::Alertmanager, &format!("{}/", rx.url));
    t.bearer_token = Some("ferry-ops-token-41".into());
    let h = Delivery::start(fast(vec![t])).unwrap();
    h.send(event("FerryBleuDrop", true));
    h.send(event("FerryChrfDrop", false));
    h.shutdown(Duration::from_secs(10)).await;
    let s = h.stats().remove(0);
    assert_eq!((s.sent, s.failed, s.dropped, s.retries), (2, 0, 0, 0), "{s:?}");
    assert!(s.target.starts_with("http://127.0.0.1:") && s.target.ends_with("/api/v2/alerts"), "{}", s.target);

    let reqs = rx.requests();
    assert!(!reqs.is_empty() && reqs.len() <= 2, "{reqs:?}");
    let mut alerts = Vec::new();
    for r in &reqs {
        assert_eq!((r.method.as_str(), r.path.as_str()), ("POST", "/api/v2/alerts"));
        assert_eq!(r.headers.get("content-type").map(String::as_str), Some("application/json"));
        assert_eq!(r.headers.get("authorization").map(String::as_str), Some("Bearer ferry-ops-token-41"));
        assert!(r.headers.contains_key("host"));
        alerts.extend(r.json().as_array().expect("Alertmanager takes a JSON array").clone());
    }
    assert_eq!(alerts.len(), 2);
    for a in &alerts {
        let keys: Vec<&str> = a.as_object().unwrap().keys().map(String::as_str).collect();
        for k in &keys {
            assert!(["labels", "annotations", "startsAt", "endsAt", "generatorURL"].contains(k), "unexpected field {k} in {a}");
        }
        assert_eq!(a["labels"]["session"], "ferry-en-de.model-v7");
        assert!(a["annotations"]["summary"].as_str().unwrap().contains("Kiel-Oslo"));
        assert_eq!(a["generatorURL"], "http://mtgauge.ferry.test:9464/alerts");
        assert!(is_rfc3339_utc(a["startsAt"].as_str().unwrap()), "{a}");
    }
    let firing = alerts.iter().find(|a| a["labels"]["alertname"] == "FerryBleuDrop").unwrap();
    assert!(firing.get("endsAt").is_none(), "a firing alert has no endsAt: {firing}");
    let resolved = alerts.iter().find(|a| a["labels"]["alertname"] == "FerryChrfDrop").unwrap();
    let ends = resolved["endsAt"].as_str().unwrap();
    assert!(is_rfc3339_utc(ends), "{resolved}");
    assert!(ends > resolved["startsAt"].as_str().unwrap(), "{resolved}");
}

#[tokio::test]
async fn server_errors_and_429_are_retried_and_arrive_once() {
    let rx = Receiver::start(vec![(503, "busy"), (429, "slow down"), (200, "")], None).await;
    let h = Delivery::start(fast(vec![target(TargetKind::Alertmanager, &rx.url)])).unwrap();
    h.send(event("FerryBleuDrop", true));
    let s = wait_stats(&h, |s| s.sent == 1).await;
    assert_eq!((s.sent, s.failed, s.dropped, s.retries), (1, 0, 0, 2), "{s:?}");
    tokio::time::sleep(Duration::from_millis(300)).await;
    let reqs = rx.requests();
    assert_eq!(reqs.len(), 3, "two refusals and one success, nothing after: {reqs:?}");
    assert!(reqs.iter().all(|r| r.body == reqs[0].body), "every attempt posts the same batch");
    assert_eq!(reqs[0].json().as_array().unwrap().len(), 1);
}

#[tokio::test]
async fn client_errors_are_not_retried_and_count_failed() {
    let rx = Receiver::start(vec![(400, "{\"code\":400,\"message\":\"bad alert\"}")], None).await;
    let h = Delivery::start(fast(vec![target(TargetKind::Alertmanager, &rx.url)])).unwrap();
    h.send(event("FerryBleuDrop", true));
    h.send(event("FerryBleuDrop", false));
    let s = wait_stats(&h, |s| s.failed + s.sent == 2).await;
    tokio::time::sleep(Duration::from_millis(300)).await;
    let reqs = rx.requests();
    // The first request carries one or both events; if it carried one, the second (200) the other.
    let first_batch = reqs[0].json().as_array().unwrap().len() as u64;
    assert_eq!(s.failed, first_batch, "{s:?}");
    assert_eq!(s.retries, 0, "{s:?}");
    assert_eq!(reqs.len() as u64, if first_batch == 2 { 1 } else { 2 }, "{reqs:?}");
}

#[tokio::test]
async fn unreachable_target_is_retried_with_backoff_then_given_up() {
    let port = {
        let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        l.local_addr().unwrap().port()
    };
    let mut c = fast(vec![target(TargetKind::Alertmanager, &format!("http://127.0.0.1:{port}"))]);
    c.max_attempts = 3;
    c.initial_backoff = Duration::from_millis(100);
    c.max_backoff = Duration::from_secs(1);
    let h = Delivery::start(c).unwrap();
    let t0 = Instant::now();
    h.send(event("FerryBleuDrop", true));
    let s = wait_stats(&h, |s| s.failed == 1).await;
    assert_eq!((s.sent, s.retries), (0, 2), "{s:?}");
    // Waits of 100 ms then 200 ms between the three attempts: a lower bound that the sleeps
    // guarantee (no claim on speed).
    assert!(t0.elapsed() >= Duration::from_millis(300), "{:?}", t0.elapsed());
}

#[tokio::test]
async fn full_queue_drops_the_oldest_and_batches_the_rest() {
    let rx = Receiver::start(vec![], Some(0)).await;
    let mut c = fast(vec![target(TargetKind::Alertmanager, &rx.url)]);
    c.queue = 3;
    let h = Delivery::start(c).unwrap();
    h.send(event("first", true));
    // The task holds "first" in a request the receiver does not answer yet.
    tokio::time::timeout(Duration::from_secs(10), rx.arrived.notified()).await.expect("first request");
    for name in ["e1", "e2", "e3", "e4", "e5"] {
        h.send(event(name, true));
    }
    assert_eq!(h.stats()[0].dropped, 2, "queue of 3, five sent while busy");
    rx.release.notify_one();
    let s = wait_stats(&h, |s| s.sent == 4).await;
    assert_eq!((s.sent, s.failed, s.dropped), (4, 0, 2), "{s:?}");
    let reqs = rx.requests();
    assert_eq!(reqs.len(), 2, "{reqs:?}");
    let names: Vec<String> = reqs[1].json().as_array().unwrap().iter().map(|a| a["labels"]["alertname"].as_str().unwrap().to_owned()).collect();
    assert_eq!(names, ["e3", "e4", "e5"], "the three newest, in order, in one POST");
}

#[tokio::test]
async fn webhook_gets_an_object_with_states_at_its_own_path() {
    let rx = Receiver::start(vec![], None).await;
    let h = Delivery::start(fast(vec![target(TargetKind::Webhook, &format!("{}/hooks/ferry?channel=bridge", rx.url))])).unwrap();
    h.send(event("FerryBleuDrop", true));
    h.send(event("FerryBleuDrop", false));
    h.shutdown(Duration::from_secs(10)).await;
    assert_eq!(h.stats()[0].sent, 2);
    assert!(h.stats()[0].target.ends_with("/hooks/ferry"), "query left out of the shown target: {}", h.stats()[0].target);
    let mut states = Vec::new();
    for r in rx.requests() {
        assert_eq!(r.path, "/hooks/ferry?channel=bridge");
        assert!(!r.headers.contains_key("authorization"));
        for a in r.json()["alerts"].as_array().unwrap() {
            states.push(a["state"].as_str().unwrap().to_owned());
        }
    }
    assert_eq!(states, ["firing", "resolved"]);
}

#[tokio::test]
async fn a_dead_target_does_not_hold_back_a_live_one() {
    let live = Receiver::start(vec![], None).await;
    let dead = Receiver::start(vec![], Some(0)).await; // never answers its first request
    let mut c = fast(vec![target(TargetKind::Alertmanager, &dead.url), target(TargetKind::Webhook, &live.url)]);
    c.timeout = Duration::from_secs(30);
    let h = Delivery::start(c).unwrap();
    h.send(event("FerryBleuDrop", true));
    let t0 = Instant::now();
    while h.stats()[1].sent < 1 {
        assert!(t0.elapsed() < Duration::from_secs(10), "{:?}", h.stats());
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert_eq!(h.stats()[0].sent, 0);
    h.shutdown(Duration::from_millis(100)).await;
    assert_eq!(h.stats()[0].failed, 1, "the batch still being tried at shutdown counts failed");
}

fn temp_file(name: &str, contents: &str) -> PathBuf {
    let p = std::env::temp_dir().join(format!("mtgauge-alert-{}-{name}", std::process::id()));
    std::fs::write(&p, contents).unwrap();
    p
}

#[tokio::test]
async fn https_target_trusts_its_ca_file() {
    use rcgen::{BasicConstraints, CertificateParams, CertifiedIssuer, IsCa, KeyPair};
    use rustls::pki_types::pem::PemObject;
    use rustls::pki_types::{CertificateDer, PrivateKeyDer};
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    let ca = CertifiedIssuer::self_signed(ca_params, KeyPair::generate().unwrap()).unwrap();
    let key = KeyPair::generate().unwrap();
    let cert = CertificateParams::new(vec!["127.0.0.1".to_owned()]).unwrap().signed_by(&key, &ca).unwrap();
    let server = rustls::ServerConfig::builder_with_provider(Arc::new(rustls::crypto::ring::default_provider()))
        .with_safe_default_protocol_versions()
        .unwrap()
        .with_no_client_auth()
        .with_single_cert(vec![CertificateDer::from_pem_slice(cert.pem().as_bytes()).unwrap()], PrivateKeyDer::from_pem_slice(key.serialize_pem().as_bytes()).unwrap())
        .unwrap();
    let rx = Receiver::start_with(vec![], None, Some(tokio_rustls::TlsAcceptor::from(Arc::new(server)))).await;
    let ca_file = temp_file("ca.pem", &ca.pem());
    let mut t = target(TargetKind::Alertmanager, &rx.url);
    t.ca_file = Some(ca_file.clone());
    t.bearer_token = Some("tls-token".into());
    let h = Delivery::start(fast(vec![t])).unwrap();
    h.send(event("FerryBleuDrop", true));
    h.shutdown(Duration::from_secs(10)).await;
    assert_eq!(h.stats()[0].sent, 1, "{:?}", h.stats());
    let reqs = rx.requests();
    assert_eq!(reqs.len(), 1);
    assert_eq!(reqs[0].headers.get("authorization").map(String::as_str), Some("Bearer tls-token"));

    // Another CA: the handshake fails, which is retried and then given up.
    let other = CertifiedIssuer::self_signed(
        {
            let mut p = CertificateParams::new(Vec::<String>::new()).unwrap();
            p.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
            p
        },
        KeyPair::generate().unwrap(),
    )
    .unwrap();
    let other_file = temp_file("other-ca.pem", &other.pem());
    let mut t = target(TargetKind::Alertmanager, &rx.url);
    t.ca_file = Some(other_file.clone());
    let mut c = fast(vec![t]);
    c.max_attempts = 2;
    let h = Delivery::start(c).unwrap();
    h.send(event("FerryBleuDrop", true));
    let s = wait_stats(&h, |s| s.failed == 1).await;
    assert_eq!((s.sent, s.retries), (0, 1), "{s:?}");
    assert_eq!(rx.requests().len(), 1, "no request got through the failed handshake");

    let empty = temp_file("empty.pem", "");
    let mut t = target(TargetKind::Alertmanager, &rx.url);
    t.ca_file = Some(empty.clone());
    let err = Delivery::start(fast(vec![t])).err().expect("an empty CA file is refused").to_string();
    assert!(err.contains("no certificate"), "{err}");
    for f in [ca_file, other_file, empty] {
        let _ = std::fs::remove_file(f);
    }
}

#[test]
fn start_needs_a_runtime_and_sane_settings() {
    let err = Delivery::start(DeliveryConfig::new(vec![])).err().unwrap().to_string();
    assert!(err.contains("tokio runtime"), "{err}");
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    rt.block_on(async {
        let mut c = DeliveryConfig::new(vec![target(TargetKind::Webhook, "http://127.0.0.1:1/")]);
        c.queue = 0;
        assert!(Delivery::start(c).err().unwrap().to_string().contains("queue"));
        let c = DeliveryConfig::new(vec![target(TargetKind::Webhook, "127.0.0.1:1/")]);
        assert!(Delivery::start(c).is_err());
    });
}

// ---- a real Alertmanager (run by tests/python/test_alertmanager.py) ----

/// `GET {base}{path_and_query}`: status and JSON body.
async fn get_json(base: &str, path_and_query: &str) -> (u16, serde_json::Value) {
    use http_body_util::BodyExt;
    let uri: hyper::Uri = base.parse().unwrap();
    let auth = uri.authority().unwrap().clone();
    let tcp = tokio::net::TcpStream::connect(auth.as_str()).await.unwrap();
    let (mut send, conn) = hyper::client::conn::http1::handshake::<_, http_body_util::Empty<bytes::Bytes>>(hyper_util::rt::TokioIo::new(tcp)).await.unwrap();
    tokio::spawn(conn);
    let req = hyper::Request::get(path_and_query).header("host", auth.as_str()).body(http_body_util::Empty::new()).unwrap();
    let resp = send.send_request(req).await.unwrap();
    let status = resp.status().as_u16();
    let body = resp.into_body().collect().await.unwrap().to_bytes();
    (status, serde_json::from_slice(&body).unwrap_or(serde_json::Value::Null))
}

/// Alerts Alertmanager lists with label run=`run`.
async fn listed(base: &str, run: &str) -> Vec<serde_json::Value> {
    let (status, v) = get_json(base, &format!("/api/v2/alerts?filter=run%3D%22{run}%22")).await;
    assert_eq!(status, 200, "{v}");
    v.as_array().cloned().unwrap_or_default()
}

#[tokio::test]
#[ignore = "needs a real Alertmanager: MTGAUGE_ALERTMANAGER_URL (tests/python/test_alertmanager.py)"]
async fn real_alertmanager() {
    let base = std::env::var("MTGAUGE_ALERTMANAGER_URL").expect("MTGAUGE_ALERTMANAGER_URL: the Alertmanager to deliver to");
    let run = std::env::var("MTGAUGE_ALERT_RUN").unwrap_or_else(|_| format!("r{}", std::process::id()));
    let firing_for: f64 = std::env::var("MTGAUGE_ALERT_FIRING_SECONDS").ok().and_then(|v| v.parse().ok()).unwrap_or(3.0);
    let h = Delivery::start(fast(vec![target(TargetKind::Alertmanager, &base)])).unwrap();
    let mut e = event("FerryBleuDrop", true);
    e.labels.insert("run".into(), run.clone());
    h.send(e.clone());

    let t0 = Instant::now();
    let alert = loop {
        if let Some(a) = listed(&base, &run).await.into_iter().next() {
            break a;
        }
        assert!(t0.elapsed() < Duration::from_secs(15), "Alertmanager never listed the alert; {:?}", h.stats());
        tokio::time::sleep(Duration::from_millis(100)).await;
    };
    assert_eq!(h.stats()[0].sent, 1, "{:?}", h.stats());
    assert_eq!(alert["status"]["state"], "active", "{alert}");
    assert_eq!(alert["labels"]["session"], "ferry-en-de.model-v7");
    assert_eq!(alert["labels"]["alertname"], "FerryBleuDrop");
    assert!(alert["annotations"]["summary"].as_str().unwrap().contains("Kiel-Oslo"), "{alert}");
    assert_eq!(alert["generatorURL"], "http://mtgauge.ferry.test:9464/alerts");
    let sent_start = mtgauge::alerts::deliver::rfc3339(e.starts_at);
    assert_eq!(alert["startsAt"].as_str().unwrap().get(..19), sent_start.get(..19), "{alert}");

    // Let Alertmanager notify the firing group before resolving it.
    tokio::time::sleep(Duration::from_secs_f64(firing_for)).await;
    e.ends_at = Some(SystemTime::now());
    h.send(e);
    h.shutdown(Duration::from_secs(15)).await;
    let s = h.stats().remove(0);
    assert_eq!((s.sent, s.failed, s.dropped), (2, 0, 0), "{s:?}");
    let t0 = Instant::now();
    while !listed(&base, &run).await.is_empty() {
        assert!(t0.elapsed() < Duration::from_secs(15), "Alertmanager still lists the resolved alert");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    println!("real_alertmanager: run {run} fired and resolved");
}
