//! TLS (with and without client certificates), the plaintext health listener, bearer tokens
//! and their scopes, and that no token ever reaches a log line or an error message.
//! Certificates are made at test time with rcgen.

mod common;

use std::path::Path;
use std::time::Duration;

use common::{demo_files, temp_dir, Server};
use mtgauge::pb;
use mtgauge::pb::scoring_client::ScoringClient;
use mtgauge::pb::sessions_client::SessionsClient;
use mtgauge::server::auth::token_line_hash;
use rcgen::{BasicConstraints, CertificateParams, CertifiedIssuer, IsCa, KeyPair};
use tonic::transport::{Certificate, ClientTlsConfig, Endpoint, Identity};
use tonic::Code;

struct Pki {
    ca: String,
    server_cert: String,
    server_key: String,
    client_cert: String,
    client_key: String,
}

fn pki() -> Pki {
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    let ca = CertifiedIssuer::self_signed(ca_params, KeyPair::generate().unwrap()).unwrap();
    let leaf = |names: Vec<String>| {
        let key = KeyPair::generate().unwrap();
        let cert = CertificateParams::new(names).unwrap().signed_by(&key, &ca).unwrap();
        (cert.pem(), key.serialize_pem())
    };
    let (server_cert, server_key) = leaf(vec!["localhost".into(), "127.0.0.1".into()]);
    let (client_cert, client_key) = leaf(vec!["probe-worker".into()]);
    Pki { ca: ca.pem(), server_cert, server_key, client_cert, client_key }
}

fn write(dir: &Path, name: &str, text: &str) -> String {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p.to_str().unwrap().to_owned()
}

async fn tls_channel(server: &Server, pki: &Pki, with_client_cert: bool) -> Result<tonic::transport::Channel, tonic::transport::Error> {
    let _ = rustls::crypto::ring::default_provider().install_default();
    let port = server.grpc.rsplit(':').next().unwrap();
    let mut tls = ClientTlsConfig::new().ca_certificate(Certificate::from_pem(&pki.ca)).domain_name("localhost");
    if with_client_cert {
        tls = tls.identity(Identity::from_pem(&pki.client_cert, &pki.client_key));
    }
    Endpoint::from_shared(format!("https://localhost:{port}")).unwrap().tls_config(tls).unwrap().connect_timeout(Duration::from_secs(5)).connect().await
}

