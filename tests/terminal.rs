//! The terminal views against a real `mtgauge serve`: `status --watch` through a pipe (plain
//! lines, no escape codes) and through a pseudo-terminal (tmux: the redrawn block with its
//! sparkline, a clean exit on Ctrl-C).

mod common;

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::{demo_files, temp_dir, Server};
use mtgauge::cli::demo::scenario::demo_segments;

/// How long a test waits for a view to show what it expects.
const VIEW_TIMEOUT: Duration = Duration::from_secs(30);

fn mtgauge(args: &[&str]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_mtgauge")).args(args).output().unwrap()
}

/// Alert rules of the test server: one on `v7` whose threshold its BLEU (about 57) is far
/// below, so that it fires once evaluated.
const ALERT_RULES: &str = "alert_eval_seconds = 1\n\n[[alert]]\nname = \"floor\"\nsession = \"v7\"\nmetric = \"bleu\"\nwhen = \"below\"\nthreshold = 90.0\nmin_segments = 100\nfor_seconds = 0\n";

/// A server with the demo reference set, the alert rules [`ALERT_RULES`] and session `v7`
/// holding the demo's 300 segments of model v7; the server and the session's cumulative BLEU as
/// `status --json` reports it.
async fn server_with_v7(dir: &Path) -> (Server, f64) {
    demo_files(dir);
    let ids: String = demo_segments().iter().map(|s| s.id.clone() + "\n").collect();
    std::fs::write(dir.join("ids.txt"), ids).unwrap();
    let config = dir.join("mtgauge.toml");
    std::fs::write(&config, ALERT_RULES).unwrap();
    let server = Server::start(&["--refset", &format!("ferry={}", dir.join("refs.jsonl").display()), "--config", config.to_str().unwrap()]);
    server.wait_serving().await;
    let p = |n: &str| dir.join(n).to_str().unwrap().to_owned();
    let sent = mtgauge(&["send", "--server", &server.grpc, "--session", "v7", "--create", "--refset", "ferry", "--hyp", &p("hyp.model-v7.de.txt"), "--ids", &p("ids.txt")]);
    assert!(sent.status.success(), "{}", String::from_utf8_lossy(&sent.stderr));
    let status = mtgauge(&["status", "--server", &server.grpc, "--session", "v7", "--json"]);
    assert!(status.status.success(), "{}", String::from_utf8_lossy(&status.stderr));
    let st: serde_json::Value = serde_json::from_slice(&status.stdout).unwrap();
    assert_eq!(st["cumulative"]["segments"], 300);
    (server, st["cumulative"]["bleu"]["score"].as_f64().unwrap())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn watch_through_a_pipe_prints_plain_lines_and_stops_on_ctrl_c() {
    let dir = temp_dir("watch-pipe");
    let (server, bleu) = server_with_v7(&dir).await;
    let mut child = Command::new(env!("CARGO_BIN_EXE_mtgauge"))
        .args(["status", "--watch", "--every", "1", "--server", &server.grpc])
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let (tx, rx) = std::sync::mpsc::channel::<Vec<u8>>();
    let stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut all = Vec::new();
        for line in BufReader::new(stdout).split(b'\n').map_while(Result::ok) {
            all.extend_from_slice(&line);
            all.push(b'\n');
            let _ = tx.send(line);
        }
        all
    });
    let mut lines = Vec::new();
    let deadline = Instant::now() + VIEW_TIMEOUT;
    // Until two refreshes came and the daemon's first evaluation of the rule (every second)
    // shows it firing.
    let firing = |l: &String| l.ends_with("; alerts FIRING floor");
    while lines.len() < 2 || !lines.iter().any(firing) {
        let left = deadline.saturating_duration_since(Instant::now());
        lines.push(String::from_utf8(rx.recv_timeout(left).unwrap_or_else(|_| panic!("two refreshes and the alert firing within {VIEW_TIMEOUT:?}; got {lines:?}"))).unwrap());
    }
    // Ctrl-C is SIGINT to the process (POSIX: the terminal's interrupt character sends it).
    assert!(Command::new("kill").args(["-INT", &child.id().to_string()]).status().unwrap().success());
    let status = child.wait().unwrap();
    let all = reader.join().unwrap();
    assert_eq!(status.code(), Some(0), "Ctrl-C ends the watch cleanly; stderr: {}", std::io::read_to_string(child.stderr.take().unwrap()).unwrap());
    assert!(!all.contains(&0x1b), "no escape codes through a pipe: {:?}", String::from_utf8_lossy(&all));
    // One line per session per refresh: a time stamp, the session, its count and scores; the
    // first refresh has no earlier count to measure a rate from, the second saw nothing new.
    let score = format!("BLEU {bleu:.2} (");
    for (k, l) in lines.iter().enumerate() {
        assert!(l.contains(" v7: 300 segments, ") && l.contains(&score) && l.contains("unknown 0.0%, rejected 0.0% of 300 items"), "{l}");
        assert!(l.starts_with("20") && l.as_bytes()[19] == b'Z', "time stamp first: {l}");
        assert!(l.contains(if k == 0 { "measuring segments/s" } else { " 0.0 segments/s" }), "{l}");
        // The demo's sources come with its segments: the guards checked every item.
        assert!(l.contains("; guards 300 checked, flagged: "), "{l}");
    }
}

