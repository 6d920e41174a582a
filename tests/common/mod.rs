//! A real `mtgauge serve` child process for integration tests (port 0, logs captured).

#![allow(dead_code)]

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use tonic::transport::Channel;

/// How long a test waits for the server to start or stop.
pub const STARTUP_TIMEOUT: Duration = Duration::from_secs(30);

pub struct Server {
    pub child: Child,
    pub grpc: String,
    pub metrics: String,
    pub logs: Arc<Mutex<Vec<String>>>,
}

/// A fresh temporary directory for one test.
pub fn temp_dir(name: &str) -> PathBuf {
    let d = std::env::temp_dir().join(format!("mtgauge-test-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

impl Server {
    /// Start `mtgauge serve` on loopback port 0 with extra arguments, on a fresh data directory
    /// unless the arguments name one (or `--durability none`).
    pub fn start(extra: &[&str]) -> Server {
        Server::start_on("127.0.0.1:0", extra)
    }

    /// [`Server::start`] on a given gRPC address (to restart a server where its clients expect it).
    pub fn start_on(listen: &str, extra: &[&str]) -> Server {
        Server::spawn(listen, extra, None)
    }

    /// [`Server::start`] in a process that may write no file past `bytes` (RLIMIT_FSIZE, with
    /// SIGXFSZ ignored so that a write past it fails with EFBIG instead of killing the process):
    /// a store that runs out of room.
    pub fn start_with_file_size_limit(extra: &[&str], bytes: u64) -> Server {
        Server::spawn("127.0.0.1:0", extra, Some(bytes))
    }

    fn spawn(listen: &str, extra: &[&str], file_size_limit: Option<u64>) -> Server {
        static N: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        // A config file that names no data directory (or durability) gets one too: the
        // daemon's default (/var/lib/mtgauge) is shared state no test may write to.
        let config_says = extra.iter().position(|a| *a == "--config").and_then(|i| extra.get(i + 1)).is_some_and(|path| {
            std::fs::read_to_string(path).is_ok_and(|text| text.lines().any(|l| l.trim_start().starts_with("data_dir") || l.trim_start().starts_with("durability")))
        });
        let own = !config_says && !extra.iter().any(|a| *a == "--data-dir" || *a == "--durability");
        let dir = temp_dir(&format!("data-{}", N.fetch_add(1, std::sync::atomic::Ordering::Relaxed)));
        let mut args: Vec<String> = extra.iter().map(|s| s.to_string()).collect();
        if own {
            args.extend(["--data-dir".to_string(), dir.display().to_string()]);
        }
        let mut command = Command::new(env!("CARGO_BIN_EXE_mtgauge"));
        // Two malloc arenas (glibc): memory tests measure what the server keeps, and per-thread
        // arenas made on contention add megabytes of noise that depend on how busy the machine is.
        // A fixed mmap threshold (glibc, mallopt(3) M_MMAP_THRESHOLD): by default glibc raises the
        // threshold each time a large block is freed, after which batch-sized buffers come from the
        // heap and stay resident in amounts that depend on timing (0 to 12 MiB over the unknown
        // flood in tests/pressure.rs; 0.1 to 0.9 MiB with the threshold fixed, 8 runs).
        command.args(["serve", "--listen", listen, "--metrics-listen", "127.0.0.1:0"]).args(&args).env("RUST_LOG", "info").env("MALLOC_ARENA_MAX", "2").env("MALLOC_MMAP_THRESHOLD_", "131072").stdin(Stdio::null()).stdout(Stdio::null()).stderr(Stdio::piped());
        if let Some(bytes) = file_size_limit {
            use std::os::unix::process::CommandExt;
            // SAFETY: only async-signal-safe calls (signal, setrlimit) between fork and exec.
            unsafe {
                command.pre_exec(move || {
                    libc::signal(libc::SIGXFSZ, libc::SIG_IGN);
                    let limit = libc::rlimit { rlim_cur: bytes as libc::rlim_t, rlim_max: bytes as libc::rlim_t };
                    if libc::setrlimit(libc::RLIMIT_FSIZE, &limit) != 0 {
                        return Err(std::io::Error::last_os_error());
                    }
                    Ok(())
                });
            }
        }
        let mut child = command.spawn().expect("start mtgauge serve");
        let stderr = child.stderr.take().unwrap();
        let logs = Arc::new(Mutex::new(Vec::new()));
        let (tx, rx) = std::sync::mpsc::channel::<String>();
        let sink = Arc::clone(&logs);
        std::thread::spawn(move || {
            for line in BufReader::new(stderr).lines().map_while(Result::ok) {
                let _ = tx.send(line.clone());
                sink.lock().unwrap().push(line);
            }
        });
        let deadline = Instant::now() + STARTUP_TIMEOUT;
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            let line = rx.recv_timeout(left).unwrap_or_else(|_| panic!("server did not log its addresses; logs: {:?}", logs.lock().unwrap()));
            if let Ok(v) = serde_json::from_str::<serde_json::Value>(&line) {
                let f = &v["fields"];
                if f["message"] == "listening" {
                    let (g, m) = (f["grpc"].as_str().unwrap(), f["metrics"].as_str().unwrap());
                    return Server { child, grpc: format!("http://{g}"), metrics: m.to_owned(), logs };
                }
            } else if let Some(rest) = line.split("listening ").nth(1) {
                let field = |k: &str| rest.split_whitespace().find_map(|w| w.strip_prefix(k)).unwrap().to_owned();
                return Server { child, grpc: format!("http://{}", field("grpc=")), metrics: field("metrics="), logs };
            }
        }
    }

    pub async fn channel(&self) -> Channel {
        tonic::transport::Endpoint::from_shared(self.grpc.clone()).unwrap().connect().await.expect("connect")
    }

    /// Wait until gRPC health reports SERVING.
    pub async fn wait_serving(&self) -> Channel {
        let ch = self.channel().await;
        let mut health = tonic_health::pb::health_client::HealthClient::new(ch.clone());
        let deadline = Instant::now() + STARTUP_TIMEOUT;
        loop {
            let r = health.check(tonic_health::pb::HealthCheckRequest { service: String::new() }).await;
            if r.is_ok_and(|r| r.into_inner().status == tonic_health::pb::health_check_response::ServingStatus::Serving as i32) {
                return ch;
            }
            assert!(Instant::now() < deadline, "server never reported SERVING");
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
    }

    /// GET /metrics.
    pub fn scrape(&self) -> String {
        use std::io::{Read, Write};
        let mut s = std::net::TcpStream::connect(&self.metrics).unwrap();
        s.write_all(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n").unwrap();
        let mut out = String::new();
        s.read_to_string(&mut out).unwrap();
        let (head, body) = out.split_once("\r\n\r\n").unwrap();
        assert!(head.starts_with("HTTP/1.1 200"), "{head}");
        body.to_owned()
    }

    /// The value of one sample of the last scrape, e.g. `mtgauge_connections_open{listener="grpc"}`
    /// (0 when the series is absent).
    pub fn sample(&self, series: &str) -> f64 {
        self.scrape().lines().find_map(|l| l.strip_prefix(series).and_then(|v| v.strip_prefix(' ')).map(|v| v.trim().parse::<f64>().unwrap())).unwrap_or(0.0)
    }

    /// Resident memory of the server process in KiB (Linux /proc).
    pub fn rss_kib(&self) -> u64 {
        let status = std::fs::read_to_string(format!("/proc/{}/status", self.child.id())).expect("/proc/PID/status");
        status.lines().find_map(|l| l.strip_prefix("VmRSS:")).and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok()).expect("VmRSS")
    }

    /// Kill with SIGKILL (no drain) and wait for the exit.
    pub fn kill(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// Send SIGTERM and wait for the exit (bounded).
    pub fn terminate(&mut self) -> std::process::ExitStatus {
        let _ = Command::new("kill").args(["-TERM", &self.child.id().to_string()]).status();
        let deadline = Instant::now() + STARTUP_TIMEOUT;
        loop {
            if let Some(st) = self.child.try_wait().unwrap() {
                return st;
            }
            assert!(Instant::now() < deadline, "server did not exit after SIGTERM");
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// The demo reference set, as the offline engine sees it (the same set `demo_files` writes).
pub fn demo_refset() -> Arc<mtgauge::refs::RefSet> {
    let segs = mtgauge::cli::demo::scenario::demo_segments();
    Arc::new(mtgauge::refs::RefSet::new(segs).unwrap())
}

/// The offline statistics of `items` (demo segment id, hypothesis) under the default
/// configuration: what a daemon that counted each item once must hold.
pub fn offline_demo(items: &[(String, String)]) -> mtgauge::metric::CorpusStats {
    use mtgauge::refs::compiled::{Compiled, Scratch};
    let compiled = Compiled::build(demo_refset(), mtgauge::metric::ScoreConfig::default());
    let ids: std::collections::HashMap<String, usize> = mtgauge::cli::demo::scenario::demo_segments().into_iter().enumerate().map(|(i, s)| (s.id, i)).collect();
    let mut scratch = Scratch::default();
    let mut sum = mtgauge::metric::CorpusStats::default();
    for (id, h) in items {
        sum.add_segment(&compiled.score_segment(ids[id], h, &mut scratch));
    }
    sum
}

/// Write the demo files into `dir`.
pub fn demo_files(dir: &Path) {
    mtgauge::cli::demo::scenario::write_demo_files(dir).unwrap();
}

/// A durable server on `dir/data` reading reference files from `dir` (written by
/// [`demo_files`]), serving, with the demo set loaded as `ferry`: the server, its channel and
/// its data directory (to start it again on).
pub async fn durable_with_ferry(dir: &Path) -> (Server, Channel, String) {
    let data = dir.join("data").to_str().unwrap().to_owned();
    let server = Server::start(&["--data-dir", &data, "--refset-dir", dir.to_str().unwrap()]);
    let ch = server.wait_serving().await;
    let load = mtgauge::pb::LoadRefSetRequest { name: "ferry".into(), format: mtgauge::pb::RefFormat::Jsonl as i32, paths: vec!["refs.jsonl".into()], source_path: String::new(), replace: false };
    mtgauge::pb::ref_sets_client::RefSetsClient::new(ch.clone()).load(load).await.unwrap();
    (server, ch, data)
}

/// A server running inside the test process on `mtgauge::server::run` (no scrape listener: the
/// Prometheus recorder is process-wide), stopped by [`InProcess::stop`].
pub struct InProcess {
    pub grpc: String,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), mtgauge::server::RunError>>,
}

impl InProcess {
    /// Bind loopback port 0 and run `config` on it (inside a Tokio runtime).
    pub async fn start(config: mtgauge::server::ServerConfig) -> InProcess {
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.expect("bind 127.0.0.1:0");
        let grpc = format!("http://{}", listener.local_addr().unwrap());
        let (shutdown, stopped) = tokio::sync::oneshot::channel::<()>();
        let task = tokio::spawn(mtgauge::server::run(config, listener, None, async move {
            let _ = stopped.await;
        }));
        InProcess { grpc, shutdown: Some(shutdown), task }
    }

    /// A channel once gRPC health reports SERVING.
    pub async fn wait_serving(&self) -> Channel {
        let deadline = Instant::now() + STARTUP_TIMEOUT;
        loop {
            if let Ok(ch) = tonic::transport::Endpoint::from_shared(self.grpc.clone()).unwrap().connect().await {
                let r = tonic_health::pb::health_client::HealthClient::new(ch.clone()).check(tonic_health::pb::HealthCheckRequest { service: String::new() }).await;
                if r.is_ok_and(|r| r.into_inner().status == tonic_health::pb::health_check_response::ServingStatus::Serving as i32) {
                    return ch;
                }
            }
            assert!(Instant::now() < deadline, "in-process server never reported SERVING");
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
    }

    /// Resolve the shutdown future and wait for `run` to return.
    pub async fn stop(mut self) -> Result<(), mtgauge::server::RunError> {
        if let Some(s) = self.shutdown.take() {
            let _ = s.send(());
        }
        tokio::time::timeout(STARTUP_TIMEOUT, &mut self.task).await.expect("run returned after its shutdown").expect("run did not panic")
    }
}