async fn health_status(ch: tonic::transport::Channel) -> Result<i32, tonic::Status> {
    let mut h = tonic_health::pb::health_client::HealthClient::new(ch);
    Ok(h.check(tonic_health::pb::HealthCheckRequest { service: String::new() }).await?.into_inner().status)
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn mutual_tls_and_plaintext_health() {
    let dir = temp_dir("tls");
    let pki = pki();
    let (cert, key, ca) = (write(&dir, "server.pem", &pki.server_cert), write(&dir, "server.key", &pki.server_key), write(&dir, "ca.pem", &pki.ca));
    let health_port = free_port();
    let health = format!("127.0.0.1:{health_port}");
    let server = Server::start(&["--tls-cert", &cert, "--tls-key", &key, "--tls-client-ca", &ca, "--health-listen", &health]);
    // Plain gRPC health on its own listener (what Kubernetes probes speak).
    let plain = Endpoint::from_shared(format!("http://{health}")).unwrap();
    let mut serving = false;
    for _ in 0..100 {
        if let Ok(ch) = plain.connect().await {
            if health_status(ch).await.is_ok_and(|s| s == tonic_health::pb::health_check_response::ServingStatus::Serving as i32) {
                serving = true;
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    assert!(serving, "plaintext health reports SERVING");
    // The health listener serves nothing else.
    let ch = plain.connect().await.unwrap();
    let e = SessionsClient::new(ch).list(pb::ListSessionsRequest {}).await.unwrap_err();
    assert_eq!(e.code(), Code::Unimplemented);

    // With a client certificate: works.
    let ch = tls_channel(&server, &pki, true).await.expect("mutual TLS connects");
    SessionsClient::new(ch).list(pb::ListSessionsRequest {}).await.expect("a call over mutual TLS");
    // Without one: the handshake or the first call fails.
    let refused = match tls_channel(&server, &pki, false).await {
        Err(_) => true,
        Ok(ch) => SessionsClient::new(ch).list(pb::ListSessionsRequest {}).await.is_err(),
    };
    assert!(refused, "a client without a certificate is refused");
    // Plaintext on the TLS port fails.
    let port = server.grpc.rsplit(':').next().unwrap();
    let plain_main = Endpoint::from_shared(format!("http://127.0.0.1:{port}")).unwrap().connect_timeout(Duration::from_secs(2));
    let refused = match plain_main.connect().await {
        Err(_) => true,
        Ok(ch) => SessionsClient::new(ch).list(pb::ListSessionsRequest {}).await.is_err(),
    };
    assert!(refused, "plaintext is refused on the TLS port");
}

/// Past limits.max_connections on a TLS port, the refusal is spoken over TLS too, so the
/// client reads RESOURCE_EXHAUSTED naming the key instead of a broken handshake.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn over_the_connection_limit_tls_clients_are_told_why() {
    let dir = temp_dir("tls-limit");
    let pki = pki();
    let (cert, key) = (write(&dir, "server.pem", &pki.server_cert), write(&dir, "server.key", &pki.server_key));
    let cfg = write(&dir, "serve.toml", "durability = \"none\"\n[limits]\nmax_connections = 1\n");
    let server = Server::start(&["--config", &cfg, "--tls-cert", &cert, "--tls-key", &key]);
    let mut first = None;
    for _ in 0..100 {
        if let Ok(ch) = tls_channel(&server, &pki, false).await {
            if health_status(ch.clone()).await.is_ok() {
                first = Some(ch);
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let first = first.expect("the first TLS connection is served");
    let second = tls_channel(&server, &pki, false).await.expect("the TLS handshake of an over-limit connection succeeds");
    let e = health_status(second).await.expect_err("the second connection is refused");
    assert_eq!(e.code(), Code::ResourceExhausted, "{e:?}");
    assert!(e.message().contains("limits.max_connections"), "{e:?}");
    health_status(first).await.expect("the first connection is still served");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tokens_scopes_and_secrecy() {
    let dir = temp_dir("tokens");
    demo_files(&dir);
    let (submit, read, admin) = ("mtg_submit_Fj39dk2", "mtg_read_Qp01xx7", "mtg_admin_Zz88aa1");
    let file = format!("# test tokens\n{} submit probe-workers\n{} read dashboards\n{} admin ops\n", token_line_hash(submit), token_line_hash(read), token_line_hash(admin));
    let tokens = write(&dir, "tokens", &file);
    let refs = format!("ferry={}", dir.join("refs.jsonl").display());
    let server = Server::start(&["--tokens", &tokens, "--refset", &refs]);
    let ch = server.wait_serving().await;
    let with = |tok: Option<&str>, mut req: tonic::Request<pb::CreateSessionRequest>| {
        if let Some(t) = tok {
            req.metadata_mut().insert("authorization", format!("Bearer {t}").parse().unwrap());
        }
        req
    };
    let create = || tonic::Request::new(pb::CreateSessionRequest { name: "s".into(), refset: "ferry".into(), config: None, labels: Default::default(), window: 0, if_not_exists: true, ..Default::default() });
    let mut sessions = SessionsClient::new(ch.clone());
    let e = sessions.create(with(None, create())).await.unwrap_err();
    assert_eq!(e.code(), Code::Unauthenticated);
    let e = sessions.create(with(Some("mtg_wrong"), create())).await.unwrap_err();
    assert_eq!(e.code(), Code::Unauthenticated);
    let e = sessions.create(with(Some(submit), create())).await.unwrap_err();
    assert_eq!(e.code(), Code::PermissionDenied);
    assert!(e.message().contains("probe-workers") && !e.message().contains(submit), "{}", e.message());
    sessions.create(with(Some(admin), create())).await.expect("admin creates");

    let batch = || pb::ScoreBatch { session: "s".into(), producer: String::new(), sequence: 0, items: vec![pb::ScoreItem { key: Some(pb::score_item::Key::SegmentId("notice-0001".into())), hypothesis: "Hunde an Deck 4".into(), ..Default::default() }], want_segment_scores: false, ..Default::default() };
    let mut scoring = ScoringClient::new(ch.clone());
    let mut r = tonic::Request::new(batch());
    r.metadata_mut().insert("authorization", format!("Bearer {read}").parse().unwrap());
    assert_eq!(scoring.submit(r).await.unwrap_err().code(), Code::PermissionDenied, "read cannot submit");
    let mut r = tonic::Request::new(batch());
    r.metadata_mut().insert("authorization", format!("Bearer {submit}").parse().unwrap());
    assert_eq!(scoring.submit(r).await.unwrap().into_inner().scored, 1);
    let mut r = tonic::Request::new(pb::GetScoresRequest { session: "s".into(), ..Default::default() });
    r.metadata_mut().insert("authorization", format!("Bearer {read}").parse().unwrap());
    assert_eq!(scoring.get_scores(r).await.unwrap().into_inner().cumulative.unwrap().segments, 1);
    // Health stays open for probes.
    assert!(health_status(ch.clone()).await.is_ok());

    // The status page and its JSON need the read scope too; the scrape stays open.
    let get = |path: &str, tok: Option<&str>| {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(&server.metrics).unwrap();
        let auth = tok.map_or(String::new(), |t| format!("Authorization: Bearer {t}\r\n"));
        write!(s, "GET {path} HTTP/1.1\r\nHost: x\r\n{auth}Connection: close\r\n\r\n").unwrap();
        let mut out = String::new();
        s.read_to_string(&mut out).unwrap();
        out
    };
    for path in ["/", "/api/v1/overview", "/api/v1/compare?a=s&b=s"] {
        for tok in [None, Some("mtg_wrong"), Some(submit)] {
            let r = get(path, tok);
            assert!(r.starts_with("HTTP/1.1 401"), "{path} with {tok:?}: {}", r.lines().next().unwrap_or(""));
            assert!(!r.contains("data-session") && !r.contains("\"sessions\""), "{path}: nothing of the sessions without the read scope");
        }
        for tok in [read, admin] {
            let r = get(path, Some(tok));
            assert!(r.starts_with("HTTP/1.1 200"), "{path} with a read-scoped token: {}", r.lines().next().unwrap_or(""));
        }
    }
    assert!(get("/", Some(read)).contains("data-session=\"s\""), "the page lists the session");
    assert!(get("/metrics", None).starts_with("HTTP/1.1 200"), "the scrape needs no token");

    // The CLI takes the token from the environment.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["status", "--server", &server.grpc, "--session", "s"]).env("MTGAUGE_TOKEN", read).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["status", "--server", &server.grpc]).env("MTGAUGE_TOKEN", "mtg_not_a_token").output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("Unauthenticated") && !err.contains("mtg_not_a_token"), "{err}");

    // No token appears in any log line.
    tokio::time::sleep(Duration::from_millis(200)).await;
    let logs = server.logs.lock().unwrap().join("\n");
    assert!(!logs.is_empty());
    for t in [submit, read, admin, "mtg_wrong", "mtg_not_a_token"] {
        assert!(!logs.contains(t), "token {t} leaked into the logs");
    }
}

#[test]
fn token_command_prints_a_token_and_its_hash_line() {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(["token", "--scopes", "submit,read", "--name", "probe"]).output().unwrap();
    assert!(out.status.success());
    let token = String::from_utf8_lossy(&out.stdout).trim().to_owned();
    let line = String::from_utf8_lossy(&out.stderr).trim().to_owned();
    assert!(token.starts_with("mtg_") && token.len() == 4 + 64, "{token}");
    assert_eq!(line, format!("{} submit,read probe", token_line_hash(&token)));
    assert!(!line.contains(&token));
}