/// tmux, or None when it is missing (MTGAUGE_REQUIRE_TMUX=1, as .ci/run sets, makes that a
/// failure).
fn tmux() -> Option<&'static str> {
    let found = Command::new("tmux").arg("-V").output().is_ok_and(|o| o.status.success());
    if !found {
        assert!(std::env::var("MTGAUGE_REQUIRE_TMUX").as_deref() != Ok("1"), "tmux is required (MTGAUGE_REQUIRE_TMUX=1) but not found");
        eprintln!("tmux not found: terminal test skipped (install Debian's tmux to run it)");
    }
    found.then_some("tmux")
}

/// A detached tmux session on a socket of its own (no user configuration), 120 x 40, running
/// `command` under sh; killed with its server on drop.
struct Pane {
    socket: String,
}

impl Pane {
    fn start(name: &str, command: &str) -> Pane {
        let socket = format!("mtgauge-test-{name}-{}", std::process::id());
        let st = Command::new("tmux").args(["-L", &socket, "-f", "/dev/null", "new-session", "-d", "-x", "120", "-y", "40", command]).status().unwrap();
        assert!(st.success(), "tmux new-session");
        Pane { socket }
    }

    fn tmux(&self, args: &[&str]) -> std::process::Output {
        Command::new("tmux").args(["-L", &self.socket]).args(args).output().unwrap()
    }

    /// The pane's text now.
    fn capture(&self) -> String {
        String::from_utf8_lossy(&self.tmux(&["capture-pane", "-p"]).stdout).into_owned()
    }

    /// Capture until `ok` holds (panics with the last screen after [`VIEW_TIMEOUT`]).
    fn wait_for(&self, what: &str, ok: impl Fn(&str) -> bool) -> String {
        let deadline = Instant::now() + VIEW_TIMEOUT;
        loop {
            let screen = self.capture();
            if ok(&screen) {
                return screen;
            }
            assert!(Instant::now() < deadline, "{what} within {VIEW_TIMEOUT:?}; screen:\n{screen}");
            std::thread::sleep(Duration::from_millis(100));
        }
    }
}

impl Drop for Pane {
    fn drop(&mut self) {
        let _ = self.tmux(&["kill-server"]);
    }
}

/// The file a command's exit status is written to, and the shell text that writes it.
fn exit_file(dir: &Path) -> (PathBuf, String) {
    let f = dir.join("exit");
    let text = format!("; echo EXIT=$? > '{}'", f.display());
    (f, text)
}

fn wait_exit(file: &Path) -> String {
    let deadline = Instant::now() + VIEW_TIMEOUT;
    loop {
        if let Ok(s) = std::fs::read_to_string(file) {
            if s.ends_with('\n') {
                return s;
            }
        }
        assert!(Instant::now() < deadline, "the command did not exit within {VIEW_TIMEOUT:?}");
        std::thread::sleep(Duration::from_millis(50));
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn watch_on_a_terminal_redraws_the_block_and_exits_on_ctrl_c() {
    if tmux().is_none() {
        return;
    }
    let dir = temp_dir("watch-tty");
    let (server, bleu) = server_with_v7(&dir).await;
    let (exit, write_exit) = exit_file(&dir);
    let command = format!("'{}' status --watch --every 1 --server {}{write_exit}; sleep 60", env!("CARGO_BIN_EXE_mtgauge"), server.grpc);
    let pane = Pane::start("watch", &command);
    // The sparkline's characters (U+2581..U+2588, Unicode "Block Elements").
    let spark = |s: &str| s.lines().any(|l| l.contains("last hour by minute") && l.chars().any(|c| ('\u{2581}'..='\u{2588}').contains(&c)));
    let first = pane.wait_for("the session block with its sparkline", |s| s.contains("v7 (reference set ferry): 300 segments") && spark(s));
    assert!(first.contains(&format!("cumulative {bleu:.2} (")), "{first}");
    assert!(first.contains("unknown 0.0%, rejected 0.0% of 300 items"), "{first}");
    assert!(first.contains("  guards   300 checked, flagged: "), "{first}");
    // The rule's state as the daemon evaluates it (every second): firing, redrawn in place.
    pane.wait_for("the alert firing", |s| s.contains("  alerts   FIRING floor"));
    // Redrawn in place: the second refresh measured a rate, and the screen holds one header.
    let second = pane.wait_for("a second refresh", |s| s.contains(" 0.0 segments/s"));
    assert_eq!(second.matches("mtgauge status --watch:").count(), 1, "{second}");
    assert!(second.lines().next().unwrap().starts_with("mtgauge status --watch:"), "drawn from the top-left corner:\n{second}");
    assert!(pane.tmux(&["send-keys", "C-c"]).status.success());
    assert_eq!(wait_exit(&exit), "EXIT=0\n");
    // The cursor is shown again (tmux: cursor_flag 1 = visible).
    let flag = pane.tmux(&["display-message", "-p", "#{cursor_flag}"]);
    assert_eq!(String::from_utf8_lossy(&flag.stdout).trim(), "1");
}

/// Segments of the generated corpus for the bar tests: above the progress threshold
/// (`PROGRESS_MIN_SEGMENTS`, 20,000), small enough to score in a few seconds.
const BAR_SEGMENTS: usize = 25_000;

/// A generated line-aligned corpus: references and hypotheses (every other one with a word
/// left out and one changed); the paths of the reference and hypothesis files.
fn generated_corpus(dir: &Path) -> (String, String) {
    let (mut refs, mut hyps) = (String::new(), String::new());
    for k in 0..BAR_SEGMENTS {
        let r = format!("the ferry {k} to Tarnholm leaves from pier {} at {} hours", k % 7, k % 24);
        let h = if k % 2 == 0 { r.clone() } else { format!("ferry {k} to Tarnholm leaves from gate {} at {} hours", k % 7, k % 24) };
        refs += &(r + "\n");
        hyps += &(h + "\n");
    }
    let (r, h) = (dir.join("ref.txt"), dir.join("hyp.txt"));
    std::fs::write(&r, refs).unwrap();
    std::fs::write(&h, hyps).unwrap();
    (r.to_str().unwrap().to_owned(), h.to_str().unwrap().to_owned())
}

#[test]
fn score_through_a_pipe_draws_no_bar() {
    let dir = temp_dir("bar-pipe");
    let (r, h) = generated_corpus(&dir);
    let out = mtgauge(&["score", "--ref", &r, "--hyp", &h]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert_eq!(String::from_utf8_lossy(&out.stderr), "", "stderr is not a terminal: no bar");
    assert!(String::from_utf8_lossy(&out.stdout).contains(&format!("{BAR_SEGMENTS} segments")));
}

/// The pane's line that starts with `label [` (the bar's last drawing).
fn bar_line(screen: &str, label: &str) -> String {
    screen.lines().find(|l| l.starts_with(&format!("{label} ["))).unwrap_or_else(|| panic!("no {label} bar on the screen:\n{screen}")).trim_end().to_owned()
}

/// The bar's characters between its brackets.
fn filling(line: &str) -> &str {
    line.split_once('[').and_then(|(_, r)| r.split_once(']')).map_or("", |(b, _)| b)
}

#[test]
fn score_on_a_terminal_draws_a_bar_with_rate_and_time() {
    if tmux().is_none() {
        return;
    }
    let dir = temp_dir("bar-tty");
    let (r, h) = generated_corpus(&dir);
    let (exit, write_exit) = exit_file(&dir);
    let stdout = dir.join("stdout.txt");
    // stdout into a file, stderr on the pane's terminal.
    let command = format!("'{}' score --ref '{r}' --hyp '{h}' > '{}'{write_exit}; sleep 60", env!("CARGO_BIN_EXE_mtgauge"), stdout.display());
    let pane = Pane::start("score", &command);
    assert_eq!(wait_exit(&exit), "EXIT=0\n");
    let screen = pane.capture();
    let line = bar_line(&screen, "scoring");
    assert!(!filling(&line).is_empty() && filling(&line).chars().all(|c| c == '#'), "a full bar at the end: {line}");
    let counts = format!("] {BAR_SEGMENTS}/{BAR_SEGMENTS} segments, ");
    assert!(line.contains(&counts) && line.contains(" segments/s, took 0:"), "{line}");
    // The bar does not change what is printed on stdout.
    let piped = mtgauge(&["score", "--ref", &r, "--hyp", &h]);
    assert_eq!(std::fs::read(&stdout).unwrap(), piped.stdout);
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn send_on_a_terminal_draws_a_bar_over_acknowledged_segments() {
    if tmux().is_none() {
        return;
    }
    let dir = temp_dir("send-tty");
    let (server, _) = server_with_v7(&dir).await;
    let (exit, write_exit) = exit_file(&dir);
    let p = |n: &str| dir.join(n).to_str().unwrap().to_owned();
    let command = format!(
        "'{}' send --server {} --session v8 --create --refset ferry --hyp '{}' --ids '{}' --batch 20{write_exit}; sleep 60",
        env!("CARGO_BIN_EXE_mtgauge"),
        server.grpc,
        p("hyp.model-v7.de.txt"),
        p("ids.txt")
    );
    let pane = Pane::start("send", &command);
    assert_eq!(wait_exit(&exit), "EXIT=0\n");
    let screen = pane.capture();
    let line = bar_line(&screen, "sending");
    assert!(filling(&line).chars().all(|c| c == '#') && line.contains("] 300/300 segments, "), "{line}");
    // The summary line follows on a line of its own.
    assert!(screen.lines().any(|l| l.starts_with("sent 300 segments in 15 batches to session v8")), "{screen}");
}
